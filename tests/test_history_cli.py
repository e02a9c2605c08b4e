"""Tests of ``sagfit record`` and ``sagfit trend`` on the invented fleet history.

Plumbing and end-to-end behaviour; the numbers behind the trends are checked against
outside references (statsmodels WLS, the closed-form crossing date, Fieller's interval)
in test_trend.py. The 30 % group limit is common practice (from memory).
"""

from __future__ import annotations

import json
import shutil
import sqlite3

import pytest

from conftest import SAMPLES, digest

FLEET = SAMPLES / "fleet_history"
FILES = sorted(FLEET.glob("string_A_*.csv"))
BENCH = FLEET / "bench.toml"


@pytest.fixture(scope="module")
def fleet_db(tmp_path_factory):
    """The invented fleet recorded once into a database (shared, read-only for the tests)."""
    from sagfit.cli import main

    db = tmp_path_factory.mktemp("fleet") / "fleet.sqlite"
    for f in FILES:
        with pytest.raises(SystemExit) as exc:
            main(["record", str(f), "--bench", str(BENCH), "--db", str(db), "--json"])
        assert exc.value.code == 0
    return db


def _trend(cli, db, *args):
    run = cli("trend", "--db", db, "--json", *args)
    return run, (json.loads(run.out) if run.out else None)


class TestFleet:
    def test_sample_fleet_has_eight_dates_of_sixteen_cells(self):
        """The invented sample is what the docs say: 8 files, labelled invented."""
        assert len(FILES) == 8
        assert all("INVENTED" in f.read_text(encoding="utf-8") for f in FILES)

    def test_the_two_fast_aging_cells_are_flagged_and_no_other(self, cli, fleet_db):
        """C05 and C12 (invented to age fast) are flagged aging; the 14 others carry no warning."""
        run, doc = _trend(cli, fleet_db)
        assert run.code == 1
        res = {r["dut"]: r for r in doc["results"]}
        assert len(res) == 16 and all(r["records"] == 8 for r in res.values())
        aging = {d for d, r in res.items() if any(f["code"] == "aging" for f in r["flags"])}
        assert aging == {"C05", "C12"}
        warned = {d for d, r in res.items() if any(f["severity"] == "warning" for f in r["flags"])}
        assert warned == {"C05", "C12"}
        assert res["C05"]["threshold_crossed"] and not res["C12"]["threshold_crossed"]
        assert res["C12"]["projected_crossing"] is not None

    def test_json_has_the_documented_fields(self, cli, fleet_db):
        """Every result has the issue's keys, with numbers in SI units."""
        _, doc = _trend(cli, fleet_db)
        r = doc["results"][0]
        assert set(r) >= {"dut", "records", "baseline_rth", "latest_rth", "change_pct",
                          "rate_per_30d", "projected_crossing", "flags"}
        assert set(r["latest_rth"]) >= {"value", "u"} and 3e-4 < r["latest_rth"]["value"] < 2e-3
        assert doc["settings"]["group_excess_pct"] == 30.0

    def test_a_stable_cell_alone_exits_zero(self, cli, fleet_db):
        """Nothing flagged → exit 0 (one stable cell of the string)."""
        run, doc = _trend(cli, fleet_db, "--dut", "C01")
        assert run.code == 0 and [r["dut"] for r in doc["results"]] == ["C01"]

    def test_one_dut_is_still_compared_with_its_whole_group(self, cli, fleet_db, tmp_path):
        """--dut C05 narrows the output, not the fleet: C05 stays an outlier of ST-A."""
        run, doc = _trend(cli, fleet_db, "--dut", "C05", "--report", tmp_path / "r")
        assert run.code == 1 and [r["dut"] for r in doc["results"]] == ["C05"]
        codes = {f["code"] for f in doc["results"][0]["flags"]}
        assert codes == {"aging", "outlier-in-group"}
        assert doc["results"][0]["group"]["size"] == 16
        assert (tmp_path / "r" / "fig-C05-trend.png").exists()

    def test_settings_change_the_verdict(self, cli, fleet_db):
        """A looser threshold and a short horizon leave C12 unflagged for aging."""
        _, doc = _trend(cli, fleet_db, "--threshold", "3x", "--horizon", "30d",
                        "--group-excess", "60%")
        flagged = {r["dut"] for r in doc["results"] if r["flags"]}
        assert "C12" not in flagged

    def test_terminal_table_shows_si_values(self, cli, fleet_db):
        """Without --json, a table with SI-prefixed values and the warnings."""
        run = cli("trend", "--db", fleet_db)
        assert run.code == 1
        assert "µΩ" in run.out and "warning C05 [aging]" in run.out

    def test_report_is_written_inside_its_folder(self, cli, fleet_db, tmp_path):
        """--report writes the HTML, JSON, CSV and figures into the folder only."""
        out = tmp_path / "rep"
        run = cli("trend", "--db", fleet_db, "--report", out)
        assert run.code == 1
        names = {p.name for p in out.iterdir()}
        assert {"report.html", "results.json", "results.csv", "fig-group-ST-A.png",
                "fig-C05-trend.png"} <= names
        page = (out / "report.html").read_text(encoding="utf-8")
        assert "<svg" in page and "C12" in page


class TestRecord:
    def test_recording_again_is_a_no_op(self, cli, tmp_path):
        """The same file twice adds nothing; --force replaces its records."""
        db = tmp_path / "h.sqlite"
        first = cli("record", FILES[0], "--bench", BENCH, "--db", db, "--json")
        again = cli("record", FILES[0], "--bench", BENCH, "--db", db, "--json")
        assert first.code == again.code == 0
        d1, d2 = json.loads(first.out), json.loads(again.out)
        assert len(d1["recorded"]) == 16 and d2["recorded"] == []
        assert len(d2["already_recorded"]) == 16 and d2["records_in_database"] == 16
        forced = json.loads(cli("record", FILES[0], "--bench", BENCH, "--db", db, "--force",
                                "--json").out)
        assert len(forced["replaced"]) == 16 and forced["records_in_database"] == 16

    def test_input_file_is_never_modified(self, cli, tmp_path):
        """Recording reads the CSV and leaves it byte for byte as it was."""
        src = tmp_path / "in.csv"
        shutil.copy(FILES[1], src)
        before = digest(src)
        assert cli("record", src, "--db", tmp_path / "h.sqlite").code == 0
        assert digest(src) == before

    def test_missing_date_is_a_one_line_error(self, cli, tmp_path):
        """A file with no date anywhere is refused with exit 2 and one error line."""
        src = tmp_path / "nodate.csv"
        src.write_text("cell,current_A,voltage_V\nC1,0,2.14\nC1,50,2.11\nC1,100,2.08\n")
        run = cli("record", src, "--db", tmp_path / "h.sqlite")
        assert run.code == 2 and run.err.count("\n") == 1
        assert "no test date" in run.err and "Traceback" not in run.err

    def test_date_option_and_dut_selection(self, cli, tmp_path):
        """--date sets the test date and --dut records only the named DUTs."""
        db = tmp_path / "h.sqlite"
        doc = json.loads(cli("record", FILES[0], "--db", db, "--date", "2026-04-09",
                             "--dut", "C01,C02", "--json").out)
        assert doc["recorded"] == ["C01", "C02"] and doc["input"]["dates"] == ["2026-04-09"]
        c = sqlite3.connect(db)
        assert c.execute("SELECT DISTINCT test_date, group_label FROM results").fetchall() == [
            ("2026-04-09", "ST-A")]
        c.close()

    def test_unfittable_dut_is_reported_and_not_recorded(self, cli, tmp_path):
        """A DUT with one load is named in the output, not recorded, and the exit status is 3."""
        src = tmp_path / "mixed.csv"
        src.write_text("# date: 2026-04-07\ncell,current_A,voltage_V\nC1,0,2.14\nC1,50,2.11\n"
                       "C1,100,2.08\nC2,0,2.14\n")
        run = cli("record", src, "--db", tmp_path / "h.sqlite", "--voltage-accuracy", "1mV")
        assert run.code == 3 and "not recorded C2" in run.out

    def test_db_that_is_the_input_is_refused(self, cli, tmp_path):
        """--db naming the readings file is refused; the file is untouched."""
        src = tmp_path / "in.csv"
        shutil.copy(FILES[0], src)
        before = digest(src)
        run = cli("record", src, "--db", src)
        assert run.code == 2 and "--db" in run.err and digest(src) == before

    def test_non_sqlite_db_is_a_clear_error(self, cli, tmp_path):
        """A --db that is not a database gives exit 2 and a one-line message."""
        bad = tmp_path / "notes.txt"
        bad.write_text("shopping list\n")
        run = cli("record", FILES[0], "--db", bad)
        assert run.code == 2 and "not an SQLite database" in run.err


class TestTrendErrors:
    def test_newer_schema_is_refused(self, cli, tmp_path):
        """trend on a database from a newer sagfit: exit 2 and the upgrade hint."""
        db = tmp_path / "h.sqlite"
        assert cli("record", FILES[0], "--db", db).code == 0
        c = sqlite3.connect(db)
        c.execute("INSERT INTO schema_version VALUES (99, '2099-01-01')")
        c.commit()
        c.close()
        run = cli("trend", "--db", db)
        assert run.code == 2 and "newer sagfit" in run.err and "upgrade" in run.err

    def test_missing_database(self, cli, tmp_path):
        """trend without a database says how to make one, and creates nothing."""
        run = cli("trend", "--db", tmp_path / "none.sqlite")
        assert run.code == 2 and "sagfit record" in run.err
        assert not (tmp_path / "none.sqlite").exists()

    @pytest.mark.parametrize("opt,value", [("--threshold", "1.5"), ("--threshold", "0.5x"),
                                           ("--baseline", "yesterday"),
                                           ("--horizon", "soon"), ("--group-excess", "-3%"),
                                           ("--as-of", "2026-02-30"), ("--dut", "NOPE")])
    def test_bad_options_are_one_line_errors(self, cli, fleet_db, opt, value):
        """Each bad option value: exit 2, one 'error:' line naming the option."""
        run = cli("trend", "--db", fleet_db, opt, value)
        assert run.code == 2 and run.err.startswith("error:") and run.err.count("\n") == 1
        assert opt in run.err

    def test_baseline_value_and_date(self, cli, fleet_db):
        """--baseline as a value or a date is applied and reported."""
        _, doc = _trend(cli, fleet_db, "--baseline", "0.5mohm", "--dut", "C01")
        assert doc["results"][0]["baseline_rth"] == pytest.approx(0.5e-3)
        _, doc = _trend(cli, fleet_db, "--baseline", "2026-06-02", "--dut", "C01")
        assert doc["results"][0]["baseline"]["date"] == "2026-06-02"

    def test_html_escapes_dut_names(self, cli, tmp_path):
        """A DUT id with markup is escaped in the report and kept out of file names."""
        src = tmp_path / "evil.csv"
        src.write_text("# date: 2026-04-07\ncell,current_A,voltage_V\n"
                       "<script>x</script>,0,2.14\n<script>x</script>,50,2.11\n"
                       "<script>x</script>,100,2.08\n")
        db = tmp_path / "h.sqlite"
        assert cli("record", src, "--db", db, "--voltage-accuracy", "1mV").code == 0
        out = tmp_path / "rep"
        cli("trend", "--db", db, "--report", out)
        page = (out / "report.html").read_text(encoding="utf-8")
        assert "<script>" not in page and "&lt;script&gt;" in page
        assert all("<" not in p.name and "/" not in p.name for p in out.iterdir())
