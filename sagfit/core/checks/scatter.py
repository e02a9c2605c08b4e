"""Scatter checks: does the scatter about the line agree with the stated uncertainties
(χ² of the line: ``excess-scatter``, ``too-good``), do repeated loads disagree with the
line more than with each other (``lack-of-fit``), and is the slope determined at all
(``weak-slope``) and of the sign a passive source has (``negative-resistance``)?

References
----------
- Lack-of-fit F test with replicates: N. R. Draper, H. Smith, *Applied Regression
  Analysis*, 3rd ed. (1998), ch. 2.1.
- χ² of a weighted fit as a test of the stated uncertainties: JCGM 100:2008 (GUM), and
  P. R. Bevington, D. K. Robinson, *Data Reduction and Error Analysis for the Physical
  Sciences*, 3rd ed. (2003), ch. 11 (common practice).
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..fit import _groupsum, _spread
from ..results import Fits
from .common import NAN, Rows, cumsum_rows, dense_blocks, reduce_rows, take

EXCESS_P = 0.001
TOO_GOOD_P = 0.999
WEAK_SLOPE = 0.5


def check_scatter(R: Rows, fits: Fits):
    """χ² of each line with stated uncertainties: its columns and the two flag masks."""
    p_fit = np.where(R.stated, fits.p_value, NAN)
    cols = {"chi2": np.where(R.stated, fits.chi2, NAN),
            "dof": np.where(R.stated, fits.dof, NAN).astype(float),
            "p_value": p_fit}
    tested = R.stated & (fits.dof > 0)
    return cols, tested & (p_fit < EXCESS_P), tested & (p_fit > TOO_GOOD_P)


def check_slope(R: Rows, fits: Fits, level: float):
    """Relative uncertainty of Rth and the one-sided p-value of Rth < 0 (in the sign a
    passive source has in the readings' own polarity)."""
    m = R.m
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
    p_neg = np.where(R.ok, p_neg, NAN)
    rel = np.where(R.ok, rel, NAN)
    cols = {"relative_u_rth": rel, "p_negative": p_neg}
    return cols, R.ok & (rel > WEAK_SLOPE), R.ok & (p_neg < level)


def check_lack_of_fit(R: Rows):
    """Lack-of-fit F test where loads are repeated (pure error from the replicates)."""
    m = R.m
    out = {k: np.full(m, NAN) for k in ("F", "p_value", "levels", "df_lof", "df_pe")}
    if not (np.isfinite(R.load) | np.isinf(R.load)).all() or R.g.size == 0:
        return out
    cell = np.zeros(R.g.size, np.int64)
    levels = np.zeros(m)
    offset = 0
    for duts, rows in dense_blocks(R.n, R.ok, 4):
        size = rows.shape[1]
        ld = take(R.load, rows)
        order = np.argsort(ld, axis=1, kind="stable")
        ls = np.take_along_axis(ld, order, 1)
        hi_, lo_ = ls[:, 1:], ls[:, :-1]  # sorted: hi_ ≥ lo_
        with np.errstate(invalid="ignore"):  # inf − inf: two open circuits, one level
            close = np.abs(hi_ - lo_) <= 1e-9 * np.abs(lo_)  # np.isclose(rtol=1e-9, atol=0)
        new = np.concatenate([np.ones((duts.size, 1), bool), ~close & (hi_ != lo_)], axis=1)
        cid_sorted = cumsum_rows(new.astype(np.int64)) - 1
        cid = np.empty_like(cid_sorted)
        np.put_along_axis(cid, order, cid_sorted, 1)
        levels[duts] = reduce_rows(np.add, new, np.int64)
        cell[rows] = offset + np.arange(duts.size)[:, None] * size + cid
        offset += duts.size * size
    if offset == 0:
        return out
    out["levels"] = np.where(R.ok & (levels > 0), levels, NAN)
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
    out["F"] = np.where(run, F, NAN)
    out["p_value"] = np.where(run, p, NAN)
    out["df_lof"] = np.where(run, df_lof, NAN)
    out["df_pe"] = np.where(run, df_pe, NAN)
    return out

