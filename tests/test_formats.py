"""Readings from Parquet files and from Excel / OpenDocument workbooks, and results written
as Parquet. Plumbing of file formats: the reference for every reading is the same table
read from CSV (invented readings of one invented pack, tests/sheets.py writes the
workbooks)."""

import json

import numpy as np
import pytest

import sagfit
from sagfit.core.errors import ReadingsFileError

from conftest import SAMPLES, digest
from sheets import write_ods, write_xlsx

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

CSV = ("dut,load_ohm,voltage_V\nA1,open,12.70\nA1,10,12.60\nA1,4.7,12.49\nA1,2.2,12.31\n"
       "B2,open,12.66\nB2,10,12.55\nB2,4.7,12.43\nB2,2.2,12.22\n")


def same(a, b):
    assert a.duts == b.duts
    for name in ("voltage", "current", "load", "group"):
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-6)


@pytest.fixture
def csv_path(tmp_path):
    p = tmp_path / "pack.csv"
    p.write_text(CSV)
    return p


class TestParquetIn:
    def test_same_readings_as_the_csv(self, tmp_path, csv_path):
        import pyarrow.csv as pa_csv

        table = pa_csv.read_csv(csv_path)
        p = tmp_path / "pack.parquet"
        pq.write_table(table, p)
        r = sagfit.read_readings(p)
        same(r, sagfit.read_readings(csv_path))
        assert r.line.tolist() == list(range(1, 9))  # rows of the table, from 1

    def test_arrow_types(self, tmp_path):
        """Dictionary-encoded ids, float32 readings, integer loads and timestamps."""
        import datetime as dt

        t0 = dt.datetime(2026, 11, 3, 10, 0, 0)
        table = pa.table({
            "serial": pa.array(["A1", "A1", "A1", "B2", "B2", "B2"]).dictionary_encode(),
            "load_ohm": pa.array([10, 5, 2, 10, 5, 2], type=pa.int32()),
            "voltage_mV": pa.array([12600, 12510, 12250, 12580, 12470, 12200],
                                   type=pa.float32()),
            "time": pa.array([t0 + dt.timedelta(seconds=30 * k) for k in range(6)],
                             type=pa.timestamp("ms")),
        })
        p = tmp_path / "typed.parquet"
        pq.write_table(table, p)
        r = sagfit.read_readings(p)
        assert r.duts == ("A1", "B2")
        assert r.voltage.tolist() == pytest.approx([12.6, 12.51, 12.25, 12.58, 12.47, 12.2])
        assert np.diff(r.time).tolist() == [30.0] * 5
        assert r.time[0] == pytest.approx(t0.replace(tzinfo=dt.timezone.utc).timestamp())

    def test_bad_cell_named_by_row_and_column(self, tmp_path):
        table = pa.table({"load": ["open", "10", "4k7", "oops"],
                          "voltage": [12.7, 12.6, 12.5, 12.4]})
        p = tmp_path / "bad.parquet"
        pq.write_table(table, p)
        with pytest.raises(ReadingsFileError) as e:
            sagfit.read_readings(p)
        assert str(e.value).startswith(f"{p}, row 4, column load: ")

    def test_not_parquet(self, tmp_path, cli):
        p = tmp_path / "junk.parquet"
        p.write_bytes(b"PAR1 not really")
        run = cli("fit", p)
        assert run.code == 2 and "not a readable Parquet file" in run.err and str(p) in run.err

    def test_cli_fits_parquet(self, tmp_path, csv_path, cli):
        import pyarrow.csv as pa_csv

        p = tmp_path / "pack.parquet"
        pq.write_table(pa_csv.read_csv(csv_path), p)
        a = json.loads(cli("fit", p, "--json").out)["results"]
        b = json.loads(cli("fit", csv_path, "--json").out)["results"]
        assert [x["vth"]["value"] for x in a] == pytest.approx([x["vth"]["value"] for x in b])


class TestParquetOut:
    def test_fit_out_parquet_has_the_csv_columns(self, tmp_path, cli):
        src = SAMPLES / "pack_a.csv"
        before = digest(src)
        assert cli("fit", src, "--out", tmp_path / "r.parquet").code in (0, 3)
        assert cli("fit", src, "--out", tmp_path / "r.csv").code in (0, 3)
        t = pq.read_table(tmp_path / "r.parquet")
        import pyarrow.csv as pa_csv

        c = pa_csv.read_csv(tmp_path / "r.csv")
        assert t.column_names == c.column_names
        for name in ("vth", "rth", "vth_u", "rth_u"):
            np.testing.assert_array_equal(t.column(name).to_numpy(), c.column(name).to_numpy())
        assert t.column("dut").to_pylist() == c.column("dut").to_pylist()
        assert digest(src) == before

    def test_accept_out_parquet(self, tmp_path, cli):
        run = cli("accept", SAMPLES / "accept_reel.csv", "--spec", SAMPLES / "accept_spec.toml",
                  "--out", tmp_path / "d.parquet")
        assert run.code in (0, 1, 3), run.err
        t = pq.read_table(tmp_path / "d.parquet")
        assert "decision" in t.column_names and t.num_rows > 0

    def test_predict_out_parquet_has_the_csv_columns(self, tmp_path, cli):
        res = tmp_path / "fit.json"
        assert cli("fit", SAMPLES / "pack_a.csv", "--out", res).code in (0, 3)
        for out in ("p.parquet", "p.csv"):
            run = cli("predict", res, "--load", "1,2.2,open", "--out", tmp_path / out)
            assert run.code == 0, run.err
        import pyarrow.csv as pa_csv

        t, c = pq.read_table(tmp_path / "p.parquet"), pa_csv.read_csv(tmp_path / "p.csv")
        assert t.column_names == c.column_names and t.num_rows == c.num_rows == 3
        for name in c.column_names:
            if pa.types.is_floating(c.schema.field(name).type):
                a = t.column(name).to_numpy(zero_copy_only=False)  # open stays inf here;
                a = np.where(np.isfinite(a), a, np.nan)  # the CSV leaves it empty
                np.testing.assert_allclose(a, c.column(name).to_numpy(zero_copy_only=False))

    @pytest.mark.parametrize("args,bad,words", [
        (["trend", "--db", "{db}"], "t.parquet", ".csv or .json"),
        (["steps", "{trace}"], "s.parquet", ".csv or .json"),
        (["steps", "{trace}", "--readings-out"], "r.json", "--readings-out"),
    ])
    def test_commands_refuse_a_format_they_do_not_write(self, tmp_path, cli, args, bad, words):
        (tmp_path / "h.sqlite").write_bytes(b"")
        trace = tmp_path / "t.csv"
        trace.write_text("time_s,current_A,voltage_V\n0,0,12\n1,1,11.9\n")
        args = [a.format(db=tmp_path / "h.sqlite", trace=trace) for a in args]
        if args[-1] != "--readings-out":
            args.append("--out")
        run = cli(*args, tmp_path / bad)
        assert run.code == 2 and words in run.err and run.err.count("\n") == 1, run.err
        assert not (tmp_path / bad).exists()

    def test_other_suffix_refused(self, tmp_path, cli):
        run = cli("fit", SAMPLES / "pack_a.csv", "--out", tmp_path / "r.xlsx")
        assert run.code == 2 and ".parquet" in run.err


ROWS = [["# date: 2026-11-03"], [], ["Serial", "Load", "Current", "Voltage", "Operator"],
        [None, "kohm", "mA", "V", None],
        ["A1", "open", 0, 12.7, "K"], ["A1", 1, 12.6, 12.6, "K"], [],
        ["A1", "0.1", 120, 12.0, "K"], ["A1", 0.047, 250, 11.75, "K"]]


@pytest.fixture(params=["xlsx", "ods"])
def book(request, tmp_path):
    p = tmp_path / f"sweep.{request.param}"
    writer = write_xlsx if request.param == "xlsx" else write_ods
    writer(p, {"Sweep": ROWS, "Notes": [["nothing here"]]})
    return p


class TestWorkbooks:
    def test_first_sheet_with_comments_units_row_and_blank_rows(self, book):
        r = sagfit.read_readings(book)
        assert r.duts == ("A1",)
        assert r.current.tolist() == pytest.approx([0.0, 0.0126, 0.120, 0.250])
        assert r.load[1] == pytest.approx(1000.0)
        assert r.line.tolist() == [5, 6, 8, 9]  # the spreadsheet's own row numbers
        assert r.meta["date"] == "2026-11-03" and r.meta["sheet"] == "Sweep"
        assert r.meta["ignored_columns"] == ["Operator"]

    def test_named_sheet_and_a_missing_one(self, book, cli):
        with pytest.raises(ReadingsFileError, match="no sheet 'Sweeps'; the sheets are "
                                                    "'Sweep', 'Notes'"):
            sagfit.read_readings(book, sheet="Sweeps")
        assert len(sagfit.read_readings(book, sheet="sweep")) == 4  # case aside
        run = cli("fit", book, "--sheet", "Notes")
        assert run.code == 2 and "sheet Notes" in run.err

    def test_bad_cell_names_sheet_row_and_column(self, tmp_path):
        rows = [list(r) for r in ROWS]
        rows[7][3] = "12,0 V?"
        p = tmp_path / "bad.xlsx"
        write_xlsx(p, {"Sweep": rows})
        with pytest.raises(ReadingsFileError) as e:
            sagfit.read_readings(p)
        assert str(e.value).startswith(f"{p}, sheet Sweep, row 8, column Voltage [V]: ")

    def test_cli_same_fit_as_csv(self, book, tmp_path, cli):
        csv = tmp_path / "same.csv"
        csv.write_text("# date: 2026-11-03\nSerial,Load,Current,Voltage\n,kohm,mA,V\n"
                       "A1,open,0,12.7\nA1,1,12.6,12.6\nA1,0.1,120,12.0\nA1,0.047,250,11.75\n")
        a = json.loads(cli("fit", book, "--json").out)["results"][0]
        b = json.loads(cli("fit", csv, "--json").out)["results"][0]
        assert a["vth"]["value"] == pytest.approx(b["vth"]["value"], rel=1e-12)
        assert a["rth"]["value"] == pytest.approx(b["rth"]["value"], rel=1e-12)

    def test_not_a_workbook(self, tmp_path, cli):
        p = tmp_path / "fake.xlsx"
        p.write_bytes(b"PK\x03\x04 this is no workbook")
        before = digest(p)
        run = cli("fit", p)
        assert run.code == 2 and "not a readable Excel or OpenDocument workbook" in run.err
        assert len(run.err.strip().splitlines()) == 1 and digest(p) == before

    def test_mapping_applies_to_a_sheet(self, tmp_path):
        p = tmp_path / "eload.xlsx"
        write_xlsx(p, {"Log": [["I_set (A)", "I_meas (A)", "V (V)"], [0, 0.001, 12.7],
                               [1, 0.998, 12.6], [2, 2.004, 12.49]]})
        with pytest.raises(ReadingsFileError, match="--columns") as e:
            sagfit.read_readings(p)
        assert "sheet Log, row 1" in str(e.value)
        r = sagfit.read_readings(p, columns="current=I_meas (A)")
        assert r.current.tolist() == pytest.approx([0.001, 0.998, 2.004])


class TestParquetSet:
    """A folder or glob of Parquet files read in one process (``read_readings``,
    ``sagfit record``): one table in file-name order, errors naming file and row."""

    @staticmethod
    def write_set(folder, bad=None):
        folder.mkdir()
        pq.write_table(pa.table({"dut": ["A1"] * 3, "load": ["open", "10", "4.7"],
                                 "voltage": [12.7, 12.6, 12.5]}), folder / "part-1.parquet")
        pq.write_table(pa.table({"dut": ["B2", "B2", "A1"], "load": ["open", "10", bad or "2.2"],
                                 "voltage": [12.66, 12.55, 12.31]}), folder / "part-2.parquet")
        return folder

    def test_folder_and_glob(self, tmp_path):
        folder = self.write_set(tmp_path / "set")
        for src in (folder, folder / "*.parquet"):
            r = sagfit.read_readings(src)
            assert r.duts == ("A1", "B2") and r.counts().tolist() == [4, 2]
            assert len(r.meta["files"]) == 2

    @pytest.mark.parametrize("bad,words", [("x", "cannot read 'x'"), ("-3", "negative load")])
    def test_error_names_the_file_and_its_row(self, tmp_path, bad, words):
        folder = self.write_set(tmp_path / "set", bad=bad)
        with pytest.raises(ReadingsFileError, match=words) as e:
            sagfit.read_readings(folder)
        assert e.value.path.endswith("part-2.parquet") and e.value.line == 3
        assert ", row 3, column load" in str(e.value)

    def test_record_reads_a_folder(self, tmp_path, cli):
        folder = self.write_set(tmp_path / "set")
        run = cli("record", folder, "--db", tmp_path / "h.sqlite", "--date", "2026-11-03",
                  "--json")
        assert run.code == 3, run.err  # B2 has two readings: too few to fit without u
        doc = json.loads(run.out)
        assert doc["recorded"] == ["A1"] and doc["not_fitted"][0]["dut"] == "B2"

    def test_fit_without_dask_reads_the_set_in_one_process(self, tmp_path, cli, monkeypatch):
        """Without Dask, ``sagfit fit FOLDER`` of Parquet files fits the set as one
        table, as ``read_readings`` reads it; ``--out`` goes beside the set, not into it."""
        from sagfit.cli import dataset_run

        monkeypatch.setattr(dataset_run, "dask_installed", lambda: False)
        folder = self.write_set(tmp_path / "set")
        run = cli("fit", folder, "--voltage-accuracy", "0.05%+2mV", "--json")
        assert run.code in (0, 1), run.err
        doc = json.loads(run.out)
        assert [d["dut"] for d in doc["results"]] == ["A1", "B2"]
        assert doc["results"][0]["n"] == 4
        inside = cli("fit", folder, "--voltage-accuracy", "0.05%+2mV", "--out", folder / "r.parquet")
        assert inside.code == 2 and "inside the data set" in inside.err
        out = tmp_path / "r.csv"
        assert cli("fit", folder, "--voltage-accuracy", "0.05%+2mV", "--out", out).code in (0, 1)
        assert out.read_text().count("\n") == 3  # header and two DUTs

    def test_which_inputs_go_to_dask(self, tmp_path, monkeypatch):
        """A CSV set still needs Dask; a Parquet set goes to Dask when it is installed or
        workers are asked for; a single file never does."""
        from sagfit.cli import dataset_run

        folder = self.write_set(tmp_path / "set")
        (tmp_path / "csvset").mkdir()
        (tmp_path / "csvset" / "a.csv").write_text(TEXT_CSV)
        monkeypatch.setattr(dataset_run, "dask_installed", lambda: False)
        assert not dataset_run.runs_on_dask(str(folder), None, None)
        assert dataset_run.runs_on_dask(str(folder), None, 2)
        assert dataset_run.runs_on_dask(str(tmp_path / "csvset"), None, None)
        assert not dataset_run.runs_on_dask(str(folder / "part-1.parquet"), None, None)
        monkeypatch.setattr(dataset_run, "dask_installed", lambda: True)
        assert dataset_run.runs_on_dask(str(folder), None, None)


TEXT_CSV = "dut,load_ohm,voltage_V\nP1,open,12.70\nP1,10,12.60\nP1,2.2,12.31\n"


def test_date_cells_of_a_sheet_are_times(tmp_path):
    """Date-time cells (an OpenDocument date column) become times, 30 s apart here."""
    import datetime as dt

    t0 = dt.datetime(2026, 11, 3, 10, 0, 0)
    rows = [["Time", "Load [ohm]", "Voltage [V]"]] + [
        [t0 + dt.timedelta(seconds=30 * k), load, v]
        for k, (load, v) in enumerate([("open", 12.7), (10, 12.6), (4.7, 12.5)])]
    p = tmp_path / "timed.ods"
    write_ods(p, {"Log": rows})
    r = sagfit.read_readings(p)
    assert np.diff(r.time).tolist() == [30.0, 30.0]
    assert r.time[0] == pytest.approx(t0.replace(tzinfo=dt.timezone.utc).timestamp())
