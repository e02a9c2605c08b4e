"""Predictions when the meters' errors are shared by the sweep (sagfit.core.predict).

A reading taken later with the very voltmeter of the sweep carries the same gain and
offset error as the readings the line was fitted to: both move together, so the
deviation of that reading from the prediction does not contain them (JCGM 100:2008,
5.2 correlated input quantities with correlation 1, F.1.2.1 a common effect). The
prediction interval for a reading with *another* meter of the same spec, and the
confidence interval for the true value, keep them.

Checked by a seeded Monte Carlo of the measurement model written here (JCGM 101:2008 in
its simplest form): meter gain and offset drawn once per sweep, rectangular within the
spec (GUM 4.3.7, the usual reading of a spec, common practice), small noise per reading.
"""

import math

import numpy as np
import pytest

import sagfit
from sagfit.core.predict import models_from_document, predict
from sagfit.core.readings import Readings
from sagfit.core.units import parse_accuracy

SQ3 = math.sqrt(3.0)
SPEC = "0.02%+3mV"
NOISE = 0.3e-3  # V, 1σ per reading (invented bench)
CURRENTS = np.array([0.0, 0.5, 1.0, 2.0, 3.0, 4.0])  # electronic load set points, A
VTH, RTH = 12.6, 0.045  # invented pack


def _sweeps(m, seed):
    rng = np.random.default_rng(seed)
    acc = parse_accuracy(SPEC, "V").with_noise(parse_accuracy("0.3mV", "V"))
    n = CURRENTS.size
    gain = rng.uniform(-1, 1, m) * 0.02e-2
    off = rng.uniform(-1, 1, m) * 3e-3
    i = np.tile(CURRENTS, m)
    g = np.repeat(np.arange(m), n)
    v_true = VTH - RTH * i
    v = v_true * (1 + gain[g]) + off[g] + rng.normal(0, NOISE, g.size)
    duts = [f"P{k:04d}" for k in range(m)]
    rd = Readings.from_arrays(current=i, voltage=v, group=g, duts=duts,
                              voltage_accuracy=acc)
    return rd, gain, off, rng


def _document(fits):
    return {"results": fits.to_dicts(), "confidence": fits.confidence, "settings": {}}


def test_shared_part_of_the_covariance_is_the_meter_spec():
    """Offset-only voltmeter: its whole variance (a/√3)² sits in the shared part of
    u²(Vth), none in Rth (the closed form of GUM 5.1.2 for an offset common to all)."""
    i = CURRENTS
    acc = parse_accuracy("3mV", "V").with_noise(parse_accuracy("0.3mV", "V"))
    f = sagfit.fit(Readings.from_arrays(current=i, voltage=VTH - RTH * i,
                                        voltage_accuracy=acc))
    assert f.var_vth_shared[0] == pytest.approx((3e-3 / SQ3) ** 2, rel=1e-9)
    assert f.var_rth_shared[0] == pytest.approx(0.0, abs=1e-18)
    assert f.var_vth_shared[0] < f.u_vth[0] ** 2


def test_no_shared_model_gives_no_same_meter_interval():
    i = CURRENTS
    f = sagfit.fit(Readings.from_arrays(current=i, voltage=VTH - RTH * i,
                                        u_voltage=np.full(i.size, 1e-3)))
    (p,) = predict(models_from_document(_document(f)), currents=[1.5])
    assert p.voltage.pi is not None and p.voltage.pi_same is None
    assert "pi_same_meter" not in p.to_dict()["voltage_V"]


def test_a_shared_ammeter_error_gives_no_same_meter_interval():
    """With a measured current whose meter error is shared too, the ammeter's gain and
    offset moved the fitted line but not a new voltmeter reading (JCGM 100:2008 5.2:
    only inputs common to both cancel), so no same-meter interval is offered."""
    i = CURRENTS
    acc_v = parse_accuracy(SPEC, "V").with_noise(parse_accuracy("0.3mV", "V"))
    acc_i = parse_accuracy("0.1%+2mA", "A")
    f = sagfit.fit(Readings.from_arrays(current=i, voltage=VTH - RTH * i,
                                        voltage_accuracy=acc_v, current_accuracy=acc_i))
    (p,) = predict(models_from_document(_document(f)), currents=[1.5])
    assert p.voltage.pi is not None and p.voltage.pi_same is None
    f = sagfit.fit(Readings.from_arrays(current=i, voltage=VTH - RTH * i,
                                        voltage_accuracy=acc_v))
    (p,) = predict(models_from_document(_document(f)), currents=[1.5])
    assert p.voltage.pi_same is not None


@pytest.mark.slow
def test_same_meter_interval_covers_a_reading_with_the_same_meter():
    m = 1500
    rd, gain, off, rng = _sweeps(m, seed=11)
    fits = sagfit.fit(rd)
    models = models_from_document(_document(fits))
    i_new = 1.5
    preds = predict(models, currents=[i_new])
    v_true = VTH - RTH * i_new
    same = v_true * (1 + gain) + off + rng.normal(0, NOISE, m)  # the sweep's own meter
    g2 = rng.uniform(-1, 1, m) * 0.02e-2  # another meter of the same spec
    o2 = rng.uniform(-1, 1, m) * 3e-3
    other = v_true * (1 + g2) + o2 + rng.normal(0, NOISE, m)
    lo_s = np.array([p.voltage.pi_same[0] for p in preds])
    hi_s = np.array([p.voltage.pi_same[1] for p in preds])
    lo_p = np.array([p.voltage.pi[0] for p in preds])
    hi_p = np.array([p.voltage.pi[1] for p in preds])
    lo_c = np.array([p.voltage.ci[0] for p in preds])
    hi_c = np.array([p.voltage.ci[1] for p in preds])
    cover_same = np.mean((lo_s <= same) & (same <= hi_s))
    cover_other = np.mean((lo_p <= other) & (other <= hi_p))
    cover_true = np.mean((lo_c <= v_true) & (v_true <= hi_c))
    # 1,500 draws: a binomial standard error of 0.6 % at 95 %
    assert 0.93 <= cover_same <= 0.985, cover_same
    assert cover_other >= 0.93, cover_other
    assert 0.93 <= cover_true <= 0.99, cover_true
    # the shared calibration error cancels: the same-meter interval is far narrower
    width_same = np.median(hi_s - lo_s)
    assert width_same < 0.5 * np.median(hi_p - lo_p)
    assert width_same < 0.5 * np.median(hi_c - lo_c)
