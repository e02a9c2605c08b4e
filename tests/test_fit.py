"""The fitter against certified data, independent libraries and simulation."""

import math
import pathlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import sagfit
from sagfit.core.fit import fit_lines, york_line
from sagfit.core.readings import Readings
from sagfit.core.units import Accuracy

DATA = pathlib.Path(__file__).parent / "data"


def lre(computed, certified):
    """Log relative error: the number of matching significant digits (NIST StRD convention)."""
    if computed == certified:
        return 16.0
    return -math.log10(abs(computed - certified) / abs(certified))


def load(name, skip):
    return np.loadtxt(DATA / name, delimiter=",", skiprows=skip, comments="#")


@pytest.mark.reference("York, Evensen, Martínez López, De Basabe Delgado, Am. J. Phys. 72, 367 "
                       "(2004); Pearson (1901) data with York (1966) weights")
class TestPearsonYork:
    """York's benchmark: values as reproduced in SOURCES.md §1 (bfsl, LinearFitXYerrors.jl)."""

    @pytest.fixture(scope="class")
    @staticmethod
    def result():
        x, wx, y, wy = load("pearson_york.csv", 5).T
        return york_line(x, y, 1 / np.sqrt(wx), 1 / np.sqrt(wy))

    def test_slope_and_intercept(self, result):
        """Slope −0.480533407 and intercept 5.479910224 to at least 9 significant digits."""
        assert lre(result["a"][0], 5.4799102240329) >= 9
        assert lre(result["b"][0], -0.48053340744620) >= 9

    def test_a_priori_standard_errors(self, result):
        """York-2004 a-priori σ_a = 0.29497074, σ_b = 0.057985009 (6 digits at least)."""
        assert lre(math.sqrt(result["var_a"][0]), 0.29497074) >= 6
        assert lre(math.sqrt(result["var_b"][0]), 0.057985009) >= 6

    def test_goodness_of_fit(self, result):
        """S = χ² = 11.866353 on 8 degrees of freedom (MSWD 1.4832941)."""
        assert lre(result["chi2"][0], 11.866353) >= 7
        assert lre(result["chi2"][0] / 8, 1.4832941) >= 7

    def test_scaled_errors(self, result):
        """σ scaled by √(S/ν): 0.35924652 and 0.070620270 (LinearFitXYerrors.jl)."""
        s = math.sqrt(result["chi2"][0] / 8)
        assert lre(math.sqrt(result["var_a"][0]) * s, 0.35924652) >= 6
        assert lre(math.sqrt(result["var_b"][0]) * s, 0.070620270) >= 6

    def test_covariance(self, result):
        """cov(a, b) = −x̄_adj·σ_b² = −0.016472545 (derivation in SOURCES.md §1)."""
        assert lre(result["cov_ab"][0], -0.016472545) >= 6

    def test_through_the_readings_api(self):
        """The same numbers come out of sagfit.fit with x = current, y = voltage, Vth = a, Rth = −b."""
        x, wx, y, wy = load("pearson_york.csv", 5).T
        r = Readings.from_arrays(current=x, voltage=y, u_current=1 / np.sqrt(wx),
                                 u_voltage=1 / np.sqrt(wy))
        f = sagfit.fit(r)[0]
        assert f.method == "york"
        assert lre(f.vth.value, 5.4799102240329) >= 9
        assert lre(f.rth.value, 0.48053340744620) >= 9
        # χ²/ν = 1.48 > 1, so the PDG scale factor is applied: the scaled σ's are reported
        assert lre(f.vth.u, 0.35924652) >= 6
        assert lre(f.rth.u, 0.070620270) >= 6
        assert f.p_value == pytest.approx(0.15727, abs=5e-5)


@pytest.mark.reference("Amen (2012) MSc report, Table 3.1, as fitted by LinearFitXYerrors.jl "
                       "(cross-implementation check, SOURCES.md §1b)")
def test_correlated_errors_match_independent_implementation():
    """With correlated x–y errors York's solution matches a = −21.9553309045508, b = 1.1762288806682."""
    x, vx, y, vy, cxy = load("york_correlated_amen2012.csv", 3).T
    sx, sy = np.sqrt(vx), np.sqrt(vy)
    res = york_line(x, y, sx, sy, cxy / (sx * sy))
    assert lre(res["a"][0], -21.9553309045508) >= 9
    assert lre(res["b"][0], 1.1762288806682) >= 9
    assert lre(math.sqrt(res["chi2"][0] / 25), 3.4885539308643) >= 7
    assert lre(math.sqrt(res["var_b"][0] * res["chi2"][0] / 25), 0.0578260394408) >= 7


@pytest.mark.reference("NIST/ITL StRD, linear least squares, Norris (certified values)")
class TestNorris:
    """Unweighted path (no stated uncertainty → OLS, Type A) against certified values."""

    CERT = {"B0": -0.262323073774029, "B1": 1.00211681802045, "sB0": 0.232818234301152,
            "sB1": 0.429796848199937e-03, "rsd": 0.884796396144373,
            "rss": 26.6173985294224}

    @pytest.fixture(scope="class")
    @staticmethod
    def fitted():
        x, y = load("nist_norris.csv", 4).T
        return fit_lines(Readings.from_arrays(current=x, voltage=y))[0]

    def test_parameters(self, fitted):
        """B0 (= Vth) and B1 (= −Rth) to at least 9 significant digits."""
        assert fitted.method == "ols"
        assert lre(fitted.vth.value, self.CERT["B0"]) >= 9
        assert lre(-fitted.rth.value, self.CERT["B1"]) >= 9

    def test_standard_deviations(self, fitted):
        """s(B0), s(B1), the residual SD and SS to at least 9 significant digits."""
        assert lre(fitted.vth.u, self.CERT["sB0"]) >= 9
        assert lre(fitted.rth.u, self.CERT["sB1"]) >= 9
        assert lre(fitted.chi2, self.CERT["rss"]) >= 9
        assert lre(math.sqrt(fitted.chi2 / fitted.dof), self.CERT["rsd"]) >= 9

    def test_student_t_interval(self, fitted):
        """No stated uncertainty: the interval uses Student t with ν = n − 2 = 34 (GUM G.3)."""
        from scipy import stats

        k = stats.t.ppf(0.975, 34)
        assert fitted.dof == 34
        assert fitted.p_value is None
        assert fitted.vth.ci_high - fitted.vth.value == pytest.approx(k * fitted.vth.u, rel=1e-12)


@pytest.mark.reference("statsmodels WLS (independent implementation)")
def test_wls_equals_statsmodels():
    """Errors in V only: Vth, Rth, their standard errors and covariance equal statsmodels WLS
    with cov_type='fixed scale' (a-priori weights), to 1e-10."""
    import statsmodels.api as sm

    rng = np.random.default_rng(7)
    i = np.array([0.0, 0.2, 0.5, 1.0, 1.6, 2.4, 3.0])
    uv = 0.002 + 0.0005 * i
    v = 5.02 - 0.041 * i + rng.normal(0, uv)
    f = fit_lines(Readings.from_arrays(current=i, voltage=v, u_voltage=uv))[0]
    assert f.method == "wls"
    X = sm.add_constant(i)
    ref = sm.WLS(v, X, weights=1 / uv ** 2).fit(cov_type="fixed scale")
    assert f.vth.value == pytest.approx(ref.params[0], rel=1e-10)
    assert -f.rth.value == pytest.approx(ref.params[1], rel=1e-10)
    scale = max(1.0, f.chi2 / f.dof)
    cov = ref.cov_params() * scale
    assert f.vth.u == pytest.approx(math.sqrt(cov[0, 0]), rel=1e-9)
    assert f.rth.u == pytest.approx(math.sqrt(cov[1, 1]), rel=1e-9)
    assert f.cov[0, 1] == pytest.approx(-cov[0, 1], rel=1e-9)
    assert f.chi2 == pytest.approx(np.sum(ref.resid ** 2 / uv ** 2), rel=1e-10)


@pytest.mark.reference("odrpack (ODRPACK95 orthogonal distance regression, independent "
                       "implementation)")
class TestYorkAgainstODR:
    def test_pearson_york(self):
        """Same data, same weights: ODR parameters agree with York's to 1e-6 and its unscaled
        covariance with York's a-priori covariance to 1e-4 (ODR's convergence tolerance)."""
        import odrpack

        x, wx, y, wy = load("pearson_york.csv", 5).T
        res = york_line(x, y, 1 / np.sqrt(wx), 1 / np.sqrt(wy))
        odr = odrpack.odr_fit(lambda x, b: b[0] + b[1] * x, x, y, np.array([5.0, -0.5]),
                              weight_x=wx, weight_y=wy, sstol=1e-15, partol=1e-15, maxit=500)
        assert odr.beta[0] == pytest.approx(res["a"][0], rel=1e-6)
        assert odr.beta[1] == pytest.approx(res["b"][0], rel=1e-6)
        assert math.sqrt(odr.cov_beta[0, 0]) == pytest.approx(math.sqrt(res["var_a"][0]), rel=1e-4)
        assert math.sqrt(odr.cov_beta[1, 1]) == pytest.approx(math.sqrt(res["var_b"][0]), rel=1e-4)

    def test_bench_readings_with_load_tolerance(self):
        """A bench sweep with meter accuracy and resistor tolerance in (I, V) (uncorrelated):
        York and ODR agree on Vth and Rth to 1e-6."""
        import odrpack

        rng = np.random.default_rng(11)
        i = np.array([0.0, 0.5, 1.1, 2.0, 2.9, 4.2])
        ui = 0.01 + 0.002 * i
        uv = np.full(i.size, 0.004)
        v = 12.6 - 0.05 * i + rng.normal(0, uv)
        iobs = i + rng.normal(0, ui)
        f = fit_lines(Readings.from_arrays(current=iobs, voltage=v, u_current=ui, u_voltage=uv))[0]
        start = np.polyfit(iobs, v, 1)[::-1]  # ODR's own stopping rule depends on the start
        odr = odrpack.odr_fit(lambda x, b: b[0] + b[1] * x, iobs, v, start,
                              weight_x=1 / ui ** 2, weight_y=1 / uv ** 2, sstol=1e-15,
                              partol=1e-15, maxit=500)
        assert f.method == "york"
        assert f.vth.value == pytest.approx(odr.beta[0], rel=1e-6)
        assert -f.rth.value == pytest.approx(odr.beta[1], rel=1e-6)


def _brute_force_york(x, y, sx, sy):
    """Minimise York's objective Σ[(x−X)²/sx² + (y−a−bX)²/sy²] over a, b and the true X."""
    from scipy.optimize import least_squares

    def resid(p):
        a, b, X = p[0], p[1], p[2:]
        return np.concatenate(((x - X) / sx, (y - a - b * X) / sy))

    b0 = np.polyfit(x, y, 1)
    sol = least_squares(resid, np.concatenate((b0[::-1], x)), xtol=1e-15, ftol=1e-15, gtol=1e-15)
    return sol.x[0], sol.x[1]


@pytest.mark.reference("independent oracle: scipy.optimize.least_squares over York's objective")
def test_york_is_the_errors_in_variables_minimum():
    """York's slope and intercept are the minimum of the full errors-in-variables objective."""
    x, wx, y, wy = load("pearson_york.csv", 5).T
    sx, sy = 1 / np.sqrt(wx), 1 / np.sqrt(wy)
    a, b = _brute_force_york(x, y, sx, sy)
    res = york_line(x, y, sx, sy)
    assert res["a"][0] == pytest.approx(a, rel=1e-7)
    assert res["b"][0] == pytest.approx(b, rel=1e-7)


def _plain_york_slope(x, y, sxx, syy, sxy, b, tol=1e-15, abs_tol=0.0):
    """York et al. (2004) steps 1–4 for one line, iterated until the slope stops changing
    (no extrapolation): the reference for the batch kernel's accelerated iteration."""
    for it in range(1, 1000):
        w = 1.0 / (syy + b * b * sxx - 2.0 * b * sxy)
        u = x - np.sum(w * x) / np.sum(w)
        v = y - np.sum(w * y) / np.sum(w)
        beta = w * (u * syy + b * v * sxx - (b * u + v) * sxy)
        b_new = np.sum(w * beta * v) / np.sum(w * beta * u)
        if abs(b_new - b) <= max(tol * abs(b_new), abs_tol):
            return b_new, it
        b = b_new
    raise AssertionError("no convergence")


@pytest.mark.reference("York et al. (2004), Am. J. Phys. 72, 367, steps 1–4, iterated plainly "
                       "one DUT at a time")
def test_accelerated_iteration_finds_the_plain_root():
    """The batch kernel's Aitken jumps (docs/method.md) end on the root the plain iteration
    finds, within 1e-8 of the slope's standard error, in fewer steps."""
    rng = np.random.default_rng(12)
    loads = np.array([100, 47, 22, 10, 4.7, 2.2, 1.0, 0.47])
    m = 200
    rth = rng.uniform(0.05, 2.0, m)  # internal resistance up to the loads': large x errors
    g = np.repeat(np.arange(m), loads.size)
    r_true = np.tile(loads, m)
    r = r_true * (1 + rng.uniform(-0.05, 0.05, r_true.size))  # 5 % resistors
    v = 12.0 * r / (r + rth[g]) + rng.normal(0, 2e-3, r.size)
    uv, ur = np.full(r.size, 2e-3), r_true * 0.05 / np.sqrt(3)
    x, y = v / r_true, v  # I = V/R with the nominal R: correlated errors in I and V
    sxx = (uv / r_true) ** 2 + (v * ur / r_true ** 2) ** 2
    syy, sxy = uv ** 2, uv ** 2 / r_true
    res = york_line(x, y, np.sqrt(sxx), np.sqrt(syy), sxy / np.sqrt(sxx * syy), group=g)
    plain_steps = []
    for k in range(m):
        s = g == k
        b0 = np.polyfit(x[s], y[s], 1, w=1 / np.sqrt(syy[s]))[0]
        b = _plain_york_slope(x[s], y[s], sxx[s], syy[s], sxy[s], b0)[0]
        # steps of the plain iteration to the kernel's own tolerance (1e-9 σ_b)
        plain_steps.append(_plain_york_slope(x[s], y[s], sxx[s], syy[s], sxy[s], b0,
                                             abs_tol=1e-9 * np.sqrt(res["var_b"][k]))[1])
        assert abs(res["b"][k] - b) <= 1e-8 * np.sqrt(res["var_b"][k])
    assert res["converged"].all()
    assert res["iterations"].mean() < np.mean(plain_steps)


class TestBatch:
    def test_batch_equals_loop(self):
        """Fitting 50 DUTs together gives the same numbers as fitting each alone."""
        rng = np.random.default_rng(3)
        loads = np.array([np.inf, 10, 4.7, 2.2, 1.0, 0.47])
        n = 50
        vth = rng.uniform(11, 13, n)
        rth = rng.uniform(0.01, 0.2, n)
        r = np.tile(loads, n)
        g = np.repeat(np.arange(n), loads.size)
        v = vth[g] / (1 + rth[g] / r) + rng.normal(0, 2e-3, r.size)  # r = inf: open circuit
        names = [f"P{k:02d}" for k in range(n)]
        acc = Accuracy(0.015, 0.002)
        batch = sagfit.fit(Readings.from_arrays(voltage=v, load=r, group=g, duts=names,
                                                voltage_accuracy=acc, load_tolerance=1.0))
        for k in range(0, n, 7):
            m = g == k
            one = sagfit.fit(Readings.from_arrays(voltage=v[m], load=r[m], voltage_accuracy=acc,
                                                  load_tolerance=1.0))[0]
            b = batch[names[k]]
            assert b.vth.value == pytest.approx(one.vth.value, rel=1e-12)
            assert b.rth.value == pytest.approx(one.rth.value, rel=1e-10)
            assert b.rth.u == pytest.approx(one.rth.u, rel=1e-9)
            assert b.chi2 == pytest.approx(one.chi2, rel=1e-8, abs=1e-12)

    def test_bad_dut_does_not_stop_the_others(self):
        """A DUT with a single load gets an error message; the other DUTs are fitted."""
        r = Readings.from_arrays(voltage=[12.0, 11.9, 11.8, 5.0, 5.0],
                                 load=[np.inf, 10, 5, 2.2, 2.2], dut=["A", "A", "A", "B", "B"],
                                 voltage_accuracy=Accuracy(0, 0.001))
        f = sagfit.fit(r)
        assert f["A"].ok and not f["B"].ok
        assert "one load" in f["B"].error
        assert math.isnan(f["B"].vth.value)


class TestDerived:
    @pytest.mark.reference("GUM JCGM 100:2008 5.1.2 law of propagation; textbook Thevenin/Norton "
                           "(Alexander & Sadiku, Fundamentals of Electric Circuits; from memory)")
    def test_delta_method_matches_numerical_jacobian(self):
        """u(Isc) and u(Pmax) equal J·Σ·Jᵀ with a numerical Jacobian of Vth/Rth and Vth²/(4Rth)."""
        rng = np.random.default_rng(5)
        i = np.array([0.0, 1, 2, 3, 4, 5.0])
        v = 12.0 - 0.3 * i + rng.normal(0, 0.01, i.size)
        f = sagfit.fit(Readings.from_arrays(current=i, voltage=v, u_voltage=np.full(6, 0.01)))[0]
        vth, rth, cov = f.vth.value, f.rth.value, f.cov
        for fun, est in ((lambda a, b: a / b, f.isc), (lambda a, b: a * a / (4 * b), f.pmax)):
            h = 1e-6
            j = np.array([(fun(vth + h, rth) - fun(vth - h, rth)) / (2 * h),
                          (fun(vth, rth + h) - fun(vth, rth - h)) / (2 * h)])
            assert est.value == pytest.approx(fun(vth, rth), rel=1e-12)
            assert est.u == pytest.approx(math.sqrt(j @ cov @ j), rel=1e-6)

    def test_negative_resistance_has_no_isc(self):
        """Rth ≤ 0 leaves Isc and Pmax undefined (null in JSON), never inf."""
        f = sagfit.fit(Readings.from_arrays(current=[0, 1, 2.0], voltage=[5.0, 5.1, 5.2],
                                            u_voltage=[0.01] * 3))[0]
        assert f.rth.value < 0
        assert f.to_dict()["isc"]["value"] is None and f.to_dict()["pmax"]["value"] is None


def _simulate(n, seed, vth, rth, loads, uv, tol_pct, uniform_r=True):
    """Seeded bench runs (invented test data), each with its own resistors: sagfit.simulate
    for rectangular resistor errors; Gaussian resistor errors, which sagfit.simulate does not
    draw, by hand."""
    if uniform_r:
        from sagfit.core.simulate import simulate

        run = simulate(vth, rth, list(loads), duts=n, seed=seed, per_dut_loads=True,
                       voltage_accuracy=Accuracy(0.0, uv * math.sqrt(3)),
                       load_tolerance=tol_pct, error_distribution="normal",
                       meter_errors="per_reading")  # u_voltage states independent noise
        return run.load_ohm, run.voltage_V, run.group
    rng = np.random.default_rng(seed)
    r_nom = np.tile(loads, n)
    g = np.repeat(np.arange(n), loads.size)
    finite = np.isfinite(r_nom)
    dr = rng.normal(0, 1, r_nom.size) * np.where(finite, tol_pct / 100 * r_nom / math.sqrt(3), 0)
    v = vth / (1 + rth / (r_nom + dr)) + rng.normal(0, uv, r_nom.size)  # r = inf: Vth
    return r_nom, v, g


@pytest.mark.slow
class TestCoverage:
    """Honest intervals: 95 % intervals cover the truth 93–98 % of the time (seeded)."""

    N = 2000

    @pytest.mark.parametrize("uniform_r", [True, False], ids=["rect-R", "gauss-R"])
    def test_meter_and_tolerance(self, uniform_r):
        """A 12.6 V pack, 50 mΩ, loads open…0.47 Ω, 2 mV meter, 1 % resistors."""
        loads = np.array([np.inf, 10, 4.7, 2.2, 1.0, 0.47])
        r, v, g = _simulate(self.N, 2026, 12.6, 0.05, loads, 0.002, 1.0, uniform_r)
        f = sagfit.fit(Readings.from_arrays(voltage=v, load=r, group=g,
                                            duts=[str(k) for k in range(self.N)],
                                            u_voltage=np.full(v.size, 0.002), load_tolerance=1.0))
        k = f.k
        cov_v = np.mean(np.abs(f.vth - 12.6) <= k * f.u_vth)
        cov_r = np.mean(np.abs(f.rth - 0.05) <= k * f.u_rth)
        assert 0.93 <= cov_v <= 0.98, cov_v
        assert 0.93 <= cov_r <= 0.98, cov_r

    def test_load_tolerance_dominates(self):
        """Rth comparable to the loads, 5 % resistors: ignoring the load uncertainty covers
        far less than 95 %; sagfit's errors-in-variables fit does not."""
        loads = np.array([np.inf, 10, 4.7, 2.2, 1.0])
        vth, rth = 5.0, 2.0
        r, v, g = _simulate(self.N, 4711, vth, rth, loads, 0.001, 5.0)
        duts = [str(k) for k in range(self.N)]
        uv = np.full(v.size, 0.001)
        ours = sagfit.fit(Readings.from_arrays(voltage=v, load=r, group=g, duts=duts, u_voltage=uv,
                                               load_tolerance=5.0))
        naive = sagfit.fit(Readings.from_arrays(voltage=v, load=r, group=g, duts=duts,
                                                u_voltage=uv))
        def cover(f, u):
            return np.mean(np.abs(f.rth - rth) <= f.k * u)

        assert 0.93 <= cover(ours, ours.u_rth) <= 0.98
        # the naive fit's own a-priori interval covers almost never; even enlarged by the
        # PDG scale factor from 3 degrees of freedom it stays well short of 95 %
        assert cover(naive, naive.u_rth / np.sqrt(naive.scale)) < 0.20
        assert cover(naive, naive.u_rth) < 0.90
        assert set(ours.method) == {"york"}

    def test_type_a_student_t(self):
        """No stated uncertainty (OLS, Student t with n − 2 dof): coverage 93–98 %."""
        rng = np.random.default_rng(99)
        i = np.tile(np.array([0.0, 0.5, 1.0, 1.5, 2.0]), self.N)
        g = np.repeat(np.arange(self.N), 5)
        v = 5.0 - 0.1 * i + rng.normal(0, 0.003, i.size)
        f = sagfit.fit(Readings.from_arrays(current=i, voltage=v, group=g,
                                            duts=[str(k) for k in range(self.N)]))
        c = np.mean(np.abs(f.rth - 0.1) <= f.k * f.u_rth)
        assert 0.93 <= c <= 0.98, c


class TestProperties:
    @settings(max_examples=60, deadline=None)
    @given(vth=st.floats(1e-3, 1e4), rth=st.floats(1e-4, 1e4),
           frac=st.lists(st.floats(0.01, 0.95), min_size=2, max_size=8, unique=True))
    def test_exact_line_is_recovered(self, vth, rth, frac):
        """Noise-free readings from random Vth > 0, Rth > 0 give Vth and Rth to 1e-9."""
        isc = vth / rth
        i = np.concatenate(([0.0], np.array(frac) * isc))
        v = vth - rth * i
        f = sagfit.fit(Readings.from_arrays(current=i, voltage=v))[0]
        assert f.vth.value == pytest.approx(vth, rel=1e-9)
        assert f.rth.value == pytest.approx(rth, rel=1e-8)

    @settings(max_examples=40, deadline=None)
    @given(seed=st.integers(0, 2 ** 31), perm_seed=st.integers(0, 2 ** 31))
    def test_row_order_does_not_matter(self, seed, perm_seed):
        """Permuting the readings changes no result."""
        rng = np.random.default_rng(seed)
        r = np.array([np.inf, 10, 4.7, 2.2, 1.0, 0.47])
        v = 12.6 / (1 + 0.05 / r) + rng.normal(0, 0.002, 6)
        p = np.random.default_rng(perm_seed).permutation(6)
        kw = dict(voltage_accuracy=Accuracy(0.015, 0.002), load_tolerance=1.0)
        a = sagfit.fit(Readings.from_arrays(voltage=v, load=r, **kw))[0]
        b = sagfit.fit(Readings.from_arrays(voltage=v[p], load=r[p], **kw))[0]
        assert b.vth.value == pytest.approx(a.vth.value, rel=1e-12)
        assert b.rth.value == pytest.approx(a.rth.value, rel=1e-10)
        assert b.rth.u == pytest.approx(a.rth.u, rel=1e-9)

    @settings(max_examples=40, deadline=None)
    @given(k=st.floats(1e-3, 1e3))
    def test_scaling_currents_scales_resistance(self, k):
        """Scaling the currents by k scales Rth by 1/k and leaves Vth unchanged."""
        i = np.array([0.0, 0.3, 0.9, 1.4, 2.2])
        v = np.array([5.02, 5.009, 4.985, 4.968, 4.935])
        a = sagfit.fit(Readings.from_arrays(current=i, voltage=v))[0]
        b = sagfit.fit(Readings.from_arrays(current=i * k, voltage=v))[0]
        assert b.vth.value == pytest.approx(a.vth.value, rel=1e-10)
        assert b.rth.value == pytest.approx(a.rth.value / k, rel=1e-9)


def test_callers_arrays_are_neither_frozen_nor_shared():
    """Readings and fits keep private, read-only copies: the caller's arrays stay writeable
    and changing them later changes no result (plumbing)."""
    v = np.array([12.7, 12.6, 12.5])
    r = np.array([np.inf, 10, 4.7])
    rd = Readings.from_arrays(voltage=v, load=r)
    v[0] = 1.0
    assert v.flags.writeable and rd.voltage[0] == 12.7
    assert not rd.voltage.flags.writeable


class TestGroupSums:
    """Segment sums (np.add.reduceat) against np.bincount, the plain definition (plumbing
    test: numpy itself is the reference)."""

    @pytest.mark.parametrize("seed", range(4))
    def test_sorted_with_gaps_unsorted_and_empty(self, seed):
        import sys

        F = sys.modules["sagfit.core.fit"]
        rng = np.random.default_rng(seed)
        m = 50
        g = np.sort(rng.integers(0, m, 400))  # some groups absent
        w = rng.normal(size=g.size)
        np.testing.assert_allclose(F._groupsum(g, w, m), np.bincount(g, w, m), rtol=1e-12,
                                   atol=1e-12)
        full = np.repeat(np.arange(m), 3)
        wf = rng.normal(size=full.size)
        np.testing.assert_allclose(F._groupsum(full, wf, m), np.bincount(full, wf, m),
                                   rtol=1e-12, atol=1e-12)
        shuffled = rng.permutation(g)
        np.testing.assert_allclose(F._groupsum(shuffled, w, m), np.bincount(shuffled, w, m),
                                   rtol=1e-12, atol=1e-12)
        assert F._groupsum(np.zeros(0, np.int64), np.zeros(0), 3).tolist() == [0, 0, 0]
        bools = rng.random(g.size) > 0.5
        np.testing.assert_array_equal(F._groupsum(g, bools, m), np.bincount(g, bools, m))

    @pytest.mark.parametrize("width", [2, 3, 5, 8, 9, 10, 16, 17, 24, 32, 33])
    def test_equal_width_sums_are_bit_equal_to_segment_sums(self, width):
        """Batches where every DUT has the same reading count take column sums; a DUT's
        sums must not change by a bit when its batch takes the segment sums instead (a
        DUT's result must not depend on the other DUTs)."""
        import sys

        F = sys.modules["sagfit.core.fit"]
        rng = np.random.default_rng(width)
        m = 300
        g = np.repeat(np.arange(m), width)
        w = rng.normal(size=g.size) * np.exp(5 * rng.normal(size=g.size))
        assert F._segments(g, m).width == width
        np.testing.assert_array_equal(F._groupsum(g, w, m),
                                      np.add.reduceat(w, np.arange(0, g.size, width)))

    @pytest.mark.parametrize("seed", range(3))
    def test_spread_equals_fancy_indexing(self, seed):
        import sys

        F = sys.modules["sagfit.core.fit"]
        rng = np.random.default_rng(seed)
        m = 40
        v = rng.normal(size=m)
        for g in (np.sort(rng.integers(0, m, 300)), np.repeat(np.arange(m), 4),
                  rng.integers(0, m, 300), np.zeros(0, np.int64)):
            np.testing.assert_array_equal(F._spread(g, v), v[g])
            counts = F._counts(g, m)
            np.testing.assert_array_equal(counts, np.bincount(g, minlength=m))
            assert counts.dtype == np.bincount(g, minlength=m).dtype
            np.testing.assert_array_equal(F._spread(g, v > 0), (v > 0)[g])


@pytest.mark.reference("Abramowitz & Stegun, Handbook of Mathematical Functions (1964), "
                       "26.4.4/26.4.5, against scipy.special.chdtrc (an independent library)")
def test_chi2_upper_tail_equals_scipy():
    """The closed-form chi-square tails for integer ν equal scipy's incomplete gamma
    function to 1e-12 relative; other arguments are scipy's own result."""
    from scipy import special

    from sagfit.core.fit import chi2_upper

    x = np.concatenate([np.linspace(0, 5, 101), np.geomspace(1e-9, 1400, 300)])
    for k in range(1, 41):
        want = special.chdtrc(k, x)
        got = chi2_upper(k, x)
        ok = want > 1e-300
        np.testing.assert_allclose(got[ok], want[ok], rtol=1e-12, atol=0)
    mixed_nu = np.array([1, 2, 3, 6, 6, 2.5, 0, 50, 6, 6, 6])
    mixed_x = np.array([0.5, 3.0, 7.0, 4.0, 1e-3, 1.0, 1.0, 40.0, -1.0, np.inf, np.nan])
    np.testing.assert_allclose(chi2_upper(mixed_nu, mixed_x), special.chdtrc(mixed_nu, mixed_x),
                               rtol=1e-12, atol=0, equal_nan=True)
    assert chi2_upper(6, 2000.0) == special.chdtrc(6, 2000.0)  # past the closed forms


class TestNoStaleGroupingCache:
    """Regression (a cache keyed on object identity returned old counts): calling
    ``sagfit.york_line`` again with the same group array, changed in place, must give the
    fit of the new grouping. Reference: the same call on a fresh copy of the array."""

    def test_group_array_changed_in_place(self):
        rng = np.random.default_rng(3)
        x = np.tile(np.linspace(0, 5, 6), 2)
        y = 10 - 0.3 * x + 0.01 * rng.standard_normal(12)
        y[6:] = 8 - 0.7 * x[6:] + 0.01 * rng.standard_normal(6)
        sx, sy = np.full(12, 1e-3), np.full(12, 1e-2)
        g = np.repeat([0, 1], 6)
        york_line(x, y, sx, sy, group=g)
        g[4:6] = 1                      # same object, two readings moved to DUT 1
        again = york_line(x, y, sx, sy, group=g)
        fresh = york_line(x, y, sx, sy, group=g.copy())
        assert again["b"][1] == pytest.approx(fresh["b"][1], rel=1e-12)
        assert list(again["n"]) == [4, 8]
