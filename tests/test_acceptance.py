"""Acceptance decisions (sagfit.acceptance) against JCGM 106:2012, ILAC-G8:09/2019 and
independent computations with scipy.stats / scipy.integrate."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sagfit.core.acceptance import (ERROR, FAIL, INCONCLUSIVE, PASS, Acceptance, Check, Condition,
                               DecisionRule, Spec, accept, check_values,
                               conformance_probability, decide, terminal_voltage)
from sagfit.core.errors import InputError
from sagfit.core.results import Fits, Flag

JCGM106 = ("JCGM 106:2012, Evaluation of measurement data - The role of measurement "
           "uncertainty in conformity assessment, normal PDF conformance probability")
ILAC = ("ILAC-G8:09/2019, Guidelines on Decision Rules and Statements of Conformity, "
        "§4.1-4.2.3")
GUM = "JCGM 100:2008 (GUM) 5.2.2; JCGM 101:2008 (GUM Supplement 1) Monte Carlo method"

GUARDED = DecisionRule("guarded")
SIMPLE = DecisionRule("simple")
RISK = DecisionRule("risk", min_conformance=0.95)


def make_fits(vth, u_vth, rth=None, u_rth=None, cov_vr=None, *, k=2.0, errors=None,
              flags=None, isc=None, u_isc=None):
    """A Fits with the given estimates (the other columns filled consistently)."""
    vth = np.atleast_1d(np.asarray(vth, float))
    m = vth.size

    def col(x, default):
        return np.full(m, default, float) if x is None else np.broadcast_to(
            np.asarray(x, float), (m,)).copy()

    rth, u_rth = col(rth, 0.02), col(u_rth, 0.001)
    u_vth, cov_vr = col(u_vth, 0.001), col(cov_vr, 0.0)
    errors = tuple(errors) if errors is not None else (None,) * m
    bad = np.array([e is not None for e in errors])
    nan = np.where(bad, np.nan, 1.0)
    return Fits(duts=tuple(f"U{i}" for i in range(m)), n=np.full(m, 6), method=np.full(m, "wls"),
                vth=vth * nan, u_vth=u_vth * nan, rth=rth * nan, u_rth=u_rth * nan,
                cov_vr=cov_vr * nan, chi2=np.full(m, 4.0), dof=np.full(m, 4),
                p_value=np.full(m, 0.4), scale=np.ones(m), k=np.full(m, k),
                isc=col(isc, 1.0) * nan, u_isc=col(u_isc, 0.1) * nan, pmax=np.ones(m),
                u_pmax=np.full(m, 0.1), converged=~bad, error=errors,
                flags=tuple(flags) if flags is not None else ((),) * m, confidence=0.95)


class TestConformanceProbability:
    @pytest.mark.reference(JCGM106 + "; METHODS.md §3 check value")
    def test_check_value_two_sided(self):
        """y = 1500, u = 0.12, T_L = 1499.80, T_U = 1500.20 gives p_c = 0.904419."""
        p = conformance_probability(1500.0, 0.12, 1499.80, 1500.20)
        assert float(p) == pytest.approx(0.904419, abs=5e-7)

    @pytest.mark.reference(JCGM106 + " (limiting case: estimate on a one-sided limit)")
    @pytest.mark.parametrize("lower,upper", [(5.0, math.inf), (-math.inf, 5.0)])
    def test_value_on_one_sided_limit_is_one_half(self, lower, upper):
        """A best estimate exactly on a one-sided limit has p_c = 0.5, whatever u."""
        p = conformance_probability(np.full(3, 5.0), np.array([1e-6, 0.1, 3.0]), lower, upper)
        np.testing.assert_allclose(p, 0.5, rtol=0, atol=1e-15)

    @pytest.mark.reference("scipy.stats.norm.cdf / scipy.integrate.quad of norm.pdf "
                           "(independent computation)")
    def test_against_scipy_norm_and_integration(self):
        """p_c equals the normal probability mass between the limits, computed with
        scipy.stats.norm and by numerical integration of the PDF."""
        from scipy import integrate, stats

        rng = np.random.default_rng(106)
        y = rng.normal(5.0, 0.2, 40)
        u = rng.uniform(0.005, 0.3, 40)
        lo, hi = 4.75, 5.25
        p = conformance_probability(y, u, lo, hi)
        ref = stats.norm.cdf(hi, loc=y, scale=u) - stats.norm.cdf(lo, loc=y, scale=u)
        np.testing.assert_allclose(p, ref, rtol=1e-12, atol=1e-15)
        for yi, ui, pi in zip(y[:8], u[:8], p[:8]):
            q, _ = integrate.quad(lambda t: stats.norm.pdf(t, yi, ui), lo, hi,
                                  points=[yi], epsabs=1e-13)
            assert pi == pytest.approx(q, abs=1e-10)

    @pytest.mark.reference("scipy.stats.norm.sf / norm.cdf (independent computation)")
    def test_one_sided_against_scipy(self):
        """One-sided p_c is Φ((T_U − y)/u) for an upper and 1 − Φ((T_L − y)/u) for a lower
        limit, also far in the tails."""
        from scipy import stats

        y = np.linspace(4.0, 6.0, 41)
        u = 0.05
        np.testing.assert_allclose(conformance_probability(y, u, -np.inf, 5.0),
                                   stats.norm.cdf(5.0, y, u), rtol=1e-12, atol=1e-300)
        np.testing.assert_allclose(conformance_probability(y, u, 5.0, np.inf),
                                   stats.norm.sf(5.0, y, u), rtol=1e-12, atol=1e-300)

    def test_zero_uncertainty_is_a_point_mass(self):
        """With u = 0, p_c is 1 inside, 0 outside and 0.5 exactly on a limit."""
        p = conformance_probability(np.array([4.0, 5.0, 6.0]), 0.0, -np.inf, 5.0)
        np.testing.assert_array_equal(p, [1.0, 0.5, 0.0])

    def test_nan_propagates(self):
        """A missing estimate has no conformance probability."""
        assert np.isnan(conformance_probability(np.nan, 0.1, 0, 1))


class TestGuardedAcceptance:
    @pytest.mark.reference(ILAC + " §4.2.2: acceptance limit = tolerance limit − w, w = U")
    def test_acceptance_limits_are_tolerance_moved_in_by_U(self):
        """A_L = T_L + U and A_U = T_U − U for every DUT (w = U = k·u)."""
        u = np.array([0.001, 0.01, 0.02])
        U = 2.0 * u
        r = decide(np.full(3, 5.0), u, U, 4.75, 5.25, GUARDED)
        np.testing.assert_allclose(r["accept_lower"], 4.75 + U)
        np.testing.assert_allclose(r["accept_upper"], 5.25 - U)

    @pytest.mark.reference(ILAC + "; JCGM 106:2012 guard band w = r·U")
    def test_guard_multiple_scales_the_band(self):
        """With guard = r, the acceptance limits move in by r·U."""
        rule = DecisionRule("guarded", guard=0.5)
        r = decide(np.array([5.0]), np.array([0.01]), np.array([0.02]), -np.inf, 5.25, rule)
        assert r["accept_upper"][0] == pytest.approx(5.25 - 0.01)

    # T = [4.75, 5.25] V and U = 1/64 V: every sum below is exact in binary floating point
    U = 1.0 / 64.0
    EPS = 1.0 / 1024.0

    @pytest.mark.reference(ILAC + " §4.2.3 zones; closed limits (common practice)")
    @pytest.mark.parametrize("value,expected,statement", [
        (5.0, PASS, 0),                      # well inside
        (5.25 - U, PASS, 0),                 # interval touches T_U from inside (y + U = T_U)
        (5.25 - U + EPS, INCONCLUSIVE, 1),   # just past the acceptance limit, inside T
        (5.25, INCONCLUSIVE, 1),             # exactly on the (closed) tolerance limit
        (5.25 + EPS, INCONCLUSIVE, 2),       # just outside T, interval still overlaps it
        (5.25 + U, INCONCLUSIVE, 2),         # interval touches T_U from outside (y − U = T_U)
        (5.25 + U + EPS, FAIL, 3),           # wholly outside
        (4.75 + U, PASS, 0),                 # touching T_L from inside
        (4.75, INCONCLUSIVE, 1),             # on the lower limit
        (4.75 - U, INCONCLUSIVE, 2),         # touching T_L from outside
        (4.75 - U - EPS, FAIL, 3),
    ])
    def test_boundary_table(self, value, expected, statement):
        """Boundary cases of the guarded rule (closed limits): decision and ILAC-G8 §4.2.3
        statement (0 pass, 1 conditional pass, 2 conditional fail, 3 fail)."""
        r = decide(np.array([value]), np.array([self.U / 2]), np.array([self.U]), 4.75, 5.25,
                   GUARDED)
        assert r["decision"][0] == expected
        assert r["statement"][0] == statement

    @pytest.mark.reference(ILAC + " §4.2.2 (acceptance zone empty when 2U exceeds the "
                           "tolerance width)")
    @settings(max_examples=200, deadline=None)
    @given(y=st.floats(-10, 10), half=st.floats(1e-6, 1.0), extra=st.floats(1e-6, 5.0),
           centre=st.floats(-1, 1))
    def test_narrow_two_sided_never_passes(self, y, half, extra, centre):
        """Two-sided limits narrower than 2U never give a pass under the guarded rule."""
        U = half + extra
        r = decide(np.array([y]), np.array([U / 2]), np.array([U]), centre - half,
                   centre + half, GUARDED)
        assert r["decision"][0] != PASS


class TestSimpleAndRisk:
    @pytest.mark.reference(ILAC + " §4.2.1 simple acceptance")
    def test_simple_rule_ignores_uncertainty(self):
        """Simple acceptance: pass inside the closed limits, fail outside, never inconclusive."""
        y = np.array([4.74, 4.75, 5.0, 5.25, 5.26])
        r = decide(y, np.full(5, 0.5), np.full(5, 1.0), 4.75, 5.25, SIMPLE)
        np.testing.assert_array_equal(r["decision"], [FAIL, PASS, PASS, PASS, FAIL])

    @pytest.mark.reference(JCGM106 + "; thresholds p_min and 1 − p_min")
    def test_risk_rule_thresholds(self):
        """Pass when p_c ≥ 0.95, fail when p_c ≤ 0.05, inconclusive between."""
        from scipy import stats

        u = 0.01
        z = stats.norm.ppf(0.95)
        y = np.array([5.25 - z * u - 1e-9, 5.25 - z * u + 1e-6, 5.25, 5.25 + z * u + 1e-6])
        r = decide(y, np.full(4, u), np.full(4, 2 * u), -np.inf, 5.25, RISK)
        np.testing.assert_array_equal(r["decision"], [PASS, INCONCLUSIVE, INCONCLUSIVE, FAIL])
        assert r["accept_upper"][0] == pytest.approx(5.25 - z * u, rel=1e-12)
        assert r["reject_upper"][0] == pytest.approx(5.25 + z * u, rel=1e-12)

    @pytest.mark.reference("scipy.optimize.brentq on scipy.stats.norm (independent "
                           "computation of the two-sided acceptance limit)")
    def test_risk_two_sided_acceptance_limits(self):
        """For a narrow two-sided tolerance the reported acceptance and rejection limits
        are where p_c equals p_min and 1 − p_min."""
        from scipy import optimize, stats

        lo, hi, u = 1499.80, 1500.20, np.array([0.08, 0.12])
        r = decide(np.full(2, 1500.0), u, 2 * u, lo, hi, RISK)
        for j, uj in enumerate(u):
            def pc(y, target):
                return stats.norm.cdf(hi, y, uj) - stats.norm.cdf(lo, y, uj) - target
            if pc(1500.0, 0.95) > 0:
                a = optimize.brentq(pc, 1500.0, hi + 10 * uj, args=(0.95,), xtol=1e-12)
                assert r["accept_upper"][j] == pytest.approx(a, abs=1e-9)
                assert r["accept_lower"][j] == pytest.approx(3000.0 - a, abs=1e-9)
            else:
                assert np.isnan(r["accept_upper"][j])
            b = optimize.brentq(pc, 1500.0, hi + 10 * uj, args=(0.05,), xtol=1e-12)
            assert r["reject_upper"][j] == pytest.approx(b, abs=1e-9)
        # u = 0.12 gives p_c = 0.904 at the midpoint (METHODS.md check value): never a pass
        assert r["decision"][1] == INCONCLUSIVE and np.isnan(r["accept_upper"][1])

    @pytest.mark.reference(JCGM106)
    @settings(max_examples=100, deadline=None)
    @given(y=st.floats(4.0, 6.0), u=st.floats(1e-4, 0.5))
    def test_risk_decision_agrees_with_its_limits(self, y, u):
        """A risk-rule pass always lies within the reported acceptance limits."""
        r = decide(np.array([y]), np.array([u]), np.array([2 * u]), 4.75, 5.25, RISK)
        if r["decision"][0] == PASS:
            assert r["accept_lower"][0] - 1e-9 <= y <= r["accept_upper"][0] + 1e-9


class TestRuleProperties:
    @pytest.mark.reference(ILAC + " (guarded acceptance zone inside the tolerance zone); "
                           "JCGM 106:2012")
    @settings(max_examples=300, deadline=None)
    @given(y=st.lists(st.floats(-3, 3), min_size=1, max_size=20),
           u=st.floats(1e-6, 1.0), lower=st.one_of(st.just(-math.inf), st.floats(-2, 0)),
           upper=st.one_of(st.just(math.inf), st.floats(0.0, 2)))
    def test_rules_are_consistent(self, y, u, lower, upper):
        """For any shape of input: a guarded pass is a simple pass, a guarded fail is a
        simple fail, a guarded pass has p_c ≥ Φ(k) against each limit, and p_c is in
        [0, 1]."""
        from scipy import stats

        if lower == -math.inf and upper == math.inf:
            upper = 1.0
        y = np.array(y)
        uu = np.full(y.shape, u)
        g = decide(y, uu, 2 * uu, lower, upper, GUARDED)
        s_ = decide(y, uu, 2 * uu, lower, upper, SIMPLE)
        assert np.all((g["decision"] != PASS) | (s_["decision"] == PASS))
        assert np.all((g["decision"] != FAIL) | (s_["decision"] == FAIL))
        assert np.all((g["p_c"] >= 0) & (g["p_c"] <= 1))
        one_side = conformance_probability(y, uu, -math.inf, upper)
        ok = g["decision"] == PASS
        assert np.all(one_side[ok] >= stats.norm.cdf(2.0) - 1e-12)


class TestDerivedQuantities:
    def test_terminal_voltage_at_load_and_current(self):
        """V = Vth·R/(Rth + R) at a load, Vth − Rth·I at a current, Vth when open
        (Thevenin's theorem, textbook)."""
        v, _, _ = terminal_voltage(np.array([5.0]), np.array([0.1]), Condition("load", 2.4))
        assert v[0] == pytest.approx(5.0 * 2.4 / 2.5)
        v, _, _ = terminal_voltage(np.array([5.0]), np.array([0.1]), Condition("current", 2.0))
        assert v[0] == pytest.approx(4.8)
        v, _, _ = terminal_voltage(np.array([5.0]), np.array([0.1]),
                                   Condition("load", math.inf))
        assert v[0] == 5.0

    @pytest.mark.reference(GUM)
    @pytest.mark.parametrize("check", [
        Check("v", "voltage", lower=4.0, at=Condition("load", 1.0)),
        Check("v", "voltage", lower=4.0, at=Condition("current", 3.0)),
        Check("reg", "regulation", upper=5.0, light=Condition("load", math.inf),
              heavy=Condition("load", 2.2)),
        Check("reg", "regulation", upper=5.0, light=Condition("current", 0.1),
              heavy=Condition("current", 2.0)),
    ], ids=["v-at-load", "v-at-current", "reg-loads", "reg-currents"])
    def test_delta_method_against_monte_carlo(self, check):
        """u of the terminal voltage and of the regulation, from the full covariance of
        (Vth, Rth), agrees with a seeded Monte Carlo propagation within 2 %."""
        vth, rth, uv, ur, rho = 5.02, 0.05, 0.002, 0.003, 0.85
        cov = rho * uv * ur
        fits = make_fits([vth], [uv], [rth], [ur], [cov])
        value, u = check_values(fits, check)
        rng = np.random.default_rng(101)
        draws = rng.multivariate_normal([vth, rth], [[uv ** 2, cov], [cov, ur ** 2]], 400_000)
        mc = make_fits(draws[:, 0], uv, draws[:, 1], ur, cov)
        sample, _ = check_values(mc, check)
        assert u[0] == pytest.approx(np.std(sample), rel=0.02)
        assert value[0] == pytest.approx(np.mean(sample), abs=3 * u[0] / 600)

    def test_correlation_matters(self):
        """Ignoring the (Vth, Rth) covariance would give a different u: it is used."""
        c = Check("v", "voltage", lower=4.0, at=Condition("current", 2.0))
        _, u_corr = check_values(make_fits([5.0], [0.002], [0.05], [0.003], [5e-6]), c)
        _, u_none = check_values(make_fits([5.0], [0.002], [0.05], [0.003], [0.0]), c)
        assert u_corr[0] == pytest.approx(math.sqrt(0.002 ** 2 + 4 * 0.003 ** 2 - 4 * 5e-6))
        assert u_none[0] == pytest.approx(math.sqrt(0.002 ** 2 + 4 * 0.003 ** 2))


class TestUnitDecision:
    SPEC = Spec(checks=(Check("vth", "vth", 4.75, 5.25), Check("rth", "rth", upper=0.1)))

    def test_worst_check_wins(self):
        """A unit's decision is the worst of its checks; an unfitted unit is an error."""
        fits = make_fits([5.0, 5.0, 4.0, 5.24, 5.0], 0.005, [0.05, 0.099, 0.05, 0.2, 0.05],
                         0.001, errors=[None, None, None, None, "only one reading"])
        acc = accept(fits, self.SPEC)
        np.testing.assert_array_equal(acc.decision, [PASS, INCONCLUSIVE, FAIL, FAIL, ERROR])
        assert acc.counts() == {"pass": 1, "inconclusive": 1, "fail": 2, "error": 1}
        assert acc.exit_code == 1
        s = acc.summary()
        assert s["yield"] == pytest.approx(0.2)
        assert s["failed_most"][0]["quantity"] in ("vth", "rth")
        assert {r["quantity"]: r["fail"] for r in s["failed_most"]} == {"vth": 1, "rth": 1}

    def test_flagged_unit_is_at_best_inconclusive(self):
        """A warning flag caps a pass at inconclusive (not a fail), unless the spec says
        otherwise or ignores that code."""
        w = Flag("curvature", "warning", "residuals curve")
        info = Flag("scale-applied", "info", "scaled")
        flags = [(w,), (info,), (w,)]
        fits = make_fits([5.0, 5.0, 4.0], 0.005, 0.05, 0.001, flags=flags)
        acc = accept(fits, self.SPEC)
        np.testing.assert_array_equal(acc.decision, [INCONCLUSIVE, PASS, FAIL])
        np.testing.assert_array_equal(acc.capped, [True, False, False])
        assert acc.exit_code == 1
        loose = Spec(self.SPEC.checks, DecisionRule(cap_flagged=False))
        assert accept(fits, loose).decision.tolist() == [PASS, PASS, FAIL]
        ignore = Spec(self.SPEC.checks, DecisionRule(ignore_flags=("curvature",)))
        assert accept(fits, ignore).decision.tolist() == [PASS, PASS, FAIL]
        flags = accept(fits, self.SPEC).to_dicts([0])[0]["flags"]
        assert [f["code"] for f in flags] == ["curvature"]  # fit's shape: code, severity,
        assert flags[0]["severity"] == "warning" and flags[0]["message"]  # message

    def test_exit_codes(self):
        """0 all pass, 3 inconclusive or error without a fail, 1 with any fail."""
        assert accept(make_fits([5.0, 5.1], 0.001), self.SPEC).exit_code == 0
        assert accept(make_fits([5.0, 5.249], 0.001), self.SPEC).exit_code == 3
        assert accept(make_fits([5.0, 5.0], 0.001, errors=[None, "x"]), self.SPEC).exit_code == 3

    def test_rule_override_and_fixed_k(self):
        """--rule overrides the spec's rule; a fixed k replaces the fit's coverage factor."""
        fits = make_fits([5.245], 0.005, k=2.0)
        assert accept(fits, self.SPEC).decision[0] == INCONCLUSIVE
        assert accept(fits, self.SPEC, rule="simple").decision[0] == PASS
        spec_k = Spec(self.SPEC.checks, DecisionRule(k=0.5))
        acc = accept(fits, spec_k)
        assert acc.checks[0].U[0] == pytest.approx(0.0025)
        assert acc.decision[0] == PASS

    def test_json_fields(self):
        """Per-DUT dicts carry the documented fields with SI values and None for no limit."""
        acc = accept(make_fits([5.0], 0.005), self.SPEC)
        d = acc.to_dicts()[0]
        assert set(d) >= {"dut", "decision", "checks"}
        c = d["checks"][1]
        assert set(c) >= {"quantity", "value", "U", "lower", "upper", "decision",
                          "conformance_probability"}
        assert c["lower"] is None and c["upper"] == 0.1 and c["U"] == pytest.approx(0.002)
        assert isinstance(acc, Acceptance)

    def test_results_are_frozen(self):
        """Decision arrays are read-only."""
        acc = accept(make_fits([5.0], 0.005), self.SPEC)
        with pytest.raises(ValueError):
            acc.decision[0] = FAIL
        with pytest.raises(ValueError):
            acc.checks[0].value[0] = 1.0

    def test_vectorised_over_many_duts(self):
        """100 000 DUTs are decided in one call, consistent with a few spot checks."""
        rng = np.random.default_rng(7)
        m = 100_000
        fits = make_fits(rng.normal(5.0, 0.1, m), 0.01, rng.uniform(0.02, 0.12, m), 0.002)
        acc = accept(fits, self.SPEC)
        assert len(acc) == m and sum(acc.counts().values()) == m
        for i in rng.integers(0, m, 20):
            y, U = fits.vth[i], 2 * 0.01
            d = decide(np.array([y]), np.array([0.01]), np.array([U]), 4.75, 5.25, GUARDED)
            assert acc.checks[0].decision[i] == d["decision"][0]


class TestExtrapolation:
    def test_operating_point_outside_measured_currents(self):
        """A terminal-voltage check at a current (or load) beyond the swept currents is
        marked as extrapolated; one inside the sweep is not; decisions are unchanged."""
        from sagfit.core.analysis import fit
        from sagfit.core.readings import Readings
        from sagfit.core.units import Accuracy

        i = np.tile([0.0, 0.25, 0.5, 0.75, 1.0], 2)
        v = np.repeat([5.0, 5.01], 5) - 0.05 * i
        r = Readings.from_arrays(voltage=v, current=i, dut=np.repeat(["A", "B"], 5),
                                 voltage_accuracy=Accuracy(0.01, 0.0005))
        fits = fit(r)
        spec = Spec(checks=(
            Check("in", "voltage", lower=4.0, at=Condition("current", 0.8)),
            Check("out", "voltage", lower=4.0, at=Condition("current", 3.0)),
            Check("load", "voltage", lower=4.0, at=Condition("load", 1.0)),  # ≈ 4.8 A
            Check("reg", "regulation", upper=5.0, light=Condition("load", math.inf),
                  heavy=Condition("current", 1.0)),
            Check("vth", "vth", lower=4.0)))
        acc = accept(fits, spec, readings=r)
        ex = {cr.name: cr.extrapolated for cr in acc.checks}
        assert ex["in"].tolist() == [False, False] and ex["out"].tolist() == [True, True]
        assert ex["load"].all() and not ex["reg"].any() and ex["vth"] is None
        assert acc.summary()["extrapolated"] == {"out": 2, "load": 2}
        assert acc.to_dicts([0])[0]["checks"][1]["extrapolated"] is True
        np.testing.assert_array_equal(acc.decision, accept(fits, spec).decision)


class TestModelValidation:
    def test_bad_checks_and_rules_are_refused(self):
        """Limits in the wrong order, no limit, bad rules and bad probabilities are errors."""
        with pytest.raises(InputError):
            Check("vth", "vth", 5.0, 4.0)
        with pytest.raises(InputError):
            Check("vth", "vth")
        with pytest.raises(InputError):
            DecisionRule("lenient")
        with pytest.raises(InputError):
            DecisionRule("risk", min_conformance=0.5)
        with pytest.raises(InputError):
            Condition("load", 0.0)
        with pytest.raises(InputError):
            Spec(checks=())
