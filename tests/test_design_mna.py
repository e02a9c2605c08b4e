"""Netlist reader, MNA equivalent and tolerance analysis (sagfit.core.netlist/mna/tolerance)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sagfit.core.errors import SagfitError
from sagfit.core.mna import Circuit, equivalent
from sagfit.core.netlist import NetlistError, parse_netlist, parse_value
from sagfit.core.tolerance import analyse, explain, normalised_error

DIVIDER = """* textbook divider
V1 in 0 DC 12 tol=1%
R1 in tap 2k tol=1%
R2 tap 0 2k0 tol=1%
.port tap 0
"""


def test_divider_thevenin_norton_and_loads():
    # 12 V over two 2 kΩ: 6 V behind 1 kΩ at the tap; 2 kΩ load sees 4 V, 1 kΩ sees 3 V
    # (common practice: the voltage-divider example of any circuits textbook).
    vth, rth = equivalent(parse_netlist(DIVIDER))
    assert vth == pytest.approx(6.0, rel=1e-12)
    assert rth == pytest.approx(1000.0, rel=1e-12)
    assert vth * 2000 / (rth + 2000) == pytest.approx(4.0, rel=1e-12)
    assert vth * 1000 / (rth + 1000) == pytest.approx(3.0, rel=1e-12)
    # Norton form: 6 mA in parallel with 1 kΩ
    c = Circuit(parse_netlist(DIVIDER))
    assert c.solve(c.nominal).isc[0] == pytest.approx(6e-3, rel=1e-12)


def test_load_in_netlist_matches_formula():
    text = DIVIDER + "RL tap 0 2k\n"
    vth, rth = equivalent(parse_netlist(text))
    assert vth == pytest.approx(4.0, rel=1e-12)  # loaded tap voltage, common practice
    assert rth == pytest.approx(2000 / 3, rel=1e-12)


def test_controlled_sources_by_hand():
    # E: ideal amplifier gain 10 of a 1 V source through 100 Ω output resistor → 10 V, 100 Ω
    e = "V1 a 0 1\nR0 a 0 1k\nE1 b 0 a 0 10\nR1 b out 100\n.port out 0\n"
    assert equivalent(parse_netlist(e)) == pytest.approx((10.0, 100.0), rel=1e-12)
    # G: 2 mS transconductance driven by 1 V into 1 kΩ: v = -gm·v·R (current n+→n-)
    g = "V1 a 0 1\nG1 out 0 a 0 2m\nR1 out 0 1k\n.port out 0\n"
    assert equivalent(parse_netlist(g)) == pytest.approx((-2.0, 1000.0), rel=1e-12)
    # F: current mirror of 1 mA (1 V over 1 kΩ through V sense), gain 2, into 500 Ω
    f = ("V1 a 0 1\nVs a b 0\nR1 b 0 1k\nF1 0 out Vs 2\nR2 out 0 500\n.port out 0\n")
    assert equivalent(parse_netlist(f)) == pytest.approx((1.0, 500.0), rel=1e-12)
    # H: transresistance 1 kΩ of 1 mA → 1 V, in series with 50 Ω
    h = ("V1 a 0 1\nVs a b 0\nR1 b 0 1k\nH1 c 0 Vs 1k\nR2 c out 50\n.port out 0\n")
    assert equivalent(parse_netlist(h)) == pytest.approx((1.0, 50.0), rel=1e-12)


def test_values_spice_and_rkm():
    assert parse_value("4.7k") == pytest.approx(4700)
    assert parse_value("1meg") == pytest.approx(1e6)
    assert parse_value("10m") == pytest.approx(0.01)
    assert parse_value("4k7") == pytest.approx(4700)
    assert parse_value("1e-3") == pytest.approx(1e-3)


def test_continuation_comments_and_inductor_capacitor():
    text = ("* title\nV1 in 0 ; the supply\n+ 12\nL1 in x 1u\nR1 x tap 2k $ top\n"
            "R2 tap 0 2k\nC1 tap 0 1u\n.port tap 0\n.end\nR9 q 0 1\n")
    net = parse_netlist(text)
    assert equivalent(net) == pytest.approx((6.0, 1000.0), rel=1e-12)
    assert any("short" in n for n in net.notes) and any("open" in n for n in net.notes)


@pytest.mark.parametrize("text, where, what", [
    ("V1 a 0 12\nR1 a b 1k\nQ1 b 0 0 npn\n.port a 0\n", "line 3, column 1", "only R"),
    ("V1 a 0 12\nR1 a 0 1x!\n.port a 0\n", "line 2, column 8", "cannot read value"),
    ("V1 a 0 1e400\nR1 a 0 1\n.port a 0\n", "line 1, column 8", "not a finite number"),
    ("V1 a 0 1\nR1 a 0 1\nE1 b 0 a 0 nan\nR2 b 0 1\n.port b 0\n", "line 3, column 12",
     "not a finite number"),
    ("V1 a 0 12\nR1 a 0 1k\nR2 b c 1k\n.port a 0\n", "line 3, column 4", "floating"),
    ("V1 a 0 12\nR1 a 0 1k\nR2 a\n+ b 1k\nC1 b\n+  d 1u\n.port a 0\n",
     "line 6, column 4", "'d' of C1 is floating"),
    ("V1 a 0 12\nV2 a 0 5\nR1 a 0 1k\n.port a 0\n", "line 2, column 1", "loop of voltage"),
    ("V1 a 0 12\nR1 a 0 1k\n.port  zz 0\n", "line 3, column 8", "port node 'zz'"),
    ("V1 a 0 12\nR1 a 0 1k\n.port a gnd\n.port 0 gnd\n", "line 4, column 9", "the same"),
    ("V1 a 0 12\nR1 a 0 1k\nE1 b 0 q 0 2\nR2 b 0 1k\n.port b 0\n", "line 3, column 1",
     "control node 'q'"),
    ("V1 a 0 12\nR1 a 0 1k tol=x\n.port a 0\n", "line 2, column 11", "tolerance"),
    ("V1 a 0 12\nR1 a 0 1k\n", "", "no port"),
])
def test_errors_name_line_and_column(text, where, what):
    with pytest.raises(NetlistError) as exc:
        parse_netlist(text, "board.cir")
    msg = str(exc.value)
    assert msg.startswith("board.cir") and where in msg and what in msg


def test_singular_network():
    # a current source in series with a capacitor (open): KCL cannot hold
    text = "I1 0 a 1m\nR1 a b 1k\nG1 b 0 b 0 -1m\nR2 b 0 1k\n.port a 0\n"
    with pytest.raises(SagfitError, match="singular"):
        equivalent(parse_netlist(text, "s.cir"))


def test_sensitivities_worst_case_and_vertices_on_divider():
    t = analyse(Circuit(parse_netlist(DIVIDER)), draws=0)
    # dVth/dV1 = R2/(R1+R2) = 0.5; dVth/dR1 = -V·R2/(R1+R2)² = -1.5 mV/Ω (analytic)
    np.testing.assert_allclose(t.svth, [0.5, -1.5e-3, 1.5e-3], rtol=1e-6)
    # the extremes of a monotone function of each part sit at vertices: the two agree
    assert t.wc_vth == pytest.approx(t.vertex_vth, rel=1e-12)
    assert t.wc_rth == pytest.approx(t.vertex_rth, rel=1e-12)
    assert t.ranking("vth")[0] == 0  # V1 (±60 mV) ahead of each resistor (±30 mV)
    assert t.rss_vth == pytest.approx(math.sqrt(0.06 ** 2 + 2 * 0.03 ** 2), rel=1e-5)


def _ladder(n, tol="1%"):
    lines = [f"V1 n0 0 10 tol={tol}"]
    for i in range(n):
        lines.append(f"RS{i} n{i} n{i + 1} 1k tol={tol}")
        lines.append(f"RP{i} n{i + 1} 0 10k tol={tol}")
    lines.append(f".port n{n} 0")
    return "\n".join(lines)


def test_monte_carlo_converges_to_rss_many_components():
    # Linear-ish output and many independent parts: by the central limit theorem the MC
    # standard deviation tends to RSS/√3 for uniform parts (GUM JCGM 100:2008, 4.3.7 and
    # G.2), and all draws stay inside the worst-case band.
    t = analyse(Circuit(parse_netlist(_ladder(15, "0.1%"))), draws=20_000, seed=7)
    assert np.std(t.mc_vth) == pytest.approx(t.rss_vth / math.sqrt(3), rel=0.03)
    assert np.std(t.mc_rth) == pytest.approx(t.rss_rth / math.sqrt(3), rel=0.03)
    assert t.wc_vth[0] <= t.mc_vth.min() and t.mc_vth.max() <= t.wc_vth[1]
    # 97.5th percentile of a near-normal sum: mean + 1.96 σ
    q = np.percentile(t.mc_vth, 97.5)
    assert q == pytest.approx(t.vth + 1.96 * t.rss_vth / math.sqrt(3), rel=1e-3)


def test_batched_equals_one_by_one():
    c = Circuit(parse_netlist(_ladder(8)))
    rng = np.random.default_rng(3)
    x = c.nominal * (1 + rng.uniform(-0.01, 0.01, (40, c.nominal.size)))
    batch = c.solve(x)
    single = [c.solve(row) for row in x]
    np.testing.assert_allclose(batch.vth, [s.vth[0] for s in single], rtol=1e-13)
    np.testing.assert_allclose(batch.rth, [s.rth[0] for s in single], rtol=1e-13)


def test_en_and_single_component_explanation():
    # E_n per ISO 13528:2022 9.7: (x − X)/√(U_lab² + U_ref²)
    assert normalised_error(6.3, 0.1, 6.0, 0.2) == pytest.approx(0.3 / math.sqrt(0.05))
    t = analyse(Circuit(parse_netlist(DIVIDER)), draws=0)
    # R2 (tap to ground) 10 % high moves Vth by +0.142857 V, Rth by +47.6 Ω: R2 is named
    net = parse_netlist(DIVIDER.replace("R2 tap 0 2k0", "R2 tap 0 2.2k"))
    v2, r2 = equivalent(net)
    # differences in units of 1 mV and 1 Ω: only a change of R2 fits both
    best = explain(t, [[v2 - t.vth, r2 - t.rth]], [[1e-3, 1.0]])[0]
    assert best[0].part == "R2" and best[0].relative_change == pytest.approx(0.1, rel=0.1)
    assert not best[0].within_tolerance  # 10 % against a 1 % part


class TestToleranceTable:
    """Tolerances from a side table (a netlist exported without tol=)."""

    PLAIN = "V1 in 0 12\nR1 in tap 2k\nR2 tap 0 2k\nRL tap 0 1meg tol=2%\n.port tap 0\n"

    def test_patterns_later_lines_win_and_table_over_netlist(self):
        """'R* 1%' gives every resistor 1 %, a later 'R2 5%' wins for R2, and the table
        wins over RL's own tol=2%."""
        from sagfit.core.netlist import apply_tolerances

        net = apply_tolerances(parse_netlist(self.PLAIN),
                               "# parts list (invented)\nR*  1%\nR2 5%\nv1, 0.005\n", "t.txt")
        assert {e.name: e.tol for e in net.elements} == pytest.approx(
            {"V1": 0.005, "R1": 0.01, "R2": 0.05, "RL": 0.01})
        assert "tolerances of 4 part(s) from t.txt" in net.notes

    @pytest.mark.parametrize("text, where, what", [
        ("R* 1%\nQ* 1%\n", "line 2, column 1", "matches no element"),
        ("R1   1x%\n", "line 1, column 6", "cannot read tolerance"),
        ("R1 150%\n", "line 1, column 4", "between 0 and 100"),
        ("R1\n", "line 1, column 1", "one part"),
    ])
    def test_errors_name_line_and_column(self, text, where, what):
        from sagfit.core.netlist import apply_tolerances

        with pytest.raises(NetlistError) as exc:
            apply_tolerances(parse_netlist(self.PLAIN), text, "t.txt")
        assert str(exc.value).startswith("t.txt, " + where) and what in str(exc.value)


@pytest.mark.slow
def test_monte_carlo_tails_reach_rss_and_worst_case():
    """Where theory says they must: (1) normal parts with tol = 3σ on a near-linear
    network: the 0.135/99.865 % percentiles tend to nominal ∓ RSS (the RSS of 3σ changes
    is the 3σ of the sum; GUM JCGM 100:2008, 5.1.2, linear model); (2) uniform parts, two
    toleranced resistors: the extremes of many draws tend to the worst case (the corners
    of the tolerance box, reached with probability ε² near each)."""
    t = analyse(Circuit(parse_netlist(_ladder(15, "0.1%"))), draws=200_000,
                distribution="normal", seed=5)
    lo, hi = np.percentile(t.mc_vth, [0.135, 99.865])
    assert t.vth - lo == pytest.approx(t.rss_vth, rel=0.03)
    assert hi - t.vth == pytest.approx(t.rss_vth, rel=0.03)
    two = DIVIDER.replace("V1 in 0 DC 12 tol=1%", "V1 in 0 DC 12")
    t2 = analyse(Circuit(parse_netlist(two)), draws=200_000, seed=6)
    half = (t2.wc_vth[1] - t2.wc_vth[0]) / 2
    assert t2.mc_vth.min() - t2.wc_vth[0] == pytest.approx(0, abs=0.02 * half)
    assert t2.wc_vth[1] - t2.mc_vth.max() == pytest.approx(0, abs=0.02 * half)
    assert t2.wc_vth[0] <= t2.mc_vth.min() and t2.mc_vth.max() <= t2.wc_vth[1]
