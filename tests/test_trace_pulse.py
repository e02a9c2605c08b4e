"""Pulse resistance: the IEC 61960-3 DC resistance and the HPPC pulse resistances on worked
examples computed by hand from the standards' formula, and their uncertainties.

Sources (details from memory, as noted in sagfit/core/pulse.py):
- IEC 61960-3, secondary lithium cells and batteries for portable applications, DC internal
  resistance (clause 7.7.2 from memory): I1 = 0.2 It for 10 s, then I2 = 1 It for 1 s;
  R_dc = (U1 − U2)/(I2 − I1).
- US DOE, FreedomCAR Battery Test Manual for Power-Assist HEVs, DOE/ID-11069 (2003),
  HPPC test (§3.3) and its resistance ΔV/ΔI from the reading just before the pulse
  (§4.2.1, from memory): 10 s discharge pulse, 40 s rest, 10 s regeneration pulse at
  75 % of the discharge current.
The voltages below are invented; the arithmetic is the standards'.
"""

import json

import numpy as np
import pytest

from sagfit.core.pulse import METHOD_TIMES, charge_from_start, find_pulses
from sagfit.core.trace import Trace, find_steps
from sagfit.core.units import parse_accuracy

DT = 0.01


def piecewise(segments, dt=DT):
    """Rows (t, I, V) from segments (duration_s, current_A, v_start, v_slope_per_s); the
    time axis is sampled every dt, each segment's voltage linear in its own time
    s = t − t_segment_start, so an edge falls halfway between two samples."""
    t_all, i_all, v_all = [], [], []
    t0 = 0.0
    for dur, cur, v0, slope in segments:
        n = int(round(dur / dt))
        t = t0 + dt / 2 + np.arange(n) * dt  # samples at t0 + dt/2, t0 + 3dt/2, …
        t_all.append(t)
        i_all.append(np.full(n, cur))
        v_all.append(v0 + slope * (t - t0))
        t0 += dur
    return np.concatenate(t_all), np.concatenate(i_all), np.concatenate(v_all)


def test_iec_61960_3_worked_example():
    """Invented cell of 2.5 Ah rated capacity (It = 2.5 A): I1 = 0.2 It = 0.5 A for 10 s
    ending at U1 = 3.912 V; I2 = 1 It = 2.5 A for 1 s, its voltage 3.830 V − 18 mV/s·s.
    The 1 s step ends at 1 s, so U2 is its last sample, 0.995 s after the edge (samples
    every 10 ms, the edge halfway between two): U2 = 3.830 − 0.018·0.995 = 3.81209 V.
    By hand: R_dc = (3.912 − 3.81209) V / (2.5 − 0.5) A = 0.09991/2.0 = 49.955 mΩ."""
    t, i, v = piecewise([(30, 0.0, 4.000, 0.0), (10, 0.5, 3.912, 0.0),
                         (1, 2.5, 3.830, -0.018), (30, 0.0, 3.990, 0.0)])
    tr = Trace.from_arrays(time=t, current=i, voltage=v)
    p = find_pulses(tr, find_steps(tr), times=METHOD_TIMES["iec"])
    iec = p.step == 2  # the 1 s step that follows the 10 s step at 0.2 It
    assert iec.sum() == 1
    u1, u2 = 3.912, 3.830 - 0.018 * 0.995
    by_hand = (u1 - u2) / (2.5 - 0.5)
    assert by_hand == pytest.approx(0.049955, abs=1e-12)
    assert p.resistance[iec, 0][0] == pytest.approx(by_hand, rel=1e-9)


def test_hppc_worked_example():
    """Invented HPPC profile: rest at 3.700 V; 20 A discharge for 10 s, the voltage
    3.620 V at the edge falling 6 mV/s; 40 s rest ending at 3.690 V; 15 A regeneration
    (75 % of 20 A) for 10 s from 3.770 V rising 1 mV/s. By hand (ΔV/ΔI from the sample
    just before the pulse):
    - discharge at 10 s, the pulse's last sample 9.995 s after the edge:
      (3.700 − (3.620 − 0.006·9.995)) / 20 = 0.13997/20 = 6.9985 mΩ;
    - discharge ohmic, first sample 5 ms after the edge: (3.700 − 3.61997)/20 = 4.0015 mΩ;
    - regeneration at 10 s (last sample, 9.995 s): (3.690 − 3.779995)/(−15 − 0)
      = 5.9997 mΩ."""
    t, i, v = piecewise([(60, 0.0, 3.700, 0.0), (10, 20.0, 3.620, -0.006),
                         (40, 0.0, 3.690, 0.0), (10, -15.0, 3.770, 0.001),
                         (60, 0.0, 3.695, 0.0)])
    tr = Trace.from_arrays(time=t, current=i, voltage=v)
    p = find_pulses(tr, find_steps(tr), times=METHOD_TIMES["hppc"])
    assert list(p.kind) == ["discharge", "charge"]
    r = p.resistance
    assert r[0, 2] == pytest.approx((3.700 - (3.620 - 0.006 * 9.995)) / 20, rel=1e-9)
    assert r[0, 0] == pytest.approx((3.700 - (3.620 - 0.006 * 0.005)) / 20, rel=1e-9)
    assert r[1, 2] == pytest.approx((3.690 - (3.770 + 0.001 * 9.995)) / (-15.0), rel=1e-9)
    assert p.t_at[0, 0] == pytest.approx(0.005)


def test_offsets_cancel_gains_do_not():
    """Monte Carlo over meter errors (rectangular gain and offset, JCGM 101:2008 style
    draws on an invented noise-free pulse): the spread of R matches the model's
    u_rel = √(u²(g_V) + u²(g_I)); a large offset spec changes nothing, because the
    offsets cancel in ΔU and ΔI."""
    t, i, v = piecewise([(30, 0.0, 3.70, 0.0), (10, 10.0, 3.62, -0.004), (30, 0.0, 3.69, 0.0)],
                        dt=0.05)
    va, ia = parse_accuracy("0.05%+20mV", "V"), parse_accuracy("0.2%+50mA", "A")
    tr = Trace.from_arrays(time=t, current=i, voltage=v)
    steps = find_steps(tr)
    p = find_pulses(tr, steps, voltage_accuracy=va, current_accuracy=ia)
    rel_model = np.hypot(va.gain_u, ia.gain_u)
    rel_total = p.u_resistance[0, 2] / p.resistance[0, 2]
    # noise-free: meters' gains and the edge's place between samples (slope·dt/√12) only
    rel_samp = 0.004 * 0.05 / np.sqrt(12) / (p.u_before[0] - p.voltage_at[0, 2])
    assert rel_total == pytest.approx(np.hypot(rel_model, rel_samp), rel=1e-6)
    no_offset = find_pulses(tr, steps, voltage_accuracy=parse_accuracy("0.05%", "V"),
                            current_accuracy=parse_accuracy("0.2%", "A"))
    assert no_offset.u_resistance[0, 2] == pytest.approx(p.u_resistance[0, 2], rel=1e-9)
    assert p.u_uncorrelated[0, 2] > 5 * p.u_resistance[0, 2]
    rng = np.random.default_rng(7)
    draws = 300
    gv, ov = rng.uniform(-1, 1, (2, draws)) * np.array([[0.0005], [0.020]])
    gi, oi = rng.uniform(-1, 1, (2, draws)) * np.array([[0.002], [0.050]])
    rs = []
    for k in range(draws):  # the test perturbs whole traces; sagfit itself never loops
        tk = Trace.from_arrays(time=t, current=(1 + gi[k]) * i + oi[k],
                               voltage=(1 + gv[k]) * v + ov[k])
        rs.append(find_pulses(tk, find_steps(tk, threshold=1.0)).resistance[0, 2])
    rel_mc = np.std(rs) / np.mean(rs)
    assert rel_mc == pytest.approx(rel_model, rel=0.15)


def test_charge_counted_from_start():
    """2 A for an hour is 2 Ah (trapezoid rule, exact for a constant current)."""
    t = np.arange(0, 3600.5, 0.5)
    tr = Trace.from_arrays(time=t, current=np.full(t.size, 2.0), voltage=np.full(t.size, 3.7))
    assert charge_from_start(tr)[-1] == pytest.approx(2.0, rel=1e-12)


def test_pulse_shorter_than_stated_time_left_empty(tmp_path, cli):
    """A 5 s pulse has no 10 s value: NaN in the core, empty in CSV, null in JSON, a warning."""
    t, i, v = piecewise([(60, 0.0, 3.7, 0.0), (5, 10.0, 3.6, -0.001), (60, 0.0, 3.69, 0.0)],
                        dt=0.1)
    p = tmp_path / "p.csv"
    p.write_text("time_s,current_A,voltage_V\n" + "\n".join(
        f"{a:.3f},{b:.4f},{c:.6f}" for a, b, c in zip(t, i, v)) + "\n")
    run = cli("pulses", p, "--json")
    assert run.code == 0, run.err
    doc = json.loads(run.out)
    assert doc["pulses"][0]["r_10s_ohm"] is None and doc["pulses"][0]["r_1s_ohm"] > 0
    assert any("shorter than a stated time" in w for w in doc["warnings"])
    assert any("cell maker" in c for c in doc["cautions"])
    run = cli("pulses", p, "--at", "ohmic,2s", "--out", tmp_path / "r.csv")
    assert run.code == 0 and "caution:" in run.out
    head = (tmp_path / "r.csv").read_text().splitlines()[0]
    assert "r_ohmic_ohm" in head and "r_2s_ohm" in head


def test_no_pulse_and_bad_options(tmp_path, cli):
    t = np.arange(0, 100, 0.1)
    p = tmp_path / "flat.csv"
    p.write_text("time_s,current_A,voltage_V\n" + "\n".join(
        f"{a:.2f},1.0,3.7" for a in t) + "\n")
    run = cli("pulses", p)
    assert run.code == 3 and "no pulse found" in run.out
    assert cli("pulses", p, "--method", "dcir").code == 2
    run = cli("pulses", p, "--at", "-1s")
    assert run.code == 2 and "--at" in run.err
