"""The CSV reader's two ways to its rows give the same readings.

Plumbing, no outside source: when every line after the header is a row (the usual
instrument export) the reader hands the bytes to Arrow whole and numbers the rows in
order; otherwise it first takes out blank lines, comment lines and lines of bare
separators and numbers the rest (``readings_csv._body``). The first is only the cheaper
way to the second's answer, so every file here is read both ways and compared: values,
line numbers, DUT names, and the error (its line and column) where there is one. The
hash read beside the parse is checked against ``hashlib`` directly.
"""

from __future__ import annotations

import hashlib
import io

import numpy as np
import pytest

import sagfit
from sagfit.core.errors import ReadingsFileError
from sagfit.io import readings_csv

HEADER = "dut,load_ohm,voltage_V,time_s\n"
ROWS = ["A,open,12.0,0", "A,10,11.0,1", "A,4.7,10.2,2", "B,open,12.1,3", "B,10,11.1,4",
        "B,4.7,10.3,5"]

CASES = {
    "plain": HEADER + "\n".join(ROWS) + "\n",
    "no final line end": HEADER + "\n".join(ROWS),
    "blank line": HEADER + "\n".join(ROWS[:2] + [""] + ROWS[2:]) + "\n",
    "blank lines at the end": HEADER + "\n".join(ROWS) + "\n\n\n",
    "comment": HEADER + "\n".join(ROWS[:3] + ["# swapped the load here"] + ROWS[3:]) + "\n",
    "comment with the header's fields": HEADER + "\n".join(
        ROWS[:3] + ["#x,1,2,3"] + ROWS[3:]) + "\n",
    "bare separators": HEADER + "\n".join(ROWS[:1] + [",,,"] + ROWS[1:]) + "\n",
    "blank cells": HEADER + "\n".join(ROWS[:4] + [" , , ,"] + ROWS[4:]) + "\n",
    "tab-led blank": HEADER + "\n".join(ROWS[:4] + ["\t,\t,,"] + ROWS[4:]) + "\n",
    "first row a comment": HEADER + "# first\n" + "\n".join(ROWS) + "\n",
    "first row blank": HEADER + "\n" + "\n".join(ROWS) + "\n",
    "numbers first": "voltage_V,current_A\n12.0,0\n11.0,1\n\n10.0,2\n# c\n9.5,2.5\n",
    "numbers first, comment with fields": "voltage_V,current_A\n12.0,0\n#c,1\n11.0,1\n10,2\n",
    "numbers first, plain": "voltage_V,current_A\n12.0,0\n11.0,1\n10.0,2\n",
    "ignored first column": "note,load_ohm,voltage_V\nx,open,12\n\ny,10,11\nz,4.7,10.1\n",
    "padded ids": HEADER + "\n".join(r.replace("A,", " A ,") for r in ROWS) + "\n",
    "ids that look like comments": HEADER + "\n".join(
        r.replace("B,", "#B,") for r in ROWS) + "\n",
    # errors: the same message, line and column both ways
    "bad number after a blank": HEADER + "\n".join(ROWS[:2] + ["", "A,22,x,9"]) + "\n",
    "empty id": HEADER + "\n".join(ROWS[:2] + [",22,10.0,9"]) + "\n",
    "wrong field count": HEADER + "\n".join(ROWS[:2] + ["A,22,10.0"] + ROWS[2:]) + "\n",
    "bad load": HEADER + "\n".join(ROWS[:2] + ["", "A,4k7k,10.0,9"]) + "\n",
    "thousands separators": 'dut,load_ohm,voltage_mV\nA,open,"12,000.5"\nA,10,"11,000.1"\n'
                            'A,4.7,"10,200.0"\n',
    "quoted ids with separators": 'dut,load_ohm,voltage_V\n"A,1",open,12\n"A,1",10,11\n'
                                  '"A,1",4.7,10.1\n',
    "unbalanced quote": 'dut,load_ohm,voltage_V\nA,open,12\n"A,10,11\nA,4.7,10.1\n',
    "CRLF with a blank line": HEADER.replace("\n", "\r\n") + "\r\n".join(
        ROWS[:2] + [""] + ROWS[2:]) + "\r\n",
    "decimal commas": "dut;load_ohm;voltage_V\nA;open;12,0\nA;10;11,5\n\nA;4,7;10,2\n",
    "units row": "dut,load,voltage\n,ohm,V\nA,open,12\nA,10,11\nA,4.7,10.1\n",
    "a line over 1 MiB": HEADER + ROWS[0] + "\n" + "A,10," + "1" * (1 << 20) + ",1\n",
}


def _read(text: str, monkeypatch, whole: bool):
    with monkeypatch.context() as m:
        if not whole:  # the line-by-line way only
            m.setattr(readings_csv, "_first_read", lambda roles: False)
        try:
            return sagfit.read_readings(io.BytesIO(text.encode()))
        except ReadingsFileError as exc:
            return exc


@pytest.mark.parametrize("case", sorted(CASES))
def test_both_ways_agree(case, monkeypatch):
    fast = _read(CASES[case], monkeypatch, whole=True)
    slow = _read(CASES[case], monkeypatch, whole=False)
    if isinstance(slow, ReadingsFileError):
        assert isinstance(fast, ReadingsFileError), case
        assert (str(fast), fast.line, fast.column) == (str(slow), slow.line, slow.column)
        return
    assert not isinstance(fast, ReadingsFileError), f"{case}: {fast}"
    assert fast.duts == slow.duts
    for field in ("group", "line", "voltage", "current", "load", "time", "u_voltage",
                  "u_current", "cov_iv"):
        np.testing.assert_array_equal(getattr(fast, field), getattr(slow, field), field)
    assert fast.meta["sha256"] == slow.meta["sha256"] == hashlib.sha256(
        CASES[case].encode()).hexdigest()


def test_line_numbers_skip_what_is_taken_out(monkeypatch):
    r = _read(CASES["comment"], monkeypatch, whole=True)
    assert r.line.tolist() == [2, 3, 4, 6, 7, 8]
    r = _read(CASES["plain"], monkeypatch, whole=True)
    assert r.line.tolist() == [2, 3, 4, 5, 6, 7]


def test_a_larger_file_both_ways(monkeypatch):
    """A file of 3,000 readings with taken-out lines strewn through it, and the same
    file without them: the same readings, and the line numbers shifted as they should."""
    rng = np.random.default_rng(7)
    rows = [f"U{k // 6:04d},{['open', '100', '47', '22', '10', '4.7'][k % 6]},"
            f"{12 - 0.01 * (k % 6) + rng.normal(0, 1e-3):.5f},{k}" for k in range(3000)]
    plain = HEADER + "\n".join(rows) + "\n"
    extra = ["", "# note", ",,,", " , , , "]
    strewn, where = [], []
    for k, row in enumerate(rows):
        if rng.random() < 0.02:
            strewn.append(extra[int(rng.integers(len(extra)))])
        strewn.append(row)
        where.append(len(strewn) + 1)  # the header is line 1
    a = _read(plain, monkeypatch, whole=True)
    b = _read(HEADER + "\n".join(strewn) + "\n", monkeypatch, whole=True)
    c = _read(HEADER + "\n".join(strewn) + "\n", monkeypatch, whole=False)
    np.testing.assert_array_equal(a.voltage, b.voltage)
    np.testing.assert_array_equal(b.line, c.line)
    assert b.line.tolist() == where
    assert a.line.tolist() == list(range(2, 3002))


@pytest.mark.parametrize("size", [0, 10, (1 << 20) - 1, 1 << 20, 3 << 20])
def test_sha256_beside_is_sha256(size):
    data = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    assert readings_csv.sha256_beside(data)() == hashlib.sha256(data).hexdigest()


def test_in_order_on_run_heads_is_the_whole_check():
    """``readings_table._in_order`` looks at the first code of each run; the plain check
    over every code gives the same answer (3,000 seeded random code sequences)."""
    from sagfit.io.readings_table import _in_order

    def plain(codes, m):
        valid = codes[codes >= 0]
        if valid.size == 0 or valid[0] != 0:
            return valid.size == 0 and m == 0
        top = np.maximum.accumulate(valid)
        return int(top[-1]) == m - 1 and bool((np.diff(top) <= 1).all())

    rng = np.random.default_rng(1)
    for k in range(3000):
        m, n = int(rng.integers(1, 6)), int(rng.integers(0, 12))
        codes = rng.integers(-1, m, n)
        if k % 3 == 0:
            codes = np.sort(codes)
        assert _in_order(codes, m) == plain(codes, m), (codes, m)


def test_no_long_line_never_misses_one(monkeypatch):
    """``_no_long_line`` (windows of MAX_LINE/2 bytes, each must hold a line end) says
    True only where the plain measure finds no line longer than MAX_LINE; checked with
    MAX_LINE = 16 on 2,000 seeded random byte strings of short and long lines."""
    monkeypatch.setattr(readings_csv, "MAX_LINE", 16)
    rng = np.random.default_rng(3)
    for _ in range(2000):
        lines = [b"x" * int(rng.choice([0, 3, 9, 15, 16, 17, 30])) for _ in range(
            int(rng.integers(1, 8)))]
        data = b"\n".join(lines) + (b"\n" if rng.random() < 0.5 else b"")
        pos = int(rng.integers(0, 3))
        longest = max(len(x) for x in data[pos:].split(b"\n"))
        if readings_csv._no_long_line(data, pos):
            assert longest <= 16, (data, pos)


def test_only_rows_on_its_own():
    """``_only_rows`` finds comment, blank and empty first cells by itself (the caller
    also sends every file with a ``#`` after the header to the line scan)."""
    import pyarrow as pa

    label = pa.dictionary(pa.int32(), pa.string())
    for first, plain in ((["A", "B"], True), (["A", "#B"], False), (["A", "  "], False),
                         (["A", None], False)):
        table = pa.table({"f0": pa.array(first, pa.string()).cast(label),
                          "f1": pa.array([1.0, 2.0])})
        assert readings_csv._only_rows(table) is plain, first
    numbers = pa.table({"f0": pa.array([1.0, 2.0]), "f1": pa.array([1.0, 2.0])})
    assert readings_csv._only_rows(numbers) is True
