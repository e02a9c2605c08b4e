"""Checks of every fitted straight line: is the source really linear over the tested range?

All checks run on all DUTs at once. Per-DUT sums use ``np.bincount`` over the ``group``
array; the order-dependent checks (knee search, runs, rank correlation, replicate cells)
work on dense blocks of the DUTs that share a reading count, so the only Python loops
run over distinct reading counts and over candidate run counts, never over DUTs.
Message strings are built only for the DUTs that carry a flag.

Each check stores its statistic and p-value in ``Fits.diagnostics[name]`` (columnar
arrays, NaN where the check was not run) so a user can audit every decision.

References
----------
- Weighted quadratic term and extra-sum-of-squares / F test: N. R. Draper, H. Smith,
  *Applied Regression Analysis*, 3rd ed. (1998), ch. 6 and 9 (orthogonal polynomials,
  ch. 22).
- Effective variance u²(V) + b²u²(I) − 2b·u(I, V) of a point about a line of slope b,
  and its iteration: D. York et al., Am. J. Phys. 72(3), 367–375 (2004).
- Broken-line (two-phase) regression with an estimated join point: D. V. Hinkley,
  "Inference about the intersection in two-phase regression", Biometrika 56, 495–504
  (1969); the search over the data is corrected by Bonferroni over the candidate splits
  (a conservative bound; details from memory).
- Runs test: A. Wald, J. Wolfowitz, Ann. Math. Statist. 11, 147–162 (1940); S. Siegel,
  N. J. Castellan, *Nonparametric Statistics for the Behavioral Sciences*, 2nd ed. (1988),
  one-sample runs test (exact distribution and normal approximation).
- Lack-of-fit F test with replicates: Draper & Smith (1998), ch. 2.1.
- Leverage-corrected (externally studentised) residuals: D. A. Belsley, E. Kuh,
  R. E. Welsch, *Regression Diagnostics* (1980), ch. 2.
- Spearman rank correlation with the Student-t approximation of its null distribution:
  M. G. Kendall, J. D. Gibbons, *Rank Correlation Methods*, 5th ed. (1990), ch. 4.
"""

from __future__ import annotations

import collections
import math

import numpy as np
from scipy import special

from .fit import (_counts, _groupsum, _segments, _spread, _york_kernel, chi2_upper,
                  segment_scope, york_state)
from .readings import Readings
from .results import Fits, Flag

__all__ = ["diagnose", "quadratic_fit", "runs_test", "CODES"]

CODES = ("curvature", "knee", "pattern", "excess-scatter", "too-good", "outlier", "drift",
         "lack-of-fit", "few-points", "weak-slope", "negative-resistance")

#: χ² of the richer model below this p-value means the stated uncertainties are too small:
#: the curvature and knee tests then estimate the scatter (F test) instead of trusting them.
CONSISTENT_P = 0.01
EXCESS_P = 0.001
TOO_GOOD_P = 0.999
WEAK_SLOPE = 0.5
#: DUTs whose screening p-value (orthogonal distances) is below this get the York refit.
KNEE_SCREEN_P = 0.5

_NAN = math.nan


# ----------------------------------------------------------------------------- quadratic
def quadratic_fit(x, y, w=None, *, group=None, m=None):
    """Weighted least-squares quadratic y = a + b·x + c·x² for one or many groups.

    Solved with orthogonal polynomials on a centred and scaled abscissa, so an
    ill-conditioned design (NIST StRD *Pontius*) keeps its digits.

    Parameters
    ----------
    x, y : array_like
        Abscissa and ordinate.
    w : array_like, optional
        Weights 1/σ² (default 1).
    group : array_like of int, optional
        Group index of each point (default: one group).
    m : int, optional
        Number of groups (default: largest index + 1).

    Returns
    -------
    dict of ndarray (one element per group)
        ``a``, ``b``, ``c``; ``var_c`` (a priori, 1/Σw·p₂²); ``chi2_line`` and
        ``chi2_quad`` (weighted residual sums of the line and the quadratic);
        ``delta`` (their difference, the extra sum of squares of c); ``n``.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    w = np.ones_like(x) if w is None else np.broadcast_to(np.asarray(w, float), x.shape)
    g = np.zeros(x.size, np.int64) if group is None else np.asarray(group, np.int64)
    if m is None:
        m = int(g.max()) + 1 if g.size else 0
    n = _counts(g, m)
    sw = _groupsum(g, w, m)
    with np.errstate(divide="ignore", invalid="ignore"):
        xbar = _groupsum(g, w * x, m) / sw
        dx = x - _spread(g, xbar)
        h = np.sqrt(_groupsum(g, w * dx * dx, m) / sw)
        t = dx / _spread(g, h)
        ybar = _groupsum(g, w * y, m) / sw
        dy = y - _spread(g, ybar)
        wt = w * t
        wt2 = wt * t
        s2 = _groupsum(g, wt2, m)
        s3 = _groupsum(g, wt2 * t, m)
        A = s3 / s2
        B = s2 / sw
        p2 = t * t - _spread(g, A) * t - _spread(g, B)
        s22 = _groupsum(g, w * p2 * p2, m)
        g1 = _groupsum(g, wt * dy, m) / s2
        g2 = _groupsum(g, w * p2 * dy, m) / s22
        line_res = dy - _spread(g, g1) * t
        chi2_line = _groupsum(g, w * line_res * line_res, m)
        delta = g2 * g2 * s22
        quad_res = line_res - _spread(g, g2) * p2
        chi2_quad = _groupsum(g, w * quad_res * quad_res, m)
        # back to powers of x: y = ybar + (g1 − A·g2)·t + g2·(t² − B)
        c = g2 / h ** 2
        b = (g1 - A * g2) / h - 2.0 * xbar * c
        a = ybar - B * g2 - (g1 - A * g2) * xbar / h + c * xbar ** 2
        var_c = 1.0 / s22 / h ** 4
    return {"a": a, "b": b, "c": c, "var_c": var_c, "chi2_line": chi2_line,
            "chi2_quad": chi2_quad, "delta": delta, "n": n}


# ----------------------------------------------------------------------------- runs test
def _log_comb(n, k):
    return special.gammaln(n + 1.0) - special.gammaln(k + 1.0) - special.gammaln(n - k + 1.0)


def runs_test(runs, n1, n2, *, exact_max: int = 60):
    """Wald–Wolfowitz runs test, lower tail (too few runs), vectorised.

    Parameters
    ----------
    runs, n1, n2 : array_like of int
        Observed number of runs and the counts of the two kinds of sign.
    exact_max : int
        Use the exact distribution when n1 + n2 ≤ exact_max, else the normal
        approximation with continuity correction.

    Returns
    -------
    mean, var, z, p : ndarray
        E[R] = 1 + 2·n1·n2/n, Var[R] = 2·n1·n2·(2·n1·n2 − n)/(n²·(n − 1)),
        z = (R − E[R])/√Var[R], and p = P(R ≤ runs) (NaN when n1 or n2 is 0).

    Notes
    -----
    Exact null distribution (Siegel & Castellan 1988): with N = C(n, n1),
    P(R = 2s) = 2·C(n1−1, s−1)·C(n2−1, s−1)/N and
    P(R = 2s+1) = [C(n1−1, s−1)·C(n2−1, s) + C(n1−1, s)·C(n2−1, s−1)]/N.
    """
    r = np.asarray(runs, float)
    n1 = np.asarray(n1, float)
    n2 = np.asarray(n2, float)
    r, n1, n2 = np.broadcast_arrays(r, n1, n2)
    n = n1 + n2
    valid = (n1 > 0) & (n2 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = 1.0 + 2.0 * n1 * n2 / n
        var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * (n - 1.0))
        z = (r - mean) / np.sqrt(var)
        p_norm = special.ndtr((r + 0.5 - mean) / np.sqrt(var))
    p = np.where(valid, p_norm, _NAN)
    ex = valid & (n <= exact_max)
    if ex.any():
        # the exact p depends only on three small integers: evaluate each triple once
        base = float(np.max(n[ex])) + 1.0
        code = (r[ex] * base + n1[ex]) * base + n2[ex]
        uniq, inv = np.unique(code, return_inverse=True)
        rr = np.floor(uniq / base ** 2)
        a = np.floor(uniq / base) - rr * base
        b = uniq - (rr * base + a) * base
        logN = _log_comb(a + b, a)
        acc = np.zeros(rr.shape)
        smax = int(np.max(rr)) // 2 + 1
        for s in range(1, smax + 1):  # loop over run counts, vectorised over DUTs
            with np.errstate(invalid="ignore", over="ignore"):
                even = np.log(2.0) + _log_comb(a - 1, s - 1) + _log_comb(b - 1, s - 1) - logN
                odd1 = _log_comb(a - 1, s - 1) + _log_comb(b - 1, s) - logN
                odd2 = _log_comb(a - 1, s) + _log_comb(b - 1, s - 1) - logN
            pe = np.where((s - 1 <= a - 1) & (s - 1 <= b - 1), np.exp(even), 0.0)
            po = (np.where((s - 1 <= a - 1) & (s <= b - 1), np.exp(odd1), 0.0)
                  + np.where((s <= a - 1) & (s - 1 <= b - 1), np.exp(odd2), 0.0))
            acc += np.where(2 * s <= rr, pe, 0.0) + np.where(2 * s + 1 <= rr, po, 0.0)
        p_ex = np.minimum(acc, 1.0)[np.ravel(inv)]
        p = p.copy()
        p[ex] = p_ex
    return mean, var, z, p


def _runs_min_p(n):
    """Smallest attainable lower-tail runs p-value with n readings (balanced signs)."""
    n = np.asarray(n, float)
    n1 = np.floor(n / 2)
    return np.exp(np.log(2.0) - _log_comb(n, n1))


# ----------------------------------------------------------------------------- helpers
def _take(v, rows):
    """``v[rows]`` for a block of :func:`_dense_blocks`: a reshaped view, no gather, when
    the block holds every row (all DUTs with the same reading count: the rows are then
    0 … N−1 in order, since each DUT's rows are contiguous)."""
    if rows.size == v.shape[0]:
        return v.reshape(rows.shape)
    return v[rows]


def _dense_blocks(n, eligible, minimum):
    """Yield (duts, rows) blocks: the DUTs with the same reading count, rows as a 2-D index."""
    starts = np.concatenate(([0], np.cumsum(n)[:-1]))
    sel = eligible & (n >= minimum)
    for size in np.unique(n[sel]):
        duts = np.flatnonzero(sel & (n == size))
        rows = starts[duts][:, None] + np.arange(int(size))[None, :]
        yield duts, rows


def _tls(sx, sy, sxx, sxy, syy, cnt, direction=True):
    """Orthogonal regression from sums: (smallest eigenvalue, mean x, mean y, and the
    principal direction as an unnormalised eigenvector (vx, vy) with its squared norm).

    The eigenvector of the larger eigenvalue λ of [[cxx, cxy], [cxy, cyy]] is
    (λ − cyy, cxy) or, equivalently, (cxy, λ − cxx); each DUT takes the longer of the two
    (the better conditioned). Callers use only direction-invariant quantities (where two
    lines meet, a slope vy/vx), so no normalisation or trigonometry is needed. A point
    cloud without a direction (all points at one spot) gives the zero vector.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        mx, my = sx / cnt, sy / cnt
        cxx = sxx - sx * mx
        cyy = syy - sy * my
        cxy = sxy - sx * my
        half = 0.5 * (cxx + cyy)
        rad = np.sqrt((0.5 * (cxx - cyy)) ** 2 + cxy ** 2)
        lam = np.maximum(half - rad, 0.0)
        if not direction:
            return lam, mx, my, None, None, None
        big = half + rad
        a1, a2 = big - cyy, big - cxx
        first = np.abs(a1) >= np.abs(a2)
        vx = np.where(first, a1, cxy)
        vy = np.where(first, cxy, a2)
    return lam, mx, my, vx, vy, vx * vx + vy * vy


class _Rows:
    """Per-reading quantities of the fitted DUTs, shared by the checks."""

    def __init__(self, readings: Readings, fits: Fits):
        m = len(fits)
        self.m = m
        ok = fits.ok
        self.g = readings.group
        self.n = _counts(self.g, m)
        self.ok = ok & (self.n == fits.n)
        stated = self.ok & (fits.method != "ols")
        self.stated = stated
        self.ols = self.ok & ~stated
        g = self.g
        st = _spread(g, stated)
        self.x = readings.current
        self.y = readings.voltage
        self.sxx = np.where(st, readings.u_current ** 2, 0.0)
        self.syy = np.where(st, readings.u_voltage ** 2, 1.0)
        self.sxy = np.where(st, readings.cov_iv, 0.0)
        b = -np.where(self.ok, fits.rth, 0.0)
        a = np.where(self.ok, fits.vth, 0.0)
        self.b, self.a = b, a
        bb = _spread(g, b)
        ok_g = _spread(g, self.ok)
        with np.errstate(divide="ignore", invalid="ignore"):
            self.w = np.where(ok_g, 1.0 / (self.syy + bb * bb * self.sxx
                                           - 2.0 * bb * self.sxy), 0.0)
        self.w = np.where(np.isfinite(self.w), self.w, 0.0)
        self.res = np.where(ok_g, self.y - _spread(g, a) - bb * self.x, 0.0)
        self.z = self.res * np.sqrt(self.w)
        self.chi2 = np.where(self.ok, fits.chi2, _NAN)
        self.line = readings.line
        self.time = readings.time
        self.load = readings.load


# ----------------------------------------------------------------------------- checks
def _curvature(R: _Rows, level):
    m, g = R.m, R.g
    q = quadratic_fit(R.x, R.res, R.w, group=g, m=m) if g.size else None
    out = {k: np.full(m, _NAN) for k in ("c", "u_c", "statistic", "p_value")}
    test = np.full(m, None, dtype=object)
    run = R.ok & (np.where(R.stated, R.n >= 4, R.n >= 5))
    if q is None or not run.any():
        return out, test, run
    nu = (R.n - 3).astype(float)
    delta = q["delta"]
    chi2q = np.maximum(R.chi2 - delta, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        p_q = _on(R.stated & run, chi2_upper, np.maximum(nu, 1), chi2q)
        known = R.stated & (p_q >= CONSISTENT_P)
        F = delta / (chi2q / np.maximum(nu, 1))
        # χ²(1) upper tail = erfc(√(x/2)); the F tail only where the scatter is estimated
        p = np.where(known, special.erfc(np.sqrt(np.maximum(delta, 0.0) / 2.0)),
                     _on(run & ~known, special.fdtrc, 1.0, np.maximum(nu, 1), F))
        scale = np.where(known, 1.0, chi2q / nu)
    stat = np.where(known, delta, F)
    out["c"] = np.where(run, q["c"], _NAN)
    with np.errstate(invalid="ignore"):
        out["u_c"] = np.where(run, np.sqrt(q["var_c"] * np.maximum(scale, 1.0 * known)), _NAN)
    out["statistic"] = np.where(run, stat, _NAN)
    out["p_value"] = np.where(run, np.minimum(p, 1.0), _NAN)
    test = _TESTS[np.where(run, np.where(known, 2, 1), 0)]
    return out, test, run


#: Up to this many readings per DUT, row reductions go column by column.
_SHORT_ROWS = 64


def _reduce_rows(ufunc, v: np.ndarray, dtype=None) -> np.ndarray:
    """``ufunc.reduce(v, axis=1)`` for many short rows (5–20 readings): one vector
    operation per column, several times faster than numpy's reduction along each row.
    Rows longer than ``_SHORT_ROWS`` (one DUT with thousands of readings) take numpy's
    own reduction: a Python step per column would cost seconds there."""
    if v.shape[1] > _SHORT_ROWS:
        return ufunc.reduce(v.astype(dtype or v.dtype, copy=False), axis=1)
    out = v[:, 0].astype(dtype or v.dtype)  # a copy
    for j in range(1, v.shape[1]):
        ufunc(out, v[:, j], out=out)
    return out


def _cumsum_rows(v: np.ndarray) -> np.ndarray:
    """``np.cumsum(v, axis=1)`` for many short rows: one vector add per column is several
    times faster than numpy's per-row loop when rows hold only 5–20 readings (longer rows:
    ``np.cumsum``, see ``_reduce_rows``)."""
    if v.shape[1] > _SHORT_ROWS:
        return np.cumsum(v, axis=1)
    out = np.empty_like(v)
    out[:, 0] = v[:, 0]
    for j in range(1, v.shape[1]):
        np.add(out[:, j - 1], v[:, j], out=out[:, j])
    return out


def _knee(R: _Rows, level):
    """Broken line: search the split on orthogonal distances, refit it with York weights."""
    m, g = R.m, R.g
    out = {k: np.full(m, _NAN) for k in ("statistic", "p_value", "current", "voltage",
                                          "splits", "n_below", "split_angle")}
    test = np.full(m, None, dtype=object)
    eligible = R.ok & np.where(R.stated, R.n >= 5, R.n >= 6)
    if not eligible.any():
        return out, test, eligible
    # per-DUT scales: typical uncertainties (a floor keeps near-vertical segments finite)
    cnt = np.maximum(R.n, 1)
    width = _segments(g, m).width
    if width > 1:  # every DUT has the same count: column by column, no segment loop
        x2, y2 = R.x.reshape(m, width), R.y.reshape(m, width)
        xmin, xmax = _reduce_rows(np.minimum, x2), _reduce_rows(np.maximum, x2)
        ymin, ymax = _reduce_rows(np.minimum, y2), _reduce_rows(np.maximum, y2)
    else:
        xmin, xmax = np.full(m, np.inf), np.full(m, -np.inf)
        ymin, ymax = np.full(m, np.inf), np.full(m, -np.inf)
        starts = np.concatenate(([0], np.cumsum(R.n)[:-1]))
        ne = R.n > 0
        if ne.any():
            xmin[ne] = np.minimum.reduceat(R.x, starts[ne])
            xmax[ne] = np.maximum.reduceat(R.x, starts[ne])
            ymin[ne] = np.minimum.reduceat(R.y, starts[ne])
            ymax[ne] = np.maximum.reduceat(R.y, starts[ne])
    rx = np.where(xmax > xmin, xmax - xmin, 1.0)
    ry = np.where(ymax > ymin, ymax - ymin, 1.0)
    sy = np.where(R.stated, np.sqrt(_groupsum(g, R.syy, m) / cnt), 1.0)
    sy = np.where(sy > 0, sy, 1e-12 * ry)
    floor = 1e-6 * rx * sy / ry
    sx = np.sqrt(np.maximum(_groupsum(g, R.sxx, m) / cnt, floor ** 2))
    sxx_k = np.maximum(R.sxx, _spread(g, floor) ** 2)

    split_row = np.zeros(g.size, np.int8)
    tested = np.zeros(m, bool)
    lam_line = np.full(m, _NAN)
    lam_br = np.full(m, _NAN)
    b0 = np.zeros((m, 2))
    for duts, rows in _dense_blocks(R.n, eligible, 5):
        size = rows.shape[1]
        xr, yr = _take(R.x, rows), _take(R.y, rows)
        xm = (_reduce_rows(np.add, xr) / size)[:, None]
        ym = (_reduce_rows(np.add, yr) / size)[:, None]
        X = (xr - xm) / sx[duts, None]
        Y = (yr - ym) / sy[duts, None]
        # order along the source curve: by the angle atan2(|I|, |V|), i.e. by load
        # conductance, which is monotone through a current-limited (vertical) segment as
        # well; the magnitudes make the order the same whichever way the leads are
        # connected (with V < 0 the open circuit got +π and sorted last)
        key = np.arctan2(np.abs(xr), np.abs(yr))
        order = np.argsort(key, axis=1, kind="stable")
        X = np.take_along_axis(X, order, 1)
        Y = np.take_along_axis(Y, order, 1)
        key = np.take_along_axis(key, order, 1)
        c = [_cumsum_rows(v) for v in (X, Y, X * X, X * Y, Y * Y)]
        tot = [v[:, -1:] for v in c]
        j = np.arange(2, size - 1)  # size of the first segment
        n1 = j[None, :].astype(float)
        s1 = [v[:, j - 1] for v in c]
        s2 = [t - v for t, v in zip(tot, s1)]
        lam1, mx1, my1, d1x, d1y, q1 = _tls(*s1, n1)
        lam2, mx2, my2, d2x, d2y, q2 = _tls(*s2, size - n1)
        lamL = _tls(*[t[:, 0] for t in tot], float(size), direction=False)[0]
        # where the two segment lines meet, along the curve (independent of the lengths
        # and signs of the direction vectors)
        cr = d1x * d2y - d1y * d2x
        with np.errstate(divide="ignore", invalid="ignore"):  # parallel or pointlike: NaN
            s = ((mx2 - mx1) * d2y - (my2 - my1) * d2x) / cr
            kx = mx1 + s * d1x
            ky = my1 + s * d1y
            xk = xm + kx * sx[duts, None]
            yk = ym + ky * sy[duts, None]
            kkey = np.arctan2(np.abs(xk), np.abs(yk))
        lo = key[:, j - 2]
        hi = key[:, np.minimum(j + 1, size - 1)]
        # |sin| of the angle between the segments above 1e-12 (squared, with the norms)
        valid = (cr * cr > 1e-24 * q1 * q2) & (kkey >= lo) & (kkey <= hi) & np.isfinite(kkey)
        total = np.where(valid, lam1 + lam2, np.inf)
        best = np.argmin(total, axis=1)
        ar = np.arange(duts.size)
        has = np.isfinite(total[ar, best])
        jb = j[best]
        tested[duts] = True
        lam_line[duts] = lamL
        lam_br[duts] = np.where(has, total[ar, best], _NAN)
        out["splits"][duts] = float(size - 3)
        out["n_below"][duts] = np.where(has, jb, _NAN)
        out["current"][duts] = np.where(has, xk[ar, best], _NAN)
        out["voltage"][duts] = np.where(has, yk[ar, best], _NAN)
        out["split_angle"][duts] = np.where(
            has, 0.5 * (key[ar, jb - 1] + key[ar, np.minimum(jb, size - 1)]), _NAN)
        # segment membership of each row (in the original row order)
        seg_sorted = (np.arange(size)[None, :] >= jb[:, None]).astype(np.int8)
        seg = np.empty_like(seg_sorted)
        np.put_along_axis(seg, order, seg_sorted, 1)
        split_row[rows[has]] = seg[has]
        ratio = sy[duts] / sx[duts]
        for k, (dx, dy) in enumerate(((d1x, d1y), (d2x, d2y))):
            cb, sb = dx[ar, best], dy[ar, best]
            # the direction with angle in (−π/2, π/2]: cos ≥ 0 (and sin > 0 when vertical)
            flip = (cb < 0) | ((cb == 0) & (sb < 0))
            cb, sb = np.where(flip, -cb, cb), np.where(flip, -sb, sb)
            with np.errstate(divide="ignore", invalid="ignore"):
                slope = np.where(cb * cb > 1e-24 * (cb * cb + sb * sb), sb / cb,
                                 np.sign(sb) * 1e12)
            b0[duts, k] = slope * ratio
        tested[duts] &= has
    # The orthogonal-distance sums of the search are in units of each DUT's typical
    # uncertainty; they decide which DUTs deserve the exact refit.
    K = out["splits"]
    stat, p, known = _knee_p(lam_line - lam_br, lam_br, R.n, R.stated, K, tested)
    source = _SOURCES[tested.astype(np.intp)]
    refine = tested & (p < KNEE_SCREEN_P)
    # York refit of the chosen split: each segment with its own slope in the weights
    rows = _spread(g, refine)
    if rows.any():
        gv = (2 * g[rows] + split_row[rows]).astype(np.int64)
        mv = 2 * m
        x, y = R.x[rows], R.y[rows]
        sxx, syy, sxy = sxx_k[rows], R.syy[rows], R.sxy[rows]
        b, _, conv = _york_kernel(gv, x, y, sxx, syy, sxy, mv, b0.reshape(-1))
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            seg_chi2 = york_state(gv, x, y, sxx, syy, sxy, mv, b)["chi2"].reshape(m, 2)
            chi = _reduce_rows(np.add, seg_chi2)
            delta_y = R.chi2 - chi
        # keep the search's metric where York did not settle on a better fit than the line
        good = (refine & _reduce_rows(np.logical_and, conv.reshape(m, 2)) & np.isfinite(chi)
                & (delta_y > -1e-9 * np.abs(R.chi2)))
        if good.any():
            st_y, p_y, kn_y = _knee_p(np.maximum(delta_y, 0.0), chi, R.n, R.stated, K, good)
            stat = np.where(good, st_y, stat)
            p = np.where(good, p_y, p)
            known = np.where(good, kn_y, known)
            source[good] = "york"
    run = eligible
    out["statistic"] = np.where(tested, stat, _NAN)
    out["p_value"] = np.where(tested, p, np.where(eligible, 1.0, _NAN))
    test = _TESTS[np.where(tested, np.where(known, 2, 1), 0)]
    out["weights"] = source
    return out, test, run


def _on(mask, fn, *args):
    """``fn(*args)`` evaluated only where ``mask`` is true (NaN elsewhere)."""
    out = np.full(mask.shape, _NAN)
    if mask.any():
        out[mask] = fn(*(np.broadcast_to(a, mask.shape)[mask] for a in args))
    return out


def _knee_p(delta, chi_br, n, stated, splits, mask=None):
    """p-value of the two-segment model, Bonferroni-corrected for the breakpoint search."""
    nu = np.maximum(n - 4, 1).astype(float)
    mask = np.isfinite(delta) if mask is None else mask
    # the two-segment model contains the line, so Δχ² < 0 is round-off (exact data)
    delta = np.maximum(delta, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        p_br = _on(mask & stated, chi2_upper, nu, chi_br)
        known = stated & (p_br >= CONSISTENT_P)
        F = (delta / 2.0) / (chi_br / nu)
        # χ²(2) upper tail = exp(−x/2); the F tail only where the scatter is estimated
        p1 = np.where(known, np.exp(-0.5 * delta), _on(mask & ~known, special.fdtrc, 2.0, nu, F))
        p = np.minimum(1.0, p1 * splits)
    return np.where(known, delta, F), p, known


def _pattern(R: _Rows, level):
    m = R.m
    out = {k: np.full(m, _NAN) for k in ("runs", "n_positive", "n_negative", "expected",
                                          "z", "p_value")}
    run = np.zeros(m, bool)
    for duts, rows in _dense_blocks(R.n, R.ok, 3):
        order = np.argsort(_take(R.x, rows), axis=1, kind="stable")
        s = np.take_along_axis(_take(R.res, rows), order, 1) >= 0
        runs = 1 + _reduce_rows(np.add, s[:, 1:] != s[:, :-1], np.int64)
        npos = _reduce_rows(np.add, s, np.int64)
        nneg = rows.shape[1] - npos
        mean, _, z, p = runs_test(runs, npos, nneg)
        out["runs"][duts] = runs
        out["n_positive"][duts] = npos
        out["n_negative"][duts] = nneg
        out["expected"][duts] = mean
        out["z"][duts] = z
        out["p_value"][duts] = p
        run[duts] = True
    return out, run


def _drift(R: _Rows, level, has_time):
    m = R.m
    out = {k: np.full(m, _NAN) for k in ("rho", "p_value")}
    basis = np.full(m, None, dtype=object)
    run = np.zeros(m, bool)
    for duts, rows in _dense_blocks(R.n, R.ok, 5):
        size = rows.shape[1]
        t = _take(R.time, rows)
        timed = (_reduce_rows(np.logical_and, np.isfinite(t)) if has_time
                 else np.zeros(duts.size, bool))
        t = np.where(timed[:, None], t, np.arange(size)[None, :])
        rt = _ranks(t)
        rr = _ranks(_take(R.res, rows))
        d = (rt - rr).astype(float)
        rho = 1.0 - 6.0 * _reduce_rows(np.add, d * d) / (size * (size * size - 1.0))
        with np.errstate(divide="ignore", invalid="ignore"):
            tt = rho * np.sqrt((size - 2.0) / np.maximum(1.0 - rho * rho, 1e-300))
        p = 2.0 * special.stdtr(size - 2.0, -np.abs(tt))
        out["rho"][duts] = rho
        out["p_value"][duts] = np.minimum(p, 1.0)
        basis[duts] = _BASES[timed.astype(np.intp)]
        run[duts] = True
    return out, basis, run


def _ranks(v: np.ndarray) -> np.ndarray:
    """Ranks 0…size−1 along each row (ties in order of appearance): the inverse of the
    sorting permutation; rows already in increasing order (readings in time order) skip
    the sort."""
    size = v.shape[1]
    ar = np.broadcast_to(np.arange(size), v.shape)
    ranks = np.array(ar)
    unsorted = ~_reduce_rows(np.logical_and, v[:, 1:] > v[:, :-1])
    if unsorted.any():
        order = np.argsort(v[unsorted], axis=1, kind="stable")
        sub = np.empty_like(order)
        np.put_along_axis(sub, order, ar[: order.shape[0]], 1)
        ranks[unsorted] = sub
    return ranks


def _lack_of_fit(R: _Rows):
    m = R.m
    out = {k: np.full(m, _NAN) for k in ("F", "p_value", "levels", "df_lof", "df_pe")}
    if not (np.isfinite(R.load) | np.isinf(R.load)).all() or R.g.size == 0:
        return out
    cell = np.zeros(R.g.size, np.int64)
    levels = np.zeros(m)
    offset = 0
    for duts, rows in _dense_blocks(R.n, R.ok, 4):
        size = rows.shape[1]
        ld = _take(R.load, rows)
        order = np.argsort(ld, axis=1, kind="stable")
        ls = np.take_along_axis(ld, order, 1)
        hi_, lo_ = ls[:, 1:], ls[:, :-1]  # sorted: hi_ ≥ lo_
        with np.errstate(invalid="ignore"):  # inf − inf: two open circuits, one level
            close = np.abs(hi_ - lo_) <= 1e-9 * np.abs(lo_)  # np.isclose(rtol=1e-9, atol=0)
        new = np.concatenate([np.ones((duts.size, 1), bool), ~close & (hi_ != lo_)], axis=1)
        cid_sorted = _cumsum_rows(new.astype(np.int64)) - 1
        cid = np.empty_like(cid_sorted)
        np.put_along_axis(cid, order, cid_sorted, 1)
        levels[duts] = _reduce_rows(np.add, new, np.int64)
        cell[rows] = offset + np.arange(duts.size)[:, None] * size + cid
        offset += duts.size * size
    if offset == 0:
        return out
    out["levels"] = np.where(R.ok & (levels > 0), levels, _NAN)
    if not (R.ok & (levels > 2) & (R.n > levels)).any():
        return out  # no DUT repeats a load: no pure-error estimate, nothing to test
    w, r = R.w, R.res
    inb = _spread(R.g, levels) > 0
    c = cell[inb]
    sw = np.bincount(c, weights=w[inb], minlength=offset)
    with np.errstate(divide="ignore", invalid="ignore"):
        rbar = np.bincount(c, weights=(w * r)[inb], minlength=offset) / sw
    dev = r[inb] - rbar[c]
    ss_pe = _groupsum(R.g[inb], w[inb] * dev * dev, m)
    df_pe = R.n - levels
    df_lof = levels - 2
    run = R.ok & (levels > 2) & (df_pe > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ss_lof = np.maximum(R.chi2 - ss_pe, 0.0)
        F = (ss_lof / df_lof) / (ss_pe / df_pe)
        p = special.fdtrc(np.maximum(df_lof, 1), np.maximum(df_pe, 1), F)
    out["F"] = np.where(run, F, _NAN)
    out["p_value"] = np.where(run, p, _NAN)
    out["df_lof"] = np.where(run, df_lof, _NAN)
    out["df_pe"] = np.where(run, df_pe, _NAN)
    return out


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


def _outliers(R: _Rows, level: float = 0.01):
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
    tmax = np.full(m, _NAN)
    limit = outlier_limits(R.n, R.stated, level)
    nflag = _groupsum(g, at > _spread(g, limit), m)
    ne = R.n > 0
    if ne.any():
        tmax[ne] = np.maximum.reduceat(at, starts[ne])
    tmax = np.where(run_dut, tmax, _NAN)
    return ({"max_abs_t": tmax, "count": np.where(run_dut, nflag, _NAN),
             "limit": np.where(run_dut, limit, _NAN)}, t, run_dut)


# ----------------------------------------------------------------------------- messages
def _fmt(x, unit):
    from .formatting import format_value

    return format_value(float(x), unit, 4)


@segment_scope
def diagnose(readings: Readings, fits: Fits, *, level: float = 0.01) -> Fits:
    """Run every check on every fitted DUT; return ``fits`` with diagnostics and flags.

    Parameters
    ----------
    readings : Readings
        The readings the fit used (same rows).
    fits : Fits
        From :func:`sagfit.fit.fit_lines`.
    level : float
        Significance level of the curvature, knee, pattern, drift, lack-of-fit and
        negative-resistance tests (default 0.01).

    Returns
    -------
    Fits
        A new ``Fits`` whose ``diagnostics`` hold each check's statistic and p-value per
        DUT and whose ``flags`` gain the findings (codes in :data:`CODES`).
    """
    if not (0.0 < level < 0.5):
        from .errors import InputError

        raise InputError(f"level must be between 0 and 0.5 (got {level!r})")
    R = _Rows(readings, fits)
    m = R.m
    curv, curv_test, curv_run = _curvature(R, level)
    knee, knee_test, knee_run = _knee(R, level)
    patt, patt_run = _pattern(R, level)
    patt_run = patt_run & (_runs_min_p(R.n) <= level)
    drift, drift_basis, drift_run = _drift(R, level, readings.has_time)
    lof = _lack_of_fit(R)
    outl, t_row, outl_run = _outliers(R, level)

    p_fit = np.where(R.stated, fits.p_value, _NAN)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.abs(fits.u_rth / fits.rth)
        # the sign a passive source's Rth has in the readings' own polarity: positive when
        # V and I were read the same way round, negative when one of them was reversed
        i_mean = _groupsum(R.g, R.x, m) / np.maximum(R.n, 1)
        polarity = np.where(np.sign(fits.vth) * np.sign(i_mean) < 0, -1.0, 1.0)
        zr = polarity * fits.rth / fits.u_rth
        p_neg = special.ndtr(zr)
        if R.ols.any():  # Student t only for the Type A fits
            p_neg[R.ols] = special.stdtr(np.maximum(fits.dof[R.ols], 1).astype(float),
                                         zr[R.ols])
    p_neg = np.where(R.ok, p_neg, _NAN)
    rel = np.where(R.ok, rel, _NAN)

    f_curv = curv_run & (curv["p_value"] < level)
    f_knee = knee_run & (knee["p_value"] < level)
    f_patt = patt_run & (patt["p_value"] < level)
    f_drift = drift_run & (drift["p_value"] < level)
    f_lof = np.isfinite(lof["p_value"]) & (lof["p_value"] < level)
    f_exc = R.stated & (fits.dof > 0) & (p_fit < EXCESS_P)
    f_good = R.stated & (fits.dof > 0) & (p_fit > TOO_GOOD_P)
    f_out = outl_run & (outl["max_abs_t"] > outl["limit"])
    f_weak = R.ok & (rel > WEAK_SLOPE)
    f_neg = R.ok & (p_neg < level)
    skipped = R.ok & ~(curv_run & knee_run & patt_run & drift_run)

    diagnostics = dict(fits.diagnostics)
    diagnostics.update({
        "curvature": {**curv, "test": curv_test, "level": _level_col(curv_run, level)},
        "knee": {**knee, "test": knee_test, "level": _level_col(knee_run, level)},
        "pattern": {**patt, "level": _level_col(patt_run, level)},
        "drift": {**drift, "basis": drift_basis, "level": _level_col(drift_run, level)},
        "lack_of_fit": lof,
        "scatter": {"chi2": np.where(R.stated, fits.chi2, _NAN),
                    "dof": np.where(R.stated, fits.dof, _NAN).astype(float),
                    "p_value": p_fit},
        "outlier": outl,
        "slope": {"relative_u_rth": rel, "p_negative": p_neg},
    })
    flags: dict[int, list[Flag]] = collections.defaultdict(list)
    sev = "warning"
    for k in np.flatnonzero(f_curv):
        c = curv["c"][k]
        if c < 0:
            how = ("the voltage drops faster than a straight line at high current: current-"
                   "limit onset, cell polarisation, heating of the source or of the wiring")
        else:
            how = ("the voltage sags less than a straight line at high current (the curve "
                   "flattens): a regulation loop taking hold, or an offset in the current "
                   "reading")
        flags[k].append(Flag("curvature", sev,
                             f"the readings bend ({how}); quadratic term "
                             f"c = {c:.3g} V/A², p {_p(curv['p_value'][k])} "
                             f"({curv_test[k]} test). The straight-line equivalent holds only "
                             "approximately; fit a narrower current range (--current-range) "
                             "or check the connections and let the source cool"))
    for k in np.flatnonzero(f_knee):
        ik, vk = knee["current"][k], knee["voltage"][k]
        flags[k].append(Flag("knee", sev,
                             f"the curve has a knee near I = {_fmt(ik, 'A')}, V = {_fmt(vk, 'V')}"
                             f" (two-segment fit better than one line, p "
                             f"{_p(knee['p_value'][k])} after the breakpoint search): typically "
                             "a supply crossing into current limit, a regulator dropping out or "
                             "foldback protection. Refit the linear part with --below-knee or "
                             "restrict it with --current-range"))
    for k in np.flatnonzero(f_patt):
        flags[k].append(Flag("pattern", sev,
                             f"the residuals ordered by current form too few runs "
                             f"({int(patt['runs'][k])} runs, {patt['expected'][k]:.3g} expected; "
                             f"p {_p(patt['p_value'][k])}): a systematic departure from the "
                             "line (curvature, a knee or a changing source); look at the "
                             "residual plot before trusting the equivalent"))
    for k in np.flatnonzero(f_exc):
        flags[k].append(Flag("excess-scatter", sev,
                             f"the scatter is far larger than the stated uncertainties "
                             f"(χ² = {fits.chi2[k]:.3g} on {fits.dof[k]} degrees of freedom, "
                             f"p {_p(p_fit[k])}): the meter accuracy or resistor tolerance is "
                             "understated, or the source was unstable (temperature, state of "
                             "charge, a loose contact); the uncertainty was enlarged by the "
                             "scale factor" + (
                                 "; here a non-linearity (see the knee/curvature findings) "
                                 "explains much of it" if f_knee[k] or f_curv[k] else "")))
    for k in np.flatnonzero(f_good):
        flags[k].append(Flag("too-good", "info",
                             f"the readings agree with the line far better than the stated "
                             f"uncertainties suggest (χ² = {fits.chi2[k]:.3g} on {fits.dof[k]} "
                             f"degrees of freedom, p {_p(p_fit[k])}): the stated uncertainties "
                             "are probably overstated (a spec used for a meter that does much "
                             "better, or correlated errors); the intervals are then wider than "
                             "they need to be"))
    if f_out.any():
        g = R.g
        row_limit = outl["limit"][g]
        bad_rows = np.flatnonzero(f_out[g] & (np.abs(t_row) > row_limit))
        starts = np.concatenate(([0], np.cumsum(R.n)[:-1]))
        for k in np.flatnonzero(f_out):
            rows = bad_rows[g[bad_rows] == k] if bad_rows.size < 10000 else \
                np.flatnonzero(np.abs(t_row[starts[k]:starts[k] + R.n[k]]) > outl["limit"][k]) \
                + starts[k]
            where = ", ".join(_where(R.line, r, starts[k]) for r in rows[:5])
            worst = rows[np.argmax(np.abs(t_row[rows]))]
            flags[k].append(Flag("outlier", sev,
                                 f"{where}: the reading lies {abs(t_row[worst]):.2g} standard "
                                 "deviations off the line (leverage-corrected): a mis-typed "
                                 "value, a wrong load, a loose contact or a reading taken "
                                 "before the source settled; check it, repeat it, or refit "
                                 "with --robust"))
    for k in np.flatnonzero(f_drift):
        what = drift_basis[k]
        flags[k].append(Flag("drift", sev,
                             f"the residuals trend with {what} (Spearman ρ = "
                             f"{drift['rho'][k]:.2f}, p {_p(drift['p_value'][k])}): the "
                             "source changed during the sweep (polarisation recovery, thermal "
                             "drift, a discharging cell). Rest the source, take readings in a "
                             "shuffled load order, or shorten the sweep"
                             + (" (with readings in load order, drift and curvature look "
                                "alike)" if what == "reading order" else "")))
    for k in np.flatnonzero(f_lof):
        flags[k].append(Flag("lack-of-fit", sev,
                             f"the repeated loads disagree with the line more than with each "
                             f"other (lack-of-fit F = {lof['F'][k]:.3g}, p "
                             f"{_p(lof['p_value'][k])}): the source is not linear over this "
                             "range; see the curvature and knee checks"))
    for k in np.flatnonzero(f_weak):
        flags[k].append(Flag("weak-slope", sev,
                             f"the internal resistance is poorly determined (u(Rth)/|Rth| = "
                             f"{rel[k] * 100:.0f} %): the current range was too narrow for "
                             "the meter resolution; load the source harder (within its "
                             "rating) or use a more precise voltmeter"))
    for k in np.flatnonzero(f_neg):
        flags[k].append(Flag("negative-resistance", sev,
                             f"the internal resistance is significantly below zero (Rth = "
                             f"{_fmt(fits.rth[k], 'Ω')}, p {_p(p_neg[k])}): swapped leads or "
                             "current sign, readings of an active (regulating or charging) "
                             "source, or a mixed-up file; check the sign convention (I is the "
                             "current delivered into the load)"))
    new = np.empty(m, dtype=object)
    new[:] = [()] * m
    # the few-points text depends only on n and on which checks were skipped: build each
    # Flag once and hand the same tuple to every DUT it applies to
    runs_mask = (curv_run.astype(np.int64) | knee_run << 1 | patt_run << 2 | drift_run << 3)
    code = np.where(skipped, R.n * 16 + runs_mask, -1)
    for c in np.unique(code[skipped]):
        nk, bits = int(c) // 16, int(c) % 16
        miss = [name for bit, name in enumerate(("curvature", "knee", "pattern (runs test)",
                                                 "drift")) if not bits >> bit & 1]
        fl = Flag("few-points", "info",
                  f"{nk} readings are too few for some checks; skipped: {', '.join(miss)}. "
                  "Take more loads (about 10 spread over the range) for a full check")
        idx = np.flatnonzero(code == c)
        new[idx] = [(fl,)] * idx.size
    for k, fl in flags.items():
        new[k] = tuple(fl) + new[k]
    settings = dict(fits.settings)
    settings["level"] = float(level)
    return fits.replace(diagnostics=diagnostics, settings=settings).add_flags(new.tolist())


# Per-DUT label columns index these: every DUT shares one str object per label (an
# np.where over strings then .astype(object) made 100,000 new strings per column).
_TESTS = np.array([None, "F", "chi2-difference"], dtype=object)
_SOURCES = np.array([None, "orthogonal"], dtype=object)
_BASES = np.array(["reading order", "time"], dtype=object)


def _level_col(run, level):
    return np.where(run, float(level), _NAN)


def _p(p):
    """'p = 0.004' or 'p < 0.001' (format_p's wording after an equals sign)."""
    from .formatting import format_p

    text = format_p(float(p))
    return text if text[0] in "<>" else "= " + text


def _where(line, row, start):
    ln = int(line[row])
    return f"line {ln}" if ln else f"reading {row - start + 1}"


def knee_rows(readings: Readings, fits: Fits) -> np.ndarray:
    """Mask of the readings below a detected knee (all readings of other DUTs).

    "Below" means before the knee along the source curve, ordered by load conductance
    I/V, so the current-limited part of a supply's curve is excluded even though its
    currents scatter around the knee current.
    """
    knee = fits.diagnostics.get("knee", {})
    flagged = fits.flag_mask(lambda fl: any(f.code == "knee" for f in fl))
    key_split = knee.get("split_angle")
    if key_split is None or not flagged.any():
        return np.ones(len(readings), bool)
    g = readings.group
    key = np.arctan2(np.abs(readings.current), np.abs(readings.voltage))
    return ~flagged[g] | (key < key_split[g])
