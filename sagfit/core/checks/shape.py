"""Shape checks: does the source bend (curvature) or break (knee) within the tested range?

- :func:`quadratic_fit`: the weighted quadratic by orthogonal polynomials, and the
  curvature check built on its extra sum of squares.
- The knee check: a continuous two-segment line searched over the splits by orthogonal
  regression, the best split refitted with York weights; :func:`knee_rows` masks the
  readings below a detected knee for the ``--below-knee`` refit.

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
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..fit import _counts, _groupsum, _segments, _spread, _york_kernel, chi2_upper, york_state
from ..readings import Readings
from ..results import Fits
from .common import NAN, TESTS, Rows, cumsum_rows, dense_blocks, reduce_rows, take, where_on

#: χ² of the richer model below this p-value means the stated uncertainties are too small:
#: the curvature and knee tests then estimate the scatter (F test) instead of trusting them.
CONSISTENT_P = 0.01
#: DUTs whose screening p-value (orthogonal distances) is below this get the York refit.
KNEE_SCREEN_P = 0.5

_SOURCES = np.array([None, "orthogonal"], dtype=object)


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



def check_curvature(R: Rows, level):
    """Quadratic term of the residuals: χ²-difference test where the stated uncertainties
    agree with the scatter, F test otherwise (n ≥ 4 stated, n ≥ 5 Type A)."""
    m, g = R.m, R.g
    q = quadratic_fit(R.x, R.res, R.w, group=g, m=m) if g.size else None
    out = {k: np.full(m, NAN) for k in ("c", "u_c", "statistic", "p_value")}
    test = np.full(m, None, dtype=object)
    run = R.ok & (np.where(R.stated, R.n >= 4, R.n >= 5))
    if q is None or not run.any():
        return out, test, run
    nu = (R.n - 3).astype(float)
    delta = q["delta"]
    chi2q = np.maximum(R.chi2 - delta, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        p_q = where_on(R.stated & run, chi2_upper, np.maximum(nu, 1), chi2q)
        known = R.stated & (p_q >= CONSISTENT_P)
        F = delta / (chi2q / np.maximum(nu, 1))
        # χ²(1) upper tail = erfc(√(x/2)); the F tail only where the scatter is estimated
        p = np.where(known, special.erfc(np.sqrt(np.maximum(delta, 0.0) / 2.0)),
                     where_on(run & ~known, special.fdtrc, 1.0, np.maximum(nu, 1), F))
        scale = np.where(known, 1.0, chi2q / nu)
    stat = np.where(known, delta, F)
    out["c"] = np.where(run, q["c"], NAN)
    with np.errstate(invalid="ignore"):
        out["u_c"] = np.where(run, np.sqrt(q["var_c"] * np.maximum(scale, 1.0 * known)), NAN)
    out["statistic"] = np.where(run, stat, NAN)
    out["p_value"] = np.where(run, np.minimum(p, 1.0), NAN)
    test = TESTS[np.where(run, np.where(known, 2, 1), 0)]
    return out, test, run



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



def check_knee(R: Rows, level):
    """Broken line: search the split on orthogonal distances, refit it with York weights."""
    m, g = R.m, R.g
    out = {k: np.full(m, NAN) for k in ("statistic", "p_value", "current", "voltage",
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
        xmin, xmax = reduce_rows(np.minimum, x2), reduce_rows(np.maximum, x2)
        ymin, ymax = reduce_rows(np.minimum, y2), reduce_rows(np.maximum, y2)
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
    lam_line = np.full(m, NAN)
    lam_br = np.full(m, NAN)
    b0 = np.zeros((m, 2))
    for duts, rows in dense_blocks(R.n, eligible, 5):
        size = rows.shape[1]
        xr, yr = take(R.x, rows), take(R.y, rows)
        xm = (reduce_rows(np.add, xr) / size)[:, None]
        ym = (reduce_rows(np.add, yr) / size)[:, None]
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
        c = [cumsum_rows(v) for v in (X, Y, X * X, X * Y, Y * Y)]
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
        lam_br[duts] = np.where(has, total[ar, best], NAN)
        out["splits"][duts] = float(size - 3)
        out["n_below"][duts] = np.where(has, jb, NAN)
        out["current"][duts] = np.where(has, xk[ar, best], NAN)
        out["voltage"][duts] = np.where(has, yk[ar, best], NAN)
        out["split_angle"][duts] = np.where(
            has, 0.5 * (key[ar, jb - 1] + key[ar, np.minimum(jb, size - 1)]), NAN)
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
            chi = reduce_rows(np.add, seg_chi2)
            delta_y = R.chi2 - chi
        # keep the search's metric where York did not settle on a better fit than the line
        good = (refine & reduce_rows(np.logical_and, conv.reshape(m, 2)) & np.isfinite(chi)
                & (delta_y > -1e-9 * np.abs(R.chi2)))
        if good.any():
            st_y, p_y, kn_y = _knee_p(np.maximum(delta_y, 0.0), chi, R.n, R.stated, K, good)
            stat = np.where(good, st_y, stat)
            p = np.where(good, p_y, p)
            known = np.where(good, kn_y, known)
            source[good] = "york"
    run = eligible
    out["statistic"] = np.where(tested, stat, NAN)
    out["p_value"] = np.where(tested, p, np.where(eligible, 1.0, NAN))
    test = TESTS[np.where(tested, np.where(known, 2, 1), 0)]
    out["weights"] = source
    return out, test, run



def _knee_p(delta, chi_br, n, stated, splits, mask=None):
    """p-value of the two-segment model, Bonferroni-corrected for the breakpoint search."""
    nu = np.maximum(n - 4, 1).astype(float)
    mask = np.isfinite(delta) if mask is None else mask
    # the two-segment model contains the line, so Δχ² < 0 is round-off (exact data)
    delta = np.maximum(delta, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        p_br = where_on(mask & stated, chi2_upper, nu, chi_br)
        known = stated & (p_br >= CONSISTENT_P)
        F = (delta / 2.0) / (chi_br / nu)
        # χ²(2) upper tail = exp(−x/2); the F tail only where the scatter is estimated
        p1 = np.where(known, np.exp(-0.5 * delta),
                      where_on(mask & ~known, special.fdtrc, 2.0, nu, F))
        p = np.minimum(1.0, p1 * splits)
    return np.where(known, delta, F), p, known



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
