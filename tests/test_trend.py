"""Tests of sagfit.trend: weighted Rth trends, projected crossings, fleet comparison."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sagfit.core.errors import InputError
from sagfit.core.trend import DAY, Baseline, Threshold, analyse_trends, iso_date

T0 = 1_775_520_000.0  # 2026-04-07 00:00 UTC


def _one(t_days, rth, u, **kw):
    t = T0 + np.asarray(t_days, float) * DAY
    n = len(t)
    return analyse_trends(np.zeros(n, int), ["X"], t, rth, np.broadcast_to(u, (n,)), **kw)


class TestClosedFormCrossing:
    def test_straight_trend_crosses_on_the_closed_form_date(self):
        """On an exact straight trend R = R0 + s·t the projected crossing is t0 + (k·R0 − R0)/s."""
        r0, s = 0.5e-3, 2e-6  # Ω, Ω per day
        days = np.arange(0, 200, 28.0)
        tr = _one(days, r0 + s * days, 1e-7, threshold=Threshold("ratio", 1.5))
        expected = T0 + (1.5 * r0 - r0) / s * DAY          # closed form: (T − R0)/s
        assert tr.crossing_time[0] == pytest.approx(expected, abs=1.0)  # within a second
        assert tr.rate[0] == pytest.approx(30 * s, rel=1e-9)
        assert tr.crossing_low[0] < expected < tr.crossing_high[0]

    def test_absolute_and_percent_thresholds_use_the_closed_form(self):
        """A percent or absolute threshold moves the crossing to (T − R0)/s as computed by hand."""
        r0, s = 1.0e-3, 5e-6
        days = np.arange(0, 150, 30.0)
        for thr, level in ((Threshold("percent", 25), 1.25e-3), (Threshold("absolute", 1.6e-3),
                                                                  1.6e-3)):
            tr = _one(days, r0 + s * days, 1e-7, threshold=thr)
            assert tr.crossing_time[0] == pytest.approx(T0 + (level - r0) / s * DAY, abs=1.0)
            assert tr.threshold_rth[0] == pytest.approx(level)

    def test_fieller_interval_matches_a_brute_force_search(self):
        """Fieller's interval is the set of dates with |fit − T| ≤ k·sd(fit), found by a grid."""
        rng = np.random.default_rng(5)
        days = np.arange(0, 250, 25.0)
        u = np.full(days.size, 4e-6)
        r = 0.6e-3 + 1.5e-6 * days + rng.normal(0, 4e-6, days.size)
        tr = _one(days, r, u, threshold=Threshold("ratio", 1.6))
        # the same line by hand: weighted LS with x in days from the latest test
        x = days - days[-1]
        w = 1 / u ** 2
        X = np.column_stack([np.ones_like(x), x])
        cov = np.linalg.inv(X.T @ (w[:, None] * X))
        a, b = cov @ X.T @ (w * r)
        chi2 = float(np.sum(w * (r - a - b * x) ** 2))
        s2 = max(1.0, chi2 / (days.size - 2))
        cov = cov * s2
        k = tr.k[0]
        T = tr.threshold_rth[0]
        grid = np.linspace(-200, 2000, 2_200_001)
        sd = np.sqrt(cov[0, 0] + 2 * grid * cov[0, 1] + grid ** 2 * cov[1, 1])
        inside = np.abs(a + b * grid - T) <= k * sd
        lo, hi = grid[inside][0], grid[inside][-1]
        assert (tr.crossing_low[0] - T0) / DAY - days[-1] == pytest.approx(lo, abs=2e-3)
        assert (tr.crossing_high[0] - T0) / DAY - days[-1] == pytest.approx(hi, abs=2e-3)

    def test_no_crossing_when_the_rate_is_not_significant(self):
        """A flat or falling trend has no projected crossing ("not within the tested trend")."""
        days = np.arange(0, 200, 28.0)
        tr = _one(days, 0.5e-3 - 1e-7 * days, 1e-6)
        assert math.isnan(tr.crossing_time[0])
        assert tr.to_dicts()[0]["projected_crossing"] is None
        assert "aging" not in tr.codes(0)


class TestWeightedFitReference:
    @pytest.mark.reference("statsmodels WLS (J. Seabold, J. Perktold, 'statsmodels', Proc. 9th "
                           "Python in Science Conf., 2010), an independent implementation")
    def test_rate_and_its_uncertainty_match_statsmodels_wls_with_scatter(self):
        """With scatter beyond u, slope and u(slope) equal statsmodels WLS (scale χ²/ν)."""
        sm = pytest.importorskip("statsmodels.api")
        rng = np.random.default_rng(11)
        days = np.sort(rng.uniform(0, 400, 9))
        u = rng.uniform(2e-6, 6e-6, days.size)
        r = 0.8e-3 + 3e-7 * days + rng.normal(0, 2e-5, days.size)
        tr = _one(days, r, u)
        res = sm.WLS(r, sm.add_constant(days), weights=1 / u ** 2).fit()
        assert tr.scale[0] > 1
        assert tr.rate[0] == pytest.approx(30 * res.params[1], rel=1e-9)
        assert tr.u_rate[0] == pytest.approx(30 * res.bse[1], rel=1e-9)
        lo, hi = res.conf_int(alpha=0.05)[1]
        assert tr.rate_low[0] == pytest.approx(30 * lo, rel=1e-9)
        assert tr.rate_high[0] == pytest.approx(30 * hi, rel=1e-9)

    @pytest.mark.reference("statsmodels WLS with cov_type='fixed scale' (Seabold & Perktold 2010)")
    def test_a_priori_uncertainty_matches_statsmodels_fixed_scale(self):
        """Scatter within the stated u keeps the a-priori covariance (statsmodels 'fixed scale')."""
        sm = pytest.importorskip("statsmodels.api")
        rng = np.random.default_rng(3)
        days = np.arange(0, 300, 30.0)
        u = np.full(days.size, 1e-5)
        r = 0.7e-3 + 2e-7 * days + rng.normal(0, 2e-6, days.size)
        tr = _one(days, r, u)
        res = sm.WLS(r, sm.add_constant(days), weights=1 / u ** 2).fit(
            cov_type="fixed scale", cov_kwds={"scale": 1.0})
        assert tr.scale[0] == 1.0
        assert tr.u_rate[0] == pytest.approx(30 * res.bse[1], rel=1e-9)
        assert tr.k[0] == pytest.approx(1.959963985, rel=1e-9)

    @pytest.mark.reference("statsmodels OLS (Seabold & Perktold 2010)")
    def test_records_without_uncertainty_give_an_unweighted_type_a_trend(self):
        """With no u recorded, the rate and its u equal statsmodels OLS."""
        sm = pytest.importorskip("statsmodels.api")
        rng = np.random.default_rng(8)
        days = np.arange(0, 240, 30.0)
        r = 0.9e-3 + 1e-7 * days + rng.normal(0, 5e-6, days.size)
        tr = _one(days, r, np.nan)
        res = sm.OLS(r, sm.add_constant(days)).fit()
        assert tr.u_rate[0] == pytest.approx(30 * res.bse[1], rel=1e-9)


class TestChangeFromBaseline:
    def test_change_and_its_uncertainty_follow_the_gum_propagation(self):
        """c = 100(R_L/R_B − 1), u² = 100²[(u_L/R_B)² + (R_L u_B/R_B²)²] (JCGM 100:2008 5.1.2)."""
        tr = _one([0, 30, 60], [1.0e-3, 1.1e-3, 1.2e-3], np.array([1e-5, 1e-5, 2e-5]))
        assert tr.change_pct[0] == pytest.approx(20.0)
        assert tr.u_change_pct[0] == pytest.approx(
            100 * math.hypot(2e-5 / 1e-3, 1.2e-3 * 1e-5 / 1e-6), rel=1e-12)

    def test_change_uncertainty_agrees_with_monte_carlo(self):
        """The propagated u(change) agrees with a seeded Monte Carlo (JCGM 101:2008 idea)."""
        rng = np.random.default_rng(1)
        rb, rl = rng.normal(1e-3, 1e-5, 200_000), rng.normal(1.3e-3, 2e-5, 200_000)
        mc = np.std(100 * (rl / rb - 1))
        tr = _one([0, 30, 60], [1.0e-3, 1.1e-3, 1.3e-3], np.array([1e-5, 1e-5, 2e-5]))
        assert tr.u_change_pct[0] == pytest.approx(mc, rel=0.02)

    def test_stated_baseline_value_has_no_uncertainty(self):
        """A baseline given as a value is exact: u(change) comes from the latest record only."""
        tr = _one([0, 30, 60], [1.0e-3, 1.1e-3, 1.2e-3], 1e-5,
                  baseline=Baseline("value", value=0.8e-3))
        assert tr.baseline_rth[0] == 0.8e-3
        assert tr.change_pct[0] == pytest.approx(50.0)
        assert tr.u_change_pct[0] == pytest.approx(100 * 1e-5 / 0.8e-3)
        tr14 = _one([0, 30, 60], [1.0e-3, 1.1e-3, 1.2e-3], 1e-5,
                    baseline=Baseline("value", value=0.8e-3), threshold=Threshold("ratio", 1.4))
        assert tr14.crossed[0] and "aging" in tr14.codes(0)

    def test_baseline_date_picks_that_record_and_falls_back_with_a_note(self):
        """--baseline DATE uses the record of that day; a DUT without one uses its first, noted."""
        t = T0 + np.array([0, 30, 60, 30, 60]) * DAY
        tr = analyse_trends([0, 0, 0, 1, 1], ["A", "B"], t, [1e-3, 1.1e-3, 1.2e-3, 2e-3, 2e-3],
                            np.full(5, 1e-5), baseline=Baseline("date", time=T0))
        assert tr.baseline_rth[0] == 1e-3 and "baseline-fallback" not in tr.codes(0)
        assert tr.baseline_rth[1] == 2e-3 and "baseline-fallback" in tr.codes(1)


class TestFlags:
    def test_scatter_alone_never_flags_a_stable_cell(self):
        """500 stable cells with ±2 % test-to-test scatter over 8 tests: none flagged aging."""
        rng = np.random.default_rng(2026)
        m, k = 500, 8
        g = np.repeat(np.arange(m), k)
        t = T0 + np.tile(np.arange(k) * 28.0, m) * DAY
        r = 0.55e-3 * (1 + 0.02 * rng.standard_normal(m * k))
        tr = analyse_trends(g, [f"C{i}" for i in range(m)], t, r, np.full(m * k, 2e-6))
        assert not any("aging" in tr.codes(i) for i in range(m))

    def test_a_fast_riser_is_flagged_before_it_crosses(self):
        """A cell rising 5 %/month, still below 1.5×, is flagged aging via the projection."""
        days = np.arange(0, 8) * 30.0
        tr = _one(days, 0.5e-3 * (1 + 0.05 * days / 30), 2e-6)
        assert not tr.crossed[0]
        assert "aging" in tr.codes(0)
        assert tr.flagged[0]

    def test_far_projection_is_not_flagged(self):
        """A significant but slow rise that crosses years away is not flagged (horizon 180 d)."""
        days = np.arange(0, 8) * 30.0
        tr = _one(days, 0.5e-3 * (1 + 0.003 * days / 30), 1e-7)
        assert np.isfinite(tr.crossing_time[0])
        assert "aging" not in tr.codes(0)
        tr2 = _one(days, 0.5e-3 * (1 + 0.003 * days / 30), 1e-7, horizon_days=20 * 365)
        assert "aging" in tr2.codes(0)

    def test_outlier_in_group_uses_the_median_and_the_setting(self):
        """A DUT 40 % above its group's median is flagged at 30 %, not at 50 %; groups < 3 never."""
        r = np.array([1.0, 1.02, 0.98, 1.01, 1.4, 2.0, 1.0]) * 1e-3
        g = np.arange(7)
        t = np.full(7, T0)
        labels = ["S1"] * 5 + ["S2"] * 2
        tr = analyse_trends(g, list("ABCDEFG"), t, r, np.full(7, 1e-6), labels=labels)
        assert [("outlier-in-group" in tr.codes(i)) for i in range(7)] == [
            False, False, False, False, True, False, False]
        assert tr.group_median[4] == pytest.approx(1.01e-3)
        tr50 = analyse_trends(g, list("ABCDEFG"), t, r, np.full(7, 1e-6), labels=labels,
                              group_excess_pct=50)
        assert not any("outlier-in-group" in tr50.codes(i) for i in range(7))

    def test_unlabelled_duts_group_by_test_day(self):
        """Without labels, DUTs whose latest test was on the same day form one group."""
        t = T0 + np.array([0, 0, 0, 1, 1, 1]) * DAY + 3600 * np.arange(6)
        tr = analyse_trends(np.arange(6), list("ABCDEF"), t, [1, 1, 1.5, 1, 1, 1.1],
                            np.full(6, 1e-3))
        assert tr.group_key[0] == tr.group_key[2] != tr.group_key[3]
        assert "outlier-in-group" in tr.codes(2)
        assert "outlier-in-group" not in tr.codes(5)

    def test_two_records_are_insufficient_history(self):
        """Fewer than three records give no rate and an info flag that does not count as flagged."""
        tr = _one([0, 30], [1e-3, 1.01e-3], 1e-6)
        assert "insufficient-history" in tr.codes(0)
        assert math.isnan(tr.rate[0]) and not tr.flagged[0]
        d = tr.to_dicts()[0]
        assert d["rate_per_30d"]["value"] is None and d["records"] == 2

    def test_json_shape_keeps_the_documented_keys(self):
        """Each result carries the documented keys with the documented types."""
        d = _one([0, 30, 60], [1e-3, 1.1e-3, 1.2e-3], 1e-5).to_dicts()[0]
        for key in ("dut", "records", "baseline_rth", "latest_rth", "change_pct",
                    "rate_per_30d", "projected_crossing", "flags"):
            assert key in d
        assert isinstance(d["records"], int)
        assert set(d["latest_rth"]) >= {"value", "u"}
        assert set(d["change_pct"]) >= {"value", "u"} and set(d["rate_per_30d"]) >= {"value", "u"}
        assert d["projected_crossing"] is None or isinstance(d["projected_crossing"], str)


class TestVectorised:
    @settings(max_examples=25, deadline=None)
    @given(st.lists(st.integers(min_value=1, max_value=7), min_size=1, max_size=6),
           st.integers(min_value=0, max_value=2**31))
    def test_many_duts_at_once_equal_one_at_a_time(self, sizes, seed):
        """Analysing DUTs together (records shuffled) gives each DUT's own result."""
        rng = np.random.default_rng(seed)
        g = np.repeat(np.arange(len(sizes)), sizes)
        t = T0 + (np.concatenate([np.arange(s) for s in sizes]) * 30.0
                  + rng.uniform(0, 3, g.size)) * DAY
        r = 1e-3 * (1 + 0.05 * rng.standard_normal(g.size)) + 1e-6 * (t - T0) / DAY * (g % 2)
        u = rng.uniform(1e-6, 1e-5, g.size)
        perm = rng.permutation(g.size)
        names = [f"D{i}" for i in range(len(sizes))]
        tr = analyse_trends(g[perm], names, t[perm], r[perm], u[perm], labels=["S"] * len(sizes),
                            as_of=float(t.max()))
        for i in range(len(sizes)):
            m = g == i
            one = analyse_trends(np.zeros(m.sum(), int), [names[i]], t[m], r[m], u[m],
                                 as_of=float(t.max()))  # the horizon counts from one date
            for f in ("rate", "u_rate", "crossing_time", "change_pct", "latest_rth"):
                a, b = getattr(tr, f)[i], getattr(one, f)[0]
                assert (np.isnan(a) and np.isnan(b)) or a == pytest.approx(b, rel=1e-9, abs=1e-9)
            assert [c for c in tr.codes(i) if c != "outlier-in-group"] == list(one.codes(0))


class TestInputs:
    def test_bad_settings_are_refused(self):
        """Thresholds, baselines and settings out of range raise InputError."""
        with pytest.raises(InputError):
            Threshold("ratio", 0.9)
        with pytest.raises(InputError):
            Threshold("percent", -5)
        with pytest.raises(InputError):
            Baseline("value", value=-1.0)
        with pytest.raises(InputError):
            _one([0, 30, 60], [1, 1, 1], 1e-3, horizon_days=-1)
        with pytest.raises(InputError):
            _one([0, 30, 60], [1, 1, 1], 1e-3, group_excess_pct=0)

    def test_records_without_rth_are_refused(self):
        """A NaN Rth or date in the input is an InputError, not a silent skip."""
        with pytest.raises(InputError):
            _one([0, 30, 60], [1e-3, np.nan, 1e-3], 1e-5)

    def test_iso_date_is_utc(self):
        """Dates are UTC days."""
        assert iso_date(T0) == "2026-04-07" and iso_date(float("nan")) is None
