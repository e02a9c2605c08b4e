"""Measured units against the design (sagfit.core.tolerance.compare, sagfit.io.fit_results,
``sagfit design --measured``): E_n per DUT and the single part that would explain it."""

from __future__ import annotations

import csv
import json
import math

import numpy as np
import pytest

from sagfit.cli import main
from sagfit.core.errors import SagfitError
from sagfit.core.mna import Circuit, equivalent
from sagfit.core.netlist import parse_netlist
from sagfit.core.tolerance import analyse, compare, design_uncertainty, explain, normalised_error
from sagfit.io.fit_results import is_results_file, read_fit_results

DIVIDER = ("* divider (invented)\nV1 in 0 DC 12 tol=1%\nR1 in tap 2k tol=1%\n"
           "R2 tap 0 2k tol=1%\n.port tap 0\n")
# six equal cells in series (invented), each an EMF behind its internal resistance
CELLS = "\n".join([f"V{i} e{i} s{i - 1} 2.1 tol=0.5%\nR{i} e{i} s{i} 4m tol=10%"
                   for i in range(1, 7)]).replace("s0", "0") + "\n.port s6 0\n"


def _run(capsys, *argv):
    with pytest.raises(SystemExit) as exc:
        main(list(argv))
    cap = capsys.readouterr()
    return exc.value.code, cap.out, cap.err


class TestNormalisedError:
    def test_formula_scalar_and_array(self):
        """E_n = (x − X)/√(U_x² + U_X²) (ISO 13528:2022, 9.7), element-wise on arrays."""
        assert normalised_error(6.3, 0.1, 6.0, 0.2) == pytest.approx(0.3 / math.sqrt(0.05))
        en = normalised_error(np.array([6.0, 5.5, np.nan]), np.array([0.3, 0.4, 0.1]), 6.0,
                              0.4)
        assert en[0] == 0 and en[1] == pytest.approx(-0.5 / math.sqrt(0.32)) and np.isnan(en[2])

    def test_design_uncertainty_from_rss_or_monte_carlo(self):
        """Without draws U = 2·RSS/√3 (uniform parts) or 2·RSS/3 (normal, tol = 3σ), GUM
        4.3.7 and 5.1.2; with draws, twice their standard deviation."""
        c = Circuit(parse_netlist(DIVIDER))
        t = analyse(c, draws=0)
        assert design_uncertainty(t)[:2] == pytest.approx(
            (2 * t.rss_vth / math.sqrt(3), 2 * t.rss_rth / math.sqrt(3)), rel=1e-12)
        tn = analyse(c, draws=0, distribution="normal")
        assert design_uncertainty(tn)[0] == pytest.approx(2 * t.rss_vth / 3, rel=1e-12)
        tm = analyse(c, draws=4000, seed=3)
        uv, _, source = design_uncertainty(tm)
        assert source == "monte-carlo"
        assert uv == pytest.approx(2 * np.std(tm.mc_vth, ddof=1), rel=1e-12)
        # the linear divider: MC σ close to the RSS reading (within the sampling spread)
        assert uv == pytest.approx(2 * t.rss_vth / math.sqrt(3), rel=0.05)


class TestExplain:
    def test_changed_resistor_is_named(self):
        """A unit built with R2 = 2.2 kΩ instead of 2 kΩ: R2, about +10 %, beyond its 1 %."""
        t = analyse(Circuit(parse_netlist(DIVIDER)), draws=0)
        v2, r2 = equivalent(parse_netlist(DIVIDER.replace("R2 tap 0 2k", "R2 tap 0 2.2k")))
        cmp = compare(t, ["U1"], [v2], [2e-3], [r2], [2.0])
        assert not cmp.consistent[0]
        best = cmp.explanations[0][0]
        assert best.part == "R2" and best.relative_change == pytest.approx(0.1, rel=0.1)
        assert not best.within_tolerance and best.value == pytest.approx(2200, rel=0.01)

    @pytest.mark.parametrize("fitted, rel", [("20k", 9.0), ("200", -0.9), ("2.2k", 0.1)])
    def test_wrong_part_found_at_its_value_on_the_network(self, fitted, rel):
        """A wrong resistor (20 kΩ or 200 Ω where 2 kΩ belongs): the first order names R2
        but misjudges the value (+164 %; below zero for 200 Ω); solved on the network the
        change is the true one and nothing is left unexplained (divider by hand)."""
        c = Circuit(parse_netlist(DIVIDER))
        t = analyse(c, draws=0)
        v2, r2 = equivalent(parse_netlist(DIVIDER.replace("R2 tap 0 2k", f"R2 tap 0 {fitted}")))
        first = compare(t, ["U1"], [v2], [2e-3], [r2], [2.0]).explanations[0][0]
        exact = compare(t, ["U1"], [v2], [2e-3], [r2], [2.0], circuit=c).explanations[0][0]
        assert first.part == exact.part == "R2"
        assert exact.relative_change == pytest.approx(rel, rel=1e-6)
        assert exact.value == pytest.approx(2000 * (1 + rel), rel=1e-6)
        assert exact.misfit == pytest.approx(0, abs=1e-6)
        if fitted != "2.2k":
            assert abs(first.relative_change - rel) > 0.5 * abs(rel)

    def test_only_vth_measured_prefers_the_smallest_change_against_tolerance(self):
        """With Vth alone every part can explain a shift; the one needing the smallest
        change relative to its tolerance comes first (here the supply: 0.5 V/V against
        1.5 mV/Ω per 1 % resistor, so V1 needs 0.5 % where a resistor needs 1 %)."""
        t = analyse(Circuit(parse_netlist(DIVIDER)), draws=0)
        best = explain(t, [[0.03, np.nan]], [[0.01, np.nan]])[0]
        assert best[0].part == "V1" and best[0].relative_change == pytest.approx(0.005)
        assert best[0].within_tolerance and best[0].misfit == pytest.approx(0, abs=1e-9)

    def test_equal_cells_are_named_together(self):
        """One of six equal cells with a high internal resistance: one cell is named and the
        five others listed as alike (the measurement cannot tell which)."""
        net = parse_netlist(CELLS)
        t = analyse(Circuit(net), draws=0)
        v2, r2 = equivalent(parse_netlist(CELLS.replace("R4 e4 s4 4m", "R4 e4 s4 8m")))
        best = compare(t, ["P1"], [v2], [1e-3], [r2], [0.2e-3]).explanations[0][0]
        assert {best.part, *best.alike} == {f"R{i}" for i in range(1, 7)}
        assert best.relative_change == pytest.approx(1.0, rel=1e-6)  # +4 mΩ on 4 mΩ

    def test_vectorised_equals_one_by_one(self):
        """compare() over many DUTs gives what it gives one DUT at a time."""
        t = analyse(Circuit(parse_netlist(CELLS)), draws=0)
        rng = np.random.default_rng(11)
        v = t.vth + rng.normal(0, 0.1, 30)
        r = t.rth + rng.normal(0, 3e-3, 30)
        uv, ur = np.full(30, 5e-3), np.full(30, 1e-4)
        r[3] = np.nan  # one DUT with Vth alone
        all_ = compare(t, [f"D{i}" for i in range(30)], v, uv, r, ur)
        for i in range(30):
            one = compare(t, [f"D{i}"], v[i:i + 1], uv[i:i + 1], r[i:i + 1], ur[i:i + 1])
            assert one.explanations[0] == all_.explanations[i]
            assert one.consistent[0] == all_.consistent[i]
        assert np.isnan(all_.en_rth[3]) and np.isfinite(all_.en_vth[3])
        assert all_.consistent[3] == (abs(all_.en_vth[3]) <= 1)


def _readings(path):
    """Invented readings of three divider boards: two as designed, one with R2 = 2.2 kΩ;
    seeded noise, a stated voltmeter and ammeter."""
    rng = np.random.default_rng(19)
    rows = ["dut,current_A,voltage_V"]
    for dut, (vth, rth) in {"B1": (6.0, 1000.0), "B2": (6.02, 1004.0),
                            "B3": equivalent(parse_netlist(DIVIDER.replace(
                                "R2 tap 0 2k", "R2 tap 0 2.2k")))}.items():
        for i in np.linspace(0, 4e-3, 6):
            rows.append(f"{dut},{i:.6g},{vth - rth * i + rng.normal(0, 2e-4):.6f}")
    path.write_text("\n".join(rows) + "\n")


class TestMeasuredFiles:
    @pytest.fixture()
    def files(self, tmp_path, capsys):
        net = tmp_path / "divider.cir"
        net.write_text(DIVIDER)
        rd = tmp_path / "boards.csv"
        _readings(rd)
        acc = ["--voltage-accuracy", "0.05%+1mV", "--current-accuracy", "0.1%+2uA"]
        for ext in ("csv", "json"):
            code, _, err = _run(capsys, "fit", str(rd), *acc, "--out",
                                str(tmp_path / f"fit.{ext}"))
            assert code in (0, 3), err
        return net, rd, tmp_path, acc

    def test_results_csv_json_and_readings_agree(self, files, capsys):
        """The same boards from the results CSV, the results JSON and the readings fitted
        by `design` itself give the same E_n (full-precision files)."""
        net, rd, tmp, acc = files
        docs = []
        for src, extra in ((tmp / "fit.csv", []), (tmp / "fit.json", []), (rd, acc)):
            code, out, err = _run(capsys, "design", str(net), "--draws", "2000", "--json",
                                  "--measured", str(src), *extra)
            assert code == 1, err  # B3 is not consistent
            docs.append(json.loads(out)["measured"])
        for d in docs[1:]:
            for a, b in zip(docs[0]["units"], d["units"]):
                assert a["dut"] == b["dut"]
                assert a["En_vth"] == pytest.approx(b["En_vth"], rel=1e-9)
                assert a["En_rth"] == pytest.approx(b["En_rth"], rel=1e-9)
        units = {u["dut"]: u for u in docs[0]["units"]}
        assert units["B1"]["consistent"] and units["B2"]["consistent"]
        assert not units["B3"]["consistent"]
        assert units["B3"]["explanation"][0]["part"] == "R2"
        assert docs[0]["summary"] == {"units": 3, "consistent": 2, "not_consistent": 1,
                                      "skipped": 0}

    def test_out_csv_and_terminal_table(self, files, capsys):
        """--out writes one row per unit; the terminal table names the part."""
        net, _, tmp, _ = files
        out_csv = tmp / "against_design.csv"
        code, out, _ = _run(capsys, "design", str(net), "--draws", "0", "--measured",
                            str(tmp / "fit.csv"), "--out", str(out_csv))
        assert code == 1
        assert "B3" in out and "NOT consistent" in out and "R2 +" in out
        with out_csv.open(newline="") as fh:
            rows = list(csv.DictReader(fh))
        assert [r["dut"] for r in rows] == ["B1", "B2", "B3"]
        assert rows[2]["consistent"] == "no" and rows[2]["likely_part"] == "R2"
        assert float(rows[2]["likely_change_pct"]) == pytest.approx(10, rel=0.15)

    def test_dut_selection_and_skipped(self, files, capsys, tmp_path):
        """--dut keeps the named units; a DUT the fit could not solve is listed as skipped."""
        net, _, tmp, _ = files
        code, out, _ = _run(capsys, "design", str(net), "--draws", "0", "--json",
                            "--measured", str(tmp / "fit.csv"), "--dut", "B1,B2")
        assert code == 0 and [u["dut"] for u in json.loads(out)["measured"]["units"]] == \
            ["B1", "B2"]
        rows = (tmp / "fit.csv").read_text().splitlines()
        bad = rows[0] + "\n" + rows[1] + "\n" + '"B9",,2' + "," * (rows[0].count(",") - 3) \
            + '"two readings"\n'
        f = tmp_path / "partial.csv"
        f.write_text(bad)
        m = read_fit_results(str(f))
        assert m.duts == ("B1",) and m.skipped[0][0] == "B9"

    def test_detection_and_errors(self, files, capsys, tmp_path):
        """Readings are not taken for results; a broken results file is one line with the
        file, line and column; meter settings with a results file are refused."""
        net, rd, tmp, acc = files
        assert is_results_file(str(tmp / "fit.csv")) and not is_results_file(str(rd))
        text = (tmp / "fit.csv").read_text().splitlines()
        cells = text[2].split(",")
        cells[3] = "six"  # the vth column of line 3
        broken = tmp_path / "broken.csv"
        broken.write_text("\n".join([text[0], text[1], ",".join(cells)]) + "\n")
        with pytest.raises(SagfitError, match=r"broken.csv, line 3, column vth: 'six'"):
            read_fit_results(str(broken))
        code, out, err = _run(capsys, "design", str(net), "--measured", str(broken))
        assert code == 2 and out == "" and "line 3, column vth" in err
        code, _, err = _run(capsys, "design", str(net), "--measured", str(tmp / "fit.csv"),
                            *acc[:2])
        assert code == 2 and "readings file" in err
        bad_json = tmp_path / "x.json"
        bad_json.write_text('{"results": [{"dut": "A"}]}')
        code, _, err = _run(capsys, "design", str(net), "--measured", str(bad_json))
        assert code == 2 and "results[0]" in err
