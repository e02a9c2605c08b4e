"""Logged traces: reading, step detection, settled readings, and the path into the fit.

Truth comes from the closed-form response of R0 + R1‖C1 to current steps (tests/_trace_synth;
the equations of /work/shared/reference METHODS §9, textbook first-order circuit theory),
with white noise on current and voltage and jittered sample times. Invented data only.
"""

import json

import numpy as np
import pytest

from _trace_synth import rc_voltage, sample_times
from sagfit.core.errors import ReadingsFileError
from sagfit.core.trace import (MAD_TO_SIGMA, Trace, current_noise, find_steps,
                               steps_to_readings)
from sagfit.io.trace_file import read_trace

OCV, R0, R1, TAU = 3.70, 0.020, 0.015, 2.0
EDGES = [40.05, 80.05, 200.05, 240.05, 300.05]
LEVELS = [0.0, 2.0, 0.0, 5.0, 0.0, 1.0]


def synth(seed=1, dt=0.1, duration=400.0, jitter=0.2, sv=2e-4, si=2e-3):
    rng = np.random.default_rng(seed)
    t = sample_times(duration, dt, rng, jitter=jitter)
    v, i = rc_voltage(t, EDGES, LEVELS, OCV, R0, [(R1, TAU)])
    return t, i + rng.normal(0, si, t.size), v + rng.normal(0, sv, t.size)


def write_csv(path, t, i, v, header="time_s,current_A,voltage_V", sep=",", fmt=None,
              pre=""):
    rows = "\n".join(f"{a:.4f}{sep}{b:.5f}{sep}{c:.6f}" for a, b, c in zip(t, i, v))
    path.write_text(pre + header + "\n" + rows + "\n", encoding="utf-8")
    return path


class TestNoise:
    def test_mad_of_differences_matches_sigma(self):
        """The MAD of first differences gives the current's σ, unmoved by a few steps
        (Hampel 1974: σ = 1.4826·MAD for a normal distribution)."""
        rng = np.random.default_rng(3)
        x = rng.normal(0, 0.01, 200_000) + np.repeat([0, 5, 1, 3], 50_000)
        s = current_noise(x, np.array([0, x.size]))[0]
        assert s == pytest.approx(0.01, rel=0.02)
        assert MAD_TO_SIGMA == pytest.approx(1 / 0.6744897501960817, rel=1e-12)


class TestSteps:
    @pytest.mark.parametrize("seed", range(8))
    def test_steps_found_exactly(self, seed):
        """Every step starts at the first sample after its edge and ends before the next."""
        t, i, v = synth(seed)
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
        assert len(steps) == len(LEVELS)
        first = np.searchsorted(t, EDGES, side="right")
        np.testing.assert_array_equal(steps.start[1:], first)
        np.testing.assert_array_equal(steps.stop[:-1], first)
        np.testing.assert_allclose(steps.current, LEVELS, atol=5e-3)
        lo, hi = t[first - 1], t[first]
        assert np.all((steps.t_edge[1:] > lo) & (steps.t_edge[1:] < hi))

    def test_settled_readings_within_uncertainty(self):
        """Long steps (≥ 20 τ): each settled voltage agrees with the steady state
        OCV − (R0 + R1)·I within 3 u; the fit recovers Vth = OCV, Rth = R0 + R1."""
        from sagfit.core.analysis import fit

        z = []
        for seed in range(10):
            t, i, v = synth(seed)
            steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
            truth = OCV - (R0 + R1) * np.asarray(LEVELS)
            ok = steps.settled
            z.append(((steps.voltage - truth) / steps.u_voltage)[ok])
            assert ok.sum() >= 5
        z = np.concatenate(z)
        assert np.mean(np.abs(z) < 3) > 0.97
        fits = fit(steps_to_readings(steps))
        r = fits[0]
        assert abs(r.vth.value - OCV) < 4 * r.vth.u
        assert abs(r.rth.value - (R0 + R1)) < 4 * r.rth.u

    def test_short_step_flagged_unsettled(self):
        """A step of 1.5 τ still sags at its end: flagged, and left out of the readings."""
        rng = np.random.default_rng(5)
        t = sample_times(60, 0.05, rng)
        v, i = rc_voltage(t, [20.0, 23.0], [0.0, 5.0, 0.0], OCV, R0, [(R1, TAU)])
        v = v + rng.normal(0, 1e-4, t.size)
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
        assert list(steps.settled) == [True, False, True]
        assert steps_to_readings(steps).voltage.size == 2

    def test_slow_drift_in_a_short_window_flagged(self):
        """A 10 s step on a source with a 25 s branch: the 2.5 s window alone shows no
        significant slope, but its mean has moved from the samples before it: unsettled."""
        rng = np.random.default_rng(8)
        t = sample_times(200, 0.2, rng)
        v, i = rc_voltage(t, [100.0, 110.0], [0.0, 0.6, 0.0], OCV, R0,
                          [(0.012, 2.5), (0.008, 25.0)])
        v = v + rng.normal(0, 3e-4, t.size)
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
        assert len(steps) == 3 and not steps.settled[1]

    def test_autocorrelated_noise_counts_fewer_samples(self):
        """AR(1) noise with φ = 0.8: n_eff ≈ n(1 − φ)/(1 + φ) = n/9 (Bayley and
        Hammersley 1946), and u of the mean covers the truth about as often as stated."""
        rng = np.random.default_rng(11)
        n, phi, reps = 4000, 0.8, 200
        e = rng.normal(0, 1e-3, (reps, n))
        x = np.empty_like(e)
        x[:, 0] = e[:, 0] / np.sqrt(1 - phi ** 2)
        for k in range(1, n):  # the test builds the AR(1) series; sagfit never loops so
            x[:, k] = phi * x[:, k - 1] + e[:, k]
        t = np.tile(np.arange(n) * 0.01, reps) + np.repeat(np.arange(reps) * 100.0, n)
        cur = np.tile(np.r_[np.zeros(n // 2), np.ones(n // 2)], reps)
        g = np.repeat(np.arange(reps), n)
        tr = Trace.from_arrays(time=t, current=cur, voltage=4.0 + x.ravel(), channel=g,
                               channels=[str(k) for k in range(reps)])
        steps = find_steps(tr, window_fraction=1.0)
        assert len(steps) == 2 * reps
        ratio = np.median(steps.n_eff / steps.n_window)
        assert ratio == pytest.approx((1 - phi) / (1 + phi), rel=0.15)
        z = (steps.voltage - 4.0) / steps.u_voltage
        assert 0.88 < np.mean(np.abs(z) < 1.96) < 0.99

    def test_spike_does_not_split_a_step(self):
        """A one-sample spike in the current is part of no step and splits none."""
        t, i, v = synth(2)
        i = i.copy()
        i[1500] += 3.0
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
        assert len(steps) == len(LEVELS)

    def test_threshold_override(self):
        """A threshold above the smallest step merges it with its neighbours."""
        t, i, v = synth(1)
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v), threshold=1.5)
        assert len(steps) == 5  # the last rest and the 1 A step are one at 1.5 A

    def test_window_in_seconds(self):
        """--window 10 s: each window covers the step's last 10 s."""
        t, i, v = synth(1)
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v), window=10.0)
        assert np.all(np.abs(steps.t_stop - steps.t_window - 10.0) < 0.2)


class TestBadTraces:
    def test_time_backwards(self):
        """Time going backwards is an error naming the line and the time column."""
        t, i, v = synth(1)
        t = t.copy()
        t[100] = t[98]
        with pytest.raises(ReadingsFileError, match=r"line 102, column time_s: time goes "
                                                    r"backwards"):
            Trace.from_arrays(time=t, current=i, voltage=v, first_line=2,
                              columns={"time": "time_s"}, source="x.csv")

    def test_gap_flagged(self):
        """A gap in the time stamps ends a step; the next one is flagged."""
        t, i, v = synth(1)
        t = np.where(t > 100, t + 50.0, t)
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
        assert steps.after_gap.sum() == 1 and len(steps) == len(LEVELS) + 1

    def test_constant_current_is_one_step(self, tmp_path, cli):
        """No step in the current: one step, and --fit says why it cannot fit."""
        rng = np.random.default_rng(1)
        t = np.arange(500) * 0.1
        p = write_csv(tmp_path / "flat.csv", t, 1 + rng.normal(0, 1e-3, 500),
                      3.6 + rng.normal(0, 1e-4, 500))
        run = cli("steps", p)
        assert run.code == 0 and "1 step(s)" in run.out
        run = cli("steps", p, "--fit")
        assert run.code == 2 and run.err.startswith("error: ") and "Traceback" not in run.err
        assert len(run.err.strip().splitlines()) == 1

    def test_nan_and_text(self, tmp_path, cli):
        """An empty cell or a word in a number column: one line with file, line, column."""
        t, i, v = synth(1)
        p = write_csv(tmp_path / "t.csv", t[:50], i[:50], v[:50])
        lines = p.read_text().splitlines()
        lines[11] = lines[11].rsplit(",", 1)[0] + ","
        p.write_text("\n".join(lines) + "\n")
        run = cli("steps", p)
        assert run.code == 2 and "line 12, column voltage_V: empty or not a number" in run.err
        lines[11] = lines[11] + "3.7"
        lines[20] = lines[20].split(",")[0] + ",oops," + lines[20].split(",")[2]
        p.write_text("\n".join(lines) + "\n")
        run = cli("steps", p)
        assert run.code == 2 and "line 21, column current_A: 'oops' is not a number" in run.err

    def test_clipped_voltage_flagged(self):
        """A voltmeter stuck at its range across a current change: both steps flagged
        clipped and left out of the readings."""
        t, i, v = synth(1)
        v = np.minimum(v, 3.65)  # the range tops out below the rest voltage
        steps = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
        assert steps.clipped.sum() >= 2
        assert not np.any(np.isin(steps_to_readings(steps).voltage, [3.65]))

    def test_missing_column(self, tmp_path, cli):
        p = tmp_path / "x.csv"
        p.write_text("time_s,current_A\n0,1\n1,1\n")
        run = cli("steps", p)
        assert run.code == 2 and "no voltage column" in run.err


class TestReader:
    def test_decimal_comma_units_comments(self, tmp_path):
        """';' with decimal commas, units in brackets (mA), comment lines: same numbers."""
        t, i, v = synth(1)
        p = tmp_path / "dc.csv"
        rows = "\n".join(f"{a:.4f};{b * 1000:.3f};{c:.6f}".replace(".", ",")
                         for a, b, c in zip(t, i, v))
        p.write_text("# logger 2\n# invented\nTime [s];Current [mA];Voltage [V]\n" + rows
                     + "\n")
        tr = read_trace(p)
        np.testing.assert_allclose(tr.current, i, atol=1e-6)
        np.testing.assert_allclose(tr.voltage, v, atol=1e-6)
        assert tr.meta["first_line"] == 4

    def test_iso_times_and_channels_parquet(self, tmp_path):
        """ISO 8601 time stamps, two interleaved channels, Parquet: rows grouped by channel,
        time in seconds from the first row."""
        import pyarrow as pa
        import pyarrow.parquet as pq

        t, i, v = synth(1, jitter=0.0)
        stamps = np.datetime64("2026-03-01T08:00:00", "ms") + (t * 1000).astype(
            "timedelta64[ms]")
        n = t.size
        tab = pa.table({"timestamp": np.r_[stamps, stamps], "cell": ["A"] * n + ["B"] * n,
                        "current_A": np.r_[i, i], "voltage_V": np.r_[v, v - 0.1]})
        order = np.argsort(np.r_[np.arange(n), np.arange(n)], kind="stable")
        pq.write_table(tab.take(order), tmp_path / "x.parquet")
        tr = read_trace(tmp_path / "x.parquet")
        assert tr.channels == ("A", "B") and len(tr) == 2 * n
        np.testing.assert_allclose(tr.time[:n], t, atol=1e-3)
        steps = find_steps(tr)
        assert len(steps) == 2 * len(LEVELS)

    @pytest.mark.parametrize("zone", ["", "Z", "+02:00"])
    def test_iso_text_times_csv(self, tmp_path, zone):
        """ISO 8601 text stamps to the microsecond in a CSV trace (read by Arrow's
        parser) give the times pandas' ISO 8601 reading gives, as seconds from the first
        row; the basic format (read through pandas) the same."""
        import pandas as pd

        t, i, v = synth(1, jitter=0.0)
        base = np.datetime64("2026-03-01T08:00:00", "us")
        stamps = [str(base + np.timedelta64(int(round(x * 1e6)), "us")) + zone for x in t]
        if zone == "+02:00":  # the basic format, which Arrow does not read
            stamps = [s.replace("-", "").replace(":", "").replace("+0200", "+02:00")
                      for s in stamps]
        p = tmp_path / "iso.csv"
        p.write_text("time,current_A,voltage_V\n" + "".join(
            f"{s},{a:.6f},{b:.6f}\n" for s, a, b in zip(stamps, i, v)))
        tr = read_trace(p)
        ref = pd.to_datetime(pd.Series(stamps), format="ISO8601", utc=True)
        expected = (ref - ref.iloc[0]).dt.total_seconds().to_numpy()
        np.testing.assert_allclose(tr.time, expected, rtol=0, atol=1e-9)

    def test_discharge_negative(self, tmp_path):
        t, i, v = synth(1)
        p = write_csv(tmp_path / "n.csv", t, -i, v)
        assert read_trace(p, discharge_negative=True).current.max() > 4.9


class TestCommand:
    def test_readings_out_feeds_fit(self, tmp_path, cli):
        """`steps --readings-out` writes a readings CSV that `sagfit fit` reads, with the
        same result as `steps --fit`."""
        t, i, v = synth(1)
        p = write_csv(tmp_path / "tr.csv", t, i, v)
        out = tmp_path / "readings.csv"
        run = cli("steps", p, "--readings-out", out, "--fit", "--json")
        assert run.code == 0, run.err
        a = json.loads(run.out)
        b = json.loads(cli("fit", out, "--json").out)
        assert a["results"][0]["rth"]["value"] == pytest.approx(
            b["results"][0]["rth"]["value"], rel=1e-9)
        assert len(a["steps"]["steps"]) == len(LEVELS)

    def test_steps_out_csv_and_json(self, tmp_path, cli):
        t, i, v = synth(1)
        p = write_csv(tmp_path / "tr.csv", t, i, v)
        assert cli("steps", p, "--out", tmp_path / "s.csv").code == 0
        head = (tmp_path / "s.csv").read_text().splitlines()[0]
        assert head.startswith("channel,step,t_start_s")
        assert cli("steps", p, "--out", tmp_path / "s.json").code == 0
        doc = json.loads((tmp_path / "s.json").read_text())
        assert len(doc["steps"]) == len(LEVELS)

    def test_refuses_to_overwrite_input(self, tmp_path, cli):
        t, i, v = synth(1)
        p = write_csv(tmp_path / "tr.csv", t, i, v)
        before = p.read_bytes()
        run = cli("steps", p, "--readings-out", p)
        assert run.code == 2 and p.read_bytes() == before


def test_steps_and_pulses_take_the_bench_profile_as_fit_does(tmp_path, cli, monkeypatch):
    """`--bench none` means no profile and $SAGFIT_BENCH is the default, for the trace
    commands as for `fit` (plumbing of options)."""
    t, i, v = synth(1)
    p = write_csv(tmp_path / "t.csv", t, i, v)
    for command in ("steps", "pulses"):
        run = cli(command, p, "--bench", "none", "-q")
        assert run.code in (0, 1, 3), (command, run.err)  # 3: no pulse in this trace
    monkeypatch.setenv("SAGFIT_BENCH", str(tmp_path / "missing.toml"))
    run = cli("steps", p, "-q")
    assert run.code == 2 and "SAGFIT_BENCH" in run.err
