"""Meter errors shared by a sweep and resistor errors shared by repeats
(sagfit.core.systematic).

Outside references:
- JCGM 100:2008 (GUM) 5.1.2 (sensitivity coefficients), 5.2 (correlated input
  quantities), F.1.2.1 (a common effect correlates readings), G.4 (Welch–Satterthwaite);
- the GUM Tree Calculator (PyPI ``GTC``, Measurement Standards Laboratory of New
  Zealand), which propagates the same measurement model with its own arithmetic;
- a brute-force Monte Carlo of the measurement model written here (JCGM 101:2008, the
  propagation of distributions, in its simplest form);
- the uniform distribution's 95 % quantile, 0.95·a = 1.645·(a/√3) (GUM G.2.3, common
  practice).
"""

import math

import numpy as np
import pytest

import sagfit
from sagfit.core.readings import Readings
from sagfit.core.simulate import simulate
from sagfit.core.systematic import coverage_half_width
from sagfit.core.units import Accuracy, parse_accuracy

SQ3 = math.sqrt(3.0)


def _line_readings(vth, rth, currents, **kw):
    i = np.asarray(currents, float)
    return Readings.from_arrays(current=i, voltage=vth - rth * i, **kw)


class TestWorkedExample:
    """Closed-form sensitivities, GUM 5.1.2 with the common effect of F.1.2.1."""

    def test_offset_moves_vth_one_for_one_and_leaves_rth(self):
        acc = parse_accuracy("2mV", "V")          # offset only, rectangular: u = 2 mV/√3
        f = sagfit.fit(_line_readings(12.0, 0.05, [0, 1, 2, 4, 6],
                                      voltage_accuracy=acc))
        assert f.u_vth[0] == pytest.approx(2e-3 / SQ3, rel=1e-9)
        assert f.u_rth[0] == pytest.approx(0.0, abs=1e-12)

    def test_voltmeter_gain_scales_vth_and_rth(self):
        acc = parse_accuracy("0.1%", "V")         # gain g: Vth(1+g), Rth(1+g)
        f = sagfit.fit(_line_readings(12.0, 0.05, [0, 1, 2, 4, 6],
                                      voltage_accuracy=acc))
        assert f.u_vth[0] == pytest.approx(12.0 * 1e-3 / SQ3, rel=1e-9)
        assert f.u_rth[0] == pytest.approx(0.05 * 1e-3 / SQ3, rel=1e-9)
        assert f.cov_vr[0] == pytest.approx(12.0 * 0.05 * 1e-6 / 3, rel=1e-9)

    def test_ammeter_gain_scales_rth_only_and_offset_moves_vth_by_rth(self):
        acc = parse_accuracy("0.2%+1mA", "A")
        f = sagfit.fit(_line_readings(5.0, 0.1, [0.5, 1, 2, 3], current_accuracy=acc,
                                      voltage_accuracy=parse_accuracy("0.0001%", "V")))
        u_gain = 0.002 / SQ3                      # I(1+g): slope −Rth/(1+g)
        u_off = 1e-3 / SQ3                        # I + o: Vth moves by Rth·o
        u_vgain = 1e-6 / SQ3
        assert f.u_rth[0] == pytest.approx(0.1 * math.hypot(u_gain, u_vgain), rel=1e-6)
        assert f.u_vth[0] == pytest.approx(math.hypot(0.1 * u_off, 5.0 * u_vgain), rel=1e-6)

    def test_shared_spec_is_larger_than_the_independent_reading_of_it(self):
        """The issue's pack: a 0.015 %+2 mV meter at 12.7 V cannot give u(Vth) below its
        own offset and gain parts (≈ 1.6 mV), as the independent model did."""
        loads = [np.inf, 10, 4.7, 2.2, 1.0, 0.47]
        run = simulate(12.7, 0.02, loads, seed=3, load_tolerance=1.0,
                       voltage_accuracy=parse_accuracy("0.015%+2mV", "V"))
        acc = parse_accuracy("0.015%+2mV", "V")
        shared = sagfit.fit(run.to_readings(voltage_accuracy=acc, load_tolerance=1.0))
        indep = sagfit.fit(run.to_readings(voltage_accuracy=acc.with_shared(False),
                                           load_tolerance=1.0))
        floor = math.hypot(2e-3, 12.7 * 0.015e-2) / SQ3
        assert shared.u_vth[0] >= floor * 0.99
        assert indep.u_vth[0] < floor


class TestAgainstGTC:
    """The same measurement model built with the GUM Tree Calculator."""

    gtc = pytest.importorskip("GTC")

    def test_wls_line_with_shared_gain_and_offset(self):
        from GTC import get_correlation, uncertainty, ureal

        i = np.array([0.0, 0.5, 1.0, 2.0, 3.0, 4.0])
        vth, rth = 12.6, 0.08
        v = vth - rth * i
        acc = parse_accuracy("0.05%+3mV", "V")
        f = sagfit.fit(Readings.from_arrays(current=i, voltage=v, voltage_accuracy=acc))
        # GTC: corrections for the voltmeter's gain and offset, one each for the sweep
        gain = ureal(0.0, acc.gain_u, label="gain")
        off = ureal(0.0, acc.offset_u, label="offset")
        w = 1.0 / acc.standard_uncertainty(v) ** 2      # the weights sagfit fits with
        vv = [float(vk) * (1 + gain) + off for vk in v]
        sw = w.sum()
        xb = (w * i).sum() / sw
        yb = sum(wk * vk for wk, vk in zip(w, vv)) / sw
        sxx = (w * (i - xb) ** 2).sum()
        b = sum(wk * (xk - xb) * (vk - yb) for wk, xk, vk in zip(w, i, vv)) / sxx
        a = yb - b * xb
        assert f.vth[0] == pytest.approx(a.x, rel=1e-12)
        assert f.u_vth[0] == pytest.approx(uncertainty(a), rel=1e-9)
        assert f.u_rth[0] == pytest.approx(uncertainty(b), rel=1e-9)
        r = f.cov_vr[0] / (f.u_vth[0] * f.u_rth[0])
        assert r == pytest.approx(-get_correlation(a, b), abs=1e-9)

    def test_two_meters(self):
        from GTC import get_correlation, uncertainty, ureal

        i = np.array([0.1, 0.5, 1.0, 1.5, 2.0])
        v = 5.0 - 0.04 * i
        va, ia = parse_accuracy("0.02%+1mV", "V"), parse_accuracy("0.3%+2mA", "A")
        f = sagfit.fit(Readings.from_arrays(current=i, voltage=v, voltage_accuracy=va,
                                            current_accuracy=ia))
        gv, ov = ureal(0, va.gain_u), ureal(0, va.offset_u)
        gi, oi = ureal(0, ia.gain_u), ureal(0, ia.offset_u)
        # York's weights at the fitted slope, held fixed (the linearisation sagfit uses)
        bfit = -f.rth[0]
        w = 1.0 / (va.standard_uncertainty(v) ** 2
                   + bfit ** 2 * ia.standard_uncertainty(i) ** 2)
        xs = [float(x) * (1 + gi) + oi for x in i]
        ys = [float(y) * (1 + gv) + ov for y in v]
        sw = w.sum()
        xb = sum(wk * x for wk, x in zip(w, xs)) / sw
        yb = sum(wk * y for wk, y in zip(w, ys)) / sw
        b = (sum(wk * (x - xb) * (y - yb) for wk, x, y in zip(w, xs, ys))
             / sum(wk * (x - xb) ** 2 for wk, x in zip(w, xs)))
        a = yb - b * xb
        assert f.u_vth[0] == pytest.approx(uncertainty(a), rel=1e-6)
        assert f.u_rth[0] == pytest.approx(uncertainty(b), rel=1e-6)
        assert f.cov_vr[0] / (f.u_vth[0] * f.u_rth[0]) == pytest.approx(
            -get_correlation(a, b), abs=1e-6)


def test_brute_force_monte_carlo_of_a_resistor_loaded_pack():
    """I = V/R with 1 % resistors (4.7 Ω used twice) and a shared voltmeter spec: the
    spread of refitted Vth and Rth over 4,000 draws of the model matches sagfit's u."""
    rng = np.random.default_rng(11)
    loads = np.array([np.inf, 10.0, 4.7, 2.2, 4.7, 1.0])
    vth, rth = 12.7, 0.025
    acc = parse_accuracy("0.015%+2mV", "V")
    r_true_nom = loads
    n_mc = 4000
    uniq = {10.0: 0, 4.7: 1, 2.2: 2, 1.0: 3}
    w_r = rng.uniform(-1, 1, (n_mc, 4))
    idx = np.array([-1] + [uniq[x] for x in loads[1:]])
    r_true = np.where(idx >= 0, r_true_nom * (1 + 0.01 * w_r[:, np.maximum(idx, 0)]), np.inf)
    i_true = np.where(np.isinf(r_true), 0.0, vth / (r_true + rth))
    v_true = vth - rth * i_true
    g, o = rng.uniform(-1, 1, (2, n_mc, 1))
    v_meas = v_true * (1 + 0.015e-2 * g) + 2e-3 * o
    rd = Readings.from_arrays(voltage=v_meas.ravel(), load=np.tile(loads, n_mc),
                              group=np.repeat(np.arange(n_mc), loads.size),
                              duts=[str(k) for k in range(n_mc)], voltage_accuracy=acc,
                              load_tolerance=1.0)
    f = sagfit.fit(rd)
    # predicted u at the exact data (no scatter: the Type A part cannot win there)
    exact = sagfit.fit(Readings.from_arrays(voltage=vth - rth * np.where(
        np.isinf(loads), 0, vth / (loads + rth)), load=loads, voltage_accuracy=acc,
        load_tolerance=1.0))
    assert np.std(f.vth) == pytest.approx(exact.u_vth[0], rel=0.06)
    assert np.std(f.rth) == pytest.approx(exact.u_rth[0], rel=0.06)


def _coverage(fits, vth, rth):
    k = fits.k
    cv = np.abs(fits.vth - vth) <= k * fits.u_vth
    cr = np.abs(fits.rth - rth) <= fits.k_rth * fits.u_rth
    return cv.mean(), cr.mean()


@pytest.mark.slow
class TestCoverage:
    """Seeded coverage of the 95 % intervals over 1,500 simulated sweeps each."""

    N = 1500

    @pytest.mark.parametrize("meter_errors", ["per_sweep", "per_reading"])
    def test_resistor_loaded_pack(self, meter_errors):
        loads = [np.inf, 10, 4.7, 2.2, 4.7, 1.0]     # one resistor used twice
        acc = Accuracy(0.015, 2e-3, noise_offset=0.1e-3)
        run = simulate(12.7, 0.025, loads, duts=self.N, seed=5, load_tolerance=1.0,
                       voltage_accuracy=acc, per_dut_loads=True, meter_errors=meter_errors)
        fits = sagfit.fit(run.to_readings(voltage_accuracy=acc, load_tolerance=1.0))
        cv, cr = _coverage(fits, run.vth, run.rth)
        assert 0.93 <= cv <= 0.99 if meter_errors == "per_sweep" else cv >= 0.93
        assert 0.93 <= cr <= 0.99 if meter_errors == "per_sweep" else cr >= 0.93

    @pytest.mark.parametrize("meter_errors", ["per_sweep", "per_reading"])
    def test_regulator_on_an_electronic_load(self, meter_errors):
        loads = [np.inf, 50, 20, 10, 5, 2.5]
        va, ia = Accuracy(0.015, 2e-3, noise_offset=0.2e-3), Accuracy(0.2, 1e-3)
        run = simulate(5.0, 0.08, loads, duts=self.N, seed=9, voltage_accuracy=va,
                       current_accuracy=ia, measure_current=True, meter_errors=meter_errors)
        fits = sagfit.fit(run.to_readings(voltage_accuracy=va, current_accuracy=ia))
        cv, cr = _coverage(fits, run.vth, run.rth)
        assert 0.93 <= cv <= 0.99 if meter_errors == "per_sweep" else cv >= 0.93
        assert 0.93 <= cr <= 0.99 if meter_errors == "per_sweep" else cr >= 0.93

    def test_independent_errors_declared(self):
        """Errors truly per reading and declared so: today's model, still ≥ 93 %."""
        loads = [np.inf, 10, 4.7, 2.2, 1.0]
        acc = Accuracy(0.015, 2e-3).with_shared(False)
        run = simulate(12.7, 0.025, loads, duts=self.N, seed=2, load_tolerance=1.0,
                       voltage_accuracy=acc, per_dut_loads=True, meter_errors="per_reading")
        fits = sagfit.fit(run.to_readings(voltage_accuracy=acc, load_tolerance=1.0))
        cv, cr = _coverage(fits, run.vth, run.rth)
        assert cv >= 0.93 and cr >= 0.93


def test_coverage_half_width_limits():
    """Uniform alone: 0.95·a (GUM G.2.3); normal alone: 1.96σ; a sum in between."""
    a = np.array([1.0, 0.0, 1.0])
    s = np.array([0.0, 1.0, 0.5])
    h = coverage_half_width(a, s, 0.95)
    assert h[0] == pytest.approx(0.95)
    assert h[1] == pytest.approx(1.959964, rel=1e-6)
    # brute force for the mixture
    rng = np.random.default_rng(1)
    x = rng.uniform(-1, 1, 400_000) + 0.5 * rng.standard_normal(400_000)
    assert h[2] == pytest.approx(np.quantile(np.abs(x), 0.95), rel=0.01)


def test_only_random_components_unchanged():
    """Per-reading u columns and no spec: the fit is the one it always was (no model)."""
    i = np.array([0.0, 1.0, 2.0, 3.0])
    v = np.array([12.0, 11.95, 11.9, 11.849])
    rd = Readings.from_arrays(current=i, voltage=v, u_voltage=np.full(4, 1e-3))
    assert rd.errors is None
