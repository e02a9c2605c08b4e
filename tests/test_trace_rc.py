"""The dynamic equivalent R0 + RC branches: recovery of known parameters, interval
coverage, the one/two-branch choice and the voltage predicted for a current profile.

Truth: the closed-form response of R0 + Σ R_k‖C_k to current steps (tests/_trace_synth;
textbook first-order circuits, /work/shared/reference METHODS §9), with white noise on
current and voltage, jittered sample times and each edge at a random place between two
samples. Invented data only.
"""

import json

import numpy as np
import pytest

from _trace_synth import rc_voltage
from sagfit.core.pulse import find_pulses
from sagfit.core.rc_model import RCFit, fit_pulses, predict_voltage
from sagfit.core.trace import Trace, find_steps

OCV, R0, R1, TAU1 = 3.70, 0.020, 0.015, 2.0


def batch(m, seed, *, dt=0.1, branches=((R1, TAU1),), pulse=10.0, rest=20.0, after=30.0,
          amp=10.0, sv=5e-4, si=5e-3):
    """m traces as the channels of one Trace, simulated at once: a rest, one discharge
    pulse, its relaxation. The pulse's end falls anywhere within one sample interval, the
    sampling phase is random and each time stamp jitters by ±10 % of dt."""
    rng = np.random.default_rng(seed)
    n = int((rest + pulse + after) / dt)
    t = np.arange(n) * dt + rng.uniform(0, dt, (m, 1)) + rng.uniform(-0.1, 0.1, (m, n)) * dt
    t = np.sort(t, axis=1)
    edges = np.column_stack([np.full(m, rest), rest + pulse + rng.uniform(-dt / 2, dt / 2, m)])
    v, i = rc_voltage(t, edges, [0.0, amp, 0.0], OCV, R0, list(branches))
    v = v + rng.normal(0, sv, v.shape)
    i = i + rng.normal(0, si, i.shape)
    offset = np.arange(m)[:, None] * 1000.0
    return Trace.from_arrays(time=(t + offset).ravel(), current=i.ravel(), voltage=v.ravel(),
                             channel=np.repeat(np.arange(m), n),
                             channels=[f"c{k}" for k in range(m)])


def fits_of(trace, **kw):
    steps = find_steps(trace)
    pulses = find_pulses(trace, steps)
    return pulses, fit_pulses(trace, steps, pulses, **kw)


@pytest.mark.slow
def test_interval_coverage():
    """500 seeded traces: the 95 % intervals of R0, R1 and τ1 cover the truth 93–98 % of
    the time (the edge's place between samples included as a rectangular term)."""
    pulses, fits = fits_of(batch(500, 2024), branches=1)
    assert len(fits) == 500
    for name, truth in (("r0", R0), ("r1", R1), ("tau1", TAU1)):
        j = fits[0].names.index(name)
        lo = np.array([f.ci_low[j] for f in fits])
        hi = np.array([f.ci_high[j] for f in fits])
        cover = np.mean((lo <= truth) & (truth <= hi))
        assert 0.93 <= cover <= 0.98, (name, cover)


def test_recovers_parameters_noise_free():
    """Without noise the fit returns the simulated R0, R1, τ1 within the error the unknown
    place of each edge between two samples leaves, which their u covers (≤ √3·u, the
    rectangle's half-width)."""
    _, fits = fits_of(batch(3, 1, sv=0.0, si=0.0), branches=1)
    for f in fits:
        for name, truth in (("r0", R0), ("r1", R1), ("tau1", TAU1)):
            assert abs(f[name] - truth) <= 1.8 * f.u_of(name)


def test_two_branches_told_from_one():
    """A source with a second branch (10 mΩ, 25 s) is fitted with two branches; a source
    with one branch keeps one (BIC, Schwarz 1978; margin 6)."""
    two = ((R1, TAU1), (0.010, 25.0))
    _, f2 = fits_of(batch(6, 5, branches=two, pulse=20.0, rest=60.0, after=150.0), relax=150.0)
    assert [f.branches for f in f2] == [2] * 6
    for f in f2:
        for name, truth in (("r1", R1), ("tau1", TAU1), ("r2", 0.010), ("tau2", 25.0)):
            j = f.names.index(name)
            assert f.ci_low[j] - 3 * f.u[j] <= truth <= f.ci_high[j] + 3 * f.u[j]
    _, f1 = fits_of(batch(6, 6, pulse=20.0, rest=60.0, after=150.0), relax=150.0)
    assert [f.branches for f in f1] == [1] * 6


def test_warnings_coarse_sampling_and_short_pulse():
    """Sampling at 1 s against τ1 = 2 s warns about R0; a 3 s pulse against τ = 20 s
    warns about τ."""
    _, f = fits_of(batch(1, 3, dt=1.0, pulse=20.0, rest=60.0, after=60.0), branches=1)
    assert any("coarse" in w for w in f[0].warnings)
    _, f = fits_of(batch(1, 3, branches=((R1, 20.0),), pulse=3.0, rest=30.0, after=6.0), branches=1)
    assert any("short against" in w for w in f[0].warnings)


def _model(r0, branches, ocv=OCV):
    rec = {"branches": len(branches), "i_base_A": 0.0, "u_base": {"value": ocv, "u": 0},
           "r0": {"value": r0, "u": 0}}
    for k, (r, tau) in enumerate(branches, 1):
        rec[f"r{k}"] = {"value": r, "u": 0}
        rec[f"tau{k}"] = {"value": tau, "u": 0}
    return RCFit.from_record(rec)


def test_prediction_matches_closed_form():
    """The exact zero-order-hold update equals the closed-form response at every sample of
    an irregularly sampled profile lasting over 300 τ (several blocks)."""
    rng = np.random.default_rng(9)
    branches = [(R1, 0.5), (0.01, 7.0)]
    t = np.sort(np.r_[0.0, rng.uniform(0, 400, 3000)])
    edges = np.sort(rng.choice(t[1:-1], 12, replace=False))
    levels = np.r_[1.0, rng.uniform(-5, 10, 12)]
    truth, i = rc_voltage(t, edges, levels, OCV, R0, branches)
    v = predict_voltage(_model(R0, branches), t, i)
    np.testing.assert_allclose(v, truth, atol=1e-12)


def test_respond_command(tmp_path, cli):
    """`pulses --out x.json` then `respond x.json profile.csv`: the predicted voltage of the
    fitted model for a new profile; within 5 mV of the true response (the fitted R0 and R1
    each carry about 0.15 mΩ from the edges' place between 0.1 s samples, ~1–2 mV at 6 A)."""
    tr = batch(1, 4, sv=2e-4)
    p = tmp_path / "trace.csv"
    p.write_text("time_s,current_A,voltage_V\n" + "\n".join(
        f"{a:.4f},{b:.5f},{c:.6f}" for a, b, c in zip(tr.time, tr.current, tr.voltage)))
    run = cli("pulses", p, "--rc", "1", "--out", tmp_path / "p.json")
    assert run.code == 0, run.err
    t = np.arange(0, 100, 0.25)
    i = np.where((t >= 10) & (t < 40), 6.0, 0.0)
    (tmp_path / "prof.csv").write_text("time_s,current_A\n" + "\n".join(
        f"{a},{b}" for a, b in zip(t, i)))
    run = cli("respond", tmp_path / "p.json", tmp_path / "prof.csv", "--out",
              tmp_path / "v.csv")
    assert run.code == 0, run.err
    got = np.genfromtxt(tmp_path / "v.csv", delimiter=",", names=True)
    truth, _ = rc_voltage(t, [10.0, 40.0], [0.0, 6.0, 0.0], OCV, R0, [(R1, TAU1)])
    assert np.max(np.abs(got["voltage_V"] - truth)) < 5e-3
    model = RCFit.from_record(json.loads((tmp_path / "p.json").read_text())["pulses"][0]["model"])
    np.testing.assert_allclose(got["voltage_V"], predict_voltage(model, t, i), rtol=1e-15)
    run = cli("respond", tmp_path / "prof.csv", tmp_path / "prof.csv")
    assert run.code == 2 and "not a pulses document" in run.err
    run = cli("respond", tmp_path / "p.json", tmp_path / "prof.csv", "--pulse", "7")
    assert run.code == 2 and "--pulse" in run.err
    doc = json.loads((tmp_path / "p.json").read_text())
    r0 = doc["pulses"][0]["model"]["r0"]
    assert r0["ci"][0] < r0["value"] < r0["ci"][1] and abs(r0["value"] - R0) < 4 * r0["u"]


@pytest.mark.parametrize("branches", [1, 2])
def test_batch_matches_per_pulse_solver(branches):
    """The batched Levenberg–Marquardt (all pulses at once) reaches the same estimates as
    MINPACK's on each pulse alone (scipy.optimize.least_squares, method 'lm')."""
    from sagfit.core.rc_model import fit_rc, pulse_samples

    two = ((R1, TAU1), (0.010, 25.0))
    tr = batch(5, 12, branches=two if branches == 2 else ((R1, TAU1),), pulse=20.0,
               rest=60.0, after=100.0)
    steps = find_steps(tr)
    pulses = find_pulses(tr, steps)
    batched = fit_pulses(tr, steps, pulses, branches=branches, relax=100.0)
    for j in range(len(pulses)):
        t, v, i_m, edges, d_i, i_b, dur, dt, e_dt = pulse_samples(tr, steps, pulses, j, 100.0)
        one = fit_rc(t, v, i_m, edges, d_i, i_b, branches=branches, duration=dur, dt=dt,
                     edge_dt=e_dt)
        np.testing.assert_allclose(batched[j].value, one.value, rtol=1e-5)
        np.testing.assert_allclose(batched[j].u, one.u, rtol=1e-3)
