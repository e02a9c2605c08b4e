"""The outlier check (sagfit.core.checks.residuals): externally studentised residuals against
Student's t (Type A) or the normal distribution (stated uncertainties), with Šidák's
correction over the readings of one DUT.

References: R. D. Cook and S. Weisberg, *Residuals and Influence in Regression* (1982),
section 2.2 (the externally studentised residual follows t with n − p − 1 degrees of
freedom); Z. Šidák, J. Am. Stat. Assoc. 62, 626 (1967); statsmodels'
``OLSInfluence.resid_studentized_external`` as an independent implementation.
Simulations are seeded and vectorised (one batch of DUTs per case).
"""

import numpy as np
import pytest

import sagfit
from sagfit.core.readings import Readings


def _batch(n, duts, seed, *, stated, outlier_sigma=0.0):
    rng = np.random.default_rng(seed)
    i = np.tile(np.linspace(0.0, 2.0, n), duts)
    sigma = 1e-3
    v = 12.0 - 0.05 * i + sigma * rng.standard_normal(i.size)
    if outlier_sigma:
        pick = rng.integers(0, n, duts) + np.arange(duts) * n
        v[pick] += outlier_sigma * sigma * rng.choice([-1, 1], duts)
    g = np.repeat(np.arange(duts), n)
    kw = {"u_voltage": np.full(i.size, sigma)} if stated else {}
    return Readings.from_arrays(current=i, voltage=v, group=g,
                                duts=[str(k) for k in range(duts)], **kw)


def _rate(fits, code="outlier"):
    return np.mean([any(f.code == code for f in fl) for fl in fits.flags])


@pytest.mark.slow
@pytest.mark.parametrize("stated", [False, True], ids=["type-a", "stated"])
@pytest.mark.parametrize("n", [5, 8, 20, 50])
def test_false_alarms_at_or_below_the_level(n, stated):
    """Linear DUTs: the chance of any outlier flag on a DUT is at most the level (1 %),
    with a simulation tolerance of three binomial standard errors."""
    duts = 4000
    fits = sagfit.fit(_batch(n, duts, 100 + n, stated=stated))
    rate = _rate(fits)
    assert rate <= 0.01 + 3 * np.sqrt(0.01 * 0.99 / duts), rate


@pytest.mark.slow
@pytest.mark.parametrize("n, power", [(8, 0.75), (20, 0.95)])
def test_a_ten_sigma_reading_is_caught(n, power):
    """A single reading 10 standard deviations off: caught in ≥ 75 % of DUTs with 8
    readings and ≥ 95 % with 20 (Type A)."""
    fits = sagfit.fit(_batch(n, 2000, 7 + n, stated=False, outlier_sigma=10.0))
    assert _rate(fits) >= power


def test_statistic_matches_statsmodels():
    """The largest |t| of a Type A DUT equals statsmodels' externally studentised
    residual on the same OLS fit."""
    sm = pytest.importorskip("statsmodels.api")
    from statsmodels.stats.outliers_influence import OLSInfluence

    rng = np.random.default_rng(3)
    i = np.linspace(0, 2, 9)
    v = 5.0 - 0.1 * i + 1e-3 * rng.standard_normal(9)
    v[4] += 6e-3
    fits = sagfit.fit(Readings.from_arrays(current=i, voltage=v))
    res = sm.OLS(v, sm.add_constant(i)).fit()
    ref = np.abs(OLSInfluence(res).resid_studentized_external).max()
    assert fits.diagnostics["outlier"]["max_abs_t"][0] == pytest.approx(ref, rel=1e-8)
