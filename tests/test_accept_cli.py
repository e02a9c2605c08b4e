"""``sagfit accept`` end to end on the invented sample reel (sample_runs/accept_*).

Expected decisions come from the construction of the invented data (boards 0008/0009 made
to fail, 0010/0011 placed within U of a limit, 0012 with one reading, 0013 with a sagging
output that the fit's checks flag) and were checked by hand against the guarded rule of
ILAC-G8:09/2019 §4.2.2; exit codes are those of issue 4.
"""

import json
import math
import re

import pytest

from conftest import SAMPLES, digest

READS = SAMPLES / "accept_reel.csv"
SPEC = SAMPLES / "accept_spec.toml"
BENCH = SAMPLES / "accept_bench.toml"
BASE = ["accept", READS, "--spec", SPEC, "--bench", BENCH]
ILAC = "ILAC-G8:09/2019 §4.2.2 guarded acceptance (expected decisions worked by hand)"

EXPECTED = {"SH5-D-0001": "pass", "SH5-D-0002": "pass", "SH5-D-0003": "pass",
            "SH5-D-0004": "pass", "SH5-D-0005": "pass", "SH5-D-0006": "pass",
            "SH5-D-0007": "pass", "SH5-D-0008": "fail", "SH5-D-0009": "fail",
            "SH5-D-0010": "inconclusive", "SH5-D-0011": "inconclusive",
            "SH5-D-0012": "error", "SH5-D-0013": "inconclusive"}


@pytest.fixture(scope="module")
def doc():
    """The --json document of the sample run (computed once)."""
    import subprocess
    import sys

    proc = subprocess.run([sys.executable, "-m", "sagfit", *map(str, BASE), "--json"],
                          capture_output=True, text=True)
    assert proc.returncode == 1, proc.stderr
    return json.loads(proc.stdout)


class TestSampleBatch:
    @pytest.mark.reference(ILAC)
    def test_decisions_and_summary(self, doc):
        """Each board gets its expected decision and the summary counts them."""
        got = {r["dut"]: r["decision"] for r in doc["results"]}
        assert got == EXPECTED
        s = doc["summary"]
        assert {k: s[k] for k in ("pass", "fail", "inconclusive", "error")} == {
            "pass": 7, "fail": 2, "inconclusive": 3, "error": 1}
        assert s["yield"] == pytest.approx(7 / 13)
        assert s["capped_by_flags"] == 0  # SH5-D-0013 is inconclusive on its Rth already
        assert {r["quantity"] for r in s["failed_most"]} >= {"vth", "rth"}

    def test_flagged_board_is_capped(self, doc):
        """The sagging board is flagged and never passes: its scatter about the line is
        Type A with four degrees of freedom, so its Rth check is inconclusive on its own
        (and the flags would cap a pass)."""
        r = next(x for x in doc["results"] if x["dut"] == "SH5-D-0013")
        assert r["decision"] == "inconclusive" and r["flags"]
        assert all(c["decision"] in ("pass", "inconclusive") for c in r["checks"])

    def test_json_shape(self, doc):
        """The documented JSON fields are present with numbers in SI units."""
        r = next(x for x in doc["results"] if x["dut"] == "SH5-D-0009")
        rth = next(c for c in r["checks"] if c["quantity"] == "rth")
        for key in ("quantity", "value", "U", "lower", "upper", "decision",
                    "conformance_probability"):
            assert key in rth
        assert rth["decision"] == "fail" and rth["upper"] == pytest.approx(0.04)
        assert rth["lower"] is None and 0.05 < rth["value"] < 0.06
        assert rth["conformance_probability"] < 1e-6
        err = next(x for x in doc["results"] if x["dut"] == "SH5-D-0012")
        assert err["checks"] == [] and "one reading" in err["error"]
        assert doc["decision_rule"]["rule"] == "guarded"
        assert doc["spec"]["sha256"] == digest(SPEC)
        assert any("not a safety assessment" in c for c in doc["cautions"])

    def test_terminal_output_and_exit_1(self, cli):
        """The table lists the worst first and the summary line; a fail gives exit 1."""
        run = cli(*BASE)
        assert run.code == 1, run.err
        lines = run.out.splitlines()
        body = [ln for ln in lines if ln.strip().startswith("SH5-")]
        assert body[0].split()[0] in ("SH5-D-0008", "SH5-D-0009")
        assert "summary: 7 pass, 2 fail, 3 inconclusive, 1 error of 13" in run.out
        assert "error SH5-D-0012" in run.out

    @pytest.mark.parametrize("duts,code", [
        ("SH5-D-0001,SH5-D-0002", 0),
        ("SH5-D-0001,SH5-D-0010", 3),
        ("SH5-D-0001,SH5-D-0012", 3),
        ("SH5-D-0001,SH5-D-0008,SH5-D-0010", 1),
    ])
    def test_exit_codes(self, cli, duts, code):
        """0 all pass; 3 inconclusive or error but no fail; 1 any fail."""
        run = cli(*BASE, "--dut", duts)
        assert run.code == code, run.err

    @pytest.mark.reference("ILAC-G8:09/2019 §4.2.1 simple acceptance")
    def test_rule_option(self, cli):
        """--rule simple turns the near-limit boards into passes (shared risk)."""
        run = cli(*BASE, "--dut", "SH5-D-0010,SH5-D-0011", "--rule", "simple", "--json")
        assert run.code == 0
        assert [r["decision"] for r in json.loads(run.out)["results"]] == ["pass", "pass"]
        run = cli(*BASE, "--dut", "SH5-D-0010", "--rule", "risk", "--json")
        assert run.code in (0, 3)
        assert json.loads(run.out)["decision_rule"]["rule"] == "risk"

    def test_inputs_untouched(self, cli, tmp_path):
        """No input file is modified."""
        before = [digest(p) for p in (READS, SPEC, BENCH)]
        cli(*BASE, "--out", tmp_path / "r.csv", "--report", tmp_path / "rep")
        assert [digest(p) for p in (READS, SPEC, BENCH)] == before


class TestBadInput:
    def test_bad_spec_names_key(self, cli, tmp_path):
        """A spec with min > max exits 2 with one error line naming the key."""
        bad = tmp_path / "bad.toml"
        bad.write_text("[limits.vth]\nmin = 5.3\nmax = 5.1\n", encoding="utf-8")
        run = cli("accept", READS, "--spec", bad)
        assert run.code == 2
        assert run.err.startswith("error: ") and "key limits.vth.min" in run.err
        assert "Traceback" not in run.err and run.err.count("\n") == 1

    def test_bad_rule_option(self, cli):
        """An unknown --rule is a usage error (exit 2)."""
        run = cli(*BASE, "--rule", "lenient")
        assert run.code == 2 and "--rule" in run.err

    def test_missing_spec_option(self, cli):
        """--spec is required."""
        run = cli("accept", READS)
        assert run.code == 2 and "--spec" in run.err

    def test_refuses_to_overwrite_input(self, cli):
        """--out pointing at an input file is refused."""
        run = cli(*BASE, "--out", READS)
        assert run.code == 2 and "input" in run.err

    def test_bad_readings_file(self, cli, tmp_path):
        """A broken readings file exits 2 with file and line."""
        p = tmp_path / "r.csv"
        p.write_text("dut,current_A,voltage_V\nA,0,5\nA,x,4.9\n", encoding="utf-8")
        run = cli("accept", p, "--spec", SPEC)
        assert run.code == 2 and "line 3" in run.err


class TestOutputs:
    def test_large_batch_json_in_pieces_equals_one_dump(self, cli, monkeypatch, tmp_path):
        """Above outputs.JSON_BIG DUTs the decisions are encoded in pieces; the text must
        be json.dumps of the whole document (plumbing: the stdlib encoder is the
        reference)."""
        import sagfit.io.outputs as outputs

        whole = cli(*BASE, "--json").out
        doc = json.loads(whole)
        n = len(doc["results"])
        assert n > 3
        monkeypatch.setattr(outputs, "JSON_BIG", 2)
        monkeypatch.setattr(outputs, "JSON_PIECE_DUTS", 3)  # pieces of 3, the last short
        pieced = cli(*BASE, "--json").out
        assert pieced == json.dumps(doc, ensure_ascii=False, allow_nan=False) + "\n"
        out = tmp_path / "d.json"
        cli(*BASE, "--out", out)
        assert out.read_text(encoding="utf-8") == pieced

    @pytest.mark.reference("OWASP, CSV Injection (common practice)")
    def test_csv_neutralised_but_numeric(self, cli, tmp_path):
        """User text that starts a formula is neutralised; numeric columns (also negative
        values) stay numbers a spreadsheet can compute with."""
        import pandas as pd

        src = tmp_path / "r.csv"
        rows = ["dut,current_A,voltage_V"]
        # "-7" is a source whose voltage rises with load: its regulation is negative
        for name, v0, r in (("=HYPERLINK(1)", 5.02, 0.02), ("-7", 5.00, -0.02),
                            ("@x", 4.99, 0.03)):
            for i in (0.0, 0.5, 1.0, 1.5):
                rows.append(f"{name},{i},{v0 - r * i:.4f}")
        src.write_text("\n".join(rows) + "\n", encoding="utf-8")
        spec = tmp_path / "s.toml"
        spec.write_text("[limits.vth]\nmin = \"4.9V\"\n[[limits.regulation]]\nlight = \"0A\"\n"
                        "heavy = \"1.5A\"\nmax = \"1%\"\n", encoding="utf-8")
        out = tmp_path / "d.csv"
        run = cli("accept", src, "--spec", spec, "--voltage-accuracy", "0.01%+0.5mV",
                  "--out", out)
        assert run.code in (0, 1, 3), run.err
        text = out.read_text(encoding="utf-8")
        assert "'=HYPERLINK(1)" in text and "'-7" in text and "'@x" in text
        frame = pd.read_csv(out)
        assert frame["vth_value"].dtype.kind == "f"
        reg = frame["regulation_0A_to_1.5A_value"]
        assert reg.dtype.kind == "f" and reg[1] < 0  # a negative number, not text
        assert frame["vth_p_c"].between(0, 1).all()

    def test_json_out_file_matches_stdout(self, cli, tmp_path):
        """--out x.json writes the same document as --json."""
        out = tmp_path / "d.json"
        run = cli(*BASE, "--json", "--out", out)
        assert json.loads(out.read_text(encoding="utf-8")) == json.loads(run.out)

    def test_report_folder(self, cli, tmp_path):
        """--report writes an escaped HTML page, histograms, CSV and JSON inside the folder."""
        src = tmp_path / "r.csv"
        rows = ["dut,current_A,voltage_V"]
        for name in ("<script>alert(1)</script>", "B&C"):
            for i in (0.0, 0.5, 1.0, 1.5):
                rows.append(f"{name},{i},{5.02 - 0.02 * i:.4f}")
        src.write_text("\n".join(rows) + "\n", encoding="utf-8")
        rep = tmp_path / "rep"
        run = cli("accept", src, "--spec", SPEC, "--voltage-accuracy", "0.01%+0.5mV",
                  "--report", rep)
        assert run.code in (0, 1, 3), run.err
        names = sorted(p.name for p in rep.iterdir())
        assert {"report.html", "results.csv", "results.json", "fig-histogram-vth.png",
                "fig-histogram-rth.png"} <= set(names)
        page = (rep / "report.html").read_text(encoding="utf-8")
        assert "<script>alert" not in page and "&lt;script&gt;" in page
        assert "B&amp;C" in page and page.count("<svg") == 4
        assert not any(p.name.endswith(".part") for p in rep.iterdir())
        assert math.isfinite(json.loads((rep / "results.json").read_text())["summary"]["yield"])

    @pytest.mark.reference("RFC 4180, Common Format and MIME Type for CSV Files (quoting)")
    def test_csv_quoting_round_trips(self):
        """DUT names with commas, quotes or the word nan survive the fast CSV writer, and
        the file reads back exactly like pandas' own writer's output."""
        import io

        import numpy as np
        import pandas as pd

        from sagfit.core.acceptance import Check, Spec, accept
        from sagfit.report.accept_report import acceptance_csv, acceptance_table
        from test_acceptance import make_fits

        fits = make_fits([5.0, 4.0, np.nan, 5.1], 0.005,
                         errors=[None, None, "only one reading", None])
        fits = fits.replace(duts=("a,b", 'say "hi"', "nan", "=1+1"))
        acc = accept(fits, Spec(checks=(Check("vth", "vth", 4.75, 5.25),)))
        text = acceptance_csv(acc)
        ours = pd.read_csv(io.StringIO(text), keep_default_na=False, na_values=[""])
        ref = pd.read_csv(io.StringIO(acceptance_table(acc).to_csv(index=False,
                                                                   float_format="%.10g")),
                          keep_default_na=False, na_values=[""])
        pd.testing.assert_frame_equal(ours, ref)
        assert ours["dut"].tolist() == ["a,b", 'say "hi"', "nan", "'=1+1"]
        assert np.isnan(ours["vth_value"][2]) and ours["vth_upper"][0] == 5.25


class TestOneDut:
    @pytest.mark.reference(ILAC)
    def test_single_dut_view(self, cli):
        """For one DUT the terminal lists every check with its acceptance limits, p_c and
        the ILAC-G8 §4.2.3 statement."""
        run = cli(*BASE, "--dut", "SH5-D-0010")
        assert run.code == 3
        assert "acceptance limits" in run.out and "conditional pass" in run.out
        row = next(ln for ln in run.out.splitlines() if ln.strip().startswith("rth"))
        assert "inconclusive" in row and "≤ 40.00 mΩ" in row


class TestFlaggedNamed:
    def test_terminal_names_the_flag_behind_inconclusive(self, cli, tmp_path):
        """A board inside every limit but with one reading far off its line (a mistyped
        digit, invented data) is 'inconclusive (flagged: …, outlier)' in the terminal, in the
        table of many boards and in the one-board view."""
        rows = ["board,current_A,voltage_V"]
        currents = [0.0, 0.15, 0.3, 0.45, 0.6, 0.75, 0.9, 1.05, 1.2, 1.35, 1.5]
        wiggle = [0.3, -0.2, 0.1, -0.3, 0.2, 0.0, -0.1, 0.3, -0.2, 0.1, -0.1]  # mV
        for b in ("SH5-D-0101", "SH5-D-0102"):
            for j, (i, w) in enumerate(zip(currents, wiggle)):
                v = 5.02 - 0.015 * i + w * 1e-3
                if b == "SH5-D-0102" and j == 5:
                    v += 0.009  # 9 mV off: the mistyped reading
                rows.append(f"{b},{i:.4f},{v:.5f}")
        path = tmp_path / "two_boards.csv"
        path.write_text("\n".join(rows) + "\n", encoding="utf-8")
        run = cli("accept", path, "--spec", SPEC, "--bench", BENCH)
        assert run.code == 3, run.err
        line = next(ln for ln in run.out.splitlines() if ln.strip().startswith("SH5-D-0102"))
        named = re.search(r"inconclusive \(flagged: ([a-z, -]+)\)", line)
        assert named and "outlier" in named.group(1).split(", ")
        one = cli("accept", path, "--spec", SPEC, "--bench", BENCH, "--dut", "SH5-D-0102")
        assert re.search(r"SH5-D-0102: inconclusive \(flagged: [a-z, -]*outlier", one.out)
