"""Tests of sagfit.simulate: the invented bench runs used by demos, tests and benchmarks."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sagfit.core.errors import InputError
from sagfit.core.fit import fit_lines
from sagfit.core.simulate import run_csv_text, simulate
from sagfit.core.units import parse_accuracy

VA = parse_accuracy("0.05%+2mV", "V")
IA = parse_accuracy("0.2%+1mA", "A")
LOADS = [math.inf, 10.0, 4.7, 2.2, 1.0, 0.47]


class TestDeterminism:
    def test_same_seed_same_run(self):
        """Two runs with the same seed and settings are identical, array by array."""
        kw = dict(duts=50, voltage_accuracy=VA, current_accuracy=IA, load_tolerance=1.0,
                  measure_current=True, vth_spread=0.01, rth_spread=0.1, drift=1e-4)
        a = simulate(12.6, 0.05, LOADS, seed=7, **kw)
        b = simulate(12.6, 0.05, LOADS, seed=7, **kw)
        for name in ("voltage_V", "current_A", "load_true_ohm", "vth", "rth", "time_s"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
        assert a.duts == b.duts

    def test_other_seed_other_run(self):
        """A different seed gives different readings."""
        a = simulate(12.6, 0.05, LOADS, duts=5, seed=1, voltage_accuracy=VA)
        b = simulate(12.6, 0.05, LOADS, duts=5, seed=2, voltage_accuracy=VA)
        assert not np.array_equal(a.voltage_V, b.voltage_V)

    def test_result_is_read_only(self):
        """The arrays of a run cannot be modified in place."""
        run = simulate(12.6, 0.05, LOADS, duts=2, voltage_accuracy=VA)
        with pytest.raises(ValueError):
            run.voltage_V[0] = 0.0


class TestModel:
    def test_noise_free_run_lies_on_the_line(self):
        """Without errors, spreads or effects every reading satisfies V = Vth − Rth·I = I·R."""
        run = simulate(12.6, 0.05, LOADS, duts=3)
        i = run.true_current_A
        np.testing.assert_allclose(run.voltage_V, 12.6 - 0.05 * i, rtol=1e-13)
        finite = np.isfinite(run.load_ohm)
        np.testing.assert_allclose(run.voltage_V[finite], i[finite] * run.load_ohm[finite],
                                   rtol=1e-13)
        assert np.all(i[~finite] == 0.0)

    def test_layout_rows_of_one_dut_contiguous(self):
        """Rows are DUT-major in load order, with names from the prefix and a bench clock."""
        run = simulate(5.0, 0.1, [math.inf, 10, 1], duts=4, interval_s=2.0, dut_prefix="B7-")
        assert run.duts == ("B7-001", "B7-002", "B7-003", "B7-004")
        np.testing.assert_array_equal(run.group, np.repeat(np.arange(4), 3))
        np.testing.assert_array_equal(run.time_s, np.arange(12) * 2.0)
        np.testing.assert_array_equal(run.load_ohm, np.tile([math.inf, 10, 1], 4))

    def test_knee_holds_the_current(self):
        """Above the current limit the current stays at the knee and V = I_knee·R."""
        run = simulate(12.0, 0.1, [math.inf, 10, 2, 1, 0.5], knee_current=5.0)
        assert run.limited.tolist() == [False, False, True, True, True]
        np.testing.assert_allclose(run.true_current_A[run.limited], 5.0)
        np.testing.assert_allclose(run.voltage_V[run.limited], 5.0 * run.load_ohm[run.limited])
        assert run.true_current_A.max() <= 5.0

    def test_curvature_is_a_quadratic_sag(self):
        """With a curvature c the terminal voltage is Vth − Rth·I − c·I² and also I·R."""
        run = simulate(12.0, 0.1, [math.inf, 4, 2, 1], curvature=0.02)
        i, v = run.true_current_A, run.voltage_V
        np.testing.assert_allclose(v, 12.0 - 0.1 * i - 0.02 * i * i, rtol=1e-12)
        np.testing.assert_allclose(v[1:], i[1:] * run.load_ohm[1:], rtol=1e-12)

    def test_drift_moves_vth_with_time_within_each_dut(self):
        """A drift raises each DUT's open-circuit voltage linearly from its first reading."""
        run = simulate(12.0, 0.1, [math.inf, math.inf, math.inf], duts=2, drift=0.01,
                       interval_s=5.0)
        np.testing.assert_allclose(run.voltage_V, [12.0, 12.05, 12.1] * 2)

    def test_resistor_drawn_once_per_resistor(self):
        """By default every DUT sees the same true resistor value for one nominal value."""
        run = simulate(12.0, 0.1, [math.inf, 10, 1, 10], duts=20, load_tolerance=5.0)
        true = run.load_true_ohm.reshape(20, 4)
        assert np.all(true == true[0])
        assert true[0, 1] == true[0, 3]  # the same 10 Ω resistor, read twice
        assert abs(true[0, 1] / 10 - 1) <= 0.05 and abs(true[0, 2] - 1) <= 0.05

    @pytest.mark.reference("JCGM 100:2008 (GUM) 4.3.7: a rectangular distribution of "
                           "half-width a has standard deviation a/√3")
    def test_resistor_drawn_per_dut_as_an_option(self):
        """With per_dut_loads the resistor errors differ between DUTs and stay in tolerance."""
        run = simulate(12.0, 0.1, [math.inf, 10, 1], duts=2000, load_tolerance=5.0,
                       per_dut_loads=True, seed=3)
        dev = run.load_true_ohm.reshape(2000, 3)[:, 1:] / np.array([10, 1]) - 1
        assert np.all(np.abs(dev) <= 0.05)
        # rectangular on ±5 %: standard deviation 5 %/√3
        assert abs(dev.std() / (0.05 / math.sqrt(3)) - 1) < 0.05

    @pytest.mark.reference("JCGM 100:2008 (GUM) 4.3.7: a rectangular distribution of "
                           "half-width a has standard deviation a/√3")
    @pytest.mark.parametrize("dist", ["rectangular", "normal"])
    def test_meter_errors_have_the_spec_standard_uncertainty(self, dist):
        """Voltmeter errors have standard deviation a/√3 for either distribution."""
        run = simulate(10.0, 0.1, [math.inf], duts=20000, voltage_accuracy=VA, seed=5,
                       error_distribution=dist, meter_errors="per_reading")
        err = run.voltage_V - run.true_voltage_V
        a = 0.0005 * 10.0 + 0.002
        assert abs(err.std() / (a / math.sqrt(3)) - 1) < 0.03
        if dist == "rectangular":
            assert np.abs(err).max() <= a

    @pytest.mark.reference("JCGM 100:2008 (GUM) 4.3.7 and F.1.2.1: a gain and an offset "
                           "error, each rectangular, shared by one sweep")
    def test_per_sweep_errors_are_one_gain_and_one_offset(self):
        """By default each DUT's sweep has one gain and one offset error: the error of a
        reading is g·V + o, with g and o each within their half of the spec."""
        run = simulate(10.0, 0.1, [math.inf, math.inf, math.inf], duts=20000,
                       voltage_accuracy=VA, seed=5)
        err = (run.voltage_V - run.true_voltage_V).reshape(-1, 3)
        assert np.ptp(err, axis=1).max() < 1e-12            # the same in one sweep
        a_gain, a_off = 0.0005 * 10.0, 0.002
        assert abs(err[:, 0].std() / math.sqrt((a_gain ** 2 + a_off ** 2) / 3) - 1) < 0.03
        assert np.abs(err).max() <= a_gain + a_off

    def test_spreads_have_the_stated_relative_deviation(self):
        """vth_spread and rth_spread are relative standard deviations across DUTs."""
        run = simulate(12.0, 0.05, [math.inf, 1], duts=20000, vth_spread=0.01,
                       rth_spread=0.2, seed=11)
        assert abs(run.vth.std() / 12.0 - 0.01) < 0.0005
        assert abs(run.rth.mean() / 0.05 - 1) < 0.01
        assert np.all(run.rth > 0)


class TestShapes:
    @settings(max_examples=60, deadline=None)
    @given(duts=st.integers(1, 50),
           loads=st.lists(st.one_of(st.just(math.inf), st.floats(1e-3, 1e6)), min_size=1,
                          max_size=12),
           knee=st.one_of(st.none(), st.floats(1e-3, 100.0)),
           curvature=st.floats(0.0, 1.0), seed=st.integers(0, 2 ** 32 - 1))
    def test_any_shape(self, duts, loads, knee, curvature, seed):
        """Any number of DUTs and loads gives duts × loads finite readings, DUT-major, with
        the current never above the knee."""
        run = simulate(12.0, 0.1, loads, duts=duts, seed=seed, voltage_accuracy=VA,
                       load_tolerance=1.0, knee_current=knee, curvature=curvature,
                       vth_spread=0.01, rth_spread=0.1)
        assert len(run) == duts * len(loads) and len(run.duts) == duts
        assert np.all(np.diff(run.group) >= 0) and run.vth.shape == (duts,)
        assert np.all(np.isfinite(run.voltage_V)) and np.all(run.true_current_A >= 0)
        if knee is not None:
            assert np.all(run.true_current_A <= knee)


class TestRoundTrip:
    @pytest.mark.slow
    @pytest.mark.reference("JCGM 100:2008 (GUM) 6.2: a coverage interval at level p contains "
                           "the true value in a fraction p of repetitions")
    def test_fit_recovers_parameters_at_the_nominal_rate(self):
        """Fitting 2,000 simulated DUTs puts the true Vth and Rth inside their 95 % intervals
        for 93–98 % of the DUTs."""
        run = simulate(12.6, 0.05, LOADS, duts=2000, seed=20261201, voltage_accuracy=VA,
                       load_tolerance=1.0, per_dut_loads=True, vth_spread=0.01,
                       rth_spread=0.1)
        fits = fit_lines(run.to_readings(voltage_accuracy=VA, load_tolerance=1.0))
        for est, true, u, k in ((fits.vth, run.vth, fits.u_vth, fits.k),
                                (fits.rth, run.rth, fits.u_rth, fits.k_rth)):
            covered = np.abs(est - true) <= k * u
            assert 0.93 <= covered.mean() <= 0.98

    def test_measured_current_round_trip(self):
        """With an ammeter the fit (York) also covers the truth at about the nominal rate."""
        run = simulate(5.0, 0.2, [math.inf, 20, 10, 5, 2.2], duts=1000, seed=4,
                       voltage_accuracy=VA, current_accuracy=IA, measure_current=True,
                       load_tolerance=1.0, per_dut_loads=True)
        fits = fit_lines(run.to_readings(voltage_accuracy=VA, current_accuracy=IA,
                                         load_tolerance=1.0))
        assert set(fits.method) == {"york"}
        covered = np.abs(fits.rth - run.rth) <= fits.k_rth * fits.u_rth
        assert 0.92 <= covered.mean() <= 0.99


class TestCsv:
    def test_csv_reads_back_with_read_readings(self, tmp_path):
        """The CSV text reads back with sagfit.read_readings to the same readings."""
        from sagfit import read_readings

        run = simulate(12.6, 0.05, LOADS, duts=3, seed=2, voltage_accuracy=VA,
                       current_accuracy=IA, measure_current=True, load_tolerance=1.0)
        path = tmp_path / "sim.csv"
        path.write_text(run_csv_text(run, ["INVENTED DATA (test)", "seed: 2"]),
                        encoding="utf-8")
        back = read_readings(path, voltage_accuracy=VA, load_tolerance=1.0)
        assert back.duts == run.duts
        np.testing.assert_allclose(back.voltage, run.voltage_V, rtol=1e-9)
        np.testing.assert_allclose(back.current, run.current_A, rtol=1e-9, atol=1e-15)
        np.testing.assert_array_equal(back.load, run.load_ohm)
        np.testing.assert_allclose(back.time, run.time_s)

    def test_csv_starts_with_the_comments(self):
        """Every comment line comes first, prefixed with '#', before the header."""
        text = run_csv_text(simulate(5.0, 0.1, [math.inf, 1]), ["INVENTED DATA", "two\nlines"])
        lines = text.splitlines()
        assert lines[:4] == ["# INVENTED DATA", "# two", "# lines", "dut,load_ohm,voltage_V,time_s"]
        assert lines[4].startswith("SIM-001,open,5,")


class TestBadInput:
    @pytest.mark.parametrize("kw, word", [
        (dict(vth=-1.0), "vth"), (dict(rth=0.0), "rth"), (dict(loads=[]), "loads"),
        (dict(loads=[-1.0]), "loads"), (dict(loads=[0.0, math.inf]), "short"),
        (dict(duts=0), "duts"), (dict(load_tolerance=120.0), "load_tolerance"),
        (dict(curvature=-1.0), "curvature"), (dict(knee_current=0.0), "knee_current"),
        (dict(error_distribution="triangular"), "error_distribution"),
        (dict(dut_prefix="=cmd|"), "dut_prefix"), (dict(vth_spread=float("nan")), "vth_spread"),
    ])
    def test_bad_parameter_is_an_input_error(self, kw, word):
        """An out-of-range parameter raises InputError naming it."""
        args = dict(vth=12.0, rth=0.1, loads=[math.inf, 1.0])
        args.update(kw)
        with pytest.raises(InputError, match=word):
            simulate(args.pop("vth"), args.pop("rth"), args.pop("loads"), **args)

    def test_short_allowed_with_measured_current(self):
        """A short-circuit reading is possible when the current is measured."""
        run = simulate(2.0, 0.5, [math.inf, 0.0], measure_current=True)
        assert run.current_A[1] == pytest.approx(4.0)
        assert run.voltage_V[1] == 0.0


def _cli(argv, capsys):
    from sagfit.cli import main

    with pytest.raises(SystemExit) as exc:
        main(argv)
    out = capsys.readouterr()
    return exc.value.code, out.out, out.err


class TestSimulateCommand:
    ARGS = ["simulate", "--vth", "12.6V", "--rth", "50mohm", "--loads", "open,10,4k7,2.2,1,R47",
            "--voltage-accuracy", "0.05%+2mV", "--load-tolerance", "1%", "--duts", "20",
            "--seed", "5"]

    def test_round_trip_through_fit(self, tmp_path, capsys):
        """`sagfit simulate … --out x.csv` then `sagfit fit x.csv …` fits every DUT."""
        import json

        out = tmp_path / "x.csv"
        code, text, err = _cli(self.ARGS + ["--out", str(out)], capsys)
        assert code == 0 and "120 invented readings of 20 DUT(s)" in text and err == ""
        code, text, err = _cli(["fit", str(out), "--voltage-accuracy", "0.05%+2mV",
                                "--load-tolerance", "1%", "--json"], capsys)
        assert code == 0
        doc = json.loads(text)
        assert len(doc["results"]) == 20
        rth = [r["rth"]["value"] for r in doc["results"]]
        assert 0.045 < np.mean(rth) < 0.055

    def test_file_is_labelled_and_reproducible(self, tmp_path, capsys):
        """The CSV starts with an INVENTED DATA line naming the settings and seed, and the
        same command writes the same bytes."""
        a, b = tmp_path / "a.csv", tmp_path / "b.csv"
        _cli(self.ARGS + ["--out", str(a)], capsys)
        _cli(self.ARGS + ["--out", str(b)], capsys)
        first = a.read_text(encoding="utf-8").splitlines()[0]
        assert first.startswith("# INVENTED DATA (sagfit simulate --vth 12.6V --rth 50mohm")
        assert "--seed 5" in first and "--load-tolerance 1%" in first
        assert a.read_bytes() == b.read_bytes()

    def test_effects_and_measured_current(self, tmp_path, capsys):
        """Knee, curvature, drift and an ammeter column are accepted with units."""
        from sagfit import read_readings

        out = tmp_path / "k.csv"
        code, text, _ = _cli(["simulate", "--vth", "12", "--rth", "0.1", "--loads",
                              "open,10,2,1,0.5", "--knee", "5A", "--curvature", "2mV/A2",
                              "--drift", "5mV/h", "--measure-current", "--current-accuracy",
                              "0.2%+1mA", "--duts", "3", "--out", str(out)], capsys)
        assert code == 0 and "in current limit" in text
        back = read_readings(out)
        assert back.n_duts == 3 and back.current.max() <= 5.0 * 1.003 + 0.001

    def test_truth_file(self, tmp_path, capsys):
        """--truth writes each DUT's true Vth and Rth, labelled as invented; it may not be
        the readings file itself."""
        out, truth = tmp_path / "x.csv", tmp_path / "truth.csv"
        code, _, _ = _cli(self.ARGS + ["--rth-spread", "10%", "--out", str(out), "--truth",
                                       str(truth)], capsys)
        lines = truth.read_text(encoding="utf-8").splitlines()
        assert code == 0 and lines[0].startswith("# INVENTED DATA (sagfit simulate")
        body = [ln for ln in lines if not ln.startswith("#")]
        assert body[0] == "dut,vth_V,rth_ohm" and len(body) == 21
        assert body[1].startswith("SIM-001,")
        code, _, err = _cli(self.ARGS + ["--out", str(out), "--truth", str(out)], capsys)
        assert code == 2 and "--truth" in err

    def test_refuses_to_overwrite_real_readings(self, tmp_path, capsys):
        """An existing file that is not a simulation is never overwritten."""
        real = tmp_path / "bench.csv"
        real.write_text("dut,load,voltage_V\nA,open,12\n", encoding="utf-8")
        code, _, err = _cli(self.ARGS + ["--out", str(real)], capsys)
        assert code == 2 and err.startswith("error: option --out:") and err.count("\n") == 1
        assert real.read_text(encoding="utf-8") == "dut,load,voltage_V\nA,open,12\n"

    @pytest.mark.parametrize("extra, option", [
        (["--rth", "open"], "--rth"), (["--loads", "1,,2"], "--loads"),
        (["--knee", "5V"], "--knee"), (["--vth-spread", "1"], "--vth-spread"),
        (["--prefix", "=HYPERLINK"], "--prefix"), (["--duts", "0"], "--duts"),
    ])
    def test_bad_option_is_one_error_line(self, tmp_path, capsys, extra, option):
        """A bad option value gives one `error:` line naming the option, exit status 2."""
        code, _, err = _cli(self.ARGS + extra + ["--out", str(tmp_path / "y.csv")], capsys)
        assert code == 2
        assert err.startswith(f"error: option {option}") and err.count("\n") == 1
        assert not (tmp_path / "y.csv").exists()


class TestPerDutValues:
    def test_per_dut_nominal_values_and_names(self):
        """A scenario's own fleet: one Vth and Rth per DUT, named DUTs; the truth is kept
        and a noise-free run gives exactly the divider voltages (textbook Thevenin)."""
        import math

        import numpy as np

        from sagfit.core.simulate import simulate

        run = simulate([12.7, 12.5], [0.02, 0.04], [math.inf, 10.0, 1.0], seed=3,
                       dut_names=["PK-A", "PK-B"])
        assert run.duts == ("PK-A", "PK-B")
        np.testing.assert_allclose(run.vth, [12.7, 12.5])
        np.testing.assert_allclose(run.rth, [0.02, 0.04])
        expect = np.array([12.7, 12.7 * 10 / 10.02, 12.7 / 1.02,
                           12.5, 12.5 * 10 / 10.04, 12.5 / 1.04])
        np.testing.assert_allclose(run.voltage_V, expect, rtol=1e-12)

    def test_mismatched_lengths_are_refused(self):
        """Per-DUT arrays of different lengths, or names that do not match, are refused."""
        import pytest

        from sagfit.core.errors import InputError
        from sagfit.core.simulate import simulate

        with pytest.raises(InputError):
            simulate([1.0, 2.0], [0.1, 0.2, 0.3], [10.0])
        with pytest.raises(InputError):
            simulate(1.0, 0.1, [10.0], duts=2, dut_names=["a", "a"])
