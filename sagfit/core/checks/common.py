"""The per-DUT state every check shares, and the row helpers the checks are built from.

:class:`Rows` holds each reading's residual, weight and standardised residual about its
DUT's fitted line; :func:`dense_blocks` groups the DUTs that share a reading count into
2-D blocks, so the order-dependent checks (knee search, runs, rank correlation,
replicate cells) loop over distinct reading counts, never over DUTs.
"""

from __future__ import annotations

import math

import numpy as np

from ..fit import _counts, _spread
from ..readings import Readings
from ..results import Fits

NAN = math.nan

#: Per-DUT label columns index these: every DUT shares one str object per label (an
#: np.where over strings then .astype(object) made 100,000 new strings per column).
TESTS = np.array([None, "F", "chi2-difference"], dtype=object)


def take(v, rows):
    """``v[rows]`` for a block of :func:`dense_blocks`: a reshaped view, no gather, when
    the block holds every row (all DUTs with the same reading count: the rows are then
    0 … N−1 in order, since each DUT's rows are contiguous)."""
    if rows.size == v.shape[0]:
        return v.reshape(rows.shape)
    return v[rows]


def dense_blocks(n, eligible, minimum):
    """Yield (duts, rows) blocks: the DUTs with the same reading count, rows as a 2-D index."""
    starts = np.concatenate(([0], np.cumsum(n)[:-1]))
    sel = eligible & (n >= minimum)
    for size in np.unique(n[sel]):
        duts = np.flatnonzero(sel & (n == size))
        rows = starts[duts][:, None] + np.arange(int(size))[None, :]
        yield duts, rows


class Rows:
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
        self.chi2 = np.where(self.ok, fits.chi2, NAN)
        self.line = readings.line
        self.time = readings.time
        self.load = readings.load



#: Up to this many readings per DUT, row reductions go column by column.
SHORT_ROWS = 64


def reduce_rows(ufunc, v: np.ndarray, dtype=None) -> np.ndarray:
    """``ufunc.reduce(v, axis=1)`` for many short rows (5–20 readings): one vector
    operation per column, several times faster than numpy's reduction along each row.
    Rows longer than ``SHORT_ROWS`` (one DUT with thousands of readings) take numpy's
    own reduction: a Python step per column would cost seconds there."""
    if v.shape[1] > SHORT_ROWS:
        return ufunc.reduce(v.astype(dtype or v.dtype, copy=False), axis=1)
    out = v[:, 0].astype(dtype or v.dtype)  # a copy
    for j in range(1, v.shape[1]):
        ufunc(out, v[:, j], out=out)
    return out


def cumsum_rows(v: np.ndarray) -> np.ndarray:
    """``np.cumsum(v, axis=1)`` for many short rows: one vector add per column is several
    times faster than numpy's per-row loop when rows hold only 5–20 readings (longer rows:
    ``np.cumsum``, see ``reduce_rows``)."""
    if v.shape[1] > SHORT_ROWS:
        return np.cumsum(v, axis=1)
    out = np.empty_like(v)
    out[:, 0] = v[:, 0]
    for j in range(1, v.shape[1]):
        np.add(out[:, j - 1], v[:, j], out=out[:, j])
    return out



def where_on(mask, fn, *args):
    """``fn(*args)`` evaluated only where ``mask`` is true (NaN elsewhere)."""
    out = np.full(mask.shape, NAN)
    if mask.any():
        out[mask] = fn(*(np.broadcast_to(a, mask.shape)[mask] for a in args))
    return out



def level_col(run, level):
    """The level as a per-DUT column: ``level`` where the check ran, NaN elsewhere."""
    return np.where(run, float(level), NAN)
