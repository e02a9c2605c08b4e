"""What a new user hands the reader first: spreadsheet leftovers, standard input, thousands
separators, in-memory inputs and load texts through the Python API. Plumbing of file
formats; the readings are invented (one invented 12 V pack)."""

import io
import json
import subprocess
import sys

import numpy as np
import pytest

import sagfit
from sagfit.core.errors import ReadingsFileError

from conftest import digest

TEXT = "dut,load_ohm,voltage_V\nP1,open,12.70\nP1,10,12.60\nP1,4k7,12.69\nP1,2.2,12.31\n"


def write(tmp_path, text, name="r.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


class TestSeparatorRows:
    def test_trailing_rows_of_separators_are_skipped(self, tmp_path, cli):
        """',,' rows as a spreadsheet leaves at the end of an export: no 'empty load cell'."""
        p = write(tmp_path, TEXT + ",,\n,,\n,,\n")
        r = sagfit.read_readings(p)
        assert len(r) == 4 and r.line.tolist() == [2, 3, 4, 5]
        assert cli("fit", p).code == 0

    def test_separator_rows_inside_keep_line_numbers(self, tmp_path):
        lines = TEXT.splitlines()
        p = write(tmp_path, "\n".join(lines[:3] + [" , ,", ",,"] + lines[3:])
                  + "\n")
        r = sagfit.read_readings(p)
        assert r.line.tolist() == [2, 3, 6, 7]

    def test_semicolon_file_with_separator_rows(self, tmp_path):
        text = TEXT.replace(",", ";").replace("12.", "12,") + ";;\r\n;;\r\n"
        r = sagfit.read_readings(write(tmp_path, text))
        assert r.voltage.tolist() == pytest.approx([12.70, 12.60, 12.69, 12.31])

    def test_a_row_with_a_value_is_still_checked(self, tmp_path):
        """Only rows of bare separators are skipped; a row with any value is a reading."""
        with pytest.raises(ReadingsFileError, match="empty load cell") as e:
            sagfit.read_readings(write(tmp_path, TEXT + ",,12.0\n"))
        assert e.value.line == 6


class TestStandardInput:
    def test_dash_reads_standard_input(self, cli, monkeypatch):
        monkeypatch.setattr(sys, "stdin", io.TextIOWrapper(io.BytesIO(TEXT.encode())))
        run = cli("fit", "-", "--json")
        assert run.code == 0, run.err
        doc = json.loads(run.out)
        assert doc["input"]["readings"] == 4 and doc["input"]["file"] == "<stdin>"

    def test_dash_in_a_pipe(self, tmp_path):
        """`cat readings.csv | sagfit fit -` as a shell runs it (a whole process)."""
        run = subprocess.run([sys.executable, "-m", "sagfit", "fit", "-", "--json"],
                             input=TEXT.encode(), capture_output=True, timeout=120)
        assert run.returncode == 0, run.stderr
        assert json.loads(run.stdout)["results"][0]["dut"] == "P1"

    def test_bad_input_on_stdin_names_it(self, cli, monkeypatch):
        bad = TEXT.replace("12.60", "abc")
        monkeypatch.setattr(sys, "stdin", io.TextIOWrapper(io.BytesIO(bad.encode())))
        run = cli("fit", "-")
        assert run.code == 2
        assert run.err.startswith("error: <stdin>, line 3, column voltage_V: 'abc' is not")

    def test_record_from_standard_input(self, cli, monkeypatch, tmp_path):
        monkeypatch.setattr(sys, "stdin", io.TextIOWrapper(io.BytesIO(TEXT.encode())))
        run = cli("record", "-", "--db", tmp_path / "h.sqlite", "--date", "2026-11-03")
        assert run.code == 0, run.err


class TestThousandsSeparators:
    @pytest.mark.parametrize("cell,value", [('"1,243.9"', 1243.9), ('"12,345,678"', 12345678.0),
                                            ('"-1,000.5"', -1000.5)])
    def test_unambiguous_grouping_is_read(self, tmp_path, cell, value):
        """Comma grouping with a decimal point (or several groups) can only be thousands."""
        text = f"load_ohm,voltage_mV\nopen,12700\n10,12600\n4.7,{cell}\n"
        r = sagfit.read_readings(write(tmp_path, text))
        assert r.voltage[2] == pytest.approx(value * 1e-3)

    def test_one_group_without_a_point_is_ambiguous(self, tmp_path):
        """'1,243': a thousands separator or a decimal comma? Asked, not guessed."""
        text = 'load_ohm,voltage_mV\nopen,12700\n10,"1,243"\n4.7,12500\n'
        with pytest.raises(ReadingsFileError) as e:
            sagfit.read_readings(write(tmp_path, text))
        assert e.value.line == 3 and "thousands separator or a decimal comma" in str(e.value)
        assert "use '.' as the decimal separator" not in str(e.value)

    def test_decimal_comma_hint_stays(self, tmp_path):
        text = 'load_ohm,voltage_V\nopen,12.7\n10,"12,6"\n4.7,12.5\n'
        with pytest.raises(ReadingsFileError, match="use '.' as the decimal separator"):
            sagfit.read_readings(write(tmp_path, text))

    def test_grouping_with_points_in_a_decimal_comma_file(self, tmp_path):
        text = "load_ohm;voltage_mV\nopen;12.700,0\n10;12.600,5\n4,7;12.500.000\n"
        r = sagfit.read_readings(write(tmp_path, text))
        assert r.voltage.tolist() == pytest.approx([12.7, 12.6005, 12500.0])


class TestInMemory:
    def test_path_text_and_binary_file_objects_agree(self, tmp_path):
        p = write(tmp_path, TEXT)
        a = sagfit.read_readings(p)
        b = sagfit.read_readings(io.StringIO(TEXT))
        c = sagfit.read_readings(io.BytesIO(TEXT.encode("utf-16")))
        for r in (b, c):
            np.testing.assert_array_equal(r.voltage, a.voltage)
            np.testing.assert_array_equal(r.load, a.load)
            assert r.duts == a.duts and r.line.tolist() == a.line.tolist()

    def test_dataframe(self):
        pd = pytest.importorskip("pandas")
        frame = pd.DataFrame({"dut": ["P1"] * 4, "load_ohm": ["open", "10", "4k7", "2.2"],
                              "voltage_V": [12.70, 12.60, 12.69, 12.31]})
        r = sagfit.read_readings(frame)
        a = sagfit.read_readings(io.StringIO(TEXT))
        np.testing.assert_array_equal(r.load, a.load)
        np.testing.assert_array_equal(r.voltage, a.voltage)
        assert r.line.tolist() == [1, 2, 3, 4]

    def test_dataframe_bad_cell_names_row_and_column(self):
        pd = pytest.importorskip("pandas")
        frame = pd.DataFrame({"load": ["open", "10", "x"], "voltage": [1.0, 0.9, 0.8]})
        with pytest.raises(ReadingsFileError, match=r"row 3, column load: cannot read 'x'"):
            sagfit.read_readings(frame)

    def test_parquet_bytes_in_a_file_object(self, tmp_path):
        pa = pytest.importorskip("pyarrow")
        import pyarrow.csv as pa_csv
        import pyarrow.parquet as pq

        sink = io.BytesIO()
        pq.write_table(pa_csv.read_csv(io.BytesIO(TEXT.encode())), sink)
        sink.seek(0)
        r = sagfit.read_readings(sink)
        assert r.load.tolist()[:2] == [np.inf, 10.0] and isinstance(r, sagfit.Readings)
        del pa


class TestLoadTextInFromArrays:
    def test_load_texts_read_as_the_csv_reader_reads_them(self):
        """SI prefixes, RKM codes (IEC 60062) and 'open', as in a readings file."""
        r = sagfit.Readings.from_arrays(load=["open", "4k7", "470R", "2.2k", "R47", "10"],
                                        voltage=[12.7, 12.69, 12.6, 12.68, 10.0, 12.3])
        assert r.load.tolist() == pytest.approx([np.inf, 4700, 470, 2200, 0.47, 10])
        same = sagfit.read_readings(io.StringIO(
            "load,voltage\nopen,12.7\n4k7,12.69\n470R,12.6\n2.2k,12.68\nR47,10.0\n10,12.3\n"))
        np.testing.assert_array_equal(r.load, same.load)
        np.testing.assert_array_equal(r.current, same.current)

    def test_mixed_numbers_and_texts(self):
        r = sagfit.Readings.from_arrays(load=np.array([np.inf, "4k7", 10.0], dtype=object),
                                        voltage=[12.7, 12.69, 12.3])
        assert r.load.tolist() == [np.inf, 4700.0, 10.0]

    @pytest.mark.parametrize("bad,words", [("x", "cannot read 'x'"), (None, "empty")])
    def test_bad_load_named_by_reading(self, bad, words):
        with pytest.raises(ReadingsFileError, match=words) as e:
            sagfit.Readings.from_arrays(load=["open", bad, "10"], voltage=[12.7, 12.6, 12.3])
        assert "reading 2" in str(e.value) and e.value.column == "load"


def test_help_imports_neither_pandas_nor_pyarrow():
    """`sagfit --help` stays light: the readers' libraries load only when a file is read."""
    run = subprocess.run([sys.executable, "-X", "importtime", "-m", "sagfit", "--help"],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0 and "fit" in run.stdout
    loaded = {ln.rsplit("|", 1)[-1].strip() for ln in run.stderr.splitlines() if "|" in ln}
    assert not loaded & {"pandas", "pyarrow", "python_calamine"}


def test_inputs_left_unchanged(tmp_path, cli):
    """Reading never touches the input file, whatever its kind."""
    p = write(tmp_path, TEXT + ",,\n")
    before = digest(p)
    cli("fit", p, "--out", tmp_path / "out.parquet")
    assert digest(p) == before


def test_a_file_name_with_glob_characters_is_that_file(tmp_path):
    """'run[1].csv' is a file's own name, not a pattern of files."""
    p = write(tmp_path, TEXT, "run[1].csv")
    write(tmp_path, TEXT.replace("P1", "P2"), "run1.csv")
    assert sagfit.read_readings(p).duts == ("P1",)


def test_data_set_files_skip_separator_rows(tmp_path):
    """The data-set reader (Dask path) skips rows of bare separators as the file reader does."""
    pytest.importorskip("dask")
    from sagfit.io.dataset import _read_file

    p = write(tmp_path, TEXT + ",,\n,,\n", "part-1.csv")
    frame = _read_file((0, str(p)))
    assert len(frame) == 4 and frame["_row"].tolist() == [2, 3, 4, 5]


class TestIsoTimes:
    """ISO 8601 time cells (ISO 8601-1:2019 extended format, common practice in logger
    exports) read by Arrow's parser, checked against pandas' ISO 8601 reading as an
    independent reference; spellings Arrow does not read (basic format) still read."""

    CASES = {
        "naive": ["2026-11-03T10:00:00", "2026-11-03T10:00:30.25", "2026-11-03 10:01:00"],
        "zoned": ["2026-11-03T10:00:00Z", "2026-11-03T11:00:30+01:00", "2026-11-03T10:01:00Z"],
        "basic format": ["20261103T100000", "20261103T100030", "20261103T100100"],
    }

    @pytest.mark.parametrize("case", sorted(CASES))
    def test_against_pandas(self, tmp_path, case):
        import pandas as pd

        cells = self.CASES[case]
        text = "time,load_ohm,voltage_V\n" + "".join(
            f"{c},{load},{v}\n" for c, load, v in zip(cells, ["open", "10", "4.7"],
                                                      [12.7, 12.6, 12.5]))
        r = sagfit.read_readings(write(tmp_path, text))
        ref = pd.to_datetime(pd.Series(cells), format="ISO8601", utc=True)
        expected = (ref - pd.Timestamp("1970-01-01", tz="UTC")).dt.total_seconds()
        np.testing.assert_allclose(r.time, expected.to_numpy(), rtol=0, atol=1e-6)

    def test_an_empty_time_cell_is_no_time(self, tmp_path):
        text = ("time,load_ohm,voltage_V\n2026-11-03T10:00:00,open,12.7\n,10,12.6\n"
                "2026-11-03T10:01:00,4.7,12.5\n")
        r = sagfit.read_readings(write(tmp_path, text))
        assert np.isnan(r.time[1]) and r.time[2] - r.time[0] == 60.0

    def test_a_bad_time_is_named(self, tmp_path):
        text = ("time,load_ohm,voltage_V\n2026-11-03T10:00:00,open,12.7\n"
                "yesterday,10,12.6\n2026-11-03T10:01:00,4.7,12.5\n")
        with pytest.raises(ReadingsFileError, match="line 3, column time: 'yesterday'"):
            sagfit.read_readings(write(tmp_path, text))
