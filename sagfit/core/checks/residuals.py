"""Residual checks: single readings far off their DUT's line (``outlier``).

The externally studentised (deleted) residual of each reading, with its leverage, against
Student's t in a Type A fit and the normal distribution with stated uncertainties,
Šidák-corrected over the readings of one DUT.

References
----------
- R. D. Cook, S. Weisberg, *Residuals and Influence in Regression*, Chapman & Hall
  (1982), 2.2.
- D. A. Belsley, E. Kuh, R. E. Welsch, *Regression Diagnostics* (1980), ch. 2.
- Z. Šidák, "Rectangular confidence regions for the means of multivariate normal
  distributions", J. Am. Stat. Assoc. 62, 626–633 (1967).
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..fit import _groupsum, _spread
from .common import NAN, Rows


def outlier_limits(n, stated, level: float) -> np.ndarray:
    """Critical |t| per DUT of the outlier check, so that a linear DUT gets a false outlier
    flag with probability ``level`` over all its readings (Šidák's correction,
    α₁ = 1 − (1 − level)^(1/n)). With stated uncertainties the externally studentised
    residual is compared with the normal distribution; in a Type A fit it follows Student's
    t with n − 3 degrees of freedom (Cook & Weisberg, *Residuals and Influence in
    Regression*, 1982, 2.2.2; Belsley, Kuh & Welsch 1980, eq. 2.8)."""
    n = np.asarray(n, float)
    a1 = 1.0 - (1.0 - level) ** (1.0 / np.maximum(n, 1.0))
    q = 1.0 - a1 / 2.0
    with np.errstate(invalid="ignore"):
        t_lim = special.stdtrit(np.maximum(n - 3.0, 1.0), q)
    return np.where(np.asarray(stated, bool), special.ndtri(q), t_lim)


def check_outliers(R: Rows, level: float = 0.01):
    """Externally studentised residuals with the leverage of each reading."""
    m, g, w = R.m, R.g, R.w
    sw = _groupsum(g, w, m)
    with np.errstate(divide="ignore", invalid="ignore"):
        xbar = _groupsum(g, w * R.x, m) / sw
        dx = R.x - _spread(g, xbar)
        sxx = _groupsum(g, w * dx * dx, m)
        h = w / _spread(g, sw) + w * dx * dx / _spread(g, sxx)
        one_h = np.maximum(1.0 - h, 1e-12)
        nu = (R.n - 2).astype(float)
        z2 = R.z * R.z / one_h
        # deleted scale (Belsley et al. 1980, eq. 2.8); the floor matters only for a line
        # that is not the least-squares one (a robust refit), where it can go negative
        chi2_g, nu_g = _spread(g, R.chi2), _spread(g, nu)
        s2_del = np.maximum((chi2_g - z2) / (nu_g - 1.0), 1e-6 * chi2_g / nu_g)
        s2 = np.where(_spread(g, R.stated), np.maximum(s2_del, 1.0), s2_del)
        t = R.z / np.sqrt(one_h * s2)
    run_dut = R.ok & (R.n >= 4)
    t = np.where(_spread(g, run_dut) & np.isfinite(t), t, 0.0)
    at = np.abs(t)
    starts = np.concatenate(([0], np.cumsum(R.n)[:-1]))
    tmax = np.full(m, NAN)
    limit = outlier_limits(R.n, R.stated, level)
    nflag = _groupsum(g, at > _spread(g, limit), m)
    ne = R.n > 0
    if ne.any():
        tmax[ne] = np.maximum.reduceat(at, starts[ne])
    tmax = np.where(run_dut, tmax, NAN)
    # p-value of the largest |t| over the DUT's n readings (Šidák, as the limit)
    with np.errstate(invalid="ignore", divide="ignore"):
        p1 = np.where(R.stated, 2.0 * special.ndtr(-tmax),
                      2.0 * special.stdtr(np.maximum(R.n - 3.0, 1.0), -tmax))
        p = -np.expm1(R.n * np.log1p(-np.minimum(p1, 1.0)))
    return ({"max_abs_t": tmax, "count": np.where(run_dut, nflag, NAN),
             "limit": np.where(run_dut, limit, NAN),
             "p_value": np.where(run_dut, p, NAN)}, t, run_dut)

