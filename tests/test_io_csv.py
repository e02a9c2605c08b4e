"""The readings importer: what real files look like, and every bad input.

Plumbing of file formats; the numerical checks cite their sources where they appear.
"""

import io
import json
import math

import numpy as np
import pytest

from sagfit.core.errors import ReadingsFileError
from sagfit.io.readings_csv import classify_header, read_readings
from sagfit.core.units import Accuracy

from conftest import SAMPLES, digest


def write(tmp_path, text, name="r.csv", encoding="utf-8"):
    p = tmp_path / name
    p.write_bytes(text.encode(encoding) if isinstance(text, str) else text)
    return p


class TestHeaders:
    @pytest.mark.parametrize("header,role,scale", [
        ("voltage_V", "voltage", 1.0), ("voltage_mV", "voltage", 1e-3), ("Voltage [mV]", "voltage", 1e-3),
        ("V", "voltage", 1.0), ("U [V]", "voltage", 1.0), ("load_ohm", "load", 1.0),
        ("load_kohm", "load", 1e3), ("Load (kΩ)", "load", 1e3), ("r_load", "load", 1.0),
        ("current_mA", "current", 1e-3), ("I [A]", "current", 1.0), ("Current (mA)", "current", 1e-3),
        ("u_voltage_V", "u_voltage", 1.0), ("u_current_mA", "u_current", 1e-3),
        ("u_load_ohm", "u_load", 1.0), ("load_tolerance_pct", "load_tolerance", 1.0),
        ("DUT", "dut", 1.0), ("Serial", "serial" and "dut", 1.0), ("id", "dut", 1.0),
        ("time", "time", 1.0), ("Time [s]", "time", 1.0), ("time_min", "time", 60.0),
        ("VOLTAGE_V", "voltage", 1.0),
    ])
    def test_recognised(self, header, role, scale):
        """Names are case-insensitive; units come from a suffix or brackets."""
        got = classify_header(header)
        assert got[0] == role and got[1] == pytest.approx(scale)

    @pytest.mark.parametrize("header", ["comment", "operator", "temperature_note", "ch2"])
    def test_unrelated(self, header):
        """Columns that are not readings are ignored (None)."""
        assert classify_header(header) is None

    @pytest.mark.parametrize("header", ["voltage_furlong", "Voltage [parsec]", "current_mV",
                                        "load [A]"])
    def test_unknown_or_wrong_unit(self, header):
        """A recognised quantity with an unknown or wrong unit is an error."""
        with pytest.raises(ValueError):
            classify_header(header)


class TestRealFiles:
    def test_r_and_v(self, tmp_path):
        """(R, V): current is V/R; open circuit gives zero current."""
        p = write(tmp_path, "load_ohm,voltage_V\nopen,12.7\n10,12.6\n4k7,12.69\n")
        r = read_readings(p)
        assert r.current_from == "load"
        assert r.current.tolist() == pytest.approx([0.0, 1.26, 12.69 / 4700])
        assert r.duts == ("r",)

    def test_i_and_v_with_units(self, tmp_path):
        """(I, V) with mA and mV columns are converted to SI."""
        p = write(tmp_path, "Current [mA],Voltage [mV]\n0,5020\n500,5001\n1000,4982\n")
        r = read_readings(p)
        assert r.current.tolist() == pytest.approx([0, 0.5, 1.0])
        assert r.voltage.tolist() == pytest.approx([5.02, 5.001, 4.982])

    def test_r_and_i(self, tmp_path):
        """(R, I): the voltage is I·R."""
        p = write(tmp_path, "load_ohm,current_A\n10,1.2\n4.7,2.5\n2.2,5\n")
        r = read_readings(p)
        assert r.voltage.tolist() == pytest.approx([12.0, 11.75, 11.0])
        assert r.voltage_from == "load"

    def test_bom_crlf_comments_semicolon_decimal_comma(self, tmp_path):
        """A spreadsheet export: BOM, CRLF, comments, ';' and decimal commas, blank tail."""
        text = ("# date: 2026-11-03\r\n# temperature_C: 21,5\r\n\r\nDUT;Load [Ω];Voltage [V]\r\n"
                "A;open;12,70\r\nA;10;12,60\r\nA;4,7;12,49\r\n\r\n\r\n")
        p = write(tmp_path, "\ufeff" + text)
        r = read_readings(p)
        assert r.duts == ("A",)
        assert r.voltage.tolist() == pytest.approx([12.7, 12.6, 12.49])
        assert r.load[2] == pytest.approx(4.7)
        assert r.meta["date"] == "2026-11-03"
        assert r.line.tolist() == [5, 6, 7]

    def test_tab_and_extra_columns(self, tmp_path):
        """Tabs are sniffed; unrelated columns are listed and ignored."""
        p = write(tmp_path, "serial\tload\tv\toperator\n7\t10\t5.0\tK\n7\t5\t4.9\tK\n7\topen\t5.1\tK\n")
        r = read_readings(p)
        assert r.meta["ignored_columns"] == ["operator"]
        assert r.duts == ("7",)

    def test_windows_1252(self, tmp_path):
        """A file saved as Windows-1252 (µ in the header) still reads."""
        p = write(tmp_path, "Load [ohm],Voltage [µV]\nopen,1.0\n1000,0.9\n500,0.8\n", encoding="cp1252")
        assert len(read_readings(p)) == 3

    def test_utf16(self, tmp_path):
        """UTF-16 with a BOM (some instrument software writes it) reads."""
        p = write(tmp_path, "load,voltage\nopen,1.0\n1000,0.9\n500,0.8\n", encoding="utf-16")
        assert len(read_readings(p)) == 3

    def test_interior_blank_and_comment_lines_keep_line_numbers(self, tmp_path):
        """Blank and # lines inside the table are skipped, and errors still name the right line."""
        p = write(tmp_path, "load,voltage\nopen,1.0\n\n# swapped resistor\n1000,abc\n")
        with pytest.raises(ReadingsFileError) as e:
            read_readings(p)
        assert e.value.line == 5 and e.value.column == "voltage"

    def test_iso_time(self, tmp_path):
        """An ISO 8601 time column becomes seconds."""
        p = write(tmp_path, "time,load,voltage\n2026-11-03T10:00:00,open,1.0\n"
                            "2026-11-03T10:00:30,1000,0.9\n2026-11-03T10:01:00,500,0.8\n")
        r = read_readings(p)
        assert np.diff(r.time).tolist() == [30.0, 30.0]

    def test_quoted_fields(self, tmp_path):
        """Quoted cells with separators inside are read by the CSV rules."""
        p = write(tmp_path, 'dut,load,voltage,note\n"A,1",open,1.0,"x, y"\n"A,1",100,0.9,z\n'
                            '"A,1",50,0.8,z\n')
        assert read_readings(p).duts == ("A,1",)

    def test_all_three_columns_cross_check(self, tmp_path):
        """With R, V and I, V/I disagreeing with R beyond tolerance becomes a flag."""
        import sagfit

        p = write(tmp_path, "load,voltage,current\n10,12.0,1.2\n5,11.9,2.38\n2.2,11.7,3.0\n")
        r = read_readings(p, load_tolerance=1.0, voltage_accuracy=Accuracy(0.05, 0.001),
                          current_accuracy=Accuracy(0.2, 0.001))
        assert r.current_from == "measured"
        f = sagfit.fit(r)[0]
        codes = [fl.code for fl in f.flags]
        assert "load-mismatch" in codes
        assert "line(s) 4" in next(fl.message for fl in f.flags if fl.code == "load-mismatch")

    @pytest.mark.reference("GUM JCGM 100:2008 5.2.2 (correlated inputs); derivation in "
                           "docs/method.md: u(V, I) = u²(V)/R for I = V/R")
    def test_propagated_covariance(self, tmp_path):
        """I = V/R carries u²(I) = u²(V)/R² + V²u²(R)/R⁴ and u(V, I) = u²(V)/R."""
        p = write(tmp_path, "load,voltage\n10,12.0\n5,11.9\nopen,12.1\n")
        acc = Accuracy(0.0, 0.003)
        r = read_readings(p, voltage_accuracy=acc, load_tolerance=1.0)
        uv = 0.003 / math.sqrt(3)
        ur = 0.01 * 10 / math.sqrt(3)
        assert r.u_voltage[0] == pytest.approx(uv)
        assert r.u_current[0] == pytest.approx(math.sqrt((uv / 10) ** 2 + (12 * ur / 100) ** 2))
        assert r.cov_iv[0] == pytest.approx(uv ** 2 / 10)
        assert r.u_current[2] == 0 and r.cov_iv[2] == 0

    def test_per_reading_columns_override_options(self, tmp_path):
        """u_voltage_mV where given wins over --voltage-accuracy; blanks fall back to it."""
        p = write(tmp_path, "load,voltage,u_voltage_mV\nopen,12.0,5\n10,11.9,\n5,11.8,1\n")
        r = read_readings(p, voltage_accuracy=Accuracy(0.0, math.sqrt(3) * 0.002))
        assert r.u_voltage.tolist() == pytest.approx([0.005, 0.002, 0.001])


BAD = [
    ("empty.csv", b"", "empty", None),
    ("header_only.csv", b"load,voltage\n", "no readings", None),
    ("no_voltage.csv", b"load,temperature\n10,20\n", "need two of", 1),
    ("nonnumeric.csv", b"load,voltage\nopen,1.0\n10,abc\n5,0.8\n", "not a number", 3),
    ("decimal_comma.csv", b"load,voltage\nopen,1.0\n10,0,9\n", "decimal comma", 3),
    ("negative_load.csv", b"load,voltage\nopen,1.0\n-10,0.9\n5,0.8\n", "negative", 3),
    ("zero_load.csv", b"load,voltage\nopen,1.0\n0,0.9\n5,0.8\n", "zero load", 3),
    ("nan.csv", b"load,voltage\nopen,1.0\n10,nan\n5,0.8\n", "not a number", 3),
    ("inf.csv", b"load,voltage\nopen,1.0\n10,inf\n5,0.8\n", "infinite", 3),
    ("one_load.csv", b"load,voltage\n10,1.0\n10,1.0001\n10,0.9999\n", "one load", None),
    ("noise_currents.csv", b"current,voltage\n1.0,5.0\n1.0001,4.99\n0.99995,5.01\n",
     "distinct currents", None),
    ("unknown_unit.csv", b"load_ohm,voltage_furlong\nopen,1\n10,0.9\n", "unknown unit", 1),
    ("ragged.csv", b"load,voltage\nopen,1.0\n10,0.9,7\n5,0.8\n", "fields", 3),
    ("short_row.csv", b"load,voltage,current\nopen,1.0,0\n10,0.9\n5,0.8,0.16\n", "fields", 3),
    ("binary.csv", bytes(range(256)) * 20, "binary", None),
    ("bad_load.csv", b"load,voltage\nopen,1.0\nfoo,0.9\n5,0.8\n", "resistance", 3),
    ("empty_cell.csv", b"load,voltage\nopen,1.0\n10,\n5,0.8\n", "not a number", 3),
    ("one_column.csv", b"voltage\n1\n2\n", "separator", 1),
    ("two_readings_typea.csv", b"load,voltage\nopen,1.0\n10,0.9\n", "third load", None),
    ("duplicate_role.csv", b"voltage,v,load\n1,1,open\n", "both look like", 1),
]


class TestBadInput:
    @pytest.mark.parametrize("name,data,words,line", BAD, ids=[b[0] for b in BAD])
    def test_one_error_line_exit_2_file_unchanged(self, tmp_path, cli, name, data, words, line):
        """Each bad input: exit 2, one 'error:' line naming the file (and line), no traceback,
        the file untouched."""
        p = write(tmp_path, data, name)
        before = digest(p)
        run = cli("fit", p)
        assert run.code == 2, run
        lines = run.err.strip().splitlines()
        assert len(lines) == 1, run.err
        assert lines[0].startswith("error: ") and str(p) in lines[0]
        assert words in lines[0]
        if line is not None:
            assert f"line {line}" in lines[0]
        assert "Traceback" not in run.err + run.out
        assert digest(p) == before

    def test_missing_file(self, tmp_path, cli):
        """A missing file: exit 2 and 'no such file'."""
        run = cli("fit", tmp_path / "nope.csv")
        assert run.code == 2 and "no such file" in run.err and run.err.startswith("error:")

    def test_folder(self, tmp_path, cli):
        """A folder given as the readings file."""
        run = cli("fit", tmp_path)
        assert run.code == 2 and "folder" in run.err

    def test_multi_dut_partial(self, tmp_path, cli):
        """A multi-DUT file with one hopeless DUT: the others are fitted, exit 3, error in JSON."""
        p = write(tmp_path, "dut,load,voltage\nA,open,1.0\nA,100,0.9\nA,50,0.8\nB,10,0.5\n")
        run = cli("fit", p, "--json")
        assert run.code == 3
        doc = json.loads(run.out)
        by = {r["dut"]: r for r in doc["results"]}
        assert by["A"]["vth"]["value"] is not None
        assert "error" in by["B"] and by["B"]["vth"]["value"] is None


def test_sample_runs_read():
    """Every bundled readings sample reads without error."""
    for p in sorted(SAMPLES.glob("*.csv")):
        assert len(read_readings(p)) > 0


class TestLineScan:
    """The line scan works on byte slices; a line split across slices must count as one
    (plumbing test: the reference is the same file scanned in one piece)."""

    TEXT = ("# bench sweep (invented)\ndut,load_ohm,voltage_V\n"
            + "".join(f"U{k // 4},{10 + k % 4},{12.0 - 0.01 * (k % 4):.3f}\n" for k in range(40)))

    @pytest.mark.parametrize("slice_bytes", [1, 7, 64, 1 << 20])
    def test_same_readings_for_any_slice_size(self, tmp_path, monkeypatch, slice_bytes):
        import sagfit.io.readings_csv as io_csv

        p = write(tmp_path, self.TEXT)
        whole = read_readings(p)
        monkeypatch.setattr(io_csv, "_SCAN_BYTES", slice_bytes)
        part = read_readings(p)
        assert part.duts == whole.duts
        np.testing.assert_array_equal(part.voltage, whole.voltage)
        np.testing.assert_array_equal(part.line, whole.line)

    @pytest.mark.parametrize("slice_bytes", [1, 5, 13, 1 << 20])
    def test_wrong_field_count_found_on_its_line(self, tmp_path, monkeypatch, slice_bytes):
        import sagfit.io.readings_csv as io_csv

        lines = self.TEXT.splitlines()
        lines[17] += ",extra"  # file line 18
        p = write(tmp_path, "\n".join(lines) + "\n")
        monkeypatch.setattr(io_csv, "_SCAN_BYTES", slice_bytes)
        with pytest.raises(ReadingsFileError) as exc:
            read_readings(p)
        assert exc.value.line == 18 and "4 fields where the header has 3" in str(exc.value)


@pytest.mark.parametrize("first,second", [(" A", "A"), ("A ", "A"), ("A\t", " A"),
                                          ("A\u00a0", "A")])
def test_dut_ids_with_outer_blanks_are_one_dut(tmp_path, first, second):
    """' A' and 'A' name one DUT (spreadsheet exports pad cells; common practice)."""
    text = ("dut,load_ohm,voltage_V\n"
            f"{first},open,12.0\n{first},10,11.9\n{second},4.7,11.8\nB,open,5.0\nB,10,4.9\n")
    r = read_readings(write(tmp_path, text))
    assert r.duts == ("A", "B") and r.counts().tolist() == [3, 2]

@pytest.mark.parametrize("ids", [("01", "1"), ("1", "1.0"), ("True", "true"), ("007", "7")])
def test_dut_ids_that_look_like_numbers_keep_their_text(tmp_path, ids):
    """Serial numbers such as 001 and 1 are two DUTs (a DUT id is text; common practice).
    pandas turns all-numeric categories into numbers, which would merge them."""
    a, b = ids
    text = ("dut,load_ohm,voltage_V,bin\n"
            f"{a},open,12.0,{a}\n{a},10,11.9,{a}\n{b},open,5.0,{b}\n{b},10,4.9,{b}\n")
    r = read_readings(write(tmp_path, text))
    assert r.duts == (a, b) and r.counts().tolist() == [2, 2]
    assert r.voltage.tolist() == [12.0, 11.9, 5.0, 4.9]


def test_group_labels_that_look_like_numbers_keep_their_text(tmp_path):
    text = "dut,load_ohm,voltage_V,lot\nA,open,12.0,01\nA,10,11.9,01\nB,open,5.0,1\nB,10,4.9,1\n"
    r = read_readings(write(tmp_path, text))
    assert r.meta["group_labels"].tolist() == ["01", "01", "1", "1"]



class TestPlainTableFastPath:
    """The window-by-window check for plain tables agrees with the full line scan
    (plumbing test: the full scan is the reference)."""

    BODY = "".join(f"U{k // 3},{10 + k % 3},{12.0 - 0.01 * (k % 3):.3f}\n" for k in range(30))
    HEAD, REST = BODY[:BODY.index("U2,")], BODY[BODY.index("U2,"):]  # split at a line end
    CASES = {
        "plain": "dut,load_ohm,voltage_V\n" + BODY,
        "no final line end": "dut,load_ohm,voltage_V\n" + BODY.rstrip("\n"),
        "trailing blank lines": "dut,load_ohm,voltage_V\n" + BODY + "\n\n",
        "comment inside": "dut,load_ohm,voltage_V\n" + HEAD + "# pause\n" + REST,
        "blank inside": "dut,load_ohm,voltage_V\n" + HEAD + "\n" + REST,
        "indented blank": "dut,load_ohm,voltage_V\n" + HEAD + "  \t\n" + REST,
        "comment at the end": "dut,load_ohm,voltage_V\n" + BODY + "# end of sweep\n",
    }

    @pytest.mark.parametrize("case", sorted(CASES))
    @pytest.mark.parametrize("slice_bytes", [16, 64, 1 << 20])
    def test_same_as_full_scan(self, tmp_path, monkeypatch, case, slice_bytes):
        import sagfit.io.readings_csv as io_csv

        p = write(tmp_path, self.CASES[case])
        monkeypatch.setattr(io_csv, "_SCAN_BYTES", slice_bytes)
        fast = read_readings(p)
        monkeypatch.setattr(io_csv, "_clean_rows", lambda *a: None)
        full = read_readings(p)
        assert fast.duts == full.duts
        np.testing.assert_array_equal(fast.line, full.line)
        np.testing.assert_array_equal(fast.voltage, full.voltage)

    def test_only_plain_tables_take_it(self):
        import sagfit.io.readings_csv as io_csv

        def count(text, ncols=3):
            arr = np.frombuffer(text.encode(), dtype=np.uint8)
            return io_csv._clean_rows(arr, ord(","), ncols, True)

        assert count(self.BODY) == 30
        assert count(self.BODY.rstrip("\n")) == 30
        assert count(self.BODY + "\n") is None  # a blank line
        assert count("# note\n" + self.BODY) is None
        assert count(self.BODY.replace("U1,", "U1,,", 1)) is None  # a field too many
        assert count(self.BODY, ncols=4) is None
        assert count(self.BODY.replace("U1,", "U1", 1)) is None  # a field too few
        assert count("a\nb\nc\n", ncols=1) == 3 and count("a\n\nc\n", ncols=1) is None

    @pytest.mark.parametrize("slice_bytes", [16, 64, 1 << 20])
    @pytest.mark.parametrize("field", [0, 1, 2])
    def test_field_spans(self, monkeypatch, slice_bytes, field):
        """The byte spans of a field on every line, as a plain split of each line gives."""
        import sagfit.io.readings_csv as io_csv

        monkeypatch.setattr(io_csv, "_SCAN_BYTES", slice_bytes)
        for text in (self.BODY, self.BODY.rstrip("\n")):
            arr = np.frombuffer(text.encode(), dtype=np.uint8)
            spans = []
            assert io_csv._clean_rows(arr, ord(","), 3, True, field, spans) == 30
            got = [text[a:b] for a, b in zip(np.concatenate([x for x, _ in spans]),
                                             np.concatenate([y for _, y in spans]))]
            assert got == [line.split(",")[field] for line in text.splitlines()]


class TestIdsFromBytes:
    """On plain tables the DUT ids are read from their byte spans instead of by pandas;
    the readings must be exactly what the pandas path gives (plumbing test: the pandas
    path is the reference), and ids it leaves to pandas must still come out right."""

    ROWS = [("U1", "open", "12.00"), ("U1", "10", "11.95"), ("U2", "open", "5.00"),
            ("U2", "10", "4.95"), ("U1", "4.7", "11.90"), ("U3", "open", "9.0"),
            ("U3", "10", "8.9")]

    @staticmethod
    def table(rows, order=(0, 1, 2), sep=","):
        head = ["dut", "load_ohm", "voltage_V"]
        lines = [sep.join(head[k] for k in order)]
        lines += [sep.join(r[k] for k in order) for r in rows]
        return "\n".join(lines) + "\n"

    def both(self, monkeypatch, path):
        import sagfit.io.readings_csv as io_csv

        seen = []
        real = io_csv._ids_from_spans
        monkeypatch.setattr(io_csv, "_ids_from_spans",
                            lambda *a: (lambda r: seen.append(r is not None) or r)(real(*a)))
        fast = read_readings(path)
        monkeypatch.setattr(io_csv, "_ids_from_spans", lambda *a: None)
        slow = read_readings(path)
        assert fast.duts == slow.duts
        for name in ("group", "line", "voltage", "current", "load"):
            np.testing.assert_array_equal(getattr(fast, name), getattr(slow, name))
        return fast, seen

    @pytest.mark.parametrize("order", [(0, 1, 2), (1, 0, 2), (1, 2, 0)])
    @pytest.mark.parametrize("ids", [("U1", "U2", "U3"), ("01", "1", "001"),
                                     (" A", "A", "A "), ("x" * 64, "y", "x" * 63),
                                     ("True", "true", "TRUE"), ("1e3", "1000", "inf")])
    def test_same_as_pandas(self, tmp_path, monkeypatch, order, ids):
        names = dict(zip(("U1", "U2", "U3"), ids))
        rows = [(names[d], ld, v) for d, ld, v in self.ROWS]  # U1 comes back after U2
        text = self.table(rows, order)
        fast, seen = self.both(monkeypatch, write(tmp_path, text))
        # read from the bytes, not by pandas (a line starting with a blank is not a plain
        # table: the full line scan and pandas read it)
        assert seen == ([] if "\n " in text else [True])

    @pytest.mark.parametrize("ids,why", [(("NA", "U2", "U3"), "missing-value spelling"),
                                         (("Ü1", "U2", "U3"), "non-ASCII"),
                                         (("x" * 65, "U2", "U3"), "longer than 64 bytes")])
    def test_left_to_pandas(self, tmp_path, monkeypatch, ids, why):
        names = dict(zip(("U1", "U2", "U3"), ids))
        rows = [(names[d], ld, v) for d, ld, v in self.ROWS]
        path = write(tmp_path, self.table(rows))
        import sagfit.io.readings_csv as io_csv

        real = io_csv._ids_from_spans
        seen = []
        monkeypatch.setattr(io_csv, "_ids_from_spans",
                            lambda *a: (lambda r: seen.append(r) or r)(real(*a)))
        if ids[0] == "NA":
            with pytest.raises(ReadingsFileError, match="empty DUT id") as exc:
                read_readings(path)
            assert exc.value.line == 2
        else:
            assert read_readings(path).duts[0] == ids[0], why
        assert seen == [None], why

    def test_empty_id_is_an_error_on_its_line(self, tmp_path):
        rows = list(self.ROWS)
        rows[3] = ("", "10", "4.95")
        with pytest.raises(ReadingsFileError, match="empty DUT id") as exc:
            read_readings(write(tmp_path, self.table(rows)))
        assert exc.value.line == 5

    def test_many_rows_across_comparison_blocks(self, tmp_path, monkeypatch):
        import sagfit.io.readings_csv as io_csv

        monkeypatch.setattr(io_csv, "_ID_ROWS", 7)  # runs of equal ids cut by the blocks
        rng = np.random.default_rng(3)
        ids = [f"P{k % 17:02d}" for k in rng.integers(0, 40, 30) for _ in range(3)]
        rows = [(d, ("open", "10", "4.7")[j % 3], f"{12 - 0.05 * (j % 3):.2f}")
                for j, d in enumerate(ids)]
        fast, seen = self.both(monkeypatch, write(tmp_path, self.table(rows)))
        assert seen == [True] and len(fast.duts) == len(set(ids))


class TestIdWords:
    """_ids_from_spans reads each id as 64-bit words; the cases sit on the word boundaries
    (plumbing tests against the ids written)."""

    @staticmethod
    def spans(ids, tail=b""):
        import sagfit.io.readings_csv as io_csv

        body = b"".join(i + b",1\n" for i in ids) + tail
        arr = np.frombuffer(body, dtype=np.uint8)
        starts, pos = [], 0
        for i in ids:
            starts.append(pos)
            pos += len(i) + 3
        fs = np.array(starts, dtype=np.intp)
        fe = fs + np.array([len(i) for i in ids], dtype=np.intp)
        return io_csv._ids_from_spans(arr, fs, fe)

    @pytest.mark.parametrize("width", [1, 7, 8, 9, 15, 16, 17, 63, 64])
    def test_ids_that_differ_in_their_last_byte_or_length(self, width):
        base = b"Q" * (width - 1)
        ids = [base + b"a", base + b"a", base + b"b", base, base + b"a", base + b"b"]
        if width == 1:
            ids = [b"a", b"a", b"b", b"c", b"a", b"b"]
        codes, texts = self.spans(ids)
        want = list(dict.fromkeys(i.decode() for i in ids))
        assert texts == want
        assert [texts[c] for c in codes] == [i.decode() for i in ids]

    def test_the_last_id_at_the_very_end_of_the_data(self):
        import sagfit.io.readings_csv as io_csv

        body = b"1,AB\n2,ABCDEFGHIJ"  # the id column last, no final line end
        arr = np.frombuffer(body, dtype=np.uint8)
        codes, texts = io_csv._ids_from_spans(arr, np.array([2, 7]), np.array([4, 17]))
        assert texts == ["AB", "ABCDEFGHIJ"] and codes.tolist() == [0, 1]

    @pytest.mark.parametrize("bad", [b"A\x00B", b"\x00", b"AB\xc3\x9c", b"NA", b"null"])
    def test_left_to_pandas(self, bad):
        assert self.spans([b"U1", bad, b"U2"]) is None

    def test_many_rows_across_blocks_and_repeats(self, monkeypatch):
        import sagfit.io.readings_csv as io_csv

        monkeypatch.setattr(io_csv, "_ID_ROWS", 5)
        rng = np.random.default_rng(7)
        ids = [f"DUT-{k:03d}-X".encode() for k in rng.integers(0, 30, 200)]
        codes, texts = self.spans(ids)
        assert [texts[c] for c in codes] == [i.decode() for i in ids]
        assert texts == list(dict.fromkeys(i.decode() for i in ids))


@pytest.mark.parametrize("ids", [("U1", "U2", "U3"), ("NA", "U2", "U3"), ("Ü1", "U2", "U3")])
def test_ids_and_digest_in_a_worker_thread_read_the_same(tmp_path, monkeypatch, ids):
    """A large file reads its DUT ids and its SHA-256 beside the parse, in a worker thread
    (BACKGROUND_BYTES lowered here so that a small file takes that path); the readings and
    errors are the same as in one thread."""
    import sagfit.io.readings_csv as io_csv

    names = dict(zip(("U1", "U2", "U3"), ids))
    rows = [(names[d], ld, v) for d, ld, v in TestIdsFromBytes.ROWS]
    path = write(tmp_path, TestIdsFromBytes.table(rows))

    def read():
        try:
            return read_readings(path)
        except ReadingsFileError as exc:
            return str(exc)

    one = read()
    monkeypatch.setattr(io_csv, "BACKGROUND_BYTES", 1)
    two = read()
    if isinstance(one, str):
        assert one == two and "empty DUT id" in one
        return
    assert one.duts == two.duts and one.meta["sha256"] == two.meta["sha256"]
    for name in ("group", "line", "voltage", "current", "load"):
        np.testing.assert_array_equal(getattr(one, name), getattr(two, name))


class TestUnitsRow:
    """A row of units under the header, as data loggers write it (invented readings)."""

    def test_units_row_gives_the_units(self, tmp_path):
        p = write(tmp_path, "Time,Load,Current,Voltage\ns,kohm,mA,mV\n0,open,0,12700\n"
                            "1,1,12.6,12600\n2,0.1,120,12000\n")
        r = read_readings(p)
        assert np.allclose(r.voltage, [12.7, 12.6, 12.0])
        assert np.allclose(r.current, [0.0, 0.0126, 0.120])

    def test_units_row_in_brackets_and_line_numbers(self, tmp_path):
        """Errors after a units row still name the line of the file."""
        p = write(tmp_path, "Current,Voltage\n[A],[V]\n0.1,12.6\n0.2,oops\n")
        with pytest.raises(ReadingsFileError) as e:
            read_readings(p)
        assert "line 4" in str(e.value) and "Voltage" in str(e.value)

    def test_first_data_row_is_not_a_units_row(self, tmp_path):
        p = write(tmp_path, "current_A,voltage_V\n0.1,12.6\n0.2,12.5\n")
        r = read_readings(p)
        assert np.allclose(r.voltage, [12.6, 12.5])
