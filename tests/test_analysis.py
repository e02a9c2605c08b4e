"""Tests of sagfit.analysis.fit: fit + checks, --current-range, --below-knee, --robust.

Mostly behaviour (plumbing) on invented, seeded data. The robust refit is Huber's
M-estimator (P. J. Huber, E. M. Ronchetti, *Robust Statistics*, 2nd ed. 2009, ch. 4;
c = 1.345 from memory) and is checked here against the known truth of the simulated
source, not against a published value; the diagnostics themselves are checked against
their references (NIST StRD Pontius, statsmodels) in test_diagnostics.py.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from sagfit.core.analysis import fit
from sagfit.core.errors import InputError
from sagfit.io.readings_csv import read_readings
from sagfit.core.readings import Readings
from sagfit.core.units import parse_accuracy

from conftest import SAMPLES

VA = parse_accuracy("0.015%+2mV", "V")
CA = parse_accuracy("0.2%+1mA", "A")
SUPPLY = SAMPLES / "bench_supply_limit.csv"


def codes(fits, i=0):
    return [f.code for f in fits.flags[i]]


def supply_readings():
    return read_readings(str(SUPPLY), voltage_accuracy=VA, current_accuracy=CA)


class TestFit:
    def test_runs_diagnostics_and_records_settings(self):
        """fit() adds the diagnostics and records every setting it used."""
        f = fit(supply_readings(), level=0.05)
        assert "knee" in f.diagnostics and "curvature" in f.diagnostics
        assert f.settings["level"] == 0.05
        assert f.settings["below_knee"] is False and f.settings["robust"] is None
        assert f.settings["current_range"] is None
        assert "knee" in codes(f)

    @pytest.mark.parametrize("level", [0.0, 0.5, -1, math.nan])
    def test_bad_level_is_an_input_error(self, level):
        """A significance level outside (0, 0.5) is refused."""
        with pytest.raises(InputError):
            fit(supply_readings(), level=level)

    def test_prediction_model_in_json(self):
        """Each fitted DUT carries the covariance and reading model that predict needs."""
        f = fit(supply_readings(), below_knee=True)
        d = json.loads(json.dumps(f[0].to_dict(), allow_nan=False))
        p = d["prediction"]
        assert p["cov_vth_rth"][0][0] == pytest.approx(f.u_vth[0] ** 2)
        assert p["cov_vth_rth"][0][1] == pytest.approx(f.cov_vr[0])
        # u(V) = (0.015 % · |V| + 2 mV)/√3 reproduced exactly from the readings
        assert p["u_voltage_model"]["offset_V"] == pytest.approx(2e-3 / math.sqrt(3))
        assert p["u_voltage_model"]["per_volt"] == pytest.approx(1.5e-4 / math.sqrt(3))


class TestCurrentRange:
    def test_restricts_and_says_so(self):
        """Only readings inside LO..HI are fitted, and a flag says how many were left out."""
        r = supply_readings()
        f = fit(r, current_range=(0.0, 1.4))
        assert f.n[0] == int(np.count_nonzero(r.current <= 1.4))
        msg = next(x.message for x in f.flags[0] if x.code == "current-range")
        assert "left out" in msg and "1.400 A" in msg
        assert f.settings["current_range"] == [0.0, 1.4]
        assert "knee" not in codes(f)

    def test_empty_range_gives_an_error_not_a_crash(self):
        """A range that holds no reading leaves the DUT unfitted with a reason."""
        f = fit(supply_readings(), current_range=(5.0, 6.0))
        assert f.error[0] is not None


class TestBelowKnee:
    def test_refits_the_constant_voltage_part(self):
        """On the bench-supply sample the refit uses the 9 readings before the 1.5 A limit
        and recovers the invented 35 mΩ output resistance."""
        f = fit(supply_readings(), below_knee=True)
        assert f.n[0] == 9
        assert f.rth[0] == pytest.approx(0.035, abs=3 * f.u_rth[0])
        assert f.vth[0] == pytest.approx(12.0, abs=3 * f.u_vth[0])
        msg = next(x.message for x in f.flags[0] if x.code == "below-knee")
        assert "9 readings below the knee" in msg and "1.50" in msg
        assert f.settings["below_knee"] is True

    def test_no_knee_no_change(self):
        """Without a knee, --below-knee changes nothing."""
        i = np.linspace(0, 2, 10)
        r = Readings.from_arrays(voltage=12 - 0.05 * i + np.tile([1e-4, -1e-4], 5), current=i,
                                 u_voltage=np.full(10, 1e-3))
        a, b = fit(r), fit(r, below_knee=True)
        assert a.vth[0] == b.vth[0] and "below-knee" not in codes(b)

    def test_too_few_below_the_knee_keeps_the_full_fit(self):
        """With fewer than three readings below the knee the full fit stays, with a warning."""
        i = np.array([0, 0.5, 1.5, 1.5, 1.5, 1.5, 1.5])
        v = np.array([12.0, 11.995, 10.0, 8.0, 6.0, 4.0, 2.0])
        v = v + np.array([1, -1, 1, -1, 1, -1, 1]) * 1e-4
        r = Readings.from_arrays(voltage=v, current=i, u_voltage=np.full(7, 1e-3),
                                 u_current=np.full(7, 1e-3))
        full, bk = fit(r), fit(r, below_knee=True)
        assert "knee" in codes(full)
        flag = next(x for x in bk.flags[0] if x.code == "below-knee")
        assert flag.severity == "warning" and bk.n[0] == 7
        assert bk.vth[0] == full.vth[0]


class TestRobust:
    def _outlier_data(self, stated):
        rng = np.random.default_rng(21)
        i = np.linspace(0, 2, 10)
        v = 5.0 - 0.1 * i + rng.normal(0, 1e-3, 10)
        v[6] += 0.05
        return Readings.from_arrays(voltage=v, current=i,
                                    u_voltage=np.full(10, 1e-3) if stated else None)

    @pytest.mark.parametrize("stated", [True, False])
    def test_outlier_loses_its_pull(self, stated):
        """The Huber refit lands nearer the true line than the plain fit, and says so."""
        r = self._outlier_data(stated)
        plain, rob = fit(r), fit(r, robust=True)
        assert abs(rob.rth[0] - 0.1) < abs(plain.rth[0] - 0.1) / 3
        assert abs(rob.vth[0] - 5.0) < abs(plain.vth[0] - 5.0)
        assert "robust" in codes(rob) and rob.settings["robust"] == "huber"
        assert "outlier" in codes(rob)  # the reading is still named

    def test_type_a_stays_type_a(self):
        """Without stated uncertainties the robust fit keeps method ols and Student-t k."""
        r = self._outlier_data(False)
        plain, rob = fit(r), fit(r, robust=True)
        assert rob.method[0] == "ols" and rob.k[0] == plain.k[0]
        assert "type-a" in codes(rob)


class TestFitCommand:
    def test_knee_shown_in_terminal(self, cli):
        """`sagfit fit` on the bench-supply sample shows the knee current and voltage."""
        res = cli("fit", SUPPLY, "--bench", SAMPLES / "bench.toml")
        assert res.code == 0
        assert "knee at I = 1.50" in res.out and "V = 11.9" in res.out
        assert "warning bench_supply_limit [knee]" in res.out

    def test_below_knee_and_range_options(self, cli):
        """--below-knee and --current-range reach the JSON (flags and settings)."""
        res = cli("fit", SUPPLY, "--bench", SAMPLES / "bench.toml", "--below-knee", "--json")
        doc = json.loads(res.out)
        assert res.code == 0 and doc["results"][0]["n"] == 9
        assert any(f["code"] == "below-knee" for f in doc["results"][0]["flags"])
        res = cli("fit", SUPPLY, "--bench", SAMPLES / "bench.toml", "--current-range",
                  "0:1.4A", "--json")
        assert json.loads(res.out)["results"][0]["n"] == 8

    def test_excluded_readings_named_by_line(self, cli):
        """The JSON lists each reading an option left out, with its input line and why."""
        res = cli("fit", SUPPLY, "--bench", SAMPLES / "bench.toml", "--below-knee",
                  "--current-range", "0.1:", "--json")
        ex = json.loads(res.out)["results"][0]["excluded_readings"]
        assert [(e["line"], e["reason"]) for e in ex] == [(8, "current-range")] + [
            (ln, "below-knee") for ln in range(17, 22)]

    @pytest.mark.parametrize("level", ["0.7", "0", "nan"])
    def test_bad_level_option(self, cli, level):
        """--level outside (0, 0.5) is one error line naming the option, exit 2."""
        res = cli("fit", SUPPLY, "--level", level)
        assert res.code == 2 and res.err.startswith("error: option --level")

    def test_bad_range_is_a_one_line_error(self, cli):
        """A malformed --current-range is one error line and exit 2."""
        res = cli("fit", SUPPLY, "--current-range", "2A:1A")
        assert res.code == 2 and res.err.startswith("error:") and res.err.count("\n") == 1

    @pytest.mark.parametrize("name", ["pack_a.csv", "fleet_packs.csv", "reg5v_board.csv",
                                      "bench_supply_limit.csv"])
    def test_every_sample_fits_with_diagnostics(self, cli, name):
        """Every sample run fits and its JSON carries diagnostics for each DUT."""
        res = cli("fit", SAMPLES / name, "--bench", SAMPLES / "bench.toml", "--json")
        assert res.code == 0
        for r in json.loads(res.out)["results"]:
            assert {"curvature", "knee", "pattern", "drift", "outlier"} <= set(r["diagnostics"])


class TestTwoThreads:
    def test_slices_in_two_threads_equal_one_pass(self, monkeypatch):
        """A large batch is fitted and checked in slices, two threads at a time; every
        number, flag and diagnostic equals the one-pass result (plumbing: DUTs are
        independent)."""
        import sagfit.core.analysis as an
        from sagfit.core.simulate import simulate

        run = simulate(12.0, 0.05, [math.inf, 10, 4.7, 2.2, 1.0, 0.47, 0.33], duts=300,
                       seed=8, voltage_accuracy=VA, load_tolerance=1.0, vth_spread=0.01,
                       rth_spread=0.3, knee_current=20.0)
        r = run.to_readings(voltage_accuracy=VA, load_tolerance=1.0)
        monkeypatch.setattr(an, "PARALLEL_DUTS", 10 ** 9)
        one = an.fit(r)
        monkeypatch.setattr(an, "PARALLEL_DUTS", 10)
        monkeypatch.setattr(an, "CHUNK_DUTS", 64)  # four slices, as on a large batch
        two = an.fit(r)
        assert one.duts == two.duts and one.error == two.error
        for name in ("vth", "u_vth", "rth", "u_rth", "cov_vr", "chi2", "p_value", "isc"):
            np.testing.assert_array_equal(getattr(one, name), getattr(two, name))
        assert [[f.to_dict() for f in fl] for fl in one.flags] == \
            [[f.to_dict() for f in fl] for fl in two.flags]
        assert json.dumps(one.to_dicts(), sort_keys=True) == json.dumps(two.to_dicts(),
                                                                         sort_keys=True)
        assert any(f.code == "knee" for fl in two.flags for f in fl)


@pytest.mark.parametrize("given", [0, 1, 3, 40])
def test_add_flags_appends_and_keeps_tuples_shared(given):
    """Fits.add_flags appends each DUT's new flags (few or many DUTs given some) and DUTs
    with the same flags share one tuple (plumbing test against a plain loop)."""
    from sagfit.core.results import Flag

    m = 40
    v = np.tile([12.0, 11.9, 11.8], m) + np.repeat(np.linspace(0, 0.1, m), 3)
    r = Readings.from_arrays(voltage=v, load=np.tile([np.inf, 10.0, 4.7], m),
                             group=np.repeat(np.arange(m), 3),
                             duts=[f"D{k}" for k in range(m)], voltage_accuracy=VA)
    fits = fit(r)
    a, b = (Flag("x", "info", "first"),), (Flag("y", "warning", "second"),)
    new = [()] * m
    for k in range(given):
        new[k * m // max(given, 1)] = a if k % 2 else b
    out = fits.add_flags(new)
    assert [tuple(f) for f in out.flags] == [tuple(o) + tuple(n)
                                             for o, n in zip(fits.flags, new)]
    assert len({id(f) for f in out.flags}) == len({tuple(f) for f in out.flags})


@pytest.mark.parametrize("m,size,workers", [(100_000, 12_500, 2), (125_000, 12_500, 2),
                                            (20_000, 12_500, 2), (300, 64, 2), (7, 64, 2),
                                            (1_000, 100, 1)])
def test_slices_are_equal_and_a_multiple_of_the_threads(m, size, workers):
    from sagfit.core.analysis import _cuts

    cuts = _cuts(m, size, workers)
    widths = np.diff(cuts)
    assert cuts[0] == 0 and cuts[-1] == m and (widths >= 0).all()
    assert (len(cuts) - 1) % workers == 0 and widths.max() - widths.min() <= 1
    if m >= size * workers:  # slices close to the size asked for
        assert 2 / 3 * size <= widths.mean() <= 3 / 2 * size
    else:  # one slice per thread
        assert len(cuts) - 1 == workers
