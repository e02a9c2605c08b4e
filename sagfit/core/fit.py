"""Straight-line fits of V = Vth − Rth·I for many DUTs at once.

Why this module stays whole at about 700 lines (over the ~500 of the house rule): the
York kernel, its state for the error propagation, the assembly of ``Fits`` and the fit's
own flags are one path through the same per-DUT sums (the shared-error propagation is in
:mod:`sagfit.core.systematic`, the checks in :mod:`sagfit.core.checks`).

One kernel serves all three methods. With per-reading variances u²(I), u²(V) and
covariance u(I, V), it is the York et al. (2004) iteration; with u(I) = 0 the same
iteration reduces to weighted least squares after one step; with no uncertainty stated,
unit weights give ordinary least squares and the scatter sets the covariance (Type A).

All sums run over DUTs as segment sums (``_groupsum``); the York iteration updates every DUT
together and stops updating each DUT once its slope has converged.

References
----------
- D. York, N. M. Evensen, M. López Martínez, J. De Basabe Delgado, "Unified equations
  for the slope, intercept, and standard errors of the best straight line",
  Am. J. Phys. 72(3), 367–375 (2004), eqs. (13a)–(13d) in variance form.
- Weighted least squares closed form: N. R. Draper, H. Smith, *Applied Regression
  Analysis*, 3rd ed. (1998), ch. 9.
- Scale factor S = √(χ²/ν), applied only when S > 1: Particle Data Group, *Review of
  Particle Physics*, Introduction, "Averages and fits" (e.g. S. Navas et al.,
  Phys. Rev. D 110, 030001 (2024); citation details from memory).
- Delta method for Isc = Vth/Rth and Pmax = Vth²/(4·Rth): JCGM 100:2008 (GUM) 5.2.2.
"""

from __future__ import annotations

import functools
import math
import threading

import numpy as np
from scipy import special

from .errors import InputError
from .readings import Readings
from .results import ColumnRows, Fits, Flag

__all__ = ["fit_lines", "york_line", "coverage_factors"]

_MAXITER = 200


_SEGMENTS = threading.local()
_CACHED = 4  # groupings remembered per thread (the fit, a York subset, the knee refit …)
_COLUMN_SUMS = 32  # up to this many rows per group, equal-width sums go column by column


class _Segments:
    """How the rows of a sorted grouping ``g`` fall into groups: ``starts`` and ``counts``
    of each present group's rows, ``present`` (which groups have rows), ``full`` (every
    group has), ``width`` (the common row count when every group has the same, else 0).
    ``starts`` is None when ``g`` is empty or not sorted."""

    __slots__ = ("g", "m", "starts", "counts", "present", "full", "width")

    def __init__(self, g, m):
        self.g, self.m = g, m
        self.starts = self.counts = self.present = None
        self.full, self.width = False, 0
        if g.size == 0 or m == 0 or not (g[1:] >= g[:-1]).all() or g[0] < 0 or g[-1] >= m:
            return
        starts = np.concatenate(([0], np.flatnonzero(g[1:] != g[:-1]) + 1))
        counts = np.diff(starts, append=g.size)
        self.starts, self.counts, self.present = starts, counts, g[starts]
        self.full = starts.size == m
        if self.full and counts.min() == counts.max():
            self.width = int(counts[0])


def _segments(g, m) -> _Segments:
    """The segments of ``g``. Inside one call of a public function (``segment_scope``) the
    last few groupings are remembered per thread, since the York iteration sums over the
    same rows six times per step; the memory is dropped when the call returns, so an
    array the caller changes between calls is never read from a stale entry."""
    cache = getattr(_SEGMENTS, "cache", None)
    if cache is None:  # outside a scope: no memory at all
        return _Segments(g, m)
    for seg in cache:
        if seg.g is g and seg.m == m:
            return seg
    seg = _Segments(g, m)
    cache.insert(0, seg)
    del cache[_CACHED:]
    return seg


def segment_scope(fn):
    """Decorator: remember groupings for the duration of one call of ``fn`` (see
    ``_segments``); nested calls share the outer call's memory."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        if getattr(_SEGMENTS, "cache", None) is not None:
            return fn(*args, **kwargs)
        _SEGMENTS.cache = []
        try:
            return fn(*args, **kwargs)
        finally:
            _SEGMENTS.cache = None
    return wrapper


def _groupsum(g, w, m):
    """Σ w per group. Rows of one DUT are contiguous (``g`` sorted), so the sums are
    segment sums: ``np.add.reduceat`` releases the GIL, which lets the two threads of a
    large batch run in parallel (``np.bincount`` holds it); where every group has the same
    number of rows, column sums of the (groups × rows) matrix, twice as fast again. An
    unsorted ``g`` falls back to ``np.bincount``."""
    seg = _segments(g, m)
    if seg.starts is None:
        return np.bincount(g, weights=w, minlength=m)
    w = np.asarray(w, dtype=np.float64)
    if 1 < seg.width <= _COLUMN_SUMS:
        return _row_sums(w.reshape(m, seg.width))
    s = np.add.reduceat(w, seg.starts)
    if seg.full:
        return s
    out = np.zeros(m)
    out[seg.present] = s
    return out


def _row_sums(w2):
    """Σ over each row of a (groups × rows) matrix, column by column, with the additions in
    the order ``np.add.reduceat`` makes them (the first value plus numpy's pairwise sum of
    the rest: eight running sums from eight values on), so that a DUT's sums are the same
    to the last bit whether its batch takes this path or the segment sums, whatever the
    other DUTs. ``tests/test_fit.py`` holds the two paths equal bit for bit."""
    a = w2[:, 1:]
    n = a.shape[1]
    if n < 8:
        res = a[:, 0].copy()
        for j in range(1, n):
            res += a[:, j]
    else:
        r = [a[:, k].copy() for k in range(8)]
        i = 8
        while i < n - n % 8:
            for k in range(8):
                r[k] += a[:, i + k]
            i += 8
        res = ((r[0] + r[1]) + (r[2] + r[3])) + ((r[4] + r[5]) + (r[6] + r[7]))
        for j in range(i, n):
            res += a[:, j]
    return w2[:, 0] + res


def _counts(g, m):
    """``np.bincount(g, minlength=m)`` (rows per group), from the cached segments when
    ``g`` is sorted (bincount holds the GIL)."""
    seg = _segments(g, m)
    if seg.starts is None:
        return np.bincount(g, minlength=m)
    out = np.zeros(m, dtype=np.int64)
    out[seg.present] = seg.counts
    return out


def _spread(g, v):
    """``v[g]``: each group's value on each of its rows, by ``np.take``. It is about as fast
    as a repeat over the segment lengths and faster than fancy indexing, and unlike
    ``np.repeat`` it releases the GIL: with the fit's two threads, ``np.repeat`` ran one
    thread at a time (measured: 1.0× on two threads against 1.8× for ``np.take``)."""
    return np.take(np.asarray(v), g)


def _york_kernel(g, x, y, sxx, syy, sxy, m, b0):
    """Iterate York's slope for all groups; return (b, iterations, converged).

    York's step is a fixed-point iteration b ← f(b) that converges linearly; where two
    successive steps shrink by a steady ratio ρ (|ρ| < 0.5), the rest of the geometric
    series, d·ρ/(1 − ρ), is added at once (Aitken's Δ² extrapolation: A. C. Aitken, Proc.
    R. Soc. Edinburgh 46, 289–305, 1926; citation from memory). The jump is never larger
    than the last step, and a DUT converges only on a plain step below the tolerance, so
    the root is the one the plain iteration finds; on bench sweeps it saves one or two of
    five or six steps.
    """
    b = b0.astype(np.float64).copy()
    iters = np.zeros(m, dtype=np.int64)
    done = np.zeros(m, dtype=bool)
    gg, xx, yy, a_sxx, a_syy, a_sxy = g, x, y, sxx, syy, sxy
    last = None  # each DUT's last plain step (NaN right after a jump)
    sb = None
    for _ in range(_MAXITER):
        with np.errstate(divide="ignore", invalid="ignore"):
            w, _, _, _, u, v, beta = _york_step(gg, xx, yy, a_sxx, a_syy, a_sxy, m, b)
            b_new = _groupsum(gg, w * beta * v, m) / _groupsum(gg, w * beta * u, m)
            if sb is None:  # the slope's standard error, for the tolerance (at the start:
                # it hardly changes while b settles)
                sb = 1.0 / np.sqrt(_groupsum(gg, w * u * u, m))
        d = b_new - b
        step = np.abs(d)
        active = ~done
        upd = active & np.isfinite(b_new)
        b[upd] = b_new[upd]
        iters[active] += 1
        # converged: the change is below a billionth of the slope's standard error,
        # or at the level of float64 round-off of the slope itself
        conv = active & ((step <= 1e-9 * sb) | (step <= 4e-16 * np.abs(b_new)) | ~np.isfinite(b_new))
        done |= conv
        if done.all():
            break
        if last is not None:
            with np.errstate(divide="ignore", invalid="ignore"):
                rho = d / last
            jump = upd & ~conv & (np.abs(rho) < 0.5)
            if jump.any():
                r = rho[jump]
                b[jump] += d[jump] * r / (1.0 - r)
            last = np.where(jump, np.nan, d)
        else:
            last = d
        if conv.any():
            # drop the rows of converged DUTs once they are a tenth of the rows left:
            # copying six arrays for a few rows costs more than iterating over them (a
            # converged DUT's slope is no longer updated either way)
            stale = np.take(done, gg)
            if np.count_nonzero(stale) * 10 >= gg.size:
                keep = ~stale
                gg, xx, yy = gg[keep], xx[keep], yy[keep]
                a_sxx, a_syy, a_sxy = a_sxx[keep], a_syy[keep], a_sxy[keep]
    return b, iters, done


def _york_step(g, x, y, sxx, syy, sxy, m, b):
    """Steps 1–3 of York et al. (2004) at the slope ``b``: weights W, ΣW, the weighted
    means X̄, Ȳ, the deviations U, V and York's β (variance form)."""
    bb = _spread(g, b)
    w = 1.0 / (syy + bb * bb * sxx - 2.0 * bb * sxy)
    sw = _groupsum(g, w, m)
    xbar = _groupsum(g, w * x, m) / sw
    ybar = _groupsum(g, w * y, m) / sw
    u = x - _spread(g, xbar)
    v = y - _spread(g, ybar)
    beta = w * (u * syy + bb * v * sxx - (bb * u + v) * sxy)
    return w, sw, xbar, ybar, u, v, beta


@segment_scope
def york_line(x, y, sx, sy, r=None, *, group=None):
    """York et al. (2004) best straight line y = a + b·x for one or many groups.

    Parameters
    ----------
    x, y : array_like
        Coordinates.
    sx, sy : array_like
        Standard uncertainties of x and y (either may be 0 but not both at one point).
    r : array_like, optional
        Correlation coefficients of the x and y errors (default 0).
    group : array_like of int, optional
        Group index of each point (non-negative); one group when omitted.

    Returns
    -------
    dict
        Arrays (one per group) ``a``, ``b``, ``var_a``, ``var_b``, ``cov_ab`` (a priori,
        from the stated uncertainties only), ``chi2``, ``n``, ``iterations``,
        ``converged``, and ``xbar_adj`` (York's weighted mean of the adjusted x).
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    sx = np.broadcast_to(np.asarray(sx, float), x.shape)
    sy = np.broadcast_to(np.asarray(sy, float), x.shape)
    r = np.zeros_like(x) if r is None else np.broadcast_to(np.asarray(r, float), x.shape)
    g = np.zeros(x.size, np.int64) if group is None else np.asarray(group, np.int64)
    return _line(g, x, y, sx * sx, sy * sy, r * sx * sy, int(g.max()) + 1 if g.size else 0)


def _line(g, x, y, sxx, syy, sxy, m):
    """Shared kernel: York/WLS/OLS sums for groups; variances are a priori."""
    n = _counts(g, m)
    # start from the y-weighted least-squares slope
    w0 = 1.0 / syy if np.all(syy > 0) else 1.0 / np.where(syy > 0, syy, sxx + 1e-300)
    sw0 = _groupsum(g, w0, m)
    with np.errstate(divide="ignore", invalid="ignore"):
        xm = _groupsum(g, w0 * x, m) / sw0
        ym = _groupsum(g, w0 * y, m) / sw0
        du = x - _spread(g, xm)
        b0 = _groupsum(g, w0 * du * (y - _spread(g, ym)), m) / _groupsum(g, w0 * du * du, m)
    b0 = np.where(np.isfinite(b0), b0, 0.0)
    b, iters, conv = _york_kernel(g, x, y, sxx, syy, sxy, m, b0)
    xerr_rows = (sxx > 0) | (sxy != 0)
    if xerr_rows.any():
        # With strongly correlated errors York's equations can have more than one root
        # (seen on Amen's 2012 set); restart the errors-in-variables groups from the
        # unweighted slope as well and keep, per group, the root with the smaller χ².
        xg = _groupsum(g, xerr_rows, m) > 0
        rows = _spread(g, xg)
        g2, x2, y2 = g[rows], x[rows], y[rows]
        n2 = np.maximum(_counts(g2, m), 1)
        xm2 = _groupsum(g2, x2, m) / n2
        ym2 = _groupsum(g2, y2, m) / n2
        d2 = x2 - _spread(g2, xm2)
        with np.errstate(divide="ignore", invalid="ignore"):
            b1 = (_groupsum(g2, d2 * (y2 - _spread(g2, ym2)), m)
                  / _groupsum(g2, d2 * d2, m))
        b1 = np.where(np.isfinite(b1) & xg, b1, b)
        # Only where the slope has the sign of a strong error correlation can the effective
        # variance u²(y) + b²u²(x) − 2b·u(x,y) approach zero and make a second root; bench
        # sweeps with I = V/R have r > 0 and a negative slope, so they skip this.
        with np.errstate(divide="ignore", invalid="ignore"):
            r_row = sxy / np.sqrt(sxx * syy)
        risky_row = (np.abs(r_row) > 0.5) & (r_row * _spread(g, b) > 0)
        risky = _groupsum(g, risky_row, m) > 0
        again = xg & risky & (np.abs(b1 - b) > 1e-12 * np.maximum(np.abs(b), 1e-300))
        if again.any():
            sel = _spread(g, again)
            b_alt, it_alt, conv_alt = _york_kernel(g[sel], x[sel], y[sel], sxx[sel], syy[sel],
                                                   sxy[sel], m, np.where(again, b1, b))
            s_main = _chi2_at(g, x, y, sxx, syy, sxy, m, b)
            s_alt = _chi2_at(g, x, y, sxx, syy, sxy, m, b_alt)
            better = again & conv_alt & (s_alt < s_main * (1 - 1e-12))
            b = np.where(better, b_alt, b)
            iters = iters + np.where(again, it_alt, 0)
            conv = np.where(better, conv_alt, conv)
    out = york_state(g, x, y, sxx, syy, sxy, m, b)
    out.update(n=n, iterations=iters, converged=conv)
    return out


def york_state(g, x, y, sxx, syy, sxy, m, b) -> dict:
    """York's quantities at the slope ``b`` (per group): steps 1–8 of York et al. (2004)
    without iterating. Used for the final estimates and by the uncertainty budget.

    Returns a dict of per-group arrays ``a``, ``b``, ``var_a``, ``var_b``, ``cov_ab``
    (a priori), ``chi2``, ``sw`` (ΣW), ``xbar``, ``ybar``, ``xbar_adj``, ``q``
    (ΣW·u², so var_b = 1/q), and per-row ``weights``, ``beta``, ``ua`` (adjusted x about
    its weighted mean).
    """
    bb = _spread(g, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        w, sw, xbar, ybar, _, _, beta = _york_step(g, x, y, sxx, syy, sxy, m, b)
        a = ybar - b * xbar
        xadj = _spread(g, xbar) + beta
        xbar_adj = _groupsum(g, w * xadj, m) / sw
        ua = xadj - _spread(g, xbar_adj)
        q = _groupsum(g, w * ua * ua, m)
        var_b = 1.0 / q
        var_a = 1.0 / sw + xbar_adj ** 2 * var_b
        cov_ab = -xbar_adj * var_b
        res = y - bb * x - _spread(g, a)
        chi2 = _groupsum(g, w * res * res, m)
    return {"a": a, "b": b, "var_a": var_a, "var_b": var_b, "cov_ab": cov_ab, "chi2": chi2,
            "sw": sw, "xbar": xbar, "ybar": ybar, "xbar_adj": xbar_adj, "q": q,
            "weights": w, "beta": beta, "ua": ua}


def _chi2_at(g, x, y, sxx, syy, sxy, m, b):
    """York's objective S(b) per group, with the intercept that minimises it."""
    bb = _spread(g, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = 1.0 / (syy + bb * bb * sxx - 2.0 * bb * sxy)
        sw = _groupsum(g, w, m)
        a = (_groupsum(g, w * y, m) - b * _groupsum(g, w * x, m)) / sw
        res = y - bb * x - _spread(g, a)
        return _groupsum(g, w * res * res, m)


#: Closed-form chi-square tails for integer degrees of freedom up to this many, and for
#: χ² up to ``_CHI2_X_MAX`` (beyond it e^(−χ²/2) underflows; scipy takes over).
_CHI2_NU_MAX = 40
_CHI2_X_MAX = 1400.0


def chi2_upper(nu, x) -> np.ndarray:
    """Upper tail Q(χ² | ν) of the chi-square distribution: ``scipy.special.chdtrc``.

    For integer ν from 1 to 40 (every bench sweep's degrees of freedom) by the finite sums
    of Abramowitz & Stegun, *Handbook of Mathematical Functions* (1964), 26.4.4 and 26.4.5:
    for even ν, Q = e^(−x/2) Σ_{r<ν/2} (x/2)^r / r!; for odd ν, Q = erfc(√(x/2))
    + √(2/π) e^(−x/2) Σ_{r=1}^{(ν−1)/2} x^(r−½) / (1·3·…·(2r−1)).
    Every term is positive, so the sums keep full relative precision; they take about a
    fifth of the time of scipy's incomplete gamma function on a batch. Anything else
    (fractional ν, non-finite or negative χ², very large χ²) goes to scipy.
    ``tests/test_fit.py`` holds the two to 1e-12 relative.
    """
    nu, x = np.broadcast_arrays(np.asarray(nu, dtype=float), np.asarray(x, dtype=float))
    with np.errstate(invalid="ignore"):
        easy = ((nu == np.floor(nu)) & (nu >= 1) & (nu <= _CHI2_NU_MAX)
                & (x >= 0) & (x <= _CHI2_X_MAX))
    out = np.empty(x.shape)
    hard = ~easy
    if hard.any():  # only those (a batch's failed DUTs have a NaN χ²)
        out[hard] = special.chdtrc(nu[hard], x[hard])
    one = not hard.any() and x.size and nu.min() == nu.max()  # a batch of equal sweeps
    for k in ([int(nu.flat[0])] if one else np.unique(nu[easy]).astype(int).tolist()):
        sel = ... if one else easy & (nu == k)
        xs = x[sel]
        half = 0.5 * xs
        if k % 2 == 0:  # A&S 26.4.4 (even ν)
            term = np.ones_like(xs)
            total = term.copy()
            for r in range(1, k // 2):
                term *= half / r
                total += term
            out[sel] = np.exp(-half) * total
        else:  # A&S 26.4.5 (odd ν)
            root = np.sqrt(xs)
            term = root.copy()
            total = np.zeros_like(xs) if k == 1 else term.copy()
            for r in range(2, (k - 1) // 2 + 1):
                term *= xs / (2 * r - 1)
                total += term
            out[sel] = special.erfc(root / math.sqrt(2.0)) + (
                math.sqrt(2.0 / math.pi) * np.exp(-half) * total)
    return out


def coverage_factors(confidence: float, dof: np.ndarray, type_a: np.ndarray) -> np.ndarray:
    """Coverage factor per DUT: normal quantile, or Student t with ``dof`` for Type A."""
    p = 0.5 * (1.0 + confidence)
    z = float(special.ndtri(p))
    type_a = np.asarray(type_a, dtype=bool)
    out = np.full(type_a.shape, z)
    if type_a.any():
        # a batch has a handful of distinct dof: one quantile each, not one per DUT
        nu, inverse = np.unique(np.maximum(np.asarray(dof)[type_a], 1), return_inverse=True)
        with np.errstate(invalid="ignore"):
            out[type_a] = special.stdtrit(nu.astype(float), p)[inverse.reshape(-1)]
    return out


def _validate(readings: Readings, m: int):
    """Per-DUT reasons why a DUT cannot be fitted (vectorised; strings only for failures)."""
    g = readings.group
    n = _counts(g, m)
    errors: list[str | None] = [None] * m
    starts = np.concatenate(([0], np.cumsum(n)[:-1]))
    nonempty = n > 0
    i, ui, uv = readings.current, readings.u_current, readings.u_voltage
    stated_row = (uv > 0) | (ui > 0)
    stated = _groupsum(g, stated_row, m) > 0
    zero_row = ~stated_row & _spread(g, stated)
    zero_in = _groupsum(g, zero_row, m) > 0

    def red(fn, a, empty):
        out = np.full(m, empty, dtype=float)
        if nonempty.any():
            out[nonempty] = fn.reduceat(a, starts[nonempty])
        return out

    imin, imax = red(np.minimum, i, np.inf), red(np.maximum, i, -np.inf)
    iabs = red(np.maximum, np.abs(i), 0.0)
    uimax = red(np.maximum, ui, 0.0)
    load = readings.load
    has_load = bool(np.isfinite(load).any() or np.isinf(load).any()) and not np.isnan(load).any()
    if has_load:
        lmin, lmax = red(np.minimum, load, np.inf), red(np.maximum, load, -np.inf)
        with np.errstate(invalid="ignore"):
            one_load = ~((lmax > lmin * (1 + 1e-9)) | (np.isinf(lmax) & np.isfinite(lmin)))
        spread_ok = (imax - imin) > 1e-12 * np.maximum(iabs, 1e-300)
    else:
        one_load = np.zeros(m, bool)
        spread_ok = (imax - imin) > np.maximum(4.0 * uimax, 1e-3 * iabs)
    few = n < 2
    few_typea = (~stated) & (n < 3)
    bad = few | one_load | ~spread_ok | few_typea | zero_in
    for k in np.flatnonzero(bad):
        if n[k] == 0:
            errors[k] = "no readings"
        elif few[k]:
            errors[k] = ("only one reading: an equivalent needs readings at two or more loads")
        elif one_load[k]:
            errors[k] = (f"all {n[k]} readings are at one load ({load[starts[k]]:.4g} Ω): "
                         "take readings at two or more different loads")
        elif not spread_ok[k]:
            errors[k] = (f"fewer than two distinct currents (the {n[k]} currents differ only "
                         "by noise): take readings at two or more different loads")
        elif few_typea[k]:
            errors[k] = ("two readings and no stated uncertainty: the scatter cannot be "
                         "estimated; add a third load or state the meter accuracy "
                         "(--voltage-accuracy, --current-accuracy, --load-tolerance)")
        else:
            rows = np.flatnonzero(zero_row[starts[k]:starts[k] + n[k]]) + starts[k]
            ln = int(readings.line[rows[0]])
            where = f"line {ln}" if ln else f"reading {rows[0] - starts[k] + 1}"
            errors[k] = (f"{where} has zero uncertainty in both V and I while other readings "
                         "have some (an open-circuit reading with only a load tolerance?); "
                         "state a voltage accuracy (--voltage-accuracy) or u_voltage for it")
    return errors, bad, stated, n


@segment_scope
def fit_lines(readings: Readings, *, confidence: float = 0.95) -> Fits:
    """Fit the Thevenin equivalent V = Vth − Rth·I of every DUT in ``readings``.

    Parameters
    ----------
    readings : Readings
        Validated readings (one or many DUTs).
    confidence : float
        Level of the confidence intervals, 0 < confidence < 1.

    Returns
    -------
    Fits
        Columnar results; DUTs that cannot be fitted carry an ``error`` message and NaN
        estimates, the others are fitted regardless.

    Notes
    -----
    1. Method per DUT: ``york`` when any reading has an uncertainty in I (stated or
       propagated from the load), ``wls`` when only V carries uncertainty, ``ols`` when
       nothing was stated.
    2. Covariance: a priori from the stated uncertainties, multiplied by S² = χ²/ν when
       χ²/ν > 1 (never reduced; PDG convention); intervals use the normal quantile.
       For ``ols`` the covariance is scaled by s² = χ²/ν and intervals use Student t
       with ν = n − 2 (Type A, GUM 4.2).
    3. Isc = Vth/Rth and Pmax = Vth²/(4·Rth) by the delta method with the full covariance;
       NaN when Rth ≤ 0.
    """
    if not (0.0 < confidence < 1.0) or not math.isfinite(confidence):
        raise InputError(f"confidence must be between 0 and 1 (got {confidence!r})")
    m = readings.n_duts
    errors, bad, stated, n = _validate(readings, m)
    g_all = readings.group
    keep = ~bad[g_all]
    g = g_all[keep]
    x = readings.current[keep]
    y = readings.voltage[keep]
    st = _spread(g, stated)
    sxx = np.where(st, readings.u_current[keep] ** 2, 0.0)
    syy = np.where(st, readings.u_voltage[keep] ** 2, 1.0)
    sxy = np.where(st, readings.cov_iv[keep], 0.0)
    res = _line(g, x, y, sxx, syy, sxy, m)
    prop = None
    if readings.errors is not None:
        from .systematic import propagate  # only when errors are shared

        with np.errstate(all="ignore"):
            every = bool(keep.all())
            prop = propagate(g, x, y, readings.load if every else readings.load[keep],
                             readings.errors if every else readings.errors.take(keep), res, m,
                             n, confidence)

    with np.errstate(all="ignore"):  # NaN/inf of DUTs in error are masked below
        return _assemble(readings, res, m, errors, bad, stated, n, g, sxx, sxy, confidence,
                         prop)


def _assemble(readings, res, m, errors, bad, stated, n, g, sxx, sxy, confidence,
              prop=None) -> Fits:
    xerr = _groupsum(g, (sxx > 0) | (sxy != 0), m) > 0
    # one shared str per method (not 100,000 new strings)
    method = np.array(["wls", "york", "ols"], dtype=object)[np.where(~stated, 2,
                                                                     xerr.astype(np.intp))]
    method[bad] = ""
    dof = np.maximum(n - 2, 0)
    chi2 = res["chi2"]
    type_a = ~stated
    with np.errstate(divide="ignore", invalid="ignore"):
        red = np.where(dof > 0, chi2 / np.maximum(dof, 1), np.nan)
        scale = np.where(type_a, red, np.where(dof > 0, np.maximum(1.0, red), 1.0))
        p_value = np.where(stated & (dof > 0), chi2_upper(np.maximum(dof, 1), chi2), np.nan)
    k = coverage_factors(confidence, dof, type_a)

    vth = res["a"]
    rth = -res["b"]
    var_v = res["var_a"] * scale
    var_r = res["var_b"] * scale
    cov_vr = -res["cov_ab"] * scale
    extra = {}
    k_rth = k
    shared = {}
    if prop is not None:  # shared meter/resistor errors: the covariance of systematic.py
        sel = stated & ~bad
        var_v = np.where(sel, prop.total[0], var_v)
        var_r = np.where(sel, prop.total[1], var_r)
        cov_vr = np.where(sel, -prop.total[2], cov_vr)
        k_rth = np.where(sel, prop.k[1], k)
        k = np.where(sel, prop.k[0], k)
        extra["uncertainty"] = _uncertainty_rows(prop, sel, k, k_rth)
        zero = np.zeros(m)
        sv, sr, svr = zero.copy(), zero.copy(), zero.copy()
        for ja, jb, _ in prop.components.values():
            sv, sr, svr = sv + ja * ja, sr + jb * jb, svr + ja * jb
        # (a, b) = (Vth, −Rth): the sign of the covariance flips
        shared = {"var_vth_shared": np.where(sel, sv, 0.0),
                  "var_rth_shared": np.where(sel, sr, 0.0),
                  "cov_vr_shared": np.where(sel, -svr, 0.0)}
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        pos = rth > 0
        isc = np.where(pos, vth / rth, np.nan)
        d_v, d_r = 1.0 / rth, -vth / rth ** 2
        u_isc = np.sqrt(np.maximum(d_v ** 2 * var_v + d_r ** 2 * var_r + 2 * d_v * d_r * cov_vr, 0))
        pmax = np.where(pos, vth ** 2 / (4.0 * rth), np.nan)
        e_v, e_r = vth / (2.0 * rth), -vth ** 2 / (4.0 * rth ** 2)
        u_pmax = np.sqrt(np.maximum(e_v ** 2 * var_v + e_r ** 2 * var_r + 2 * e_v * e_r * cov_vr, 0))
    u_isc = np.where(pos, u_isc, np.nan)
    u_pmax = np.where(pos, u_pmax, np.nan)

    nan = np.where(bad, np.nan, 1.0)
    flags = _basic_flags(readings, m, bad, stated, scale, dof, res["converged"])
    if prop is not None:
        flags = _calibration_flags(flags, prop, stated & ~bad)
    return Fits(
        duts=readings.duts, n=n, method=method, vth=vth * nan, u_vth=np.sqrt(var_v) * nan,
        rth=rth * nan, u_rth=np.sqrt(var_r) * nan, cov_vr=cov_vr * nan, chi2=chi2 * nan,
        dof=dof, p_value=p_value * nan, scale=scale * nan, k=k, isc=isc * nan,
        u_isc=u_isc * nan, pmax=pmax * nan, u_pmax=u_pmax * nan,
        converged=res["converged"] & ~bad, error=tuple(errors), flags=flags,
        confidence=float(confidence), extra=extra, k_rth=k_rth, **shared,
        settings={"confidence": float(confidence), "source": readings.source})


_METER = {"v_gain": "voltmeter", "v_offset": "voltmeter", "i_gain": "ammeter",
          "i_offset": "ammeter"}


def _calibration_flags(flags, prop, sel):
    """An info flag where one meter's shared (calibration) errors make up more than half of
    the variance of Vth or Rth: more readings will not reduce it, a better meter will."""
    names = list(prop.components)
    if not names:
        return flags
    # per DUT one code for (Vth's meter, Rth's meter), 0 = not limited; one shared tuple
    # of flags per code, so a large batch builds a handful of Flag objects
    meters = ("voltmeter", "ammeter")
    code = np.zeros(sel.size, np.int64)
    for j in (0, 1):
        by_meter = [sum((prop.components[nm][j] ** 2 for nm in names if _METER[nm] == mt),
                        np.zeros(sel.size)) for mt in meters]
        stack = np.vstack(by_meter)
        with np.errstate(divide="ignore", invalid="ignore"):
            limited = sel & (np.max(stack, axis=0) / prop.total[j] > 0.5)
        code += np.where(limited, 1 + np.argmax(stack, axis=0), 0) * (3 ** j)
    extra = {}
    for c in np.unique(code[code > 0]).tolist():
        fl = []
        for j, q in enumerate(("Vth", "Rth")):
            which = (c // 3 ** j) % 3
            if which:
                fl.append(Flag("calibration-limited", "info",
                               f"{q} is limited by the {meters[which - 1]}'s calibration: a "
                               "better meter, not more readings, reduces it"))
        extra[c] = tuple(fl)
    out = [f if c == 0 else tuple(f) + extra[c] for f, c in zip(flags, code.tolist())]
    return tuple(out)


def _uncertainty_rows(prop, sel, k, k_rth) -> ColumnRows:
    """Per-DUT JSON of the shared-error model (built when a document asks): which random
    part, ν_eff, k and why, and the standard uncertainty each shared component gives Vth
    and Rth."""
    cols = {"sel": sel, "k": k, "k_rth": k_rth, "use_a": prop.use_type_a,
            "dof": prop.dof_eff, "why": np.asarray(prop.k_reason, dtype=object)}
    for j, q in enumerate(("vth", "rth")):
        cols["rand_" + q] = np.sqrt(np.maximum(np.where(
            prop.use_type_a, prop.type_a[j],
            prop.random_stated[j] + prop.resistor_sharing[j]), 0.0))
        for nm, comp in prop.components.items():
            cols[f"{nm}_{q}"] = np.abs(comp[j])
    names = tuple(prop.components)
    return ColumnRows(cols, lambda c, i: _uncertainty_row(c, i, names))


def _uncertainty_row(c, i, names):
    if not c["sel"][i]:
        return None
    dof = float(c["dof"][i])
    return {
        "model": "meter gain and offset shared by the sweep; resistor errors shared by "
                 "repeats at one load (GUM 5.2, F.1.2.1)",
        "random": {"source": "scatter (Type A)" if c["use_a"][i] else "stated",
                   "u_vth": float(c["rand_vth"][i]), "u_rth": float(c["rand_rth"][i])},
        "shared": {nm: {"u_vth": float(c[nm + "_vth"][i]), "u_rth": float(c[nm + "_rth"][i])}
                   for nm in names},
        "effective_dof": round(dof, 1) if math.isfinite(dof) else None,
        "coverage_factor_vth": float(c["k"][i]), "coverage_factor_rth": float(c["k_rth"][i]),
        "coverage_basis": str(c["why"][i])}


def _basic_flags(readings: Readings, m, bad, stated, scale, dof, converged):
    """Flags the fit itself raises: cross-check notes, Type A fallback, scale applied."""
    # One shared Flag per kind, and one shared tuple per combination of kinds: a
    # 100,000-DUT batch must not build 100,000 messages or tuples.
    type_a = Flag("type-a", "info",
                  "no measurement uncertainty stated: the uncertainty comes from the scatter "
                  "alone (Type A, Student t with n − 2 degrees of freedom); state the meter "
                  "accuracy and resistor tolerance for an uncertainty a lab can defend")
    scaled = Flag("scale-applied", "info",
                  "scatter exceeds the stated uncertainties (χ²/ν > 1): the covariance was "
                  "enlarged by S² = χ²/ν (PDG convention, never reduced; see scale_factor)")
    unconverged = Flag("not-converged", "warning",
                       "the errors-in-variables iteration did not converge; treat the result "
                       "with caution")
    kinds = (type_a, scaled, unconverged)
    with np.errstate(invalid="ignore"):
        bits = ((~stated & ~bad) * 1 + (stated & ~bad & (scale > 1.0)) * 2
                + (~converged & ~bad) * 4)
    combos = [tuple(k for j, k in enumerate(kinds) if c >> j & 1) for c in range(8)]
    flags = [combos[c] for c in bits.tolist()]
    for note in readings.notes:
        if not bad[note.group]:
            flags[note.group] = (Flag(note.code, note.severity, note.message),) + flags[note.group]
    return tuple(flags)
