"""``sagfit design`` as users run it: table, JSON, spec written and read back, errors.

Outside reference for the numbers: the textbook voltage divider (common practice; e.g.
C. K. Alexander, M. N. O. Sadiku, *Fundamentals of Electric Circuits*, Thevenin's
theorem): 12 V over two 2 kΩ resistors is 6 V behind 1 kΩ at the tap, and its worst
case with 1 % parts and a 1 % source is 12.12 V·2.02 kΩ/4.00 kΩ by hand. The rest is
plumbing (the spec written is read back by sagfit's own spec reader)."""

from __future__ import annotations

import json

import pytest

from sagfit.cli import main
from sagfit.io.spec import read_spec

DIVIDER = "* divider (invented)\nV1 in 0 DC 12 tol=1%\nR1 in tap 2k tol=1%\nR2 tap 0 2k tol=1%\n"


def _run(capsys, *argv):
    with pytest.raises(SystemExit) as exc:
        main(list(argv))
    cap = capsys.readouterr()
    return exc.value.code, cap.out, cap.err


def test_json_spec_round_trip_and_csv(tmp_path, capsys):
    net = tmp_path / "d.cir"
    net.write_text(DIVIDER)
    spec = tmp_path / "limits.toml"
    csvf = tmp_path / "sens.csv"
    code, out, _ = _run(capsys, "design", str(net), "--port", "tap,0", "--json", "--draws",
                        "2000", "--spec-out", str(spec), "--out", str(csvf))
    assert code == 0
    doc = json.loads(out)
    assert doc["nominal"]["vth_V"] == pytest.approx(6.0)
    assert doc["nominal"]["rth_ohm"] == pytest.approx(1000.0)
    # worst case Vth: 12.12·2.02/(1.98+2.02) (hand calculation)
    assert doc["worst_case"]["vth_V"][1] == pytest.approx(12.12 * 2.02 / 4.0, rel=1e-9)
    assert doc["vertices"]["agrees_with_worst_case"] is True
    s = read_spec(str(spec))
    vth = next(c for c in s.checks if c.quantity == "vth")
    rth = next(c for c in s.checks if c.quantity == "rth")
    assert (vth.lower, vth.upper) == pytest.approx(tuple(doc["limits"]["vth"]), rel=1e-15)
    assert (rth.lower, rth.upper) == pytest.approx(tuple(doc["limits"]["rth"]), rel=1e-15)
    assert csvf.read_text().splitlines()[1].startswith("V1,")


def test_measured_unit_outside_design(tmp_path, capsys):
    net = tmp_path / "d.cir"
    net.write_text(DIVIDER + ".port tap 0\n")
    code, out, _ = _run(capsys, "design", str(net), "--draws", "0", "--measured-vth", "6.3V",
                        "--u-vth", "20mV")
    assert code == 1 and "NOT consistent" in out
    # the supply alone explains a Vth 5 % high (first order: 0.3 V / (0.5 · 12 V))
    assert "V1 +5 % (beyond its tolerance)" in out


def test_bad_netlist_one_line_error(tmp_path, capsys):
    net = tmp_path / "bad.cir"
    net.write_text("V1 a 0 12\nD1 a 0 dmod\n.port a 0\n")
    code, out, err = _run(capsys, "design", str(net))
    assert code == 2 and out == ""
    assert err.startswith("error: ") and "bad.cir, line 2, column 1" in err
    assert len(err.strip().splitlines()) == 1


class TestProgress:
    """A progress bar for long Monte Carlo runs on a terminal; none with --json or a pipe."""

    @pytest.fixture()
    def recorder(self, monkeypatch):
        import contextlib

        from sagfit.cli import design_cmd

        calls = []

        @contextlib.contextmanager
        def fake(label, enabled, total=None):
            calls.append({"label": label, "enabled": enabled, "total": total, "steps": []})
            yield calls[-1]["steps"].append

        monkeypatch.setattr(design_cmd, "progress", fake)
        monkeypatch.setattr(design_cmd, "PROGRESS_WORK", 1000)
        return design_cmd, calls

    def test_terminal_run_steps_through_the_draws(self, recorder, monkeypatch, tmp_path,
                                                  capsys):
        """On a terminal the bar advances once per pass of draws, to the total."""
        design_cmd, calls = recorder
        monkeypatch.setattr(design_cmd, "interactive", lambda: True)
        monkeypatch.setattr("sagfit.core.tolerance.MC_CHUNK", 700)
        net = tmp_path / "d.cir"
        net.write_text(DIVIDER + ".port tap 0\n")
        code, _, _ = _run(capsys, "design", str(net), "--draws", "2000")
        assert code == 0 and calls[0]["enabled"] is True
        assert calls[0]["steps"] == ["Monte Carlo: 700 of 2,000 draws",
                                     "Monte Carlo: 1,400 of 2,000 draws",
                                     "Monte Carlo: 2,000 of 2,000 draws"]

    @pytest.mark.parametrize("argv, tty", [(["--json"], True), ([], False)])
    def test_silent_with_json_or_a_pipe(self, recorder, monkeypatch, tmp_path, capsys, argv,
                                        tty):
        """--json, or output to a pipe: no bar."""
        design_cmd, calls = recorder
        monkeypatch.setattr(design_cmd, "interactive", lambda: tty)
        net = tmp_path / "d.cir"
        net.write_text(DIVIDER + ".port tap 0\n")
        code, _, err = _run(capsys, "design", str(net), "--draws", "2000", *argv)
        assert code == 0 and calls[0]["enabled"] is False and err == ""


def test_sample_pack_design_against_the_fleet(capsys):
    """The docs' example runs as written: the invented pack design against the invented
    fleet readings (fitted here); the older pack PK-12 is not consistent and a cell's
    internal resistance is named, the five other cells as alike."""
    from pathlib import Path

    root = Path(__file__).resolve().parents[1] / "sample_runs"
    code, out, err = _run(capsys, "design", str(root / "pack_design.cir"), "--measured",
                          str(root / "fleet_packs.csv"), "--draws", "500", "--json")
    assert code == 1, err
    units = {u["dut"]: u for u in json.loads(out)["measured"]["units"]}
    assert not units["PK-12"]["consistent"] and units["PK-07"]["consistent"]
    e = units["PK-12"]["explanation"][0]
    assert e["part"].startswith("RC") and len(e["alike"]) == 5 and not e["within_tolerance"]


def test_tolerance_table_option(tmp_path, capsys):
    """--tolerances gives a netlist without tol= its tolerances (the hand-calculated worst
    case of the divider with 1 % parts, as with tol= in the netlist)."""
    net = tmp_path / "plain.cir"
    net.write_text("V1 in 0 DC 12\nR1 in tap 2k\nR2 tap 0 2k\n.port tap 0\n")
    tab = tmp_path / "tol.txt"
    tab.write_text("# from the parts list (invented)\n* 1%\n")
    code, out, _ = _run(capsys, "design", str(net), "--tolerances", str(tab), "--json",
                        "--draws", "0")
    assert code == 0
    assert json.loads(out)["worst_case"]["vth_V"][1] == pytest.approx(12.12 * 2.02 / 4.0,
                                                                     rel=1e-9)


def test_out_json_and_fit_options_need_measured(tmp_path, capsys):
    """--out x.json writes the --json document; meter options without --measured are an
    option error rather than silently unused."""
    net = tmp_path / "d.cir"
    net.write_text(DIVIDER + ".port tap 0\n")
    doc_path = tmp_path / "design.json"
    code, out, _ = _run(capsys, "design", str(net), "--draws", "500", "--json", "--out",
                        str(doc_path))
    assert code == 0 and json.loads(doc_path.read_text()) == json.loads(out)
    code, out, err = _run(capsys, "design", str(net), "--bench", "b.toml")
    assert code == 2 and out == "" and err.startswith("error: option --bench")
