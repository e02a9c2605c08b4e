"""Tests of sagfit.core.checks: the linearity checks, their false alarms and their power."""

from __future__ import annotations

import itertools
import json
import math
import pathlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import special

from sagfit.core.checks import CODES, diagnose, quadratic_fit, runs_test
from sagfit.core.fit import fit_lines
from sagfit.core.readings import Readings
from sagfit.core.units import parse_accuracy

DATA = pathlib.Path(__file__).parent / "data"
VA = parse_accuracy("0.05%+2mV", "V")
CA = parse_accuracy("0.2%+1mA", "A")


def has(fits, code):
    """Boolean per DUT: carries a flag with this code."""
    return np.array([any(f.code == code for f in fl) for fl in fits.flags])


def batch(v, i=None, load=None, m=1, **kw):
    """Readings for m DUTs from stacked arrays (rows of one DUT contiguous)."""
    n = (v.size // m)
    g = np.repeat(np.arange(m), n)
    return Readings.from_arrays(voltage=v, current=i, load=load, group=g,
                                duts=[f"D{k}" for k in range(m)], **kw)


def run(readings, level=0.01):
    return diagnose(readings, fit_lines(readings), level=level)


def supply(loads, vset=12.0, rout=0.035, ilim=1.5):
    """True (I, V) of a bench supply in constant voltage with a current limit (invented)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        i_cv = np.where(np.isinf(loads), 0.0, vset / (loads + rout))
    cc = i_cv > ilim
    i = np.where(cc, ilim, i_cv)
    v = np.where(cc, ilim * loads, vset - rout * i)
    return i, v


def noisy_supply(rng, m, loads):
    i, v = supply(np.tile(loads, m))
    v = v + rng.normal(size=v.size) * VA.standard_uncertainty(v)
    i = i + rng.normal(size=i.size) * CA.standard_uncertainty(i)
    return batch(v, i, m=m, voltage_accuracy=VA, current_accuracy=CA)


SUPPLY_LOADS = np.array([np.inf, 100, 47, 33, 22, 15, 12, 10, 8.2, 6.8, 5.6, 4.7, 3.3, 2.2])


class TestQuadraticFit:
    @pytest.mark.reference("NIST/ITL StRD, linear least squares, Pontius (certified values); "
                           "values as in /work/shared/reference/SOURCES.md section 3")
    def test_pontius_certified_values(self):
        """The orthogonal-polynomial quadratic reproduces NIST's certified Pontius values."""
        x, y = np.loadtxt(DATA / "nist_pontius.csv", delimiter=",", skiprows=5, unpack=True)
        q = quadratic_fit(x, y)
        rss = q["chi2_quad"][0]
        certified = {"a": 0.673565789473684e-03, "b": 0.732059160401003e-06,
                     "c": -0.316081871345029e-14}
        for key, value in certified.items():
            lre = -math.log10(abs(q[key][0] - value) / abs(value))
            assert lre >= 10, (key, q[key][0], lre)
        assert rss == pytest.approx(0.155761768796992e-05, rel=1e-10)
        assert math.sqrt(rss / 37) == pytest.approx(0.205177424076185e-03, rel=1e-10)
        s_c = math.sqrt(q["var_c"][0] * rss / 37)
        assert s_c == pytest.approx(0.486652849992036e-16, rel=1e-9)

    def test_groups_are_independent(self):
        """Fitting two groups together gives each group's own quadratic."""
        rng = np.random.default_rng(1)
        x = np.tile(np.linspace(0, 3, 7), 2)
        y = np.concatenate([1 + 2 * x[:7] - 0.5 * x[:7] ** 2, -1 + x[7:] + 0.25 * x[7:] ** 2])
        y = y + rng.normal(0, 1e-3, y.size)
        both = quadratic_fit(x, y, group=np.repeat([0, 1], 7))
        one = quadratic_fit(x[7:], y[7:])
        assert both["c"][1] == pytest.approx(one["c"][0], rel=1e-12)
        assert both["c"][0] == pytest.approx(-0.5, abs=1e-2)


class TestRunsTest:
    @pytest.mark.reference("statsmodels.sandbox.stats.runs.Runs.runs_test(correction=False), "
                           "an independent implementation")
    def test_mean_and_z_match_statsmodels(self):
        """E[R], Var[R] and z agree with statsmodels' runs test on the same signs."""
        from statsmodels.sandbox.stats.runs import Runs

        rng = np.random.default_rng(7)
        for _ in range(20):
            s = rng.integers(0, 2, size=int(rng.integers(8, 40)))
            if s.min() == s.max():
                continue
            r = 1 + int(np.count_nonzero(s[1:] != s[:-1]))
            n1, n2 = int(s.sum()), int(s.size - s.sum())
            mean, var, z, _ = runs_test(r, n1, n2)
            z_sm, _ = Runs(s).runs_test(correction=False)
            assert z == pytest.approx(z_sm, rel=1e-12)
            assert mean == pytest.approx(1 + 2 * n1 * n2 / (n1 + n2), rel=1e-14)

    @pytest.mark.reference("exact null distribution by enumerating all arrangements "
                           "(METHODS.md 6a: verified for (3,4), (5,5), (6,3), (7,8))")
    @pytest.mark.parametrize("n1,n2", [(3, 4), (5, 5), (6, 3), (7, 8)])
    def test_exact_distribution_matches_enumeration(self, n1, n2):
        """P(R ≤ r) equals the share of all arrangements with at most r runs."""
        n = n1 + n2
        counts = {}
        for pos in itertools.combinations(range(n), n1):
            s = np.zeros(n, bool)
            s[list(pos)] = True
            r = 1 + int(np.count_nonzero(s[1:] != s[:-1]))
            counts[r] = counts.get(r, 0) + 1
        total = sum(counts.values())
        rs = np.arange(2, max(counts) + 1)
        _, _, _, p = runs_test(rs, n1, n2)
        want = np.cumsum([counts.get(r, 0) for r in rs]) / total
        np.testing.assert_allclose(p, want, rtol=1e-12)

    def test_normal_approximation_for_large_counts(self):
        """Above the exact limit the p-value comes from the normal approximation."""
        _, _, z, p = runs_test(40, 50, 50)
        assert p == pytest.approx(special.ndtr((40 + 0.5 - 51) / math.sqrt(
            2 * 2500 * (5000 - 100) / (100 ** 2 * 99))), rel=1e-12)
        assert z < 0


class TestFalseAlarms:
    @pytest.mark.slow
    @pytest.mark.parametrize("n", [8, 12])
    def test_linear_sources_rarely_flagged(self, n):
        """On linear sources with correctly stated Gaussian errors ≤ 5 % of DUTs carry
        curvature, knee or pattern (2 000 DUTs, one call)."""
        rng = np.random.default_rng(100 + n)
        m = 2000
        loads = np.concatenate([[np.inf], np.geomspace(47, 0.47, n - 1)])
        R = np.tile(loads, m)
        with np.errstate(invalid="ignore"):
            v = np.where(np.isinf(R), 12.7, 12.7 * R / (R + 0.022))
        v = v + rng.normal(size=v.size) * VA.standard_uncertainty(v)
        f = run(batch(v, load=R, m=m, voltage_accuracy=VA))
        any_flag = has(f, "curvature") | has(f, "knee") | has(f, "pattern")
        assert any_flag.mean() <= 0.05
        # each test on its own stays near its 1 % level
        assert has(f, "curvature").mean() <= 0.02
        assert has(f, "knee").mean() <= 0.02

    @pytest.mark.slow
    def test_type_a_linear_sources_rarely_flagged(self):
        """Without stated uncertainties (F tests) the false-alarm rate stays ≤ 5 %."""
        rng = np.random.default_rng(5)
        m, n = 2000, 10
        i = np.tile(np.linspace(0, 2, n), m)
        v = 5.0 - 0.1 * i + rng.normal(0, 1e-3, i.size)
        f = run(batch(v, i, m=m))
        any_flag = has(f, "curvature") | has(f, "knee") | has(f, "pattern")
        assert any_flag.mean() <= 0.05


class TestKnee:
    @pytest.mark.slow
    def test_current_limit_is_flagged_nearly_always(self):
        """A 12 V supply crossing into its 1.5 A limit mid-range (constant current, voltage
        falling: a near-vertical segment) is flagged in ≥ 99 % of 500 DUTs."""
        rng = np.random.default_rng(3)
        f = run(noisy_supply(rng, 500, SUPPLY_LOADS))
        assert has(f, "knee").mean() >= 0.99
        k = f.diagnostics["knee"]
        ok = has(f, "knee")
        assert np.all(np.abs(k["current"][ok] - 1.5) < 0.02)
        assert np.all(np.abs(k["voltage"][ok] - (12 - 0.035 * 1.5)) < 0.1)

    def test_current_limit_without_current_uncertainty(self):
        """With only the voltmeter stated (WLS) the current-limited segment is still found."""
        rng = np.random.default_rng(4)
        i, v = supply(np.tile(SUPPLY_LOADS, 50))
        v = v + rng.normal(size=v.size) * VA.standard_uncertainty(v)
        f = run(batch(v, i, m=50, voltage_accuracy=VA))
        assert has(f, "knee").mean() >= 0.98

    def test_knee_at_the_end_of_the_range(self):
        """A limit reached only by the last two loads is still a knee."""
        rng = np.random.default_rng(8)
        f = run(noisy_supply(rng, 100, SUPPLY_LOADS[:11]))
        assert has(f, "knee").mean() >= 0.95

    @pytest.mark.reference("synthetic broken line with a known breakpoint (issue 3: estimate "
                           "within one reading spacing)")
    def test_breakpoint_within_one_reading_spacing(self):
        """A regulator dropping out at 1.05 A (slope change) is located within one spacing."""
        rng = np.random.default_rng(9)
        m, spacing = 200, 0.2
        i = np.tile(np.arange(0, 2.01, spacing), m)
        v_true = 5.0 - 0.02 * i - 1.5 * np.maximum(i - 1.05, 0)
        u = 0.002
        v = v_true + rng.normal(0, u, i.size)
        f = run(batch(v, i, m=m, u_voltage=np.full(i.size, u)))
        assert has(f, "knee").mean() >= 0.99
        assert np.all(np.abs(f.diagnostics["knee"]["current"] - 1.05) < spacing)

    def test_knee_statistics_in_json(self):
        """The knee's statistic, p-value, test and location are in the per-DUT JSON."""
        rng = np.random.default_rng(10)
        f = run(noisy_supply(rng, 1, SUPPLY_LOADS))
        d = json.loads(json.dumps(f[0].to_dict(), allow_nan=False))["diagnostics"]["knee"]
        assert d["p_value"] < 1e-6 and d["test"] == "chi2-difference"
        assert d["weights"] == "york" and d["splits"] == len(SUPPLY_LOADS) - 3
        assert abs(d["current"] - 1.5) < 0.01
        msg = next(x.message for x in f.flags[0] if x.code == "knee")
        assert "I = 1.49" in msg or "I = 1.50" in msg
        assert "current limit" in msg


class TestCurvature:
    @pytest.mark.slow
    def test_power_close_to_known_sigma_optimum(self):
        """With correctly stated σ the curvature test is about as powerful as the known-σ z
        test and much more powerful than an F test that re-estimates the scatter."""
        rng = np.random.default_rng(11)
        m, n, sig = 3000, 8, 0.002
        i = np.tile(np.linspace(0, 2, n), m)
        rates = {}
        for c in (0.0, -0.004):
            v = 12 - 0.05 * i + c * i ** 2 + rng.normal(0, sig, i.size)
            f = run(batch(v, i, m=m, u_voltage=np.full(i.size, sig)))
            q = quadratic_fit(i, v, np.full(i.size, sig ** -2), group=np.repeat(np.arange(m), n))
            ours = has(f, "curvature").mean()
            optimum = np.mean(special.chdtrc(1, q["delta"]) < 0.01)
            always_f = np.mean(special.fdtrc(1, n - 3, q["delta"] / (q["chi2_quad"] / (n - 3)))
                               < 0.01)
            rates[c] = (ours, optimum, always_f)
        assert rates[0.0][0] <= 0.015
        assert rates[0.0][0] <= rates[0.0][1] + 0.002  # not more false alarms than optimum
        ours, optimum, always_f = rates[-0.004]
        assert ours >= 0.95 * optimum
        assert ours > 1.8 * always_f

    def test_direction_in_message(self):
        """The message says whether the voltage drops faster or flattens at high current."""
        i = np.tile(np.linspace(0, 2, 8), 2)
        bend = np.concatenate([-0.05 * i[:8] ** 2, 0.05 * i[8:] ** 2])
        v = 12 - 0.1 * i + bend + np.tile([1, -1], 8) * 1e-4
        f = run(batch(v, i, m=2, u_voltage=np.full(16, 1e-3)))
        m0 = next(x.message for x in f.flags[0] if x.code == "curvature")
        m1 = next(x.message for x in f.flags[1] if x.code == "curvature")
        assert "drops faster" in m0 and "flattens" in m1
        assert f.diagnostics["curvature"]["c"][0] < 0 < f.diagnostics["curvature"]["c"][1]

    def test_f_test_when_uncertainties_understated(self):
        """When χ² says the stated σ are far too small, the scatter is estimated (F test)."""
        rng = np.random.default_rng(12)
        i = np.linspace(0, 2, 10)
        v = 12 - 0.1 * i + rng.normal(0, 0.01, i.size)
        f = run(batch(v, i, u_voltage=np.full(i.size, 1e-4)))
        assert f.diagnostics["curvature"]["test"][0] == "F"
        f = run(batch(v, i))
        assert f.diagnostics["curvature"]["test"][0] == "F"
        f = run(batch(v, i, u_voltage=np.full(i.size, 0.01)))
        assert f.diagnostics["curvature"]["test"][0] == "chi2-difference"


class TestOtherChecks:
    def test_outlier_names_the_input_line(self):
        """A reading far off the line is flagged with its source line number."""
        rng = np.random.default_rng(13)
        i = np.linspace(0, 2, 9)
        v = 12 - 0.1 * i + rng.normal(0, 1e-3, 9)
        v[4] += 0.03
        r = Readings.from_arrays(voltage=v, current=i, u_voltage=np.full(9, 1e-3),
                                 line=np.arange(10, 19))
        f = run(r)
        msg = next(x.message for x in f.flags[0] if x.code == "outlier")
        assert msg.startswith("line 14")
        assert f.diagnostics["outlier"]["count"][0] == 1

    def test_drift_with_time_column(self):
        """Residuals trending with the time column are flagged as drift, naming time."""
        i = np.array([0.0, 1.0, 2.0, 0.5, 1.5, 0.25, 1.75, 1.25, 0.75, 2.0])
        t = np.arange(10) * 60.0
        v = 12 - 0.1 * i - 2e-4 * t / 60
        f = run(Readings.from_arrays(voltage=v, current=i, time=t,
                                     u_voltage=np.full(10, 1e-4)))
        assert has(f, "drift")[0]
        assert f.diagnostics["drift"]["basis"][0] == "time"

    def test_excess_scatter_and_too_good(self):
        """χ² beyond its 0.1 % tails is flagged as excess scatter or too good."""
        rng = np.random.default_rng(14)
        i = np.tile(np.linspace(0, 2, 10), 2)
        v = 12 - 0.1 * i + rng.normal(0, 1e-3, 20)
        u = np.concatenate([np.full(10, 1e-5), np.full(10, 0.1)])
        f = run(batch(v, i, m=2, u_voltage=u))
        assert has(f, "excess-scatter").tolist() == [True, False]
        assert has(f, "too-good").tolist() == [False, True]

    def test_weak_and_negative_slope(self):
        """A slope lost in the noise is weak-slope; a clearly rising line is negative-resistance."""
        i = np.tile(np.linspace(0, 1, 6), 2)
        v = np.concatenate([12 - 1e-4 * i[:6] + np.tile([1, -1], 3) * 1e-3,
                            12 + 0.5 * i[6:] + np.tile([1, -1], 3) * 1e-4])
        f = run(batch(v, i, m=2, u_voltage=np.full(12, 1e-3)))
        assert has(f, "weak-slope").tolist() == [True, False]
        assert has(f, "negative-resistance").tolist() == [False, True]

    @pytest.mark.reference("statsmodels OLS + anova_lm of the line against the cell-means "
                           "model (independent implementation)")
    def test_lack_of_fit_matches_statsmodels(self):
        """The lack-of-fit F and p equal statsmodels' comparison of line and cell means."""
        import pandas as pd
        import statsmodels.formula.api as smf
        from statsmodels.stats.anova import anova_lm

        rng = np.random.default_rng(15)
        levels = np.array([0.2, 0.6, 1.0, 1.4, 1.8])
        i = np.repeat(levels, 3)
        v = 12 - 0.1 * i - 0.02 * i ** 2 + rng.normal(0, 2e-3, i.size)
        load = 12.0 / i
        f = run(Readings.from_arrays(voltage=v, current=i, load=load))
        df = pd.DataFrame({"V": v, "I": i, "cell": i.astype(str)})
        table = anova_lm(smf.ols("V ~ I", df).fit(), smf.ols("V ~ C(cell)", df).fit())
        lof = f.diagnostics["lack_of_fit"]
        assert lof["F"][0] == pytest.approx(table["F"][1], rel=1e-9)
        assert lof["p_value"][0] == pytest.approx(table["Pr(>F)"][1], rel=1e-7)
        assert lof["df_lof"][0] == 3 and lof["df_pe"][0] == 10

    def test_few_points_names_skipped_checks(self):
        """Four readings: the flag lists the checks that could not run."""
        i = np.linspace(0, 1, 4)
        f = run(Readings.from_arrays(voltage=12 - 0.1 * i, current=i,
                                     u_voltage=np.full(4, 1e-3)))
        msg = next(x.message for x in f.flags[0] if x.code == "few-points")
        assert "knee" in msg and "pattern" in msg and "drift" in msg
        assert math.isnan(f.diagnostics["knee"]["p_value"][0])

    def test_codes_are_the_documented_ones(self):
        """Every flag code the checks raise is one of the documented codes."""
        rng = np.random.default_rng(16)
        f = run(noisy_supply(rng, 20, SUPPLY_LOADS))
        codes = {x.code for fl in f.flags for x in fl}
        assert codes - {"scale-applied", "type-a", "load-mismatch"} <= set(CODES)


class TestVectorisation:
    def test_batch_equals_single(self):
        """A DUT's diagnostics are the same alone and inside a batch of others."""
        rng = np.random.default_rng(17)
        r = noisy_supply(rng, 5, SUPPLY_LOADS)
        both = run(r)
        one = run(r.only_duts(["D3"]))
        for name, cols in one.diagnostics.items():
            for key, col in cols.items():
                a, b = col[0], both.diagnostics[name][key][3]
                if isinstance(a, float) and math.isnan(a):
                    assert math.isnan(b), (name, key)
                else:
                    assert a == pytest.approx(b, rel=1e-9, abs=1e-12) if isinstance(
                        a, (float, np.floating)) else a == b, (name, key)
        assert [x.code for x in one.flags[0]] == [x.code for x in both.flags[3]]

    @settings(max_examples=25, deadline=None)
    @given(st.lists(st.integers(2, 14), min_size=1, max_size=6), st.integers(0, 2 ** 16),
           st.booleans())
    def test_any_shape_of_input(self, sizes, seed, stated):
        """Any mix of reading counts gives one finite-or-NaN entry per DUT, JSON-safe."""
        rng = np.random.default_rng(seed)
        i = np.concatenate([np.linspace(0, 1, n) + rng.normal(0, 1e-3, n) for n in sizes])
        v = 5 - 0.2 * i + rng.normal(0, 1e-3, i.size)
        g = np.repeat(np.arange(len(sizes)), sizes)
        r = Readings.from_arrays(voltage=v, current=i, group=g,
                                 duts=[f"D{k}" for k in range(len(sizes))],
                                 u_voltage=np.full(i.size, 1e-3) if stated else None)
        f = run(r)
        for cols in f.diagnostics.values():
            for col in cols.values():
                assert len(col) == len(sizes)
        json.dumps([x.to_dict() for x in f], allow_nan=False)


def test_exact_line_raises_no_numeric_warning():
    """Noise-free readings (Δχ² at round-off, possibly below zero) give p = 1 for the knee,
    without an overflow warning (regression: found by the hypothesis property test)."""
    from sagfit.core.analysis import fit as full_fit
    from sagfit.core.readings import Readings

    vth, rth = 5627.0, 1.0
    i = np.concatenate(([0.0], np.array([0.9375, 0.95, 0.95 - 2e-16, 0.25, 0.01]) * vth / rth))
    f = full_fit(Readings.from_arrays(current=i, voltage=vth - rth * i))[0]
    assert f.diagnostics["knee"]["p_value"] == 1.0


def test_tls_direction_is_the_principal_axis():
    """The knee search's segment directions are the principal axis θ = ½·atan2(2·cxy,
    cxx − cyy) of each point cloud (plumbing test: numpy's trigonometry is the
    reference), including axis-aligned clouds; a cloud without a direction gives the
    zero vector."""
    from sagfit.core.checks.shape import _tls

    rng = np.random.default_rng(11)
    n = 20_000
    sx, sy = rng.normal(size=n), rng.normal(size=n)
    sxx = np.abs(rng.normal(size=n)) * 10 + sx ** 2 / 5
    syy = np.abs(rng.normal(size=n)) * 10 + sy ** 2 / 5
    sxy = rng.normal(size=n) * 3
    sxy[4:8], sx[4:8], sy[4:8] = 0.0, 0.0, 0.0  # axis-aligned
    sxx[4:6], syy[4:6] = 1.0, 10.0
    sxx[6:8], syy[6:8] = 10.0, 1.0
    _, mx, my, vx, vy, q = _tls(sx, sy, sxx, sxy, syy, 5.0)
    cxx, cyy, cxy = sxx - sx * mx, syy - sy * my, sxy - sx * my
    th = 0.5 * np.arctan2(2 * cxy, cxx - cyy)
    norm = np.sqrt(q)
    # parallel to (cos θ, sin θ): the cross product vanishes, the norms agree
    np.testing.assert_allclose((vx * np.sin(th) - vy * np.cos(th)) / norm, 0.0, atol=1e-12)
    np.testing.assert_allclose(q, vx ** 2 + vy ** 2)
    one_spot = _tls(np.zeros(1), np.zeros(1), np.ones(1), np.zeros(1), np.ones(1), 5.0)
    assert one_spot[5][0] == 0.0


@pytest.mark.parametrize("width", [1, 2, 5, 8, 13])
def test_row_reductions_equal_numpys(width):
    """The column-by-column row reductions of the checks equal numpy's along axis 1
    (plumbing; sums of integers and booleans exactly, of floats to round-off)."""
    from sagfit.core.checks.common import cumsum_rows, reduce_rows

    rng = np.random.default_rng(width)
    v = rng.normal(size=(50, width))
    b = v > 0
    np.testing.assert_allclose(reduce_rows(np.add, v), v.sum(axis=1), rtol=1e-13, atol=1e-13)
    np.testing.assert_array_equal(reduce_rows(np.add, b, np.int64), b.sum(axis=1))
    np.testing.assert_array_equal(reduce_rows(np.logical_and, b), b.all(axis=1))
    np.testing.assert_array_equal(reduce_rows(np.logical_or, b), b.any(axis=1))
    np.testing.assert_array_equal(cumsum_rows(b.astype(np.int64)), np.cumsum(b, axis=1))


@pytest.mark.parametrize("width", [5, 64, 65, 3000])
def test_row_reductions_equal_numpy_for_short_and_long_rows(width):
    """The column-by-column row reductions (short rows) and numpy's own (long rows, one
    DUT with thousands of readings) give numpy's results (plumbing test)."""
    from sagfit.core.checks.common import cumsum_rows, reduce_rows

    a = np.random.default_rng(width).random((7, width))
    np.testing.assert_allclose(reduce_rows(np.add, a), a.sum(axis=1), rtol=1e-12)
    np.testing.assert_allclose(cumsum_rows(a), np.cumsum(a, axis=1), rtol=1e-12)
    assert (reduce_rows(np.logical_or, a > 0.9, bool) == (a > 0.9).any(axis=1)).all()
