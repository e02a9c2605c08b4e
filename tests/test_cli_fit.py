"""`sagfit fit` end to end: output shapes, files, options, exit codes (plumbing; the numbers
themselves are checked against references in test_fit.py)."""

import csv
import io
import json
import pathlib
import subprocess
import sys

import pytest

from conftest import SAMPLES, digest

PACK = SAMPLES / "pack_a.csv"
FLEET = SAMPLES / "fleet_packs.csv"
BENCH = SAMPLES / "bench.toml"
REQUIRED = ["dut", "method", "n", "vth", "vth_u", "vth_ci_low", "vth_ci_high", "rth", "rth_u",
            "rth_ci_low", "rth_ci_high", "flags"]


class TestJson:
    def test_document_shape(self, cli):
        """--json prints one document with the promised keys, SI units, nothing else on stdout."""
        run = cli("fit", FLEET, "--bench", BENCH, "--json")
        assert run.code == 0, run.err
        doc = json.loads(run.out)
        assert doc["tool"] == "sagfit" and doc["confidence"] == 0.95 and doc["version"]
        assert len(doc["results"]) == 6
        r = doc["results"][0]
        for key in ("dut", "n", "method", "vth", "rth", "isc", "pmax", "corr_vth_rth", "chi2",
                    "dof", "p_value", "flags"):
            assert key in r
        for q in ("vth", "rth", "isc", "pmax"):
            assert set(r[q]) >= {"value", "u", "ci"} and len(r[q]["ci"]) == 2
        assert r["method"] == "york"
        assert 12 < r["vth"]["value"] < 13 and 0.01 < r["rth"]["value"] < 0.05
        assert doc["input"]["sha256"] == digest(FLEET)

    def test_no_uncertainty_gives_null_p(self, cli):
        """Without stated uncertainty the method is ols and p_value is null."""
        doc = json.loads(cli("fit", PACK, "--json").out)
        assert doc["results"][0]["method"] == "ols" and doc["results"][0]["p_value"] is None

    def test_confidence_changes_intervals(self, cli):
        """--confidence 0.99 widens the interval by z(0.995)/z(0.975)."""
        a = json.loads(cli("fit", PACK, "--bench", BENCH, "--json").out)["results"][0]["vth"]
        b = json.loads(cli("fit", PACK, "--bench", BENCH, "--json", "--confidence", "0.99")
                       .out)["results"][0]["vth"]
        wa, wb = a["ci"][1] - a["ci"][0], b["ci"][1] - b["ci"][0]
        # the bench's meters are shared by the sweep: k comes from the distribution of the
        # sum (a rectangular part, Type A with ν = n − 2), not from z alone; the interval
        # still widens, and it is the value ± k·u of the stated k
        assert wb > 1.2 * wa
        ka = json.loads(cli("fit", PACK, "--bench", BENCH, "--json").out)["results"][0][
            "coverage_factor"]
        assert wa == pytest.approx(2 * ka * a["u"], rel=1e-9)
        c = json.loads(cli("fit", PACK, "--bench", BENCH, "--json", "--independent-errors",
                           "--confidence", "0.99").out)["results"][0]["vth"]
        d = json.loads(cli("fit", PACK, "--bench", BENCH, "--json", "--independent-errors")
                       .out)["results"][0]["vth"]
        # independent errors: the normal quantile ratio, as before
        assert (c["ci"][1] - c["ci"][0]) / (d["ci"][1] - d["ci"][0]) == pytest.approx(
            2.5758293035489 / 1.959963984540054, rel=1e-9)


class TestLargeBatchJson:
    """Above outputs.JSON_BIG DUTs the document is encoded in pieces, never held whole as
    Python objects; its text must be exactly what json.dumps gives for the whole document
    (plumbing test: the standard library's encoder is the reference)."""

    @pytest.fixture(scope="class")
    @staticmethod
    def batch(tmp_path_factory):
        from sagfit.core.simulate import run_csv_text, simulate
        from sagfit.core.units import parse_accuracy

        run = simulate(12.6, 0.05, [float("inf"), 10, 4.7, 2.2, 1.0], duts=130, seed=4,
                       vth_spread=0.01, rth_spread=0.2,
                       voltage_accuracy=parse_accuracy("0.015%+2mV", "V"), load_tolerance=1.0)
        path = tmp_path_factory.mktemp("big") / "batch.csv"
        path.write_text(run_csv_text(run, ["INVENTED test data"]))
        return path

    def test_pieces_equal_one_dump(self, cli, monkeypatch, tmp_path, batch):
        import sagfit.io.outputs as outputs

        args = ("fit", batch, "--voltage-accuracy", "0.015%+2mV", "--load-tolerance", "1%",
                "--json")
        whole = cli(*args).out  # 130 DUTs: below JSON_BIG, one piece, indented
        doc = json.loads(whole)
        assert len(doc["results"]) == 130 and whole.startswith('{\n  "tool"')
        monkeypatch.setattr(outputs, "JSON_BIG", 100)
        monkeypatch.setattr(outputs, "JSON_PIECE_DUTS", 32)  # five pieces, the last short
        pieced = cli(*args).out
        assert pieced == json.dumps(doc, ensure_ascii=False, allow_nan=False) + "\n"
        out = tmp_path / "res.json"
        assert cli(*args[:-1], "--out", out).code == 0
        assert out.read_text() == pieced
        rep = tmp_path / "rep"
        assert cli(*args[:-1], "--report", rep, "--figures", "none").code == 0
        assert (rep / "results.json").read_text() == pieced

    def test_a_failing_piece_leaves_no_file(self, monkeypatch, tmp_path):
        import sagfit.io.outputs as outputs
        from sagfit.io.outputs import OutputError

        def pieces():
            yield "{"
            raise OSError(28, "no space")

        with pytest.raises(OutputError, match="no space left"):
            outputs.atomic_write(tmp_path / "x.json", pieces())
        assert list(tmp_path.iterdir()) == []


class TestOut:
    def test_csv(self, cli, tmp_path):
        """--out x.csv writes one row per DUT with the required columns, numeric cells numeric."""
        out = tmp_path / "res.csv"
        run = cli("fit", FLEET, "--bench", BENCH, "--out", out)
        assert run.code == 0, run.err
        rows = list(csv.DictReader(io.StringIO(out.read_text())))
        assert len(rows) == 6 and set(REQUIRED) <= set(rows[0])
        float(rows[0]["vth"]), float(rows[0]["rth_ci_high"])
        assert not list(tmp_path.glob(".*part"))

    def test_json_file(self, cli, tmp_path):
        """--out x.json writes the same document as --json."""
        out = tmp_path / "res.json"
        assert cli("fit", PACK, "--out", out).code == 0
        assert json.loads(out.read_text())["results"][0]["dut"] == "pack_a"

    def test_refuses_to_overwrite_input(self, cli, tmp_path):
        """--out naming the input file is refused with exit 2 and the file is unchanged."""
        p = tmp_path / "pack.csv"
        p.write_bytes(PACK.read_bytes())
        before = digest(p)
        run = cli("fit", p, "--out", p)
        assert run.code == 2 and "input file" in run.err
        assert digest(p) == before

    def test_unknown_extension(self, cli, tmp_path):
        """An --out name that is neither .csv nor .json is refused."""
        assert cli("fit", PACK, "--out", tmp_path / "x.xlsx").code == 2

    def test_missing_folder(self, cli, tmp_path):
        """--out into a folder that does not exist is refused, not created."""
        run = cli("fit", PACK, "--out", tmp_path / "no" / "x.csv")
        assert run.code == 2 and "does not exist" in run.err

    def test_formula_injection_neutralised(self, cli, tmp_path):
        """A DUT id starting with '=' is neutralised in the CSV; numbers stay numbers."""
        p = tmp_path / "evil.csv"
        p.write_text("dut,load,voltage\n=HYPERLINK(1),open,12.7\n=HYPERLINK(1),10,12.6\n"
                     "=HYPERLINK(1),4.7,12.5\n")
        out = tmp_path / "r.csv"
        assert cli("fit", p, "--out", out).code == 0
        row = next(csv.DictReader(io.StringIO(out.read_text())))
        assert row["dut"].startswith("'=")
        float(row["vth"])


class TestOptions:
    def test_dut_filter(self, cli):
        """--dut keeps only the named DUTs; an unknown one is an error."""
        doc = json.loads(cli("fit", FLEET, "--dut", "PK-12,PK-07", "--json").out)
        assert [r["dut"] for r in doc["results"]] == ["PK-12", "PK-07"]
        run = cli("fit", FLEET, "--dut", "PK-99")
        assert run.code == 2 and "PK-99" in run.err

    @pytest.mark.parametrize("args,words", [
        (["--voltage-accuracy", "fast"], "--voltage-accuracy"),
        (["--current-accuracy", "0.2%+1"], "--current-accuracy"),
        (["--load-tolerance", "1"], "per-cent"),
        (["--confidence", "1.5"], "--confidence"),
        (["--bench", "nope.toml"], "nope.toml"),
        (["--current-range", "5"], "--current-range"),
        (["--frobnicate"], "No such option"),
        (["--report", "rep", "--figures", "some"], "--figures"),
    ])
    def test_bad_options(self, cli, args, words):
        """A bad option value: exit 2 and one error line naming the option."""
        run = cli("fit", PACK, *args)
        assert run.code == 2
        lines = run.err.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error:") and words in lines[0]

    def test_bench_profile_errors_name_the_key(self, cli, tmp_path):
        """Unknown keys in a bench profile name the key."""
        b = tmp_path / "b.toml"
        b.write_text('[voltage]\naccuracy = "0.1%+1mV"\nacuracy = "x"\n')
        run = cli("fit", PACK, "--bench", b)
        assert run.code == 2 and "voltage.acuracy" in run.err

    def test_cli_overrides_bench(self, cli):
        """A command-line accuracy wins over the bench profile's."""
        a = json.loads(cli("fit", PACK, "--bench", BENCH, "--json").out)
        b = json.loads(cli("fit", PACK, "--bench", BENCH, "--voltage-accuracy", "1%+10mV",
                           "--json").out)
        assert b["results"][0]["vth"]["u"] > a["results"][0]["vth"]["u"]
        assert b["settings"]["voltage_accuracy"]["text"] == "1%+10mV"


class TestTraceability:
    def test_past_due_calibration_is_a_warning(self, cli, tmp_path):
        """A bench instrument whose calibration was due before the file's test date gives a
        warning in the JSON and on the terminal (traceability, common practice of
        calibration labs: ISO/IEC 17025 requires calibrated equipment; clause from memory)."""
        b = tmp_path / "b.toml"
        b.write_text('[voltage]\naccuracy = "0.015%+2mV"\ninstrument = "DMM-OLD"\n'
                     'calibration_due = 2026-01-31\n')
        doc = json.loads(cli("fit", PACK, "--bench", b, "--json").out)
        assert doc["traceability"]["test_date"] == "2026-11-03"
        assert len(doc["warnings"]) == 1 and "DMM-OLD" in doc["warnings"][0]
        assert "warning: calibration" in cli("fit", PACK, "--bench", b).out

    def test_budget_in_json(self, cli):
        """Each fitted DUT carries an uncertainty budget whose components add up to u(Vth)."""
        doc = json.loads(cli("fit", PACK, "--bench", BENCH, "--json").out)
        bud = doc["results"][0]["budget"]["vth"]
        total = sum(c["contribution"] ** 2 for c in bud["components"]) ** 0.5
        assert total == pytest.approx(bud["u_combined"], rel=1e-9)
        assert bud["dominant"] in {"voltage", "current", "load", "scale", "type_a", "v_gain",
                                   "v_offset", "i_gain", "i_offset"}


class TestCautions:
    def test_current_limited_supply_has_no_high_isc_caution(self, cli):
        """A supply seen in current limit (knee near 1.5 A) is not warned about hundreds of
        amperes its line would extrapolate to; a 12 V pack is (safety: compute Isc, never
        measure it; common practice)."""
        supply = SAMPLES / "bench_supply_limit.csv"
        for args in (("fit", supply, "--bench", BENCH, "--json"),
                     ("fit", supply, "--bench", BENCH, "--below-knee", "--json")):
            doc = json.loads(cli(*args).out)
            assert not any("short-circuit current" in c for c in doc["cautions"])
        doc = json.loads(cli("fit", PACK, "--bench", BENCH, "--json").out)
        assert any("short-circuit current" in c for c in doc["cautions"])

    def test_accept_and_record_use_the_same_cautions(self, cli, tmp_path):
        """accept and record raise the cautions that fit raises for the same readings."""
        supply = SAMPLES / "bench_supply_limit.csv"
        spec = tmp_path / "s.toml"
        spec.write_text("[limits.vth]\nmin = \"11V\"\nmax = \"13V\"\n")
        fit_doc = json.loads(cli("fit", supply, "--bench", BENCH, "--json").out)
        acc_doc = json.loads(cli("accept", supply, "--spec", spec, "--bench", BENCH,
                                 "--json").out)
        rec_doc = json.loads(cli("record", supply, "--bench", BENCH, "--db",
                                 tmp_path / "h.sqlite", "--date", "2026-11-03", "--json").out)
        assert fit_doc["cautions"] == acc_doc["cautions"] == rec_doc["cautions"]


class TestTerminal:
    def test_summary(self, cli):
        """The terminal summary shows SI-prefixed values with units and the cautions."""
        run = cli("fit", PACK, "--bench", BENCH)
        assert run.code == 0
        assert "mΩ" in run.out and " V" in run.out and "caution:" in run.out
        assert "compute Isc" in run.out.lower() or "Compute Isc" in run.out

    def test_verbose_lists_ignored_columns(self, cli, tmp_path):
        """--verbose lists columns that were ignored."""
        p = tmp_path / "x.csv"
        p.write_text("load,voltage,operator\nopen,5.0,K\n10,4.9,K\n5,4.8,K\n")
        assert "operator" in cli("fit", p, "--verbose").out


def test_python_dash_m():
    """`python -m sagfit fit` works as a whole process, with exit status 0."""
    p = subprocess.run([sys.executable, "-m", "sagfit", "fit", str(PACK), "--json"],
                       capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    assert json.loads(p.stdout)["results"][0]["dut"] == "pack_a"


def test_console_script_error_has_no_traceback(tmp_path):
    """The installed `sagfit` script prints one error line for a missing file, exit 2."""
    p = subprocess.run([str(pathlib.Path(sys.executable).with_name("sagfit")), "fit", str(tmp_path / "missing.csv")], capture_output=True,
                       text=True, timeout=120)
    assert p.returncode == 2 and p.stderr.startswith("error:") and "Traceback" not in p.stderr


def test_version(cli):
    """`sagfit --version` prints the version and exits 0 (plumbing)."""
    import sagfit

    run = cli("--version")
    assert run.code == 0 and run.out.strip() == f"sagfit {sagfit.__version__}"


class TestTypeANote:
    """Without stated uncertainties, the run says once what that means (issue: checks that
    do not cry wolf); with a bench profile it says nothing."""

    PHRASE = "No measurement uncertainty was stated"

    def test_terminal_says_it_once_per_run(self, cli):
        """Many Type A DUTs: one note for the run, no per-DUT type-a note (also --verbose)."""
        for args in ((), ("--verbose",)):
            run = cli("fit", FLEET, *args)
            assert run.code == 0, run.err
            assert run.out.count(self.PHRASE) == 1
            assert "[type-a]" not in run.out
            assert "--bench" in run.out and "--voltage-accuracy" in run.out
            assert "degrees of freedom" in run.out

    def test_bench_profile_gives_no_note(self, cli):
        """With the meters stated there is nothing to say."""
        run = cli("fit", PACK, "--bench", BENCH)
        assert self.PHRASE not in run.out
        assert json.loads(cli("fit", PACK, "--bench", BENCH, "--json").out)["note"] is None

    def test_json_top_level_note(self, cli):
        """The JSON carries the note once, at the top level, naming the degrees of freedom
        (pack_a: 6 readings, 4 degrees of freedom, Student t at 95 %: 2.78)."""
        doc = json.loads(cli("fit", PACK, "--json").out)
        assert doc["note"].startswith(self.PHRASE)
        assert "n − 2 = 4 degrees of freedom" in doc["note"] and "±2.78" in doc["note"]

    def test_html_report_says_it_once(self, cli, tmp_path):
        """The HTML report shows the note once, near the top."""
        run = cli("fit", FLEET, "--report", tmp_path / "rep", "--figures", "none")
        assert run.code == 0, run.err
        html = next((tmp_path / "rep").glob("*.html")).read_text(encoding="utf-8")
        assert html.count(self.PHRASE) == 1
        assert html.index(self.PHRASE) < html.index("<h2>Results</h2>")


def test_readme_demo_shows_no_false_flag(cli):
    """The README's first command on the linear demo pack prints no warning."""
    run = cli("fit", PACK)
    assert run.code == 0, run.err
    assert "warning" not in run.out.lower()
