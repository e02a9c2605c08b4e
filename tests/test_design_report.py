"""The report of ``sagfit design`` (sagfit.report.design_report): expected histograms of
Vth and Rth with the measured units and their intervals marked; the page itself.
Plumbing: the figures must show the values the analysis computed (read back from the
drawn artists); the values themselves are checked against ngspice, lcapy and the textbook
divider in test_design_references.py and test_design_mna.py."""

from __future__ import annotations

import json

import numpy as np
import pytest

from sagfit.cli import main
from sagfit.core.mna import Circuit
from sagfit.core.netlist import parse_netlist
from sagfit.core.tolerance import analyse
from sagfit.report.design_report import MAX_MARKED_UNITS, expected_histogram

DIVIDER = ("* divider (invented)\nV1 in 0 DC 12 tol=1%\nR1 in tap 2k tol=1%\n"
           "R2 tap 0 2k tol=1%\n.port tap 0\n")


def _run(capsys, *argv):
    with pytest.raises(SystemExit) as exc:
        main(list(argv))
    cap = capsys.readouterr()
    return exc.value.code, cap.out, cap.err


def _doc(capsys, tmp_path, *extra):
    net = tmp_path / "d.cir"
    net.write_text(DIVIDER)
    code, out, _ = _run(capsys, "design", str(net), "--json", *extra)
    assert code == 0
    return json.loads(out)


def _units(n, rng):
    return [{"dut": f"U{i}", "vth_V": 6.0 + rng.normal(0, 0.05), "U_vth_V": 0.02,
             "En_vth": 0.0 if i else 2.0, "rth_ohm": 1000 + rng.normal(0, 5), "U_rth_ohm": 3.0,
             "En_rth": 0.0} for i in range(n)]


class TestExpectedHistogram:
    def test_draws_limits_and_measured_points(self, capsys, tmp_path):
        """Bars hold every draw; the two limits are vertical lines at their values; each
        measured unit is one point with a horizontal interval of ± U, at its value."""
        doc = _doc(capsys, tmp_path, "--draws", "3000", "--limits", "rss")
        t = analyse(Circuit(parse_netlist(DIVIDER)), draws=3000)
        doc["measured"] = {"units": _units(3, np.random.default_rng(1))}
        fig = expected_histogram(t.mc_vth, "vth", doc)
        ax = fig.axes[0]
        hist = [c for c in ax.containers if type(c).__name__ == "BarContainer"]
        assert len(hist) == 1 and sum(p.get_height() for p in hist[0]) == 3000
        xs = {round(ln.get_xdata()[0], 12) for ln in ax.lines if len(ln.get_xdata()) == 2
              and ln.get_xdata()[0] == ln.get_xdata()[1]}
        assert {round(x, 12) for x in doc["limits"]["vth"]} <= xs
        bars = [c for c in ax.containers if type(c).__name__ == "ErrorbarContainer"]
        assert len(bars) == 3
        for c, u in zip(bars, doc["measured"]["units"]):
            x, _ = c.lines[0].get_data()
            assert x[0] == pytest.approx(u["vth_V"])
            seg = c.lines[2][0].get_segments()[0]
            assert (seg[0][0], seg[1][0]) == pytest.approx((u["vth_V"] - 0.02,
                                                           u["vth_V"] + 0.02))
        assert "Open-circuit voltage Vth" in ax.get_xlabel()

    def test_many_units_as_ticks_and_no_draws(self, capsys, tmp_path):
        """Above the point limit the units become ticks (flagged ones apart); without
        Monte Carlo draws the figure says so and still marks limits and units."""
        doc = _doc(capsys, tmp_path, "--draws", "0")
        doc["measured"] = {"units": _units(MAX_MARKED_UNITS + 5, np.random.default_rng(2))}
        fig = expected_histogram(None, "rth", doc)
        ax = fig.axes[0]
        ticks = [ln for ln in ax.lines if ln.get_marker() == "|"]
        assert sum(len(ln.get_xdata()) for ln in ticks) == MAX_MARKED_UNITS + 5
        assert any("no Monte Carlo draws" in t.get_text() for t in ax.texts)


def test_report_folder_from_the_command(tmp_path, capsys):
    """--report writes report.html (both figures inline, every unit, escaped names),
    results.json equal to --json, and the two PNGs; an input file is never a folder."""
    net = tmp_path / "d.cir"
    net.write_text(DIVIDER)
    res = tmp_path / "fit.csv"
    head = ("dut,method,n,vth,vth_u,vth_ci_low,vth_ci_high,rth,rth_u,rth_ci_low,rth_ci_high,"
            "error\n")
    res.write_text(head + "<b>A1</b>,wls,6,6.01,0.005,6.0,6.02,1001,2,997,1005,\n"
                   "A2,wls,6,6.4,0.005,6.39,6.41,1090,2,1086,1094,\n")
    rep = tmp_path / "rep"
    code, out, _ = _run(capsys, "design", str(net), "--draws", "2000", "--measured", str(res),
                        "--report", str(rep), "--json")
    assert code == 1
    page = (rep / "report.html").read_text()
    assert page.count("<svg") == 2 and "&lt;b&gt;A1&lt;/b&gt;" in page and "<b>A1" not in page
    assert "not consistent" in page and "ISO 13528" in page
    assert json.loads((rep / "results.json").read_text()) == json.loads(out)
    assert (rep / "fig-expected-vth.png").read_bytes()[:4] == b"\x89PNG"
    assert (rep / "fig-expected-rth.png").stat().st_size > 0
    code, _, err = _run(capsys, "design", str(net), "--report", str(net))
    assert code == 2 and "input file" in err
