"""The readings importer: what real files look like, and every bad input.

Plumbing of file formats; the numerical checks cite their sources where they appear.
"""

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


class TestLineNumbers:
    """Every reading keeps the line of the file it came from, whatever blank, comment
    and separator-only lines sit between the rows (plumbing test: the reference is a
    plain split of the text into lines)."""

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
        "comments before the header": "# bench 3 (invented)\n\ndut,load_ohm,voltage_V\n" + BODY,
        "separator rows": "dut,load_ohm,voltage_V\n" + HEAD + ",,\n" + REST + ",,\n,,\n",
        "CRLF": ("dut,load_ohm,voltage_V\n" + HEAD + "\n" + REST).replace("\n", "\r\n"),
    }

    @staticmethod
    def reference(text):
        lines = text.replace("\r\n", "\n").split("\n")
        head = next(k for k, ln in enumerate(lines) if ln.strip() and not ln.startswith("#"))
        rows = [(k + 1, ln.split(",")) for k, ln in enumerate(lines) if k > head
                and ln.strip(" \t,") and not ln.startswith("#")]
        return [k for k, _ in rows], [float(f[2]) for _, f in rows]

    @pytest.mark.parametrize("case", sorted(CASES))
    def test_lines_and_values(self, tmp_path, case):
        text = self.CASES[case]
        r = read_readings(write(tmp_path, text))
        lines, volts = self.reference(text)
        assert r.line.tolist() == lines
        assert r.voltage.tolist() == volts
        assert r.duts == tuple(f"U{k}" for k in range(10))

    def test_wrong_field_count_found_on_its_line(self, tmp_path):
        lines = ("dut,load_ohm,voltage_V\n" + self.BODY).splitlines()
        lines[17] += ",extra"  # file line 18
        with pytest.raises(ReadingsFileError) as exc:
            read_readings(write(tmp_path, "\n".join(lines) + "\n"))
        assert exc.value.line == 18 and "4 fields where the header has 3" in str(exc.value)

    def test_wrong_field_count_after_a_comment(self, tmp_path):
        text = "dut,load_ohm,voltage_V\n" + self.HEAD + "# pause\n" + "U9,10\n" + self.REST
        with pytest.raises(ReadingsFileError) as exc:
            read_readings(write(tmp_path, text))
        assert exc.value.line == self.HEAD.count("\n") + 3 and "2 fields" in str(exc.value)


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



class TestIds:
    """DUT ids are text, numbered in order of first appearance (plumbing tests against
    the ids written)."""

    ROWS = [("U1", "open", "12.00"), ("U1", "10", "11.95"), ("U2", "open", "5.00"),
            ("U2", "10", "4.95"), ("U1", "4.7", "11.90"), ("U3", "open", "9.0"),
            ("U3", "10", "8.9")]

    @staticmethod
    def table(rows, order=(0, 1, 2), sep=","):
        head = ["dut", "load_ohm", "voltage_V"]
        lines = [sep.join(head[k] for k in order)]
        lines += [sep.join(r[k] for k in order) for r in rows]
        return "\n".join(lines) + "\n"

    @pytest.mark.parametrize("order", [(0, 1, 2), (1, 0, 2), (1, 2, 0)])
    @pytest.mark.parametrize("ids", [("U1", "U2", "U3"), ("01", "1", "001"),
                                     ("x" * 64, "y", "x" * 63), ("x" * 65, "Ü1", "U3"),
                                     ("True", "true", "TRUE"), ("1e3", "1000", "inf")])
    def test_ids_as_written(self, tmp_path, order, ids):
        names = dict(zip(("U1", "U2", "U3"), ids))
        rows = [(names[d], ld, v) for d, ld, v in self.ROWS]  # U1 comes back after U2
        r = read_readings(write(tmp_path, self.table(rows, order)))
        assert r.duts == ids
        got = sorted(zip(r.line.tolist(), (r.duts[g] for g in r.group), r.voltage.tolist()))
        assert got == [(k + 2, d, float(v)) for k, (d, _, v) in enumerate(rows)]

    @pytest.mark.parametrize("spelling", ["NA", "null", "N/A", ""])
    def test_missing_value_spelling_is_an_empty_id(self, tmp_path, spelling):
        rows = list(self.ROWS)
        rows[0] = (spelling, "open", "12.00")
        with pytest.raises(ReadingsFileError, match="empty DUT id") as exc:
            read_readings(write(tmp_path, self.table(rows)))
        assert exc.value.line == 2

    def test_empty_id_is_an_error_on_its_line(self, tmp_path):
        rows = list(self.ROWS)
        rows[3] = ("", "10", "4.95")
        with pytest.raises(ReadingsFileError, match="empty DUT id") as exc:
            read_readings(write(tmp_path, self.table(rows)))
        assert exc.value.line == 5

    def test_order_of_appearance_across_arrow_blocks(self, tmp_path):
        """A file of several MiB is parsed in blocks, each with its own dictionary of ids;
        the ids still come out in order of first appearance, new ids appearing late."""
        rng = np.random.default_rng(3)
        ids = [f"P{k:05d}" for k in rng.permutation(30_000)]
        ids = ids[:20_000] + ids[:20_000][::-1] + ids[20_000:]  # ids seen again, then new
        rows = [(d, ("open", "10", "4.7")[j % 3], f"{12 - 0.05 * (j % 3):.2f}")
                for d in ids for j in range(3)]
        text = self.table(rows)
        assert len(text) > 2 << 20
        r = read_readings(write(tmp_path, text))
        assert r.duts == tuple(dict.fromkeys(ids))
        by_line = dict(zip(r.line.tolist(), (r.duts[g] for g in r.group)))
        assert [by_line[2 + 3 * k] for k in range(len(ids))] == ids


def test_digest_is_the_files_sha256(tmp_path):
    """The input's SHA-256 (for the results' traceability) is that of the file's bytes."""
    import hashlib

    p = write(tmp_path, "\ufeffload;voltage\r\nopen;1,0\r\n10;0,9\r\n5;0,8\r\n")
    assert read_readings(p).meta["sha256"] == hashlib.sha256(p.read_bytes()).hexdigest()


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
