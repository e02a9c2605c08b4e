"""The results CSV writer (sagfit.io.readings_csv.table_csv): full precision, empty
cells for NaN/inf, numbers unquoted, text neutralised and quoted.

References: RFC 4180 (CSV quoting, inner quotes doubled); IEEE 754 binary64 round trip
(a decimal string read back with Python's ``float`` gives the same double: Python
Language Reference, floating-point literals); OWASP "CSV Injection" for the leading
= + - @ (common practice).
"""

import csv
import io

import numpy as np
import pytest

from sagfit.io.readings_csv import table_csv


def _rows(text):
    return list(csv.reader(io.StringIO(text)))


def test_floats_round_trip_exactly():
    """Regression: the writer kept 10 significant digits (0.1234567890123456 came back as
    0.123456789). Every double, random bit patterns included, reads back bit for bit."""
    rng = np.random.default_rng(7)
    bits = rng.integers(0, 2 ** 63, 20_000, dtype=np.int64)
    x = bits.view(np.float64)
    x = np.concatenate([x[np.isfinite(x)], [0.1234567890123456, 5e-324, 1.7976931348623157e308,
                                            -0.0, 1e22, 1 / 3]])
    rows = _rows(table_csv({"x": x}))
    assert rows[0] == ["x"]
    back = np.array([float(r[0]) for r in rows[1:]])
    assert np.array_equal(back.view(np.int64), x.view(np.int64))


def test_non_finite_are_empty_and_integers_stay_integers():
    text = table_csv({"v": np.array([1.5, np.nan, np.inf, -np.inf]), "n": np.arange(4)})
    assert text.splitlines()[1:] == ["1.5,0", ",1", ",2", ",3"]


def test_text_is_neutralised_and_quoted():
    text = table_csv({"dut": ["=cmd()", 'a,"b"', "two\nlines", "Zürich"],
                      "v": np.array([1.0, 2.0, 3.0, 4.0])})
    rows = _rows(text)
    assert [r[0] for r in rows[1:]] == ["'=cmd()", 'a,"b"', "two\nlines", "Zürich"]
    assert [r[1] for r in rows[1:]] == ["1", "2", "3", "4"]
    assert text.splitlines()[1].startswith('"')     # text quoted, numbers not


@pytest.mark.parametrize("n", [1, 50_000])
def test_reads_back_with_pandas(n):
    pd = pytest.importorskip("pandas")
    rng = np.random.default_rng(n)
    cols = {"dut": [f"D{i}" for i in range(n)], "vth": rng.normal(12.6, 0.1, n),
            "u": rng.standard_normal(n) * 1e-6}
    df = pd.read_csv(io.StringIO(table_csv(cols)))
    assert list(df.columns) == ["dut", "vth", "u"] and len(df) == n
    np.testing.assert_allclose(df["vth"].to_numpy(), cols["vth"], rtol=1e-15)


def test_empty_table_is_the_header_alone():
    assert table_csv({"dut": [], "vth": np.array([])}) == "dut,vth\n"
