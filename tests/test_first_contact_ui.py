"""First-contact cases of the terminal, the reports and the Python API: instruments listed
only when they entered the result, cautions that follow the data, tables on a narrow
terminal, one naming scheme, the default bench profile (all data invented)."""

from __future__ import annotations

import json

import pytest

from conftest import SAMPLES

# invented: an ammeter that a (R, V) sweep never uses, calibration long overdue
BENCH_UNUSED_AMMETER = """\
[voltage]
accuracy = "0.015%+2mV"
instrument = "DMM-Q1"
calibration_due = 2027-05-01

[current]
accuracy = "0.2%+1mA"
instrument = "SHUNT-Q9"
calibration_due = 2020-01-01
"""


class TestInstrumentsThatEnteredTheResult:
    def test_unused_ammeter_is_not_listed(self, cli, tmp_path):
        """Readings with I = V/R list the voltmeter only: terminal, JSON and report."""
        bench = tmp_path / "bench.toml"
        bench.write_text(BENCH_UNUSED_AMMETER)
        src = SAMPLES / "pack_a.csv"  # load_ohm, voltage_V
        doc = json.loads(cli("fit", src, "--bench", bench, "--json").out)
        ids = [row["identifier"] for row in doc["traceability"]["instruments"]]
        assert ids == ["DMM-Q1"]
        assert not doc["traceability"]["warnings"]
        term = cli("fit", src, "--bench", bench)
        assert "SHUNT-Q9" not in term.out
        cli("fit", src, "--bench", bench, "--report", tmp_path / "rep")
        html = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
        assert "DMM-Q1" in html and "SHUNT-Q9" not in html

    def test_measured_current_keeps_the_ammeter(self, cli, tmp_path):
        """(I, V) readings use both meters, and the overdue ammeter is reported."""
        bench = tmp_path / "bench.toml"
        bench.write_text(BENCH_UNUSED_AMMETER)
        p = tmp_path / "iv.csv"
        p.write_text("# date: 2026-11-03\ncurrent_A,voltage_V\n0,12.0\n0.5,11.97\n"
                     "1,11.95\n1.5,11.92\n")
        doc = json.loads(cli("fit", p, "--bench", bench, "--json").out)
        ids = [row["identifier"] for row in doc["traceability"]["instruments"]]
        assert ids == ["DMM-Q1", "SHUNT-Q9"]
        assert any("SHUNT-Q9" in w for w in doc["traceability"]["warnings"])

    def test_accept_lists_only_the_voltmeter(self, cli, tmp_path):
        bench = tmp_path / "bench.toml"
        bench.write_text(BENCH_UNUSED_AMMETER)
        run = cli("accept", SAMPLES / "pack_a.csv", "--spec", SAMPLES / "accept_spec.toml",
                  "--bench", bench, "--json")
        doc = json.loads(run.out)
        assert "SHUNT-Q9" not in json.dumps(doc)


class TestCautionsFollowTheSource:
    def test_regulator_board_caution_says_extrapolated_not_melting(self, cli):
        """A 5 V board tested to 1.5 A: the 132 A is called an extrapolation, without the
        'melt tools' wording of a source seen delivering its current."""
        run = cli("fit", SAMPLES / "reg5v_board.csv")
        line = next(ln for ln in run.out.splitlines() if "short-circuit" in ln
                    and ln.startswith("caution:"))
        assert "(extrapolated)" in line and "tested up to 1.5 A" in line
        assert "melt" not in run.out and "battery" not in run.out

    def test_below_knee_uses_the_limit_not_the_line(self, cli, tmp_path):
        """A 12 V supply seen limiting at 1 A, refitted below the knee: the line's 860 A
        raises no short-circuit caution."""
        rows = ["load_ohm,voltage_V,current_A", "open,12.0000,0.0000"]
        for r in (100, 47, 33, 22, 18, 15, 12.5):
            i = 12 / (r + 0.014)
            rows.append(f"{r},{12 - 0.014 * i:.4f},{i:.4f}")
        rows += [f"{r},{r:.4f},1.0000" for r in (10, 8.2, 6.8, 5.6, 4.7)]
        p = tmp_path / "limit.csv"
        p.write_text("\n".join(rows) + "\n")
        run = cli("fit", p, "--below-knee", "--voltage-accuracy", "0.01%+1mV",
                  "--current-accuracy", "0.1%+1mA")
        assert run.code == 0, run.err
        assert "short-circuit current Isc (extrapolated)" in run.out
        assert "High prospective short-circuit current" not in run.out

    def test_record_gives_its_cautions_once_per_run(self, cli, tmp_path):
        """Three files in one record run: each recorded, the cautions printed once."""
        import shutil
        files = []
        for k in range(3):
            files.append(tmp_path / f"pack{k}.csv")
            shutil.copy(SAMPLES / "pack_a.csv", files[-1])
        run = cli("record", *files, "--db", tmp_path / "h.sqlite")
        assert run.code == 0, run.err
        assert run.out.count("recorded 1 DUT(s)") == 3
        assert "(1 record in all)" in run.out and "(3 records in all)" in run.out
        assert run.out.count("High prospective short-circuit current") == 1
        assert run.out.count("Hot load resistors") == 1
        assert run.out.count("not a safety assessment") == 1
        doc = json.loads(cli("record", *files, "--db", tmp_path / "h2.sqlite", "--json").out)
        assert len(doc["runs"]) == 3 and len(doc["cautions"]) == 3
        assert all("cautions" not in r for r in doc["runs"])

    def test_record_of_a_bad_second_file_records_nothing(self, cli, tmp_path):
        bad = tmp_path / "bad.csv"
        bad.write_text("load_ohm,voltage_V\nopen,12.7\n10,x\n")
        run = cli("record", SAMPLES / "pack_a.csv", bad, "--db", tmp_path / "h.sqlite")
        assert run.code == 2 and "bad.csv" in run.err
        assert not (tmp_path / "h.sqlite").exists()


class TestPowerFigure:
    @staticmethod
    def _band_and_labels(fig):
        ax = fig.axes[0]
        band = ax.collections[0].get_paths()[0].vertices
        labels = [t.get_text() for leg in fig.legends for t in leg.get_texts()]
        return band, labels, ax

    def test_regulator_peak_is_labelled_extrapolated(self):
        """A 5 V board tested to 1.5 A: the 166 W peak is marked extrapolated, the
        region below the smallest tested load is shaded and labelled."""
        import sagfit
        from sagfit.report.plots import power_figure
        r = sagfit.read_readings(SAMPLES / "reg5v_board.csv")
        band, labels, ax = self._band_and_labels(power_figure(r, sagfit.fit(r), 0))
        assert any(lb.startswith("maximum power at R = Rth (extrapolated)") for lb in labels)
        assert any(lb.startswith("extrapolated: loads below") for lb in labels)
        assert ax.get_ylim()[0] == 0.0

    def test_band_never_below_zero(self):
        """A poorly determined source: the k·u band stops at zero power."""
        import numpy as np

        from sagfit.core.readings import Readings
        from sagfit.report.plots import power_figure
        # invented: three noisy readings, a wide band
        rd = Readings.from_arrays(voltage=[5.0, 4.6, 4.75], current=[0.0, 0.5, 1.0])
        import sagfit
        fig = power_figure(rd, sagfit.fit(rd), 0)
        band, labels, _ = self._band_and_labels(fig)
        assert np.nanmin(band[:, 1]) >= 0.0

    def test_sweep_through_the_peak_is_not_labelled(self):
        """A cell swept past R = Rth: the peak was measured and is not labelled."""
        import numpy as np

        from sagfit.core.readings import Readings
        from sagfit.report.plots import power_figure
        import sagfit
        i = np.array([0.0, 0.5, 1.0, 1.5, 2.0, 2.5])  # invented: Isc = 3 A
        rd = Readings.from_arrays(voltage=1.5 - 0.5 * i, current=i, u_voltage=[0.001] * 6)
        band, labels, _ = self._band_and_labels(power_figure(rd, sagfit.fit(rd), 0))
        assert any(lb.startswith("maximum power at R = Rth:") for lb in labels)


@pytest.fixture
def terminal(monkeypatch):
    """Pretend stdout is an interactive terminal of a given width."""
    import sagfit.cli.common as common

    def at(width: int):
        monkeypatch.setattr(common, "interactive", lambda: True)
        monkeypatch.setenv("COLUMNS", str(width))
    return at


def _table_lines(text):
    return [ln for ln in text.splitlines() if "│" in ln or "┃" in ln]


class TestNarrowTerminal:
    def test_fit_table_fits_80_columns_without_cutting_numbers(self, cli, terminal):
        """Six packs on 80 columns: the empty flags column and the least important ones
        are left out and named; every number shown is whole (no '…')."""
        terminal(80)
        run = cli("fit", SAMPLES / "fleet_packs.csv", "--bench", SAMPLES / "bench.toml",
                  "--quiet")
        assert run.code == 0, run.err
        lines = _table_lines(run.out)
        assert lines and max(len(ln) for ln in lines) <= 80
        assert "…" not in run.out.split("Uncertainties")[0]
        assert "12.7404 ± 0.0017 V" in run.out and "21.479 ± 0.054 mΩ" in run.out
        assert "left out to fit 80 columns: flags" in run.out
        assert "--wide" in run.out

    def test_wide_and_piped_show_every_column(self, cli, terminal):
        src, bench = SAMPLES / "fleet_packs.csv", SAMPLES / "bench.toml"
        piped = cli("fit", src, "--bench", bench, "--quiet")
        assert "flags" in piped.out and "Pmax" in piped.out and "left out" not in piped.out
        terminal(80)
        wide = cli("fit", src, "--bench", bench, "--quiet", "--wide")
        assert "flags" in wide.out and "Pmax" in wide.out and "left out" not in wide.out

    def test_accept_decision_never_cut(self, cli, terminal):
        """'inconclusive (flagged)' wraps at its space rather than losing letters."""
        terminal(80)
        run = cli("accept", SAMPLES / "accept_reel.csv", "--spec",
                  SAMPLES / "accept_spec.toml", "--bench", SAMPLES / "accept_bench.toml",
                  "--quiet")
        lines = _table_lines(run.out)
        assert max(len(ln) for ln in lines) <= 80
        table = "\n".join(lines)
        assert "inconclusi…" not in table and "…" not in table
        assert "inconclusive" in table

    def test_trend_dates_never_cut(self, cli, terminal, tmp_path):
        """The projected crossing dates stay whole on 80 columns."""
        import re
        db = tmp_path / "h.sqlite"
        files = sorted((SAMPLES / "fleet_history").glob("string_A_*.csv"))
        assert cli("record", *files, "--db", db, "--bench",
                   SAMPLES / "fleet_history" / "bench.toml", "--quiet").code == 0
        wide = cli("trend", "--db", db, "--json")
        dates = {r["projected_crossing"] for r in json.loads(wide.out)["results"]} - {None}
        terminal(80)
        run = cli("trend", "--db", db)
        lines = _table_lines(run.out)
        assert max(len(ln) for ln in lines) <= 80
        assert "…" not in "\n".join(lines)
        shown = set(re.findall(r"\d{4}-\d{2}-\d{2}", "\n".join(lines)))
        assert shown and all(len(d) == 10 for d in shown)
        assert dates and dates <= shown  # every projected date, whole

    @pytest.mark.parametrize("args", [
        ["plan", "--vth", "12.6V", "--rth", "50mohm", "--max-current", "10A",
         "--max-power", "25W"],
        ["simulate-predict"],
    ])
    def test_predict_and_plan_fit_80_columns(self, cli, terminal, tmp_path, args):
        if args == ["simulate-predict"]:
            res = tmp_path / "fit.json"
            assert cli("fit", SAMPLES / "fleet_packs.csv", "--bench", SAMPLES / "bench.toml",
                       "--out", res).code == 0
            args = ["predict", res, "--load", "1,2.2,open", "--dut", "PK-07"]
        terminal(80)
        run = cli(*args)
        assert run.code == 0, run.err
        lines = _table_lines(run.out)
        assert lines and max(len(ln) for ln in lines) <= 80
        assert "…" not in "\n".join(lines)


class TestOneReportScheme:
    def test_three_reports_share_names_and_style(self, cli, tmp_path):
        """fit, accept and trend reports: report.html, results.json/csv, fig-*.png, and the
        same style sheet inline."""
        from sagfit.report.style import STYLESHEET
        cli("fit", SAMPLES / "pack_a.csv", "--report", tmp_path / "f", "--quiet")
        cli("accept", SAMPLES / "pack_a.csv", "--spec", SAMPLES / "accept_spec.toml",
            "--report", tmp_path / "a", "--quiet")
        db = tmp_path / "h.sqlite"
        files = sorted((SAMPLES / "fleet_history").glob("string_A_*.csv"))[:3]
        cli("record", *files, "--db", db, "--quiet")
        cli("trend", "--db", db, "--dut", "C05", "--report", tmp_path / "t")
        for sub in "fat":
            names = {p.name for p in (tmp_path / sub).iterdir()}
            assert {"report.html", "results.json", "results.csv"} <= names, sub
            pngs = [n for n in names if n.endswith(".png")]
            assert pngs and all(n.startswith("fig-") for n in pngs), (sub, pngs)
            page = (tmp_path / sub / "report.html").read_text(encoding="utf-8")
            assert STYLESHEET in page
        assert (tmp_path / "t" / "fig-C05-trend.png").exists()
        assert (tmp_path / "a" / "fig-histogram-vth.png").exists()


class TestBatchFigure:
    def test_fit_report_has_the_batch_figure_without_flags(self, cli, tmp_path):
        """Six packs, none flagged: the report still shows every DUT in one figure."""
        run = cli("fit", SAMPLES / "fleet_packs.csv", "--bench", SAMPLES / "bench.toml",
                  "--report", tmp_path / "r", "--figures", "none", "--quiet")
        assert run.code == 0, run.err
        assert (tmp_path / "r" / "fig-batch-vth-rth.png").exists()
        page = (tmp_path / "r" / "report.html").read_text(encoding="utf-8")
        assert "Vth against Rth of the 6 fitted DUTs" in page

    def test_many_duts_make_a_few_artists(self):
        """2,000 DUTs: one point set and one bar collection per group, not 2,000 lines."""
        import numpy as np

        from sagfit.core.fit import fit_lines
        from sagfit.core.readings import Readings
        from sagfit.report.plots import batch_figure
        rng = np.random.default_rng(21)  # invented batch, seeded
        m, i = 2000, np.array([0.0, 1.0, 2.0, 3.0])
        vth = rng.normal(5.0, 0.01, m)[:, None]
        rth = rng.normal(0.05, 0.004, m)[:, None]
        v = (vth - rth * i + rng.normal(0, 1e-4, (m, 4))).ravel()
        rd = Readings.from_arrays(voltage=v, current=np.tile(i, m), u_voltage=np.full(4 * m, 1e-4),
                                  dut=np.repeat([f"B{j}" for j in range(m)], 4))
        fits = fit_lines(rd)
        hl = np.arange(m) < 10
        fig = batch_figure(fits, highlight=hl)
        ax = fig.axes[0]
        assert len(ax.lines) <= 2 and len(ax.collections) <= 4
        pts = sum(len(ln.get_xdata()) for ln in ax.lines)
        assert pts == m
        labels = [t.get_text() for t in ax.get_legend().get_texts()]
        assert any("(1990)" in lb for lb in labels) and any("(10)" in lb for lb in labels)


class TestPythonApi:
    def test_to_dataframe_has_the_csv_columns(self, tmp_path):
        """One row per DUT, the same columns and values as results.csv."""
        import pandas as pd

        import sagfit
        from sagfit.io.readings_csv import fits_csv
        r = sagfit.read_readings(SAMPLES / "fleet_packs.csv")
        fits = sagfit.fit(r)
        df = fits.to_dataframe()
        (tmp_path / "r.csv").write_bytes(b"".join(fits_csv(fits)))
        csv = pd.read_csv(tmp_path / "r.csv", keep_default_na=False)
        assert list(df.columns) == list(csv.columns) and len(df) == len(fits) == 6
        assert df["dut"].tolist() == list(fits.duts)
        assert df["rth"].to_numpy() == pytest.approx(csv["rth"].to_numpy(), rel=1e-15)
        assert df["flags"].tolist() == csv["flags"].tolist()

    def test_repr_html_lists_duts_and_escapes(self):
        import numpy as np

        import sagfit
        from sagfit.core.readings import Readings
        i = np.array([0.0, 1.0, 2.0])
        rd = Readings.from_arrays(voltage=np.r_[5.0 - 0.05 * i, 5.1 - 0.06 * i],
                                  current=np.r_[i, i], u_voltage=np.full(6, 1e-3),
                                  dut=["<b>x</b>"] * 3 + ["B2"] * 3)
        page = sagfit.fit(rd)._repr_html_()
        assert "&lt;b&gt;x&lt;/b&gt;" in page and "<b>x</b>" not in page
        assert page.count("<tr>") == 3 and "± " in page and "mΩ" in page

    def test_import_stays_lean_and_plots_are_public(self):
        """`import sagfit` loads neither pandas nor matplotlib; sagfit.plots is public."""
        import subprocess
        import sys
        code = ("import sys, sagfit; assert 'pandas' not in sys.modules; "
                "assert 'matplotlib' not in sys.modules; "
                "assert 'plots' in sagfit.__all__; "
                "from sagfit import plots; print(plots.batch_figure.__name__)")
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
        assert out.returncode == 0, out.stderr
        assert out.stdout.strip() == "batch_figure"

    def test_figures_take_a_dut_name(self):
        import sagfit
        from sagfit import plots
        r = sagfit.read_readings(SAMPLES / "fleet_packs.csv")
        fits = sagfit.fit(r)
        for fn in (plots.fit_figure, plots.residual_figure, plots.power_figure):
            by_name, by_index = fn(r, fits, "PK-12"), fn(r, fits, 5)
            a = by_name.axes[0].lines[0].get_ydata()
            b = by_index.axes[0].lines[0].get_ydata()
            assert type(by_name).__name__ == "Figure" and list(a) == list(b)


class TestDefaultBenchProfile:
    @pytest.mark.parametrize("platform, env, expect", [
        ("linux", {"HOME": "/h/ann", "XDG_CONFIG_HOME": "/cfg"}, "/cfg/sagfit/bench.toml"),
        ("linux", {"HOME": "/h/ann"}, "/h/ann/.config/sagfit/bench.toml"),
        ("linux", {"HOME": "/h/ann", "XDG_CONFIG_HOME": "rel"},
         "/h/ann/.config/sagfit/bench.toml"),
        ("darwin", {"HOME": "/Users/ann"},
         "/Users/ann/Library/Application Support/sagfit/bench.toml"),
        ("win32", {"APPDATA": r"C:\\Users\\ann\\AppData\\Roaming"},
         r"C:\\Users\\ann\\AppData\\Roaming/sagfit/bench.toml"),
    ])
    def test_platform_places(self, platform, env, expect):
        from pathlib import Path

        from sagfit.io.bench import user_bench_path
        assert user_bench_path(env, platform) == Path(expect)

    @staticmethod
    def _user_profile(tmp_path, monkeypatch, text):
        cfg = tmp_path / "cfg"
        (cfg / "sagfit").mkdir(parents=True)
        (cfg / "sagfit" / "bench.toml").write_text(text)
        monkeypatch.setenv("XDG_CONFIG_HOME", str(cfg))
        return cfg / "sagfit" / "bench.toml"

    def test_user_profile_applies_and_is_named(self, cli, tmp_path, monkeypatch):
        prof = self._user_profile(tmp_path, monkeypatch, BENCH_UNUSED_AMMETER)
        run = cli("fit", SAMPLES / "pack_a.csv", "--quiet")
        assert run.out.startswith(f"bench profile: {prof} (the user's default")
        doc = json.loads(cli("fit", SAMPLES / "pack_a.csv", "--json").out)
        assert doc["settings"]["bench"] == str(prof)
        assert doc["settings"]["bench_source"] == "user configuration"
        assert doc["settings"]["voltage_accuracy"]["text"] == "0.015%+2mV"

    def test_environment_variable_wins_and_option_wins_over_both(self, cli, tmp_path,
                                                               monkeypatch):
        self._user_profile(tmp_path, monkeypatch, BENCH_UNUSED_AMMETER)
        env_prof = tmp_path / "env.toml"
        env_prof.write_text('[voltage]\naccuracy = "0.05%+5mV"\n')
        monkeypatch.setenv("SAGFIT_BENCH", str(env_prof))
        doc = json.loads(cli("fit", SAMPLES / "pack_a.csv", "--json").out)
        assert doc["settings"]["bench_source"] == "SAGFIT_BENCH"
        assert doc["settings"]["voltage_accuracy"]["text"] == "0.05%+5mV"
        run = cli("fit", SAMPLES / "pack_a.csv", "--quiet")
        assert "($SAGFIT_BENCH;" in run.out.splitlines()[0]
        doc = json.loads(cli("fit", SAMPLES / "pack_a.csv", "--json", "--bench",
                             SAMPLES / "bench.toml").out)
        assert doc["settings"]["bench_source"] == "--bench"
        named = cli("fit", SAMPLES / "pack_a.csv", "--bench", SAMPLES / "bench.toml", "-q")
        assert not named.out.startswith("bench profile:")
        doc = json.loads(cli("fit", SAMPLES / "pack_a.csv", "--json", "--bench", "none").out)
        assert doc["settings"]["bench"] is None and doc["settings"]["voltage_accuracy"] is None

    def test_missing_environment_profile_is_a_one_line_error(self, cli, tmp_path,
                                                             monkeypatch):
        monkeypatch.setenv("SAGFIT_BENCH", str(tmp_path / "nope.toml"))
        run = cli("fit", SAMPLES / "pack_a.csv")
        assert run.code == 2 and run.err.startswith("error: SAGFIT_BENCH=")
        assert len(run.err.splitlines()) == 1

    @pytest.mark.parametrize("cmd", ["accept", "record", "plan"])
    def test_other_commands_use_it(self, cli, tmp_path, monkeypatch, cmd):
        prof = self._user_profile(tmp_path, monkeypatch, BENCH_UNUSED_AMMETER)
        args = {"accept": ["accept", SAMPLES / "pack_a.csv", "--spec",
                           SAMPLES / "accept_spec.toml"],
                "record": ["record", SAMPLES / "pack_a.csv", "--db", tmp_path / "h.sqlite"],
                "plan": ["plan", "--vth", "12.6V", "--rth", "50mohm", "--max-current", "10A",
                         "--max-power", "25W"]}[cmd]
        run = cli(*args, "--quiet") if cmd != "plan" else cli(*args)
        assert run.out.startswith(f"bench profile: {prof}"), run.err

    def test_the_developers_own_profile_never_leaks(self):
        """The suite's autouse fixture: no SAGFIT_BENCH, no user profile found."""
        from sagfit.io.bench import default_bench
        assert default_bench() == (None, "")


def _axis_unit(fig, which="y"):
    import re
    fig.canvas.draw()
    ax = fig.axes[0]
    label = (ax.yaxis if which == "y" else ax.xaxis).label.get_text()
    return re.search(r"\(([^)]*)\)$", label).group(1)


class TestOneUnitPerAxisAndLegend:
    def test_axis_near_a_decade_takes_the_legends_prefix(self):
        """Values 538…990 µΩ: ticks up to 1000 would choose mΩ; locked to the legend's
        µΩ, axis and legend read alike."""
        import numpy as np

        from sagfit.report.plots import format_like, house_style, new_figure, si_axis
        y = np.array([538e-6, 700e-6, 890e-6, 990e-6])
        with house_style():
            fig, ax = new_figure()
            ax.plot(np.arange(4), y)
            like = float(y.max())
            ax.axhline(807.6e-6, label=f"threshold {format_like(807.6e-6, 'Ω', like)}")
            si_axis(ax, "y", "Ω", "Internal resistance", like=like)
        assert _axis_unit(fig) == "µΩ"
        assert ax.get_legend_handles_labels()[1][0] == "threshold 807.6 µΩ"

    def test_knee_and_power_legends_use_the_axis_units(self):
        import re

        import sagfit
        from sagfit import plots
        r = sagfit.read_readings(SAMPLES / "bench_supply_limit.csv")
        fits = sagfit.fit(r)
        fig = plots.fit_figure(r, fits, 0)
        knee = next(lb for lb in fig.axes[0].get_legend_handles_labels()[1]
                    if lb.startswith("knee at"))
        x_unit, y_unit = _axis_unit(fig, "x"), _axis_unit(fig, "y")
        assert re.fullmatch(rf"knee at [\d.]+ {x_unit}, [\d.]+ {y_unit}", knee), knee
        fig = plots.power_figure(r, fits, 0)
        star = next(lb for lb in fig.axes[0].get_legend_handles_labels()[1]
                    if lb.startswith("maximum power"))
        assert f" {_axis_unit(fig)} at " in star


class TestOutOnEveryCommand:
    """`--out x.csv|x.json` on every command that produces results."""

    def test_predict_plan_trend_design_write_csv_and_json(self, cli, tmp_path):
        import csv as csvmod
        fit_json = tmp_path / "fit.json"
        assert cli("fit", SAMPLES / "fleet_packs.csv", "--out", fit_json, "-q").code == 0
        db = tmp_path / "h.sqlite"
        files = sorted((SAMPLES / "fleet_history").glob("string_A_*.csv"))[:3]
        assert cli("record", *files, "--db", db, "-q").code == 0
        net = tmp_path / "d.cir"  # invented divider
        net.write_text("* divider\nV1 in 0 DC 12 tol=1%\nR1 in tap 2k tol=1%\n"
                       "R2 tap 0 2k tol=1%\n.port tap 0\n")
        runs = {
            "predict": ["predict", fit_json, "--load", "1,open"],
            "plan": ["plan", "--vth", "12.6V", "--rth", "50mohm", "--max-current", "10A",
                     "--max-power", "25W"],
            "trend": ["trend", "--db", db],
            "design": ["design", net, "--draws", "200"],
        }
        rows = {"predict": 12, "plan": 6, "trend": 16}
        for name, args in runs.items():
            for ext in ("csv", "json"):
                out = tmp_path / f"{name}.{ext}"
                run = cli(*args, "--out", out)
                assert run.code in (0, 1), (name, run.err)
                text = out.read_text(encoding="utf-8")
                if ext == "json":
                    doc = json.loads(text)
                    assert doc == json.loads(cli(*args, "--json").out), name
                elif name in rows:
                    table = list(csvmod.DictReader(text.splitlines()))
                    assert len(table) == rows[name], name
            bad = cli(*args, "--out", tmp_path / f"{name}.txt")
            assert bad.code == 2 and "--out" in bad.err, name

    def test_predict_csv_marks_open_circuit_by_an_empty_load(self, cli, tmp_path):
        import csv as csvmod
        fit_json = tmp_path / "fit.json"
        cli("fit", SAMPLES / "pack_a.csv", "--out", fit_json, "-q")
        cli("predict", fit_json, "--load", "open,2.2", "--out", tmp_path / "p.csv")
        table = list(csvmod.DictReader((tmp_path / "p.csv").read_text().splitlines()))
        assert [r["load_ohm"] for r in table] == ["", "2.2"]
        assert float(table[0]["current_A"]) == 0.0

    def test_report_option_reads_alike_everywhere(self, cli):
        for cmd in ("fit", "accept", "trend"):
            text = " ".join(cli(cmd, "--help").out.split())
            assert ("Write a report into this folder: report.html with figures, "
                    "results.json, results.csv, PNGs.") in text, cmd

    def test_dut_option_reads_alike_everywhere(self, cli):
        """The same --dut help on every command that has it."""
        for cmd in ("fit", "predict", "accept", "record", "trend"):
            text = " ".join(cli(cmd, "--help").out.split())
            assert "Only these DUTs, e.g. 'A1' or 'A1,A7'." in text, cmd


class TestReportCautionsFollowTheData:
    def test_electronic_load_report_has_no_resistor_or_battery_reminder(self, cli, tmp_path):
        """A regulator swept with an electronic load (I, V): the report's standing
        reminders speak of neither load resistors nor battery packs."""
        p = tmp_path / "iv.csv"  # invented: 5 V regulator, electronic-load sweep
        p.write_text("current_A,voltage_V\n0,5.021\n0.5,5.002\n1.0,4.983\n1.5,4.964\n")
        assert cli("fit", p, "--report", tmp_path / "r", "-q").code == 0
        page = (tmp_path / "r" / "report.html").read_text(encoding="utf-8")
        assert "never measure it by shorting the terminals" in page
        assert "Load resistors get hot" not in page and "Battery packs" not in page

    def test_resistor_report_keeps_the_resistor_reminder(self, cli, tmp_path):
        assert cli("fit", SAMPLES / "pack_a.csv", "--report", tmp_path / "r", "-q").code == 0
        page = (tmp_path / "r" / "report.html").read_text(encoding="utf-8")
        assert "Load resistors get hot" in page


class TestDistributionOption:
    def test_simulate_and_design_share_the_name(self, cli, tmp_path):
        """simulate --distribution as design's; --errors kept working, hidden."""
        base = ["simulate", "--vth", "12", "--rth", "50m", "--loads", "open,10,4.7",
                "--voltage-accuracy", "0.05%+2mV", "--out", "-"]
        new = cli(*base, "--distribution", "normal")
        old = cli(*base, "--errors", "normal")
        assert new.code == old.code == 0
        body = [ln for ln in new.out.splitlines() if not ln.startswith("# INVENTED")]
        assert body == [ln for ln in old.out.splitlines() if not ln.startswith("# INVENTED")]
        assert "--distribution normal" in new.out.splitlines()[0]
        same = cli(*base, "--distribution", "uniform").out.splitlines()[1:]
        assert same == cli(*base).out.splitlines()[1:]
        help_text = cli("simulate", "--help").out
        assert "--distribution" in help_text and "--errors" not in help_text
        net = tmp_path / "d.cir"  # invented divider
        net.write_text("V1 in 0 DC 12 tol=1%\nR1 in tap 2k tol=1%\nR2 tap 0 2k tol=1%\n"
                       ".port tap 0\n")
        a = json.loads(cli("design", net, "--draws", "200", "--distribution", "rectangular",
                           "--json").out)
        b = json.loads(cli("design", net, "--draws", "200", "--json").out)
        assert a == b
