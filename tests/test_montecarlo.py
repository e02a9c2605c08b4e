"""Monte Carlo coverage intervals (sagfit.core.montecarlo, JCGM 101:2008).

Outside references:
- JCGM 101:2008 (GUM Supplement 1): propagation of distributions by Monte Carlo (5.9),
  the probabilistically symmetric coverage interval (7.7), validation of the GUM
  interval within δ (8.1–8.2);
- JCGM 100:2008 G.2.3 / 4.3.7: a rectangular distribution of half-width a has its 95 %
  interval at ±0.95·a (closed form);
- the Student t interval of an ordinary least-squares intercept (N. R. Draper,
  H. Smith, *Applied Regression Analysis*, 3rd ed. (1998), §1.4, 3.1), which the Monte
  Carlo with σ² drawn from its posterior s²·ν/χ²_ν must reproduce (JCGM 101:2008, 6.4.9);
- sagfit's analytic coverage factor (largest rectangular ⊕ normal, tests/test_systematic.py)
  on a mixed budget.
"""

import math

import numpy as np
import pytest
from scipy import stats

import sagfit
from sagfit.core import montecarlo as mcmod
from sagfit.core.errors import InputError
from sagfit.core.montecarlo import monte_carlo
from sagfit.core.readings import Readings
from sagfit.core.units import parse_accuracy

I = np.array([0.0, 0.5, 1.0, 2.0, 3.0, 4.0])
VTH, RTH = 12.6, 0.045  # invented pack


def _fit(**kw):
    rd = Readings.from_arrays(current=I, voltage=VTH - RTH * I, **kw)
    return rd, sagfit.fit(rd)


def test_rectangular_offset_gives_the_uniform_interval():
    """A 3 mV offset (rectangular, tiny noise) shifts Vth one for one: 95 % at ±0.95·3 mV."""
    acc = parse_accuracy("3mV", "V").with_noise(parse_accuracy("0.01mV", "V"))
    rd, f = _fit(voltage_accuracy=acc)
    mc = monte_carlo(rd, f, draws=100_000, seed=1)
    half = 0.5 * (mc.vth_high[0] - mc.vth_low[0])
    assert half == pytest.approx(0.95 * 3e-3, rel=0.01)
    assert mc.u_vth[0] == pytest.approx(3e-3 / math.sqrt(3), rel=0.01)
    # sagfit's own coverage factor knows the rectangular shape: the GUM interval is valid
    assert bool(mc.gum_valid_vth[0])


def test_mixed_budget_agrees_with_the_analytic_coverage_factor():
    acc = parse_accuracy("0.02%+3mV", "V").with_noise(parse_accuracy("1mV", "V"))
    rd, f = _fit(voltage_accuracy=acc, current_accuracy=parse_accuracy("0.1%+2mA", "A"))
    mc = monte_carlo(rd, f, draws=200_000, seed=2)
    for lo, hi, v, u, k in ((mc.vth_low, mc.vth_high, f.vth, f.u_vth, f.k),
                            (mc.rth_low, mc.rth_high, f.rth, f.u_rth, f.k_rth)):
        assert 0.5 * (hi[0] - lo[0]) == pytest.approx(k[0] * u[0], rel=0.02)
        assert 0.5 * (hi[0] + lo[0]) == pytest.approx(v[0], abs=0.02 * u[0])


def test_type_a_fit_gives_the_student_t_interval():
    rng = np.random.default_rng(5)
    v = VTH - RTH * I + rng.normal(0, 2e-3, I.size)
    rd = Readings.from_arrays(current=I, voltage=v)
    f = sagfit.fit(rd)
    assert str(f.method[0]) == "ols"
    mc = monte_carlo(rd, f, draws=200_000, seed=3)
    t = stats.t.ppf(0.975, I.size - 2)
    assert 0.5 * (mc.vth_high[0] - mc.vth_low[0]) == pytest.approx(t * f.u_vth[0], rel=0.02)
    assert 0.5 * (mc.rth_high[0] - mc.rth_low[0]) == pytest.approx(t * f.u_rth[0], rel=0.02)


def test_resistor_loaded_pack_with_a_repeated_load():
    loads = np.array([np.inf, 10, 4.7, 2.2, 2.2, 1.0])
    i = np.where(np.isinf(loads), 0.0, VTH / (loads + RTH))
    v = VTH - RTH * i
    rd = Readings.from_arrays(load=loads, voltage=v, load_tolerance=1.0,
                              voltage_accuracy=parse_accuracy("0.015%+2mV", "V"))
    f = sagfit.fit(rd)
    mc = monte_carlo(rd, f, draws=100_000, seed=4)
    # the linearised interval and the distribution's agree to a few per cent here
    assert 0.5 * (mc.rth_high[0] - mc.rth_low[0]) == pytest.approx(
        f.k_rth[0] * f.u_rth[0], rel=0.05)
    assert mc.u_vth[0] == pytest.approx(f.u_vth[0], rel=0.03)


def test_many_duts_in_bounded_passes(monkeypatch):
    """Blocks of DUTs and draws (bounded memory) give the same intervals as one pass,
    within the Monte Carlo's own noise; DUTs in error stay NaN."""
    acc = parse_accuracy("0.05%+2mV", "V").with_noise(parse_accuracy("0.5mV", "V"))
    m = 12
    g = np.repeat(np.arange(m), I.size)
    v = np.tile(VTH - RTH * I, m) + np.repeat(np.linspace(0, 1, m), I.size)
    rd = Readings.from_arrays(current=np.tile(I, m), voltage=v, group=g,
                              duts=[f"D{k}" for k in range(m)], voltage_accuracy=acc)
    f = sagfit.fit(rd)
    one = monte_carlo(rd, f, draws=20_000, seed=7)
    monkeypatch.setattr(mcmod, "MAX_VALUES_PER_PASS", 20_000)  # 3 DUTs × 1,111 draws a pass
    many = monte_carlo(rd, f, draws=20_000, seed=7)
    np.testing.assert_allclose(many.u_vth, one.u_vth, rtol=0.05)
    np.testing.assert_allclose(many.vth_high - many.vth_low, one.vth_high - one.vth_low,
                               rtol=0.06)


def test_refusals():
    rd, f = _fit(voltage_accuracy=parse_accuracy("0.05%+2mV", "V"))
    with pytest.raises(InputError, match="at least 1,000"):
        monte_carlo(rd, f, draws=10)
    rf = sagfit.fit(rd, robust=True)
    with pytest.raises(InputError, match="robust"):
        monte_carlo(rd, rf, draws=1000)


def test_cli(tmp_path, cli):
    csv = tmp_path / "p.csv"
    csv.write_text("current,voltage\n0,12.600\n0.5,12.578\n1,12.555\n2,12.510\n3,12.465\n",
                   encoding="utf-8")
    r = cli("fit", csv, "--voltage-accuracy", "0.05%+2mV", "--monte-carlo", "20000", "--json")
    assert r.code == 0, r.err
    import json

    block = json.loads(r.out)["results"][0]["monte_carlo"]
    assert block["draws"] == 20000 and len(block["vth"]["ci"]) == 2
    r = cli("fit", csv, "--voltage-accuracy", "0.05%+2mV", "--monte-carlo", "20000")
    assert "Monte Carlo 95 %" in r.out and "JCGM 101:2008" in r.out
    r = cli("fit", csv, "--monte-carlo", "50")
    assert r.code == 2 and "at least 1000" in r.err
