"""Tests of sagfit.budget: the GUM-style uncertainty budget of Vth and Rth."""

from __future__ import annotations

import json
import pathlib

import numpy as np
import pytest

from sagfit.core.budget import GROUPS, budget_arrays, budgets
from sagfit.core.fit import fit_lines, york_line
from sagfit.core.readings import Readings

DATA = pathlib.Path(__file__).parent / "data"


def _pearson_york():
    a = np.loadtxt(DATA / "pearson_york.csv", delimiter=",", comments="#", skiprows=5)
    x, wx, y, wy = a.T
    return x, 1 / np.sqrt(wx), y, 1 / np.sqrt(wy)


def _fd_jacobian(x, y, sx, sy, r=None, h=1e-7):
    """Central-difference Jacobian of York's (a, b) with respect to each x_i and y_i,
    the stated uncertainties held fixed."""
    ja = np.zeros((2, x.size))
    jb = np.zeros((2, x.size))
    for which, arr in enumerate((x, y)):
        for i in range(x.size):
            step = h * max(1.0, abs(arr[i]))
            hi, lo = arr.copy(), arr.copy()
            hi[i] += step
            lo[i] -= step
            args_hi = (hi, y) if which == 0 else (x, hi)
            args_lo = (lo, y) if which == 0 else (x, lo)
            rh = york_line(*args_hi, sx, sy, r)
            rl = york_line(*args_lo, sx, sy, r)
            ja[which, i] = (rh["a"][0] - rl["a"][0]) / (2 * step)
            jb[which, i] = (rh["b"][0] - rl["b"][0]) / (2 * step)
    return ja, jb


def _pack(seed=3, n_duts=1, noise=1.0):
    """Invented lead-acid pack readings: load resistors (1 %) and a voltmeter reading,
    I computed as V/R (the bench's usual two-column file)."""
    rng = np.random.default_rng(seed)
    loads = np.array([np.inf, 10, 4.7, 2.2, 1.0, 0.47])
    rows_r, rows_v, rows_d = [], [], []
    for d in range(n_duts):
        vth = 12.7 + 0.05 * rng.standard_normal()
        rth = 0.02 * (1 + 0.2 * rng.random())
        r_true = np.where(np.isinf(loads), np.inf, loads * (1 + 0.005 * rng.standard_normal(6)))
        fin = np.isfinite(r_true)
        v = np.full(6, vth)
        v[fin] = vth * r_true[fin] / (r_true[fin] + rth)
        v = v + noise * 0.001 * rng.standard_normal(6)
        rows_r += list(loads)
        rows_v += list(v)
        rows_d += [f"P{d:03d}"] * 6
    from sagfit.core.units import parse_accuracy

    # independent errors: these tests check the linearisation of the classic budget
    return Readings.from_arrays(voltage=rows_v, load=rows_r, dut=rows_d, load_tolerance=1.0,
                                voltage_accuracy=parse_accuracy("0.015%+2mV",
                                                                "V").with_shared(False))


class TestCombinedEqualsFit:
    def test_wls_budget_equals_a_priori_exactly(self):
        """With voltage uncertainties only (WLS), the budget's combined u equals the fit's."""
        rng = np.random.default_rng(1)
        i = np.linspace(0, 2, 8)
        uv = 0.002 + 0.001 * rng.random(8)
        v = 5.02 - 0.031 * i + uv * rng.standard_normal(8)
        rd = Readings.from_arrays(voltage=v, current=i, u_voltage=uv)
        fits = fit_lines(rd)
        assert fits.method[0] == "wls"
        b = budget_arrays(rd, fits)
        np.testing.assert_allclose(b.u_combined["vth"], fits.u_vth, rtol=1e-12)
        np.testing.assert_allclose(b.u_combined["rth"], fits.u_rth, rtol=1e-12)
        assert b.contribution[("vth", "current")][0] == 0.0

    def test_york_budget_equals_a_priori(self):
        """With uncertainties in both coordinates (York), the budget reproduces York's a-priori
        σ_a, σ_b (York et al. 2004 eq. 7) to round-off, on the Pearson–York data."""
        x, sx, y, sy = _pearson_york()
        rd = Readings.from_arrays(voltage=y, current=x, u_voltage=sy, u_current=sx)
        fits = fit_lines(rd)
        ref = york_line(x, y, sx, sy)
        b = budget_arrays(rd, fits)
        np.testing.assert_allclose(b.u_apriori["vth"], np.sqrt(ref["var_a"]), rtol=1e-10)
        np.testing.assert_allclose(b.u_apriori["rth"], np.sqrt(ref["var_b"]), rtol=1e-10)
        np.testing.assert_allclose(b.u_combined["vth"], fits.u_vth, rtol=1e-10)
        np.testing.assert_allclose(b.u_combined["rth"], fits.u_rth, rtol=1e-10)

    @pytest.mark.reference("SOURCES.md §1: Pearson (1901)/York (1966) data; a-priori "
                           "σ_a = 0.29497074, σ_b = 0.057985009 (York 2004 formula, bfsl test)")
    def test_pearson_york_certified_values(self):
        """The a-priori uncertainties in the budget are the published York values."""
        x, sx, y, sy = _pearson_york()
        rd = Readings.from_arrays(voltage=y, current=x, u_voltage=sy, u_current=sx)
        b = budget_arrays(rd, fit_lines(rd))
        assert b.u_apriori["vth"][0] == pytest.approx(0.29497074, rel=1e-7)
        assert b.u_apriori["rth"][0] == pytest.approx(0.057985009, rel=1e-7)


class TestAgainstFiniteDifferences:
    @pytest.mark.reference("Krystek & Anton first-order propagation as implemented in GTC "
                           "(MSLNZ/GTC type_a.line_fit_wtls docstring): σ_a = 0.2919335, "
                           "σ_b = 0.05761674 for Pearson–York; SOURCES.md §1")
    def test_fd_jacobian_of_york_line_matches_published_propagation(self):
        """The finite-difference Jacobian of york_line propagates to the published first-order
        figures, and the budget (York's linearisation) lies within 1.5 % of them."""
        x, sx, y, sy = _pearson_york()
        ja, jb = _fd_jacobian(x, y, sx, sy)
        u_a = np.sqrt(np.sum((ja[0] * sx) ** 2 + (ja[1] * sy) ** 2))
        u_b = np.sqrt(np.sum((jb[0] * sx) ** 2 + (jb[1] * sy) ** 2))
        assert u_a == pytest.approx(0.2919335, rel=2e-6)
        assert u_b == pytest.approx(0.05761674, rel=2e-6)
        rd = Readings.from_arrays(voltage=y, current=x, u_voltage=sy, u_current=sx)
        b = budget_arrays(rd, fit_lines(rd))
        # stated tolerance: the linearisation about the adjusted points differs from the
        # exact Jacobian by terms of the order of the relative scatter (here ≈ 1 %)
        assert b.u_apriori["vth"][0] == pytest.approx(u_a, rel=0.015)
        assert b.u_apriori["rth"][0] == pytest.approx(u_b, rel=0.015)

    def test_wls_sensitivities_are_exact_derivatives(self):
        """For WLS the budget's per-group contributions equal the finite-difference ones."""
        rng = np.random.default_rng(7)
        i = np.linspace(0.0, 1.5, 7)
        uv = np.full(7, 0.003)
        v = 5.0 - 0.04 * i + uv * rng.standard_normal(7)
        rd = Readings.from_arrays(voltage=v, current=i, u_voltage=uv)
        b = budget_arrays(rd, fit_lines(rd))
        ja, jb = _fd_jacobian(i, v, np.zeros(7), uv)
        assert b.contribution[("vth", "voltage")][0] == pytest.approx(
            np.sqrt(np.sum((ja[1] * uv) ** 2)), rel=1e-6)
        assert b.contribution[("rth", "voltage")][0] == pytest.approx(
            np.sqrt(np.sum((jb[1] * uv) ** 2)), rel=1e-6)

    def test_load_chain_rule_matches_finite_differences(self):
        """I = V/R: the voltage-meter and resistor contributions match a finite-difference
        Jacobian of york_line with respect to each V_i and R_i to 1 % (the exact Jacobian also
        moves the weights and the residuals; on this bench data that is a few 0.1 %)."""
        rd = _pack(seed=11)
        fits = fit_lines(rd)
        b = budget_arrays(rd, fits)
        v = np.asarray(rd.voltage)
        r = np.asarray(rd.load)
        sx, sy = np.asarray(rd.u_current), np.asarray(rd.u_voltage)
        rho = np.where(sx * sy > 0, rd.cov_iv / np.where(sx * sy > 0, sx * sy, 1), 0.0)

        def line(vv, rr):
            cur = np.where(np.isinf(rr), 0.0, vv / rr)
            out = york_line(cur, vv, sx, sy, rho)
            return np.array([out["a"][0], -out["b"][0]])

        u_r = np.where(np.isfinite(r), 0.01 * r / np.sqrt(3), 0.0)
        var_v = np.zeros(2)
        var_r = np.zeros(2)
        for k in range(v.size):
            h = 1e-6 * v[k]
            vp, vm = v.copy(), v.copy()
            vp[k] += h
            vm[k] -= h
            var_v += ((line(vp, r) - line(vm, r)) / (2 * h) * sy[k]) ** 2
            if np.isfinite(r[k]):
                h = 1e-6 * r[k]
                rp, rm = r.copy(), r.copy()
                rp[k] += h
                rm[k] -= h
                var_r += ((line(v, rp) - line(v, rm)) / (2 * h) * u_r[k]) ** 2
        for j, y in enumerate(("vth", "rth")):
            assert b.contribution[(y, "voltage")][0] == pytest.approx(np.sqrt(var_v[j]), rel=1e-2)
            assert b.contribution[(y, "load")][0] == pytest.approx(np.sqrt(var_r[j]), rel=1e-2)

    def test_voltage_from_current_and_load(self):
        """V = I·R (current and load columns): the groups are current readings and
        resistors, and they add up to the fit's uncertainty."""
        from sagfit.core.units import parse_accuracy

        cur = np.array([0.5, 1.0, 1.5, 2.0, 2.5])
        r = np.array([9.9, 4.9, 3.2, 2.4, 1.9])
        rd = Readings.from_arrays(current=cur, load=r, load_tolerance=0.5,
                                  current_accuracy=parse_accuracy("0.1%+1mA",
                                                                  "A").with_shared(False))
        fits = fit_lines(rd)
        b = budget_arrays(rd, fits)
        assert b.contribution[("vth", "voltage")][0] == 0.0
        for y in ("vth", "rth"):
            parts = [b.contribution[(y, g)][0] for g in ("current", "load", "scale")]
            assert np.sqrt(np.sum(np.square(parts))) == pytest.approx(
                float(getattr(fits, "u_" + y)[0]), rel=1e-10)
            assert parts[0] > 0 and parts[1] > 0


class TestGroups:
    def test_contributions_add_to_reported_u_with_scale(self):
        """With excess scatter the scale-factor row closes the sum to the reported u."""
        rd = _pack(seed=5, n_duts=20, noise=8.0)
        fits = fit_lines(rd)
        assert (fits.scale > 1).any()
        b = budget_arrays(rd, fits)
        for y, u in (("vth", fits.u_vth), ("rth", fits.u_rth)):
            tot = np.sqrt(sum(b.contribution[(y, g)] ** 2 for g in ("voltage", "current",
                                                                      "load", "scale")))
            np.testing.assert_allclose(tot, u, rtol=1e-10)
            assert np.all((b.contribution[(y, "scale")] > 0) == (fits.scale > 1))

    def test_ols_is_one_type_a_component(self):
        """No stated uncertainty: one Type A component equal to the reported u."""
        rd = Readings.from_arrays(voltage=[5.02, 5.01, 4.99, 4.97], current=[0, 0.5, 1.0, 1.5])
        fits = fit_lines(rd)
        doc = budgets(rd, fits)[0]
        assert doc["method"] == "ols"
        (comp,) = doc["vth"]["components"]
        assert comp["input"] == "type_a"
        assert comp["contribution"] == pytest.approx(fits.u_vth[0], rel=1e-12)
        assert comp["sensitivity"] * comp["u"] == pytest.approx(comp["contribution"], rel=1e-12)

    def test_many_duts_match_one_at_a_time(self):
        """The vectorised budget equals the budget of each DUT computed alone."""
        rd = _pack(seed=2, n_duts=12)
        fits = fit_lines(rd)
        b = budget_arrays(rd, fits)
        for k in (0, 5, 11):
            one = rd.only_duts([rd.duts[k]])
            b1 = budget_arrays(one, fit_lines(one))
            for key, col in b.contribution.items():
                assert col[k] == pytest.approx(b1.contribution[key][0], rel=1e-9, abs=1e-300)

    def test_dominant_input_is_the_largest(self):
        """The dominant group is the one with the largest contribution."""
        rd = _pack(seed=4, n_duts=3)
        fits = fit_lines(rd)
        for doc in budgets(rd, fits):
            for y in ("vth", "rth"):
                comps = doc[y]["components"]
                best = max(comps, key=lambda c: c["contribution"])
                assert doc[y]["dominant"] == best["input"]
                assert sum(c["share"] for c in comps) == pytest.approx(1.0, rel=1e-12)


class TestJson:
    def test_unfitted_dut_has_no_budget_and_json_is_strict(self):
        """A DUT that could not be fitted gets None; the rest serialise without NaN."""
        rd = Readings.from_arrays(voltage=[5.0, 4.9, 4.8, 7.0], current=[0, 1, 2, 1],
                                  dut=["A", "A", "A", "B"], u_voltage=[0.01] * 4)
        fits = fit_lines(rd)
        out = budgets(rd, fits)
        assert out[1] is None and out[0] is not None
        json.dumps(out, allow_nan=False)
        assert {c["input"] for c in out[0]["vth"]["components"]} <= {"voltage", "scale"}

    def test_subset_fit_gets_no_budget(self):
        """Rows that do not reproduce the reported line (a refit on a subset) give no budget."""
        rd = _pack(seed=9)
        fits = fit_lines(rd)
        used = np.ones(len(rd), bool)
        used[-1] = False
        b = budget_arrays(rd, fits, used=used)
        assert not b.valid[0]
        assert "did not use these readings" in b.reason[0]


class TestShapes:
    @pytest.mark.parametrize("shared", [False, True], ids=["independent", "shared"])
    @pytest.mark.parametrize("mode", ["vi", "rv", "ri"])
    def test_any_shape_closes_to_the_fit(self, mode, shared):
        """For random numbers of DUTs and readings, in each column layout, the groups add up
        to the reported u(Vth) and u(Rth) of every fitted DUT."""
        from hypothesis import given, settings
        from hypothesis import strategies as st

        from sagfit.core.units import parse_accuracy

        @settings(max_examples=25, deadline=None)
        @given(st.lists(st.integers(3, 9), min_size=1, max_size=6), st.integers(0, 2 ** 31))
        def check(sizes, seed):
            rng = np.random.default_rng(seed)
            cols: dict = {"voltage": [], "current": [], "load": [], "dut": []}
            for d, n in enumerate(sizes):
                r = np.geomspace(0.5, 20, n) * (1 + 0.01 * rng.standard_normal(n))
                vth, rth = 5 + rng.random(), 0.05 + 0.5 * rng.random()
                i = vth / (r + rth)
                cols["current"] += list(i * (1 + 1e-3 * rng.standard_normal(n)))
                cols["voltage"] += list(i * r * (1 + 1e-3 * rng.standard_normal(n)))
                cols["load"] += list(r)
                cols["dut"] += [f"D{d}"] * n
            keys = {"vi": ("voltage", "current"), "rv": ("load", "voltage"),
                    "ri": ("load", "current")}[mode]
            rd = Readings.from_arrays(**{k: cols[k] for k in keys}, dut=cols["dut"],
                                      load_tolerance=1.0,
                                      voltage_accuracy=parse_accuracy(
                                          "0.05%+2mV", "V").with_shared(shared),
                                      current_accuracy=parse_accuracy(
                                          "0.2%+1mA", "A").with_shared(shared))
            fits = fit_lines(rd)
            b = budget_arrays(rd, fits)
            ok = fits.ok
            assert np.all(b.valid == ok)
            for y, u in (("vth", fits.u_vth), ("rth", fits.u_rth)):
                tot = np.sqrt(sum(b.contribution[(y, g)] ** 2 for g in ("type_a",) + GROUPS))
                np.testing.assert_allclose(tot[ok], u[ok], rtol=1e-9)
            json.dumps(budgets(rd, fits), allow_nan=False)

        check()
