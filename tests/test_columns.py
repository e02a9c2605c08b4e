"""Column mapping: telling sagfit which column is which (``--columns``, the bench
profile's ``[columns]`` table, ``read_readings(columns=...)``), and the error that lists
the columns and shows the mapping to write. Plumbing of file formats, no numerical
method: the expected values are the numbers written into the invented files themselves
(an electronic-load export of one invented cell), unit prefixes by SI (BIPM, *The
International System of Units*, 9th ed. 2019, Table 7)."""

import json

import pytest

import sagfit
from sagfit.core.errors import InputError, ReadingsFileError
from sagfit.io.columns import parse_column_mapping

ELOAD = ("I_set (A);I_meas (A);V (V)\n0;0,001;12,70\n1;0,998;12,60\n2;2,004;12,49\n"
         "3;3,001;12,39\n")


def write(tmp_path, text, name="eload.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


class TestMappingText:
    def test_pairs_split_at_role_names(self):
        """Headers may hold commas and '='-free text; pairs split before a role name."""
        got = parse_column_mapping("voltage=V (V), current=I (A, measured),serial=Cell")
        assert got == {"voltage": "V (V)", "current": "I (A, measured)", "dut": "Cell"}

    @pytest.mark.parametrize("text,words", [("voltage", "ROLE=COLUMN"),
                                            ("volume=V", "not a column role"),
                                            ("voltage=", "as text"),
                                            ("voltage=A,v=B", "twice")])
    def test_bad_mapping(self, text, words):
        with pytest.raises(InputError, match=words):
            parse_column_mapping(text)


class TestUnknownHeaders:
    def test_error_lists_columns_and_shows_the_mapping(self, tmp_path, cli):
        """No mapping: one error line naming every column and a mapping to copy, with
        the measured current chosen over the set value."""
        p = write(tmp_path, ELOAD)
        run = cli("fit", p)
        assert run.code == 2
        line = run.err.strip()
        assert "'I_set (A)', 'I_meas (A)', 'V (V)'" in line
        assert '--columns "voltage=V (V),current=I_meas (A)"' in line
        assert "[columns]" in line and len(run.err.strip().splitlines()) == 1

    def test_suggested_mapping_works_as_written(self, tmp_path, cli):
        p = write(tmp_path, ELOAD)
        run = cli("fit", p, "--columns", "voltage=V (V),current=I_meas (A)", "--json")
        assert run.code == 0, run.err
        doc = json.loads(run.out)
        assert doc["input"]["readings"] == 4
        assert doc["settings"]["columns"] == {"voltage": "V (V)", "current": "I_meas (A)"}

    def test_mapping_to_a_missing_column_lists_the_columns(self, tmp_path, cli):
        p = write(tmp_path, ELOAD)
        run = cli("fit", p, "--columns", "current=I_act (A)")
        assert run.code == 2
        assert "no column 'I_act (A)' for current" in run.err
        assert "'I_meas (A)'" in run.err and str(p) in run.err


class TestMappedReadings:
    def test_measured_current_read_in_its_unit(self, tmp_path):
        r = sagfit.read_readings(write(tmp_path, ELOAD), columns="current=I_meas (A)")
        assert r.current.tolist() == pytest.approx([0.001, 0.998, 2.004, 3.001])
        assert r.voltage.tolist() == pytest.approx([12.70, 12.60, 12.49, 12.39])
        assert "I_set (A)" in r.meta["ignored_columns"]

    def test_unit_given_with_the_mapping(self, tmp_path):
        """'voltage=Ch1 [mV]': a header without a unit gets it from the mapping."""
        p = write(tmp_path, "Ch1,Ch2\n12700,0\n12600,500\n12490,1000\n")
        r = sagfit.read_readings(p, columns={"voltage": "Ch1 [mV]", "current": "Ch2 [mA]"})
        assert r.voltage.tolist() == pytest.approx([12.7, 12.6, 12.49])
        assert r.current.tolist() == pytest.approx([0.0, 0.5, 1.0])

    def test_mapping_settles_two_current_columns(self, tmp_path):
        """Two columns that both read as current: the mapping says which is measured,
        the other is ignored instead of 'both look like current'."""
        text = "I [A],current_meas [A],V\n0,0.002,12.7\n1,1.003,12.6\n2,1.998,12.5\n"
        with pytest.raises(ReadingsFileError, match="both look like|need two"):
            sagfit.read_readings(write(tmp_path, text.replace("current_meas", "current")))
        r = sagfit.read_readings(write(tmp_path, text), columns="current=current_meas [A]")
        assert r.current.tolist() == pytest.approx([0.002, 1.003, 1.998])

    def test_wrong_unit_for_the_role(self, tmp_path):
        p = write(tmp_path, "Ch1,Ch2\n12700,0\n12600,500\n")
        with pytest.raises(ReadingsFileError, match="not a unit of V") as e:
            sagfit.read_readings(p, columns={"voltage": "Ch1 [mA]", "current": "Ch2"})
        assert e.value.column == "Ch1"

    def test_header_case_and_blanks_do_not_matter(self, tmp_path):
        r = sagfit.read_readings(write(tmp_path, ELOAD), columns="current= i_meas (a) ")
        assert len(r) == 4


class TestBenchTable:
    def test_bench_profile_states_it_once(self, tmp_path, cli):
        p = write(tmp_path, ELOAD)
        bench = tmp_path / "bench.toml"
        bench.write_text('[voltage]\naccuracy = "0.05%+2mV"\n[columns]\n'
                         'current = "I_meas (A)"\nvoltage = "V (V)"\n')
        run = cli("fit", p, "--bench", bench, "--json")
        assert run.code == 0, run.err
        assert json.loads(run.out)["settings"]["columns"]["current"] == "I_meas (A)"

    def test_option_overrides_the_bench_role_by_role(self, tmp_path, cli):
        p = write(tmp_path, ELOAD.replace("I_meas", "I_read"))
        bench = tmp_path / "bench.toml"
        bench.write_text('[columns]\ncurrent = "I_meas (A)"\nvoltage = "V (V)"\n')
        run = cli("fit", p, "--bench", bench, "--columns", "current=I_read (A)", "--json")
        assert run.code == 0, run.err
        cols = json.loads(run.out)["settings"]["columns"]
        assert cols == {"current": "I_read (A)", "voltage": "V (V)"}

    @pytest.mark.parametrize("body,key", [('[columns]\nvolume = "V"\n', "columns.volume"),
                                          ("[columns]\nvoltage = 3\n", "columns.voltage")])
    def test_bad_table(self, tmp_path, cli, body, key):
        bench = tmp_path / "bench.toml"
        bench.write_text(body)
        run = cli("fit", write(tmp_path, ELOAD), "--bench", bench)
        assert run.code == 2 and key in run.err and "bench.toml" in run.err

    def test_record_and_accept_take_the_mapping(self, tmp_path, cli):
        from conftest import SAMPLES

        p = write(tmp_path, ELOAD)
        run = cli("record", p, "--db", tmp_path / "h.sqlite", "--date", "2026-11-03",
                  "--columns", "current=I_meas (A)")
        assert run.code == 0, run.err
        run = cli("accept", p, "--spec", SAMPLES / "accept_spec.toml",
                  "--columns", "current=I_meas (A)", "--json")
        assert run.code in (0, 1, 3), run.err
        assert json.loads(run.out)["results"][0]["decision"] in ("pass", "fail", "inconclusive")


class TestDataSet:
    """The mapping reaches every file of a data set (the Dask path of fit and accept)."""

    def test_each_file_read_with_the_mapping(self, tmp_path):
        pytest.importorskip("dask")
        from sagfit.io.dataset import DatasetError, _read_file

        p = write(tmp_path, "Cell;" + ELOAD.replace("\n", "\nK1;", 4).rstrip("K1;"),
                  "part-1.csv")
        with pytest.raises(DatasetError, match="needs two of"):
            _read_file((0, str(p)))
        frame = _read_file((0, str(p)), {"dut": "Cell", "current": "I_meas (A)"})
        assert frame["current"].tolist() == pytest.approx([0.001, 0.998, 2.004, 3.001])
        assert set(frame["dut"]) == {"K1"}

    def test_cli_data_set_with_columns(self, tmp_path, cli):
        pytest.importorskip("distributed")
        folder = tmp_path / "set"
        folder.mkdir()
        for k in (1, 2):
            body = ELOAD.replace("\n", f"\nK{k};", 4).rstrip(f"K{k};")
            write(folder, "Cell;" + body, f"part-{k}.csv")
        run = cli("fit", folder, "--workers", "1", "--columns", "current=I_meas (A)",
                  "--out", tmp_path / "res")
        assert run.code == 0, run.err
        import pyarrow.parquet as pq

        t = pq.read_table(tmp_path / "res")
        assert sorted(t.column("dut").to_pylist()) == ["K1", "K2"]
