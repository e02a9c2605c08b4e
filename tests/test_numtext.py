"""The vectorised CSV writer (sagfit.io_numtext, io_csv.table_csv) against Python's own
formatter.

Reference: Python Language Reference, "printf-style String Formatting", conversion 'g'
(precision 10; it follows C99 7.21.6.1 fprintf %g: exponent notation when the exponent is
below −4 or not below the precision, trailing zeros and a bare '.' removed, at least two
exponent digits). Python's implementation is correctly rounded (round-half-even on the
exact binary value), so equality with ``'%.10g' % x`` is equality with the exact decimal
rounding.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sagfit.io.readings_csv import table_csv
from sagfit.io.numtext import PAD, g10_matrix, join_rows, text_matrix


def _cells(mat):
    return [bytes(r[r != PAD]).decode("utf-8") for r in mat]


def _ref(values):
    return ["%.10g" % v if math.isfinite(v) else "" for v in values]


EDGE = [0.0, -0.0, 1.0, -1.0, 10.0, 1e10, 1e9, 9999999999.0, 99999999995.0, 1e-5, 1e-4,
        0.0001234, 123456789012.0, 9.9999999996, 9.99999999949, 9.99999999951, 1.5, 0.5,
        0.05, 2.5e-5, 5e-324, 2.2250738585072014e-308, 1.7976931348623157e308, 1e100, -1e-100,
        1e300, 1e-300, 1e281, 1e-281, 12.6, 0.1, 0.2, 0.3, 1 / 3, 2 / 3, 1e21, 1e22, 1e23,
        123456789.05, 1234567890.5, 0.00012345678905, 4.35, 2.675, 1e16, 9.5, 99.5,
        float("nan"), float("inf"), float("-inf")]


class TestG10:
    def test_edge_values(self):
        """Zeros, signs, powers of ten, carries (9.9999999996 → 10), exact ties,
        subnormals, the largest double, NaN and ±inf (empty cells)."""
        assert _cells(g10_matrix(np.array(EDGE))) == _ref(EDGE)

    @pytest.mark.parametrize("seed", [0, 1])
    def test_random_bit_patterns(self, seed):
        """Every finite double is a possible input: 200,000 random bit patterns."""
        raw = np.random.default_rng(seed).integers(0, 2 ** 64, 200_000, dtype=np.uint64)
        x = raw.view(np.float64)
        x = x[np.isfinite(x)]
        assert _cells(g10_matrix(x)) == _ref(x.tolist())

    def test_bench_like_values(self):
        """Values as a fit writes them: volts, milliohms, p-values, counts as floats, and
        numbers with few digits (trailing zeros removed)."""
        rng = np.random.default_rng(7)
        x = np.concatenate([rng.normal(12.6, 0.1, 50_000), rng.lognormal(-3, 1, 50_000),
                            rng.uniform(0, 1, 50_000), np.round(rng.uniform(-1e6, 1e6, 50_000), 3),
                            rng.integers(-10 ** 12, 10 ** 12, 50_000).astype(float)])
        assert _cells(g10_matrix(x)) == _ref(x.tolist())

    @settings(max_examples=300, deadline=None)
    @given(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=1, max_size=50))
    def test_property(self, values):
        assert _cells(g10_matrix(np.array(values, dtype=float))) == _ref(values)

    def test_width_bound(self):
        """No '%.10g' text is wider than the matrix (17 bytes)."""
        assert g10_matrix(np.array([-1.234567891e-308, -1.234567891e+300])).shape[1] <= 17


class TestTextAndRows:
    def test_text_matrix_utf8_and_nul(self):
        vals = ["", "a", "Zürich-ß", "x\x00y", "trail\x00", "µΩ", "plain"]
        assert _cells(text_matrix(vals)) == vals

    def test_join_rows(self):
        a = text_matrix(["a", "", "ccc"])
        b = g10_matrix(np.array([1.5, float("nan"), -2.0]))
        assert bytes(join_rows([a, b])) == b"a,1.5\n,\nccc,-2\n"


def _old_table_csv(columns):
    """The row-wise writer sagfit used before (one '%'-format per row): the reference for
    the whole table."""
    from sagfit.io.readings_csv import _csv_text_cell, _csv_text_column

    names = list(columns)
    parts, fmts = [], []
    for name in names:
        col = columns[name]
        if isinstance(col, np.ndarray) and col.dtype.kind in "fiub":
            if col.dtype.kind in "iub":
                parts.append(col.astype(np.int64).tolist())
                fmts.append("%d")
            else:
                parts.append(["%.10g" % x if math.isfinite(x) else "" for x in col.tolist()])
                fmts.append("%s")
        else:
            vals = ["" if v is None else str(v) for v in col]
            parts.append(_csv_text_column(vals))
            fmts.append("%s")
    header = ",".join(_csv_text_cell(n) for n in names)
    body = [",".join(fmts) % row for row in zip(*parts)]
    return header + "\n" + ("\n".join(body) + "\n" if body else "")


class TestTable:
    @pytest.mark.parametrize("n", [0, 1, 3, 5_000, 45_001])  # 45,001: the two-thread path
    def test_same_as_row_wise_writer(self, n):
        rng = np.random.default_rng(n)
        cols = {
            "dut": [f"D{i}" for i in range(n)], "method": ["york"] * n,
            "n": rng.integers(2, 10, n), "ok": rng.random(n) > 0.5,
            "vth": rng.normal(12.6, 0.1, n),
            "u": np.where(rng.random(n) < 0.1, np.nan, rng.standard_normal(n) * 1e-6),
            "k": np.full(n, 1.96), "inf": np.where(rng.random(n) < 0.5, np.inf, -0.0),
            "note": ["" if i % 3 else '=bad,"q"' for i in range(n)],
            "site": ["Zürich-ß" if i % 7 == 0 else "ok" for i in range(n)],
            "mixed": [None if i % 2 else 3 for i in range(n)],
            "lead": ["-x" if i == 5 else "a" for i in range(n)],
            "tab": ["\tx" if i == 7 else "a" for i in range(n)],
            "lines": ["two\nlines" if i == 2 else ("a,b" if i == 3 else "x\r") for i in range(n)],
        }
        assert table_csv(cols) == _old_table_csv(cols)
