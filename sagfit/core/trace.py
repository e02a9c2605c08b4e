"""Logged traces: constant-current steps and the settled reading of each step.

Why this module stays whole at about 580 lines (over the ~500 of the house rule): the
validated ``Trace``, the step detection and the settled readings share their row-range
helpers and read top to bottom as one path.

A trace is a time series (time, current, voltage) of one or many channels, as a data
logger, an electronic load or a cell cycler writes it. This module finds the steps of the
current (constant-current segments, rests included), takes the settled voltage and
current at the end of each step with a Type A uncertainty, and turns them into
:class:`~sagfit.core.readings.Readings` for the ordinary fit. Pure core: arrays in,
frozen results out, and no Python loop per sample (every pass is a numpy reduction over
the whole trace or over the concatenated windows).

Methods
-------
- **Noise of the current**: the median absolute deviation (MAD) of the first differences,
  σ = 1.4826·MAD(ΔI)/√2 (the MAD-to-σ factor of a normal distribution; F. R. Hampel,
  "The influence curve and its role in robust estimation", JASA 69 (1974) 383). Differences
  remove the steps themselves: only the few samples at an edge are outliers, which the
  median ignores.
- **Steps** (threshold and merge): a sample starts a transition where |ΔI| exceeds the
  threshold (default 8·√2·σ, floored at 1e-6 of the largest |I| so that a noise-free,
  quantised current still has one); consecutive jumps form one transition (a slewing
  load); a segment shorter than ``min_samples`` is part of a transition (a spike); two
  neighbours whose mean currents differ by less than the threshold are merged. A time gap
  over ``gap_factor`` times the median sampling interval also ends a step.
- **Settled reading**: the mean over a window at the end of the step (default the last
  quarter, at least ``min_samples``); the Type A standard uncertainty s/√n_eff with the
  effective number of samples of a first-order autoregressive series,
  n_eff = n·(1 − r₁)/(1 + r₁) for lag-1 autocorrelation r₁ > 0 (G. V. Bayley and
  J. M. Hammersley, "The 'effective' number of independent observations in an
  autocorrelated time series", J. R. Stat. Soc. Suppl. 8 (1946) 184; N. F. Zhang,
  "Calculation of the uncertainty of the mean of autocorrelated measurements",
  Metrologia 43 (2006) S276 — both from memory); r₁ of the residuals about the window's
  straight line, so that a drift is not taken for correlated noise.
- **Settling check**: a straight line through the window's voltage; the step is flagged
  ``unsettled`` when the drift across the window (slope × window length) exceeds the
  samples' scatter about the line and the slope is significant (|t| > 3); or when the
  window's mean differs from the mean of as many samples just before it by more than the
  scatter of one sample and more than 3 u of the difference (a slow drift a short window
  cannot show). A still-sagging voltage means the window is not at steady state: the step
  was too short.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from ._frozen import freeze_arrays
from .errors import ReadingsFileError
from .readings import Readings

__all__ = ["Trace", "Steps", "find_steps", "current_noise", "settled_readings_arrays",
           "steps_to_readings", "steps_columns", "search_rows", "step_warnings", "MAD_TO_SIGMA"]

#: σ of a normal distribution per unit of median absolute deviation (Hampel 1974).
MAD_TO_SIGMA = 1.482602218505602
#: Default threshold in units of the noise of one first difference (√2·σ).
THRESHOLD_SIGMAS = 8.0
#: A time gap longer than this many median sampling intervals ends a step.
GAP_FACTOR = 10.0
#: Clipping: this many equal voltages in a row at the trace's extreme, where other steps
#: show noise, look like a meter stuck at its range (sagfit's choice).
CLIP_RUN = 20


@dataclass(frozen=True, slots=True)
class Trace:
    """A logged trace of one or many channels, rows of one channel contiguous and in time
    order (the reader sorts them so).

    Attributes
    ----------
    time : ndarray of float64
        Seconds from the start of the file (the first row's time; ``meta['t0']`` holds
        the first time stamp as ISO 8601 when the file had dates).
    current : ndarray of float64
        Current in A, positive when the source delivers current (discharge).
    voltage : ndarray of float64
        Terminal voltage in V.
    channel : ndarray of int64
        Index into ``channels`` of each row (non-decreasing).
    channels : tuple of str
        Channel (cell, DUT) names.
    soc : ndarray of float64 or None
        State of charge (%) or remaining capacity column, when the file has one.
    soc_kind : str
        ``"soc_pct"``, ``"capacity_Ah"`` or ``""``.
    row_line : ndarray of int64 or None
        1-based file line of each row, where the reader could tell it.
    source : str
        File name, for messages.
    columns : mapping
        Header text of each role (``time``, ``current``, ``voltage``), for messages.
    meta : mapping
        Anything else the reader learnt (``t0``, sorted, comment lines).
    """

    time: np.ndarray
    current: np.ndarray
    voltage: np.ndarray
    channel: np.ndarray
    channels: tuple[str, ...]
    soc: np.ndarray | None = None
    soc_kind: str = ""
    row_line: np.ndarray | None = None
    source: str = "<arrays>"
    columns: Mapping[str, str] = field(default_factory=dict)
    meta: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self):
        freeze_arrays(self, ("time", "current", "voltage", "channel", "soc", "row_line"),
                      copy=False)

    def __len__(self) -> int:
        return int(self.time.size)

    def __repr__(self) -> str:
        return f"<Trace {self.source} {len(self)} rows, {len(self.channels)} channel(s)>"

    def where(self, row: int) -> int | None:
        """The file line of row ``row`` (None where unknown)."""
        if self.row_line is not None:
            return int(self.row_line[row]) or None
        first = self.meta.get("first_line")
        return None if first is None else int(first) + int(row)

    def channel_bounds(self) -> np.ndarray:
        """Row offsets: channel k occupies rows [b[k], b[k+1])."""
        return np.searchsorted(self.channel, np.arange(len(self.channels) + 1))

    @classmethod
    def from_arrays(cls, *, time, current, voltage, channel=None, channels=None, soc=None,
                    soc_kind: str = "", row_line=None, first_line: int | None = None,
                    source: str = "<arrays>",
                    columns: Mapping[str, str] | None = None,
                    meta: Mapping[str, object] | None = None) -> "Trace":
        """Validate a trace: finite numbers, rows of a channel in time order.

        ``channel`` holds int codes into ``channels`` (or nothing: one channel named
        ``"cell"``). Rows are sorted by channel, stably (the file's order kept within a
        channel). ``row_line`` gives each row's file line, or ``first_line`` the line of
        the first row when the rows follow one another line by line. Raises
        :class:`ReadingsFileError` with the line and column of the first bad value: NaN
        or text, an infinite value, time going backwards.
        """
        t = np.asarray(time, dtype=np.float64).ravel()
        i = np.asarray(current, dtype=np.float64).ravel()
        v = np.asarray(voltage, dtype=np.float64).ravel()
        n = t.size
        cols = {"time": "time", "current": "current", "voltage": "voltage", **(columns or {})}
        if i.size != n or v.size != n:
            raise ReadingsFileError(source, "time, current and voltage differ in length")
        if n == 0:
            raise ReadingsFileError(source, "no rows (the table has a header but no data)")
        lines = None if row_line is None else np.asarray(row_line, dtype=np.int64).ravel()
        g = (np.zeros(n, np.int64) if channel is None
             else np.asarray(channel, dtype=np.int64).ravel())
        names = tuple(str(c) for c in (channels if channels is not None else ("cell",)))

        def fail(msg, row, role):
            if lines is not None:
                ln = int(lines[row]) or None
            else:
                ln = None if first_line is None else int(first_line) + int(row)
            if ln is None:
                msg = f"data row {row + 1}: {msg}"
            raise ReadingsFileError(source, msg, line=ln, column=cols.get(role, role))

        for role, a in (("time", t), ("current", i), ("voltage", v)):
            bad = np.flatnonzero(~np.isfinite(a))
            if bad.size:
                what = "empty or not a number" if np.isnan(a[bad[0]]) else "infinite"
                fail(f"{what} ({role} must be a finite number in every row)", int(bad[0]),
                     role)
        if n > 1 and np.any(g[1:] < g[:-1]):
            order = np.argsort(g, kind="stable")
            if lines is None and first_line is not None:
                lines = int(first_line) + np.arange(n, dtype=np.int64)
            t, i, v, g = t[order], i[order], v[order], g[order]
            lines = None if lines is None else lines[order]
            soc = None if soc is None else np.asarray(soc, np.float64)[order]
        same = g[1:] == g[:-1]
        back = np.flatnonzero(same & (np.diff(t) < 0))
        if back.size:
            k = int(back[0]) + 1
            fail(f"time goes backwards ({t[k - 1]:g} s, then {t[k]:g} s); the rows of a "
                 "channel must be in time order", k, "time")
        socv = None if soc is None else np.asarray(soc, dtype=np.float64).ravel()
        return cls(time=t, current=i, voltage=v, channel=g, channels=names, soc=socv,
                   soc_kind=soc_kind if socv is not None else "", row_line=lines,
                   source=source, columns=cols,
                   meta={**(meta or {}), "first_line": first_line if lines is None else None})


@dataclass(frozen=True, slots=True)
class Steps:
    """The constant-current steps of a trace and their settled readings (one row per step).

    Row ranges are half-open [start, stop) into the trace's rows; the settling window is
    [w_start, stop). Means and standard uncertainties are in A and V; ``t_start``,
    ``t_stop`` the times of the step's first and last samples (s).

    Attributes
    ----------
    channel : ndarray of int64
    start, stop, w_start : ndarray of int64
    t_start, t_stop, t_edge, t_window : ndarray of float64
        ``t_window`` is the time of the settling window's first sample. ``t_edge`` is the estimated instant the current changed: halfway between the last
        sample of the previous level and the first sample of this one (the step's first
        sample for the first step of a channel).
    current, voltage, u_current, u_voltage : ndarray of float64
        Settled means and their Type A standard uncertainties.
    sd_voltage, sd_current : ndarray of float64
        Sample standard deviation in the window (the noise of one sample).
    n_window, n_eff : ndarray
        Samples in the window and the effective number of the voltage's samples
        (autocorrelation counted; the current's is counted the same way, separately).
    drift : ndarray of float64
        Voltage change across the window from the straight line (V).
    settled : ndarray of bool
    after_gap : ndarray of bool
        The step begins after a gap in the time stamps.
    clipped : ndarray of bool
        The window's voltage sits at the trace's extreme for ``CLIP_RUN`` samples or more
        with no scatter: a meter at the end of its range.
    threshold : ndarray of float64
        Current threshold used per channel (A).
    noise : ndarray of float64
        σ of the current per channel (A).
    """

    channel: np.ndarray
    start: np.ndarray
    stop: np.ndarray
    w_start: np.ndarray
    t_start: np.ndarray
    t_stop: np.ndarray
    t_edge: np.ndarray
    t_window: np.ndarray
    current: np.ndarray
    voltage: np.ndarray
    u_current: np.ndarray
    u_voltage: np.ndarray
    sd_current: np.ndarray
    sd_voltage: np.ndarray
    n_window: np.ndarray
    n_eff: np.ndarray
    drift: np.ndarray
    settled: np.ndarray
    after_gap: np.ndarray
    clipped: np.ndarray
    threshold: np.ndarray
    noise: np.ndarray
    channels: tuple[str, ...] = ()

    def __post_init__(self):
        freeze_arrays(self, [f for f in self.__slots__ if f != "channels"], copy=False)

    def __len__(self) -> int:
        return int(self.start.size)

    def __repr__(self) -> str:
        return (f"<Steps {len(self)} steps, {int(np.count_nonzero(~self.settled))} "
                f"unsettled>")

    @property
    def duration(self) -> np.ndarray:
        return self.t_stop - self.t_start

    @property
    def is_rest(self) -> np.ndarray:
        """Steps at zero current (|I| below the channel's threshold)."""
        return np.abs(self.current) < self.threshold[self.channel]


def current_noise(current: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """σ of the current per channel, from the MAD of its first differences (see module
    notes); 0 for a channel with fewer than three rows."""
    m = bounds.size - 1
    out = np.zeros(m)
    d = np.abs(np.diff(current))
    for k in range(m):  # one median per channel (a few channels), never per sample
        lo, hi = int(bounds[k]), int(bounds[k + 1])
        if hi - lo >= 3:
            seg = d[lo:hi - 1]
            out[k] = MAD_TO_SIGMA * float(np.median(seg)) / math.sqrt(2.0)
    return out


def find_steps(trace: Trace, *, threshold: float | None = None, min_samples: int = 5,
               window: float | None = None, window_fraction: float = 0.25,
               gap_factor: float = GAP_FACTOR) -> Steps:
    """Split every channel into constant-current steps and take each step's settled reading.

    Parameters
    ----------
    trace : Trace
    threshold : float, optional
        Current change (A) that makes a new step; default from the data's own noise
        (module notes).
    min_samples : int
        Fewest samples of a step, and of its settling window.
    window : float, optional
        Length of the settling window at the end of each step (s); default the last
        ``window_fraction`` of the step.
    window_fraction : float
        Share of each step taken as its settling window when ``window`` is not given.
    gap_factor : float
        A gap in the time stamps above this many median sampling intervals ends a step.

    Returns
    -------
    Steps
        One row per step, channels in order.

    Raises
    ------
    ReadingsFileError
        No step at all (every segment shorter than ``min_samples``).
    """
    t, cur, g = trace.time, trace.current, trace.channel
    n = t.size
    m = len(trace.channels)
    bounds = trace.channel_bounds()
    noise = current_noise(cur, bounds)
    top = np.zeros(m)
    typical = np.zeros(m)
    dt = np.diff(t)
    for k in range(m):  # per channel (a few), never per sample
        lo, hi = int(bounds[k]), int(bounds[k + 1])
        if hi > lo:
            top[k] = float(np.max(np.abs(cur[lo:hi])))
        if hi - lo >= 2:
            typical[k] = float(np.median(dt[lo:hi - 1]))
    if threshold is None:
        thr = np.maximum(THRESHOLD_SIGMAS * math.sqrt(2.0) * noise,
                         1e-6 * np.maximum(top, 1e-3))
    else:
        thr = np.full(m, float(threshold))

    # Boundary b (1 ≤ b < n) lies between rows b−1 and b. A run of consecutive jumps
    # b0..b1 is one transition: rows b0..b1−1 belong to no step, row b1 starts the next.
    new_chan = g[1:] != g[:-1]
    gk = g[1:]
    jump = (np.abs(np.diff(cur)) > thr[gk]) & ~new_chan
    gap = (dt > gap_factor * typical[gk]) & (typical[gk] > 0) & ~new_chan
    jb = np.flatnonzero(jump & ~gap) + 1
    cut_b = np.flatnonzero(gap | new_chan) + 1
    gap_b = np.flatnonzero(gap) + 1
    if jb.size:
        brk = np.diff(jb) > 1
        run_first, run_last = jb[np.r_[True, brk]], jb[np.r_[brk, True]]
    else:
        run_first = run_last = np.zeros(0, np.int64)
    starts = np.unique(np.r_[0, run_last, cut_b]).astype(np.int64)
    stops = np.unique(np.r_[run_first, cut_b, n]).astype(np.int64)
    seg_stop = stops[np.minimum(np.searchsorted(stops, starts, side="right"), stops.size - 1)]
    ok = (seg_stop - starts) >= min_samples
    starts, seg_stop = starts[ok], seg_stop[ok]
    if starts.size == 0:
        raise ReadingsFileError(trace.source, "no step of the current could be found (every "
                                              f"segment is shorter than {min_samples} samples)")
    after_gap = np.isin(starts, gap_b)

    # Merge neighbours at the same level (a spike split one step in two).
    level = _range_means(cur, starts, seg_stop)
    ch = g[starts]
    same = ((np.abs(np.diff(level)) < thr[ch[1:]]) & (ch[1:] == ch[:-1]) & ~after_gap[1:])
    head = np.r_[True, ~same]
    idx = np.cumsum(head) - 1
    merged_stop = np.zeros(int(head.sum()), np.int64)
    np.maximum.at(merged_stop, idx, seg_stop)
    return _settle(trace, starts[head], merged_stop, after_gap[head], thr, noise,
                   min_samples, window, window_fraction)


def _range_means(x: np.ndarray, starts: np.ndarray, stops: np.ndarray) -> np.ndarray:
    """Mean of ``x`` over each half-open row range (non-empty, non-overlapping)."""
    lengths = stops - starts
    total = int(lengths.sum())
    offs = np.cumsum(lengths) - lengths
    rows = np.repeat(starts - offs, lengths) + np.arange(total)
    return np.add.reduceat(x[rows], offs) / lengths


def _settle(trace, starts, stops, after_gap, thr, noise, min_samples, window,
            window_fraction) -> Steps:
    t, cur, volt, g = trace.time, trace.current, trace.voltage, trace.channel
    length = stops - starts
    if window is None:
        wl = np.maximum(np.ceil(window_fraction * length).astype(np.int64), min_samples)
    else:
        first = search_rows(t, starts, stops, t[stops - 1] - window)
        wl = np.maximum(stops - first, min_samples)
    wl = np.minimum(wl, length)
    w0 = stops - wl
    # concatenated window rows
    total = int(wl.sum())
    seg_of = np.repeat(np.arange(starts.size), wl)
    offs = np.cumsum(wl) - wl
    rows = np.repeat(w0 - offs, wl) + np.arange(total)
    ws = offs  # starts of each window in the concatenation
    tv, iv, vv = t[rows], cur[rows], volt[rows]
    nw = wl.astype(np.float64)
    mv = np.add.reduceat(vv, ws) / nw
    mi = np.add.reduceat(iv, ws) / nw
    mt = np.add.reduceat(tv, ws) / nw
    dv = vv - mv[seg_of]
    di = iv - mi[seg_of]
    dtt = tv - mt[seg_of]
    svv = np.add.reduceat(dv * dv, ws)
    sii = np.add.reduceat(di * di, ws)
    stt = np.add.reduceat(dtt * dtt, ws)
    stv = np.add.reduceat(dtt * dv, ws)
    sti = np.add.reduceat(dtt * di, ws)
    last = ws + wl - 1
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = np.where(stt > 0, stv / stt, 0.0)
        slope_i = np.where(stt > 0, sti / stt, 0.0)
    # Lag-1 autocorrelation of the residuals about each window's straight line (a drift
    # is the settling check's business, not noise); the pair across two windows dropped.
    ev = dv - slope[seg_of] * dtt
    ei = di - slope_i[seg_of] * dtt
    lag_v = np.r_[ev[1:] * ev[:-1], 0.0]
    lag_i = np.r_[ei[1:] * ei[:-1], 0.0]
    lag_v[last] = 0.0
    lag_i[last] = 0.0
    rv = np.add.reduceat(lag_v, ws)
    ri = np.add.reduceat(lag_i, ws)
    evv = np.add.reduceat(ev * ev, ws)
    eii = np.add.reduceat(ei * ei, ws)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd_v = np.sqrt(svv / np.maximum(nw - 1, 1))
        sd_i = np.sqrt(sii / np.maximum(nw - 1, 1))
        # scatter at the level of rounding (a noise-free, set current) has no correlation
        # worth the name
        r1v = np.where(evv > (1e-12 * np.abs(mv)) ** 2 * nw, rv / evv, 0.0)
        r1i = np.where(eii > (1e-12 * np.abs(mi)) ** 2 * nw, ri / eii, 0.0)
        r1v, r1i = np.clip(r1v, 0.0, 0.99), np.clip(r1i, 0.0, 0.99)
        n_eff = np.clip(nw * (1 - r1v) / (1 + r1v), 1.0, nw)
        n_eff_i = np.clip(nw * (1 - r1i) / (1 + r1i), 1.0, nw)
        uv = sd_v / np.sqrt(n_eff)
        ui = sd_i / np.sqrt(n_eff_i)
        span = t[stops - 1] - t[w0]
        drift = slope * span
        s_line = np.sqrt(evv / np.maximum(nw - 2, 1))
        se_slope = np.where(stt > 0, s_line / np.sqrt(stt), np.inf) * np.sqrt(nw / n_eff)
        tstat = np.where(se_slope > 0, np.abs(slope) / se_slope, np.where(slope != 0, np.inf,
                                                                          0.0))
    settled = ~((np.abs(drift) > s_line) & (tstat > 3.0))
    # A short window hides a slow drift: compare its mean with the mean of as many
    # samples just before it (within the step); a shift beyond the noise of one sample
    # and beyond 3 u of the difference means the step had not settled either.
    prev_lo = np.maximum(starts, w0 - wl)
    has_prev = (w0 - prev_lo) >= min_samples
    if np.any(has_prev):
        k_p = np.flatnonzero(has_prev)
        m_prev = _range_means(volt, prev_lo[k_p], w0[k_p])
        u_prev = uv[k_p] * np.sqrt(nw[k_p] / (w0[k_p] - prev_lo[k_p]))
        shift = np.abs(mv[k_p] - m_prev)
        moved = (shift > s_line[k_p]) & (shift > 3.0 * np.hypot(uv[k_p], u_prev))
        settled[k_p[moved]] = False
    # Clipping: a window with no scatter at all at the channel's voltage extreme, in a
    # channel whose other windows do scatter, or whose neighbour at another current sits
    # at the same value: the voltage did not follow the source, the meter sat at the end
    # of its range.
    ch = g[starts]
    bounds = trace.channel_bounds()
    vmax = np.maximum.reduceat(volt, bounds[:-1])[ch]
    vmin = np.minimum.reduceat(volt, bounds[:-1])[ch]
    v_first = vv[ws]
    flat = (np.maximum.reduceat(vv, ws) == np.minimum.reduceat(vv, ws)) & ((v_first == vmax) | (v_first == vmin)) & (vmax > vmin)
    noisy = np.zeros(len(trace.channels), bool)
    noisy[ch[~flat & (sd_v > 0)]] = True
    pair = ((ch[1:] == ch[:-1]) & (v_first[1:] == v_first[:-1]) & flat[1:] & flat[:-1]
            & (np.abs(mi[1:] - mi[:-1]) > thr[ch[1:]]))
    clipped = (np.r_[pair, False] | np.r_[False, pair]
               | (flat & (wl >= CLIP_RUN) & noisy[ch]))
    # The instant the current changed: halfway between the last sample of the previous
    # step and the next sample (the first of the transition).
    prev_stop = np.r_[0, stops[:-1]]
    new_run = np.r_[True, ch[1:] != ch[:-1]] | after_gap
    t_edge = np.where(new_run, t[starts],
                      0.5 * (t[np.maximum(prev_stop - 1, 0)] + t[np.minimum(prev_stop, t.size - 1)]))
    return Steps(channel=ch.astype(np.int64), start=starts.astype(np.int64),
                 stop=stops.astype(np.int64), w_start=w0.astype(np.int64),
                 t_start=t[starts], t_stop=t[stops - 1], t_edge=t_edge, t_window=t[w0],
                 current=mi,
                 voltage=mv, u_current=ui, u_voltage=uv, sd_current=sd_i, sd_voltage=sd_v,
                 n_window=wl.astype(np.int64), n_eff=n_eff, drift=drift, settled=settled,
                 after_gap=after_gap.astype(bool), clipped=clipped, threshold=thr,
                 noise=noise, channels=trace.channels)


def search_rows(t, starts, stops, target):
    """First row r in [start, stop) of each range with t[r] ≥ target (``stop`` where none):
    a binary search run on all ranges at once (about log2 of the longest range passes),
    valid because a channel's rows are in time order."""
    lo, hi = starts.astype(np.int64).copy(), stops.astype(np.int64).copy()
    while True:
        active = lo < hi
        if not np.any(active):
            return lo
        mid = (lo + hi) // 2
        right = active & (t[np.minimum(mid, t.size - 1)] < target)
        lo = np.where(right, mid + 1, lo)
        hi = np.where(active & ~right, mid, hi)


def settled_readings_arrays(steps: Steps, *, include_unsettled: bool = False) -> dict:
    """The settled readings as plain arrays (a readings table): one row per step, the
    unsettled and clipped steps left out unless ``include_unsettled`` (clipped ones always
    left out: their voltage is the meter's range, not the source's).

    Keys: ``dut``, ``step`` (1-based step number in the trace), ``time`` (s, end of the
    step), ``current``, ``voltage``, ``u_current``, ``u_voltage``.
    """
    keep = ~steps.clipped if include_unsettled else (steps.settled & ~steps.clipped)
    names = np.asarray(steps.channels, dtype=object)
    return {"dut": names[steps.channel[keep]], "step": np.flatnonzero(keep) + 1,
            "time": steps.t_stop[keep], "current": steps.current[keep],
            "voltage": steps.voltage[keep], "u_current": steps.u_current[keep],
            "u_voltage": steps.u_voltage[keep]}


def steps_to_readings(steps: Steps, *, source: str = "<trace>", voltage_accuracy=None,
                      current_accuracy=None, include_unsettled: bool = False) -> Readings:
    """Settled readings as :class:`Readings` for the ordinary fit.

    Weighting: with meter accuracies given, the readings carry the meters' model (gain and
    offset shared by the sweep, as for any readings file) and the fit's own Type A
    estimate from the scatter about the line covers the random part; without them, each
    reading is weighted by its window's Type A uncertainty of the mean. The window's u is
    always reported with the steps.
    """
    a = settled_readings_arrays(steps, include_unsettled=include_unsettled)
    if a["voltage"].size == 0:
        raise ReadingsFileError(source, "no settled step to fit (every step is flagged "
                                        "unsettled or clipped; see the steps table, or "
                                        "lengthen the steps)")
    meters = voltage_accuracy is not None or current_accuracy is not None
    return Readings.from_arrays(
        voltage=a["voltage"], current=a["current"], dut=a["dut"], time=a["time"],
        u_voltage=None if meters else a["u_voltage"],
        u_current=None if meters else a["u_current"],
        voltage_accuracy=voltage_accuracy, current_accuracy=current_accuracy,
        source=source, meta={"from_trace": True, "steps": a["step"].tolist()})


def steps_columns(steps: Steps) -> dict:
    """The steps table as named columns (units in the names), for CSV and JSON."""
    names = np.asarray(steps.channels, dtype=object)
    return {
        "channel": names[steps.channel], "step": np.arange(1, len(steps) + 1),
        "t_start_s": steps.t_start, "t_stop_s": steps.t_stop,
        "duration_s": steps.duration, "current_A": steps.current,
        "u_current_A": steps.u_current, "voltage_V": steps.voltage,
        "u_voltage_V": steps.u_voltage, "sd_voltage_V": steps.sd_voltage,
        "window_start_s": steps.t_window,
        "n_window": steps.n_window, "n_eff": steps.n_eff, "drift_V": steps.drift,
        "settled": steps.settled, "clipped": steps.clipped, "after_gap": steps.after_gap,
        "rest": steps.is_rest,
    }


def step_warnings(steps: Steps) -> list[str]:
    """One line per kind of doubtful step (unsettled, clipped, after a gap)."""
    out = []
    for mask, text in ((~steps.settled, "still drifting at the end (too short to settle; "
                                        "left out of the readings)"),
                       (steps.clipped, "at the voltmeter's range (clipped; left out)"),
                       (steps.after_gap, "after a gap in the time stamps")):
        k = np.flatnonzero(mask) + 1
        if k.size:
            shown = ", ".join(str(x) for x in k[:10]) + (", …" if k.size > 10 else "")
            out.append(f"{k.size} step(s) {text}: {shown}")
    return out
