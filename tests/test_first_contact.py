"""First-contact cases: inputs and outputs a new user trips over (overload codes, bare spec
limits, duplicated hints, help text versus docs, grammar of counts, stdout as output)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sagfit.core.errors import ReadingsFileError
from sagfit.core.formatting import format_estimate, format_interval, format_value
from sagfit.core.readings import Readings


class TestOverloadAndPlausibility:
    # SCPI-99 vol. 1, 7.2.1.5: 9.9E+37 is the overload value, 9.91E+37 "not a number".
    @pytest.mark.parametrize("code", [9.9e37, -9.9e37, 9.91e37])
    def test_overload_code_is_refused_with_its_line(self, code):
        with pytest.raises(ReadingsFileError) as exc:
            Readings.from_arrays(voltage=[12.0, code, 11.0], current=[0.0, 1.0, 2.0],
                                 line=[5, 6, 7], source="bench.csv")
        msg = str(exc.value)
        assert "overload" in msg and "bench.csv" in msg and "6" in msg

    def test_implausible_magnitude_names_the_unit_slip(self):
        with pytest.raises(ReadingsFileError, match="implausible"):
            Readings.from_arrays(voltage=[12.0, 11.9], current=[0.0, 3.0e10], line=[2, 3])

    def test_ordinary_readings_pass(self):
        r = Readings.from_arrays(voltage=[12.0, 11.9], current=[0.0, 1.0],
                                 load=[math.inf, 11.9])
        assert len(r) == 2

    def test_cli_overload_is_an_error_not_a_fit(self, cli, tmp_path):
        p = tmp_path / "ovl.csv"
        p.write_text("voltage_V,current_A\n12.0,0\n9.9E+37,0.5\n11.8,1.0\n11.7,1.5\n")
        run = cli("fit", p)
        assert run.code == 2
        assert run.err.startswith("error:") and "overload" in run.err
        assert "Traceback" not in run.err


class TestNoPrefixBeyondKnown:
    @pytest.mark.parametrize("x", [9.9e37, 1.0e15, 3.0e-16])
    def test_value_beyond_prefixes_goes_scientific(self, x):
        text = format_value(x, "V")
        assert "e" in text and text.endswith(" V") and "TV" not in text
        assert float(text.split()[0]) == pytest.approx(x, rel=1e-3)

    def test_estimate_and_interval_beyond_prefixes(self):
        assert "TV" not in format_estimate(9.9e37, 1e35, "V")
        assert "TV" not in format_interval(9.8e37, 9.9e37, "V")

    def test_in_range_unchanged(self):
        assert format_value(4700.0, "Ω") == "4.700 kΩ"
        assert format_estimate(12.483162, 0.0041789, "V") == "12.4832 ± 0.0042 V"


class TestSpecLimitsNeedUnits:
    @pytest.mark.parametrize("raw", ["50", "\"50\""])
    def test_bare_rth_limit_refused_with_the_fix(self, raw):
        from sagfit.core.errors import SpecFileError
        from sagfit.io.spec import parse_spec
        with pytest.raises(SpecFileError) as exc:
            parse_spec(f"[limits.rth]\nmax = {raw}\n", "spec.toml")
        msg = str(exc.value)
        assert "limits.rth.max" in msg and "no unit" in msg and '"50mΩ"' in msg

    def test_cli_bare_limit_is_exit_2(self, cli, tmp_path):
        from conftest import SAMPLES
        spec = tmp_path / "s.toml"
        spec.write_text("[limits.rth]\nmax = 50\n")
        run = cli("accept", SAMPLES / "accept_reel.csv", "--spec", spec,
                  "--bench", SAMPLES / "accept_bench.toml")
        assert run.code == 2 and run.err.startswith("error:") and "no unit" in run.err

    def test_limit_with_unit_is_read_in_si(self):
        from sagfit.io.spec import parse_spec
        spec = parse_spec("[limits.rth]\nmax = \"50mΩ\"\n", "spec.toml")
        assert any(math.isclose(c.upper, 0.05) for c in spec.checks)


class TestTerminalWording:
    def test_did_you_mean_once(self, cli):
        run = cli("fitt", "x.csv")
        assert run.code == 2 and run.err.count("Did you mean") == 1

    def test_robust_help_matches_docs_and_runtime(self, cli):
        from conftest import ROOT
        run = cli("fit", "--help")
        text = " ".join(run.out.split())
        assert "Huber" in text and "1.345" in text and "soft-L1" not in text
        assert "c = 1.345" in (ROOT / "docs" / "diagnostics.md").read_text(encoding="utf-8")

    @pytest.mark.parametrize("dof, text", [(1, "1 degree of freedom"),
                                           (3, "3 degrees of freedom")])
    def test_degree_of_freedom_grammar(self, dof, text):
        from sagfit.cli.render import _quality
        assert text in _quality(1.2, dof, 0.3, "wls", 0.5)
        assert text in _quality(1.2, dof, None, "ols", 0.5)


class TestStdoutDash:
    def test_simulate_out_dash_writes_csv_to_stdout(self, cli, tmp_path, monkeypatch):
        monkeypatch.chdir(tmp_path)
        run = cli("simulate", "--vth", "12", "--rth", "50m", "--loads", "open,10,4.7",
                  "--out", "-")
        assert run.code == 0, run.err
        lines = run.out.splitlines()
        assert lines[0].startswith("# INVENTED DATA")
        assert "dut,load_ohm,voltage_V,time_s" in lines
        assert "wrote" not in run.out and not list(tmp_path.iterdir())  # no file named '-'
        p = tmp_path / "back.csv"
        p.write_text(run.out, encoding="utf-8")
        assert cli("fit", p, "--json").code == 0


class TestCalibrationOverdueEverywhere:
    """A meter past its calibration due date is named by accept and record as by fit
    (ISO/IEC 17025:2017, 6.4.7, calibration programme; the decision is marked)."""

    @staticmethod
    def _bench(tmp_path):
        from conftest import SAMPLES
        text = (SAMPLES / "accept_bench.toml").read_text(encoding="utf-8")
        p = tmp_path / "old_bench.toml"
        p.write_text(text.replace("calibration_due = 2027-03-01",
                                  "calibration_due = 2026-01-01", 1), encoding="utf-8")
        return p

    def test_accept_terminal_json_and_html(self, cli, tmp_path):
        import json

        from conftest import SAMPLES
        bench = self._bench(tmp_path)
        args = ("accept", SAMPLES / "accept_reel.csv", "--spec", SAMPLES / "accept_spec.toml",
                "--bench", bench)
        term = cli(*args)
        assert "warning: calibration of the" in term.out and "2026-01-01" in term.out
        assert "past its calibration due date" in term.out
        doc = json.loads(cli(*args, "--json").out)
        assert doc["decision_rule"]["calibration_overdue"] is True
        assert any("2026-01-01" in w for w in doc["warnings"])
        cli(*args, "--report", tmp_path / "rep")
        html = next((tmp_path / "rep").glob("*.html")).read_text(encoding="utf-8")
        assert "past its calibration due date" in html and "2026-01-01" in html

    def test_accept_in_date_meter_is_not_marked(self, cli):
        import json

        from conftest import SAMPLES
        doc = json.loads(cli("accept", SAMPLES / "accept_reel.csv", "--spec",
                             SAMPLES / "accept_spec.toml", "--bench",
                             SAMPLES / "accept_bench.toml", "--json").out)
        assert doc["decision_rule"]["calibration_overdue"] is False and not doc["warnings"]

    def test_record_terminal_json_and_history(self, cli, tmp_path):
        import json
        import sqlite3

        from conftest import SAMPLES
        bench = self._bench(tmp_path)
        db = tmp_path / "h.sqlite"
        run = cli("record", SAMPLES / "accept_reel.csv", "--bench", bench, "--db", db)
        assert run.code in (0, 3), run.err  # 3: a board of the reel is not fitted
        assert "warning: calibration of the" in run.out
        doc = json.loads(cli("record", SAMPLES / "accept_reel.csv", "--bench", bench, "--db",
                             tmp_path / "h2.sqlite", "--json").out)
        assert any("2026-01-01" in w for w in doc["warnings"])
        with sqlite3.connect(db) as con:
            stored = [json.loads(r[0]) for r in con.execute("SELECT settings_json FROM "
                                                          + _settings_table(con))]
        assert stored and all(any("2026-01-01" in w for w in s["calibration_warnings"])
                              for s in stored)


def _settings_table(con) -> str:
    for (name,) in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'"):
        cols = [r[1] for r in con.execute(f"PRAGMA table_info({name})")]
        if "settings_json" in cols:
            return name
    raise AssertionError("no table with settings_json")


class TestReportCitesCleanly:
    def test_method_section_has_no_developer_remarks(self, cli, tmp_path):
        from conftest import SAMPLES
        from sagfit.report.fit_report import METHODS
        assert not any("memory" in what + src for what, src in METHODS)
        run = cli("fit", SAMPLES / "pack_a.csv", "--report", tmp_path / "rep")
        assert run.code == 0, run.err
        html = next((tmp_path / "rep").glob("*.html")).read_text(encoding="utf-8")
        assert "from memory" not in html and "Navas" in html


class TestFlagsOneShape:
    def test_accept_json_flags_are_fit_objects(self, cli):
        import json

        from conftest import SAMPLES
        bench = SAMPLES / "accept_bench.toml"
        acc = json.loads(cli("accept", SAMPLES / "accept_reel.csv", "--spec",
                             SAMPLES / "accept_spec.toml", "--bench", bench, "--json").out)
        fit = json.loads(cli("fit", SAMPLES / "accept_reel.csv", "--bench", bench,
                             "--json").out)
        fit_flags = {r["dut"]: r["flags"] for r in fit["results"]}
        flagged = [r for r in acc["results"] if r["flags"]]
        assert flagged, "the demo reel has a flagged board"
        for r in flagged:
            for f in r["flags"]:
                assert set(f) == {"code", "severity", "message"}
                assert f in fit_flags[r["dut"]]


class TestTypeAColumns:
    def test_type_a_fits_show_a_dash_and_say_why(self, cli, tmp_path):
        p = tmp_path / "a.csv"
        p.write_text("dut,load_ohm,voltage_V\n"
                     "A,open,12.0\nA,10,11.94\nA,4.7,11.873\nA,2.2,11.73\n"
                     "B,open,12.1\nB,10,12.03\nB,4.7,11.97\nB,2.2,11.83\n")
        run = cli("fit", p)
        assert run.code == 0, run.err
        rows = [ln for ln in run.out.splitlines() if "ols" in ln and ln.lstrip()[:1] in "AB"]
        cells = [[c.strip() for c in r.split("│")] for r in rows]
        assert len(cells) == 2 and all(c[7] == "—" and c[8] == "—" for c in cells)
        assert "Type A fit" in run.out and "do not apply" in run.out


class TestOptionNames:
    ARGS = ["--max-current", "10A", "--max-power", "25W", "--json"]

    def test_plan_takes_simulates_names_and_keeps_the_old_ones(self, cli):
        new = cli("plan", "--vth", "12.6V", "--rth", "50mohm", *self.ARGS)
        old = cli("plan", "--voltage", "12.6V", "--resistance", "50mohm", *self.ARGS)
        assert new.code == 0 and old.code == 0 and new.out == old.out

    def test_help_shows_one_scheme(self, cli):
        text = cli("plan", "--help").out
        assert "--vth" in text and "--rth" in text
        assert "--voltage " not in text and "--resistance" not in text

    def test_missing_vth_is_a_one_line_error(self, cli):
        run = cli("plan", "--rth", "50mohm")
        assert run.code == 2 and run.err.startswith("error:") and "--vth" in run.err


def _readme_commands():
    """Every `sagfit …` command of the README's shell blocks, continuation lines joined."""
    import re

    from conftest import ROOT
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    cmds = []
    for block in re.findall(r"```(?:sh|console|bash)\n(.*?)```", text, flags=re.S):
        joined = re.sub(r"\\\n\s*", " ", block)
        for line in joined.splitlines():
            line = line.split("  #")[0].strip().removeprefix("$ ")
            if "&&" in line:
                line = line.split("&&")[-1].strip()
            if line.startswith("sagfit "):
                cmds.append(line)
    return cmds


class TestReadmeRunsAsWritten:
    def test_readme_has_commands(self):
        assert len(_readme_commands()) >= 10

    @pytest.mark.slow
    def test_every_command_runs(self, cli, tmp_path, monkeypatch):
        """In order, in a fresh folder holding the sample files (later commands read what
        earlier ones wrote, as a reader following the README would)."""
        import shlex
        import shutil

        from conftest import SAMPLES
        shutil.copytree(SAMPLES, tmp_path / "sample_runs")
        monkeypatch.chdir(tmp_path)
        for cmd in _readme_commands():
            run = cli(*shlex.split(cmd)[1:])
            # accept exits 1/3 for fail/inconclusive boards: a decision, not a bad command
            assert run.code in (0, 1, 3), f"{cmd}: {run.err}"
            assert "Traceback" not in run.err


class TestOnePrefixPerValue:
    def test_interval_takes_the_estimates_prefix(self):
        assert format_estimate(999.98, 0.16, "Ω") == "999.98 ± 0.16 Ω"
        text = format_interval(999.54, 1000.41, "Ω", 0.16, 999.98)
        assert text == "[999.54, 1000.41] Ω"
        assert format_interval(999.54, 1000.41, "Ω", 0.16) == "[0.99954, 1.00041] kΩ"

    def test_fit_table_shows_one_prefix_per_row(self, cli, tmp_path):
        # a source near 1 kΩ, whose interval crosses 1 kΩ (invented readings)
        p = tmp_path / "k.csv"
        p.write_text("load_ohm,voltage_V\nopen,10.000\n10000,9.0912\n4700,8.2450\n"
                     "2200,6.8762\n1000,5.0003\n")
        run = cli("fit", p, "--voltage-accuracy", "0.01%+0.2mV", "--load-tolerance", "0.1%")
        assert run.code == 0, run.err
        row = next(ln for ln in run.out.splitlines() if "internal resistance" in ln)
        assert row.count("kΩ") + row.count(" Ω") == 2
        assert (row.count("kΩ") in (0, 2))


class TestIscPmaxExtrapolated:
    def test_regulator_board_labels_isc_and_pmax(self, cli, tmp_path):
        import json

        from conftest import SAMPLES
        src = SAMPLES / "reg5v_board.csv"
        term = cli("fit", src)
        assert "short-circuit current Isc (extrapolated)" in term.out
        assert "maximum power Pmax (extrapolated)" in term.out
        doc = json.loads(cli("fit", src, "--json").out)
        assert doc["extrapolated"]["isc"] == ["reg5v_board"] == doc["extrapolated"]["pmax"]
        cli("fit", src, "--report", tmp_path / "rep")
        html = next((tmp_path / "rep").glob("*.html")).read_text(encoding="utf-8")
        assert "extrapolated beyond the tested currents" in html

    def test_sweep_to_near_short_is_not_labelled(self):
        from sagfit.core.analysis import fit
        from sagfit.core.extrapolation import extrapolated_isc_pmax
        # invented: 1.5 V cell, Rth 0.5 Ω, swept from open to 2.9 A (Isc = 3 A)
        i = np.array([0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 2.9])
        r = Readings.from_arrays(voltage=1.5 - 0.5 * i, current=i)
        ex_isc, ex_pmax = extrapolated_isc_pmax(fit(r), r)
        assert not ex_isc[0] and not ex_pmax[0]
        r2 = Readings.from_arrays(voltage=1.5 - 0.5 * i[:3], current=i[:3])
        ex_isc, ex_pmax = extrapolated_isc_pmax(fit(r2), r2)
        assert ex_isc[0] and ex_pmax[0]


def test_dut_option_help_wording(cli):
    text = " ".join(cli("fit", "--help").out.split())
    assert "Only these DUTs, e.g. 'A1' or 'A1,A7'." in text


class TestQuiet:
    @pytest.mark.parametrize("cmd", ["fit", "accept", "record"])
    def test_quiet_drops_cautions_in_the_terminal_only(self, cli, tmp_path, cmd):
        import json

        from conftest import SAMPLES
        src = SAMPLES / "pack_a.csv"
        extra = {"fit": [], "accept": ["--spec", SAMPLES / "accept_spec.toml"],
                 "record": ["--db", tmp_path / "h.sqlite"]}[cmd]
        loud = cli(cmd, src, *extra, "--bench", SAMPLES / "bench.toml")
        assert "caution:" in loud.out
        if cmd == "record":
            extra = ["--db", tmp_path / "h2.sqlite"]
        quiet = cli(cmd, src, *extra, "--bench", SAMPLES / "bench.toml", "--quiet")
        assert quiet.code == loud.code and "caution:" not in quiet.out
        if cmd == "record":
            extra = ["--db", tmp_path / "h3.sqlite"]
        doc = json.loads(cli(cmd, src, *extra, "--bench", SAMPLES / "bench.toml", "--quiet",
                             "--json").out)
        assert doc["cautions"]


class TestCautionsFollowTheData:
    def test_electronic_load_readings_raise_no_hot_resistor_caution(self, cli, tmp_path):
        p = tmp_path / "iv.csv"  # invented: electronic-load sweep, 70 W at the last step
        p.write_text("current_A,voltage_V\n0,12.0\n2,11.9\n4,11.8\n6,11.7\n")
        run = cli("fit", p)
        assert "Hot load resistors" not in run.out

    def test_resistor_readings_still_warn(self, cli, tmp_path):
        p = tmp_path / "r.csv"  # invented: 12 V source into 2 Ω, about 70 W in the resistor
        p.write_text("load_ohm,voltage_V\nopen,12.0\n10,11.94\n4.7,11.87\n2,11.7\n")
        run = cli("fit", p)
        assert "Hot load resistors" in run.out

    def test_short_circuit_caution_does_not_assume_a_battery(self, cli, tmp_path):
        p = tmp_path / "iv.csv"
        p.write_text("current_A,voltage_V\n0,12.0\n2,11.9\n4,11.8\n6,11.7\n")
        run = cli("fit", p)
        assert "High prospective short-circuit current" in run.out
        assert "battery" not in run.out
