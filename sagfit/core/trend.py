"""Aging trends of internal resistance across a history of fits, for many DUTs at once.

Why this module stays whole at about 670 lines (over the ~500 of the house rule): the
steps share the sorted record arrays and per-DUT indexes built at the top of
:func:`analyse_trends`; split, each part would rebuild or pass a dozen of them.

Pure core: arrays of recorded fits in (one row per DUT per test), a frozen columnar
``Trends`` out. Nothing here opens a file or knows about the database.

Method, per DUT (all DUTs together, sums with ``np.bincount``):

1. **Baseline** Rth_B: the first record (default), the record on a stated date, or a
   stated value.
2. **Change** from baseline to the latest record, c = 100·(Rth_L/Rth_B − 1) %, with
   u²(c) = 100²·[(u_L/Rth_B)² + (Rth_L·u_B/Rth_B²)²] (GUM law of propagation,
   JCGM 100:2008 5.1.2; with the same instruments on both dates only the random parts
   enter, their shared calibration error cancelling in the ratio; otherwise the two
   tests are taken as uncorrelated).
3. **Rate**: weighted least-squares line Rth(t) = a + b·(t − t_L), weights 1/u²(Rth)
   (the York et al. 2004 kernel of :func:`sagfit.fit.york_line` with no error in t,
   which is WLS; N. R. Draper, H. Smith, *Applied Regression Analysis*, 3rd ed. (1998),
   ch. 9). Month-to-month scatter (temperature, state of charge, contacts) usually
   exceeds one fit's uncertainty, so the covariance is multiplied by
   S² = max(1, χ²/ν), ν = n − 2 (PDG convention), and intervals then use Student t with
   ν degrees of freedom; without scatter beyond the stated uncertainties, the normal
   quantile. A rate is *significantly above zero* when its lower confidence limit is
   above zero. Records taken with the same instrument share its systematic error
   (GUM 5.2, F.1.2.1): the weights are the random parts, and each instrument's shared
   part enters as one common shift of its records (:func:`_shared_parts`), which a line
   absorbs into its level unless the instrument changed.
4. **Projected crossing** of the threshold T: t* = t_L + (T − a)/b, with Fieller's
   interval — the set of t where |a + b·t − T| ≤ k·√var(a + b·t) (E. C. Fieller,
   "Some problems in interval estimation", J. R. Stat. Soc. B 16, 175–185 (1954);
   citation from memory). The interval is bounded exactly when the rate is
   significantly above zero; otherwise there is no projected crossing ("not within the
   tested trend").
5. **Fleet view**: each DUT's latest Rth against the median latest Rth of its group
   (DUTs sharing a group label, else DUTs whose latest test was on the same day).

Flags: ``aging`` (warning; the latest Rth is at or above the threshold, or the rate is
significantly above zero and the projected crossing is within the horizon),
``outlier-in-group`` (warning; latest Rth more than ``group_excess_pct`` above the
group median, groups of three or more), ``insufficient-history`` (info; fewer than
``min_records`` records on two or more dates, so no rate), ``baseline-fallback`` (info;
no record on the baseline date).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
from scipy import special

from ._frozen import freeze_arrays
from .errors import InputError
from .fit import segment_scope, york_line
from .formatting import format_estimate, format_percent, format_value
from .results import Flag

__all__ = ["Baseline", "Threshold", "Trends", "analyse_trends", "iso_date", "DAY",
           "DEFAULT_GROUP_EXCESS_PCT", "DEFAULT_HORIZON_DAYS", "DEFAULT_THRESHOLD_RATIO"]

DAY = 86400.0
#: Common practice in stationary battery maintenance (from memory, no source checked):
#: a cell whose ohmic value is about 30 % above the median of its string-mates is
#: investigated. A setting (``--group-excess``), not a law.
DEFAULT_GROUP_EXCESS_PCT = 30.0
#: Common practice (from memory): an ohmic value risen to about 1.5× its baseline calls
#: for replacement planning. A setting (``--threshold``).
DEFAULT_THRESHOLD_RATIO = 1.5
DEFAULT_HORIZON_DAYS = 180.0


def iso_date(t: float) -> str | None:
    """Unix time (s) → ``YYYY-MM-DD`` (UTC), ``None`` for NaN or out of range."""
    if t is None or not math.isfinite(t):
        return None
    try:
        return _dt.datetime.fromtimestamp(float(t), _dt.timezone.utc).date().isoformat()
    except (OverflowError, OSError, ValueError):
        return None


@dataclass(frozen=True, slots=True)
class Baseline:
    """Where the baseline Rth comes from: ``kind`` ``"first"``, ``"date"`` (``time`` =
    any instant of that UTC day, s) or ``"value"`` (``value`` in Ω)."""

    kind: str = "first"
    time: float = math.nan
    value: float = math.nan

    def __post_init__(self):
        if self.kind not in ("first", "date", "value"):
            raise InputError(f"baseline kind must be first, date or value (got {self.kind!r})")
        if self.kind == "value" and not (math.isfinite(self.value) and self.value > 0):
            raise InputError(f"a baseline resistance must be positive (got {self.value!r} Ω)")
        if self.kind == "date" and not math.isfinite(self.time):
            raise InputError("a baseline date is needed")

    def describe(self) -> str:
        if self.kind == "first":
            return "first record"
        if self.kind == "date":
            return f"record of {iso_date(self.time)}"
        return format_value(self.value, "Ω")


@dataclass(frozen=True, slots=True)
class Threshold:
    """The Rth at which a DUT counts as aged: ``kind`` ``"ratio"`` (× baseline),
    ``"percent"`` (% above baseline) or ``"absolute"`` (Ω)."""

    kind: str = "ratio"
    value: float = DEFAULT_THRESHOLD_RATIO

    def __post_init__(self):
        ok = {"ratio": lambda v: v > 1, "percent": lambda v: v > 0,
              "absolute": lambda v: v > 0}
        if self.kind not in ok:
            raise InputError(f"threshold kind must be ratio, percent or absolute "
                             f"(got {self.kind!r})")
        if not (math.isfinite(self.value) and ok[self.kind](self.value)):
            need = "above 1" if self.kind == "ratio" else "positive"
            raise InputError(f"a {self.kind} threshold must be {need} (got {self.value!r})")

    def resolve(self, baseline: np.ndarray) -> np.ndarray:
        """Threshold in Ω per DUT."""
        if self.kind == "ratio":
            return baseline * self.value
        if self.kind == "percent":
            return baseline * (1.0 + self.value / 100.0)
        return np.full(baseline.shape, self.value)

    def describe(self) -> str:
        if self.kind == "ratio":
            return f"{self.value:g}× baseline"
        if self.kind == "percent":
            return f"{self.value:g} % above baseline"
        return format_value(self.value, "Ω")


_FIELDS = ("records", "dates", "baseline_rth", "u_baseline", "baseline_time", "latest_rth",
           "u_latest", "latest_time", "threshold_rth", "change_pct", "u_change_pct", "rate",
           "u_rate", "rate_low", "rate_high", "fitted_latest", "chi2", "dof", "scale", "k",
           "crossing_time", "crossing_low", "crossing_high", "crossed", "group_median",
           "group_size", "excess_pct")


@dataclass(frozen=True)
class Trends:
    """Trend results for many DUTs, as arrays (one element per DUT).

    Attributes
    ----------
    duts : tuple of str
    records, dates : ndarray of int
        Records used and distinct test days.
    baseline_rth, u_baseline, baseline_time : ndarray
        Baseline Rth (Ω), its standard uncertainty (0 for a stated value) and date (Unix s,
        NaN for a stated value).
    latest_rth, u_latest, latest_time : ndarray
        Latest recorded Rth (Ω), its standard uncertainty and date (Unix s).
    threshold_rth : ndarray
        Threshold in Ω.
    change_pct, u_change_pct : ndarray
        Change of the latest Rth from the baseline (%), and its standard uncertainty.
    rate, u_rate, rate_low, rate_high : ndarray
        Slope of Rth against time (Ω per 30 days), its standard uncertainty (scale
        included) and confidence interval; NaN with too little history.
    fitted_latest : ndarray
        Trend line's Rth at the latest date (Ω).
    chi2, dof, scale, k : ndarray
        Trend fit χ², degrees of freedom, covariance factor S², coverage factor.
    crossing_time, crossing_low, crossing_high : ndarray
        Projected threshold crossing (Unix s) and its Fieller interval; NaN when the rate
        is not significantly above zero.
    crossed : ndarray of bool
        Latest Rth at or above the threshold.
    group_key : tuple of str
        The fleet group each DUT was compared within.
    group_median, group_size, excess_pct : ndarray
        Median latest Rth of the group (Ω), DUTs in it, and this DUT's excess over it (%).
    flags : tuple of tuple of Flag
    confidence : float
    settings : mapping
    """

    duts: tuple[str, ...]
    records: np.ndarray
    dates: np.ndarray
    baseline_rth: np.ndarray
    u_baseline: np.ndarray
    baseline_time: np.ndarray
    latest_rth: np.ndarray
    u_latest: np.ndarray
    latest_time: np.ndarray
    threshold_rth: np.ndarray
    change_pct: np.ndarray
    u_change_pct: np.ndarray
    rate: np.ndarray
    u_rate: np.ndarray
    rate_low: np.ndarray
    rate_high: np.ndarray
    fitted_latest: np.ndarray
    chi2: np.ndarray
    dof: np.ndarray
    scale: np.ndarray
    k: np.ndarray
    crossing_time: np.ndarray
    crossing_low: np.ndarray
    crossing_high: np.ndarray
    crossed: np.ndarray
    group_key: tuple[str, ...]
    group_median: np.ndarray
    group_size: np.ndarray
    excess_pct: np.ndarray
    flags: tuple
    confidence: float
    as_of: float
    settings: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self):
        freeze_arrays(self, _FIELDS)

    def __len__(self) -> int:
        return len(self.duts)

    def __repr__(self) -> str:
        return f"<Trends {len(self)} DUT(s), {int(self.flagged.sum())} flagged>"

    @property
    def expanded_latest(self) -> np.ndarray:
        """Expanded uncertainty U = k·u of the latest Rth, k the normal quantile at
        ``confidence`` (GUM 6.2)."""
        return float(special.ndtri(0.5 * (1.0 + self.confidence))) * self.u_latest

    @property
    def flagged(self) -> np.ndarray:
        """DUTs with a warning flag (``aging`` or ``outlier-in-group``)."""
        return np.array([any(f.severity == "warning" for f in fl) for fl in self.flags], bool)

    def codes(self, i: int) -> tuple[str, ...]:
        return tuple(f.code for f in self.flags[i])

    def index(self, dut: str) -> int:
        try:
            return self.duts.index(str(dut))
        except ValueError:
            raise KeyError(dut) from None

    def take(self, names: Sequence[str]) -> "Trends":
        """A new ``Trends`` with only the named DUTs, in that order (each keeps the fleet
        comparison made with its whole group)."""
        idx = np.array([self.index(d) for d in names], dtype=np.int64)
        changes = {f: getattr(self, f)[idx] for f in _FIELDS}
        return dataclasses.replace(
            self, duts=tuple(self.duts[i] for i in idx),
            group_key=tuple(self.group_key[i] for i in idx),
            flags=tuple(self.flags[i] for i in idx), **changes)

    def to_dicts(self) -> list[dict]:
        """Plain JSON-ready dicts, SI units (the ``results`` of ``sagfit trend --json``)."""
        # columns converted once (lists of Python floats/None, date strings), not per DUT
        c = {name: _floats(getattr(self, name)) for name in (
            "baseline_rth", "u_baseline", "latest_rth", "u_latest", "threshold_rth",
            "change_pct", "u_change_pct", "rate", "u_rate", "rate_low", "rate_high", "chi2",
            "k", "fitted_latest", "group_median", "excess_pct")}
        c["U"] = _floats(self.expanded_latest)
        c["S"] = _floats(np.sqrt(np.where(self.scale > 0, self.scale, np.nan)))
        dates = {name: _dates(getattr(self, name)) for name in (
            "baseline_time", "latest_time", "crossing_time", "crossing_low", "crossing_high")}
        records, ndates, dof = self.records.tolist(), self.dates.tolist(), self.dof.tolist()
        crossed, size = self.crossed.tolist(), self.group_size.tolist()
        out = []
        for i in range(len(self)):
            out.append({
                "dut": self.duts[i],
                "records": records[i],
                "dates": ndates[i],
                "baseline_rth": c["baseline_rth"][i],
                "baseline": {"value": c["baseline_rth"][i], "u": c["u_baseline"][i],
                             "date": dates["baseline_time"][i]},
                "latest_rth": {"value": c["latest_rth"][i], "u": c["u_latest"][i],
                               "U": c["U"][i], "date": dates["latest_time"][i]},
                "threshold_rth": c["threshold_rth"][i],
                "change_pct": {"value": c["change_pct"][i], "u": c["u_change_pct"][i]},
                "rate_per_30d": {"value": c["rate"][i], "u": c["u_rate"][i],
                                 "ci": [c["rate_low"][i], c["rate_high"][i]], "unit": "ohm"},
                "projected_crossing": dates["crossing_time"][i],
                "projected_crossing_ci": [dates["crossing_low"][i], dates["crossing_high"][i]],
                "threshold_crossed": crossed[i],
                "trend_fit": {"chi2": c["chi2"][i], "dof": dof[i], "scale_factor": c["S"][i],
                              "coverage_factor": c["k"][i],
                              "fitted_latest_rth": c["fitted_latest"][i]},
                "group": {"key": self.group_key[i], "size": size[i],
                          "median_rth": c["group_median"][i], "excess_pct": c["excess_pct"][i]},
                "flags": [f.to_dict() for f in self.flags[i]],
            })
        return out


def _floats(a) -> list:
    """Array → list of float, ``None`` where not finite (JSON has no NaN)."""
    a = np.asarray(a, float)
    return np.where(np.isfinite(a), a, None).tolist()


def _dates(t) -> list:
    """Unix times → ``YYYY-MM-DD`` strings (UTC), ``None`` where not finite (vectorised)."""
    t = np.asarray(t, float)
    ok = np.isfinite(t) & (np.abs(t) < 1e13)
    out = np.full(t.shape, None, dtype=object)
    if ok.any():
        out[ok] = np.datetime_as_string(np.floor(t[ok]).astype("int64").astype("datetime64[s]"),
                                        unit="D")
    return out.tolist()


def _f(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def _group_median(codes: np.ndarray, values: np.ndarray, m: int):
    """Median of ``values`` within each code 0..m-1 (vectorised), and the group sizes."""
    order = np.lexsort((values, codes))
    vs = values[order]
    cnt = np.bincount(codes, minlength=m)
    start = np.concatenate(([0], np.cumsum(cnt)[:-1]))
    med = np.full(m, np.nan)
    ok = cnt > 0
    lo = start + (cnt - 1) // 2
    hi = start + cnt // 2
    med[ok] = 0.5 * (vs[lo[ok]] + vs[hi[ok]])
    return med, cnt


@segment_scope
def analyse_trends(
    dut_index,
    duts: Sequence[str],
    time,
    rth,
    u_rth,
    *,
    labels: Sequence[str] | None = None,
    baseline: Baseline = Baseline(),
    threshold: Threshold = Threshold(),
    horizon_days: float = DEFAULT_HORIZON_DAYS,
    group_excess_pct: float = DEFAULT_GROUP_EXCESS_PCT,
    confidence: float = 0.95,
    min_records: int = 3,
    as_of: float | None = None,
    u_rth_shared=None,
    instrument: Sequence[str] | None = None,
) -> Trends:
    """Baseline, change, rate, projected crossing and fleet comparison of every DUT.

    Parameters
    ----------
    dut_index : array_like of int, shape (n,)
        Which DUT each record belongs to (indexes ``duts``; any order).
    duts : sequence of str
        DUT names.
    time : array_like of float
        Test date of each record (Unix time, s).
    rth, u_rth : array_like of float
        Recorded internal resistance (Ω) and its standard uncertainty (Ω); records with
        no usable uncertainty make that DUT's trend unweighted (Type A).
    labels : sequence of str, optional
        Group label per DUT (for example its string); ``""`` for none.
    baseline : Baseline
    threshold : Threshold
    horizon_days : float
        Flag ``aging`` when the projected crossing is within this many days of ``as_of``.
    group_excess_pct : float
        Flag ``outlier-in-group`` above this excess over the group median (%).
    confidence : float
        Level of the intervals and of the "significantly above zero" test.
    min_records : int
        Records (on at least two days) needed for a rate.
    as_of : float, optional
        The date the horizon counts from (Unix s); default the latest record of all.
    u_rth_shared : array_like of float, optional
        Per record, the part of ``u_rth`` that came from the meters' systematic errors
        (gain and offset shared by the sweep; NaN or 0 where unknown or none).
    instrument : sequence of str, optional
        Per record, which instruments took it (``""`` when unknown). Records of one DUT
        taken with the same instrument share its systematic error (GUM 5.2, F.1.2.1): it
        moves them together, so it cannot make a slope. The rate is fitted with the
        random parts as weights and the shared parts are propagated through the line by
        their sensitivities, one common shift per instrument: with one instrument
        throughout they leave the rate alone and stay in the level (the latest value, the
        projected crossing); a change of instrument makes them a step the rate does see.
        Records with no known instrument are taken as independent (their whole
        uncertainty weights the rate: the cautious reading).

    Returns
    -------
    Trends
    """
    if not (0.0 < confidence < 1.0):
        raise InputError(f"confidence must be between 0 and 1 (got {confidence!r})")
    if not (math.isfinite(horizon_days) and horizon_days >= 0):
        raise InputError(f"the horizon must be a non-negative number of days "
                         f"(got {horizon_days!r})")
    if not (math.isfinite(group_excess_pct) and group_excess_pct > 0):
        raise InputError(f"the group excess must be a positive percentage "
                         f"(got {group_excess_pct!r})")
    min_records = max(3, int(min_records))
    duts = tuple(str(d) for d in duts)
    m = len(duts)
    g0 = np.asarray(dut_index, np.int64).ravel()
    t0 = np.asarray(time, float).ravel()
    r0 = np.asarray(rth, float).ravel()
    u0 = np.asarray(u_rth, float).ravel()
    sh0 = (np.zeros(u0.size) if u_rth_shared is None
           else np.nan_to_num(np.asarray(u_rth_shared, float).ravel(), nan=0.0))
    inst0 = (np.full(u0.size, "", dtype=object) if instrument is None
             else np.asarray(list(instrument), dtype=object))
    if not (g0.size == t0.size == r0.size == u0.size == sh0.size == inst0.size):
        raise InputError("trend input arrays differ in length")
    if g0.size and (g0.min() < 0 or g0.max() >= m):
        raise InputError("trend input: DUT index out of range")
    bad = ~(np.isfinite(t0) & np.isfinite(r0))
    if bad.any():
        raise InputError(f"trend input: record {int(np.flatnonzero(bad)[0]) + 1} has no date "
                         "or no Rth")
    labels = tuple("" if x is None else str(x) for x in (labels or [""] * m))
    if len(labels) != m:
        raise InputError("trend input: one group label per DUT is needed")

    order = np.lexsort((t0, g0))
    g, t, r, u = g0[order], t0[order], r0[order], u0[order]
    inst = inst0[order].astype(str)
    # the shared part counts as shared only where the instrument is known
    sh = np.where((inst != "") & np.isfinite(u), np.clip(sh0[order], 0.0, np.abs(u)), 0.0)
    u_rand = np.sqrt(np.maximum(u * u - sh * sh, 0.0))
    n = np.bincount(g, minlength=m)
    present = n > 0
    start = np.concatenate(([0], np.cumsum(n)[:-1]))
    last = start + n - 1
    si = np.where(present, start, 0)
    li = np.where(present, last, 0)
    nan = np.full(m, np.nan)

    day = np.floor(t / DAY)
    new_day = np.ones(g.size, bool)
    if g.size > 1:
        new_day[1:] = (g[1:] != g[:-1]) | (day[1:] != day[:-1])
    dates = np.bincount(g, weights=new_day, minlength=m).astype(np.int64)

    latest = np.where(present, r[li], np.nan)
    u_latest = np.where(present, u[li], np.nan)
    t_latest = np.where(present, t[li], np.nan)
    if as_of is None:
        as_of = float(np.nanmax(t_latest)) if present.any() else math.nan

    # ---- baseline
    fallback = np.zeros(m, bool)
    if baseline.kind == "value":
        b_rth, b_u, b_t = np.full(m, baseline.value), np.zeros(m), nan.copy()
        b_idx = np.full(m, -1)
    else:
        b_idx = si.copy()
        if baseline.kind == "date":
            hit = day == math.floor(baseline.time / DAY)
            cand = np.where(hit, np.arange(g.size), g.size)
            first_hit = np.full(m, g.size)
            if g.size:
                first_hit[present] = np.minimum.reduceat(cand, start[present])
            found = first_hit < g.size
            fallback = present & ~found
            b_idx = np.where(found, first_hit, si)
        b_rth = np.where(present, r[b_idx], np.nan)
        b_u = np.where(present, u[b_idx], np.nan)
        b_t = np.where(present, t[b_idx], np.nan)
    same = b_idx == li
    thr = threshold.resolve(b_rth)
    # the same instrument at both ends: its shared error cancels in the ratio
    same_inst = np.zeros(m, bool)
    if baseline.kind != "value":
        same_inst = present & (inst[b_idx] == inst[li]) & (inst[li] != "")
    ul = np.where(same_inst, u_rand[li], u_latest)
    ub = np.where(same_inst, u_rand[np.maximum(b_idx, 0)], b_u)
    with np.errstate(divide="ignore", invalid="ignore"):
        change = 100.0 * (latest / b_rth - 1.0)
        u_change = 100.0 * np.sqrt((ul / b_rth) ** 2 + (latest * ub / b_rth ** 2) ** 2)
    u_change = np.where(same, 0.0, u_change)

    # ---- weighted trend line, x in days from each DUT's latest test
    has_u_row = np.isfinite(u) & (u > 0)
    has_u = np.bincount(g, weights=~has_u_row, minlength=m) == 0
    enough = present & (n >= min_records) & (dates >= 2)
    rows = enough[g]
    gi, x, y = g[rows], (t[rows] - t_latest[g[rows]]) / DAY, r[rows]
    u_w = np.where(u_rand[rows] > 0, u_rand[rows], u[rows])  # random part as the weight
    sy = np.where(has_u[gi], np.where(has_u_row[rows], u_w, 1.0), 1.0)
    rate, u_rate, lo_r, hi_r = nan.copy(), nan.copy(), nan.copy(), nan.copy()
    a_fit, chi2, scale, k = nan.copy(), nan.copy(), nan.copy(), nan.copy()
    cross, c_lo, c_hi = nan.copy(), nan.copy(), nan.copy()
    dof = np.where(enough, n - 2, 0)
    if rows.any():
        res = york_line(x, y, 0.0, sy, group=gi)
        mm = res["a"].size
        sel = np.zeros(m, bool)
        sel[:mm] = enough[:mm]
        idx = np.flatnonzero(sel)
        a, b = res["a"][idx], res["b"][idx]
        va, vb, cab, c2 = res["var_a"][idx], res["var_b"][idx], res["cov_ab"][idx], res["chi2"][idx]
        nu = dof[idx].astype(float)
        sys = _shared_parts(gi, x, sy, np.where(has_u[gi], sh[rows], 0.0), inst[rows], m)
        red = c2 / (nu + sys[3][idx])  # χ² against its expectation under the model
        stated = has_u[idx]
        s2 = np.where(stated, np.maximum(1.0, red), red)
        typea = ~stated | (s2 > 1.0)
        p = 0.5 * (1.0 + confidence)
        kk = np.where(typea, special.stdtrit(nu, p), float(special.ndtri(p)))
        va, vb, cab = va * s2, vb * s2, cab * s2
        va, vb, cab = va + sys[0][idx], vb + sys[1][idx], cab + sys[2][idx]
        rate[idx], u_rate[idx] = 30.0 * b, 30.0 * np.sqrt(vb)
        lo_r[idx], hi_r[idx] = rate[idx] - kk * u_rate[idx], rate[idx] + kk * u_rate[idx]
        a_fit[idx], chi2[idx], scale[idx], k[idx] = a, c2, s2, kk
        # Fieller: (a + b·x − T)² = k²·(va + 2x·cab + x²·vb), bounded iff b − k·√vb > 0
        d = a - thr[idx]
        qa = b * b - kk * kk * vb
        qb = 2.0 * (b * d - kk * kk * cab)
        qc = d * d - kk * kk * va
        signif = (b > 0) & (qa > 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            root = np.sqrt(np.maximum(qb * qb - 4.0 * qa * qc, 0.0))
            x1 = (-qb - root) / (2.0 * qa)
            x2 = (-qb + root) / (2.0 * qa)
            xs = -d / b
        tl = t_latest[idx]
        cross[idx] = np.where(signif, tl + xs * DAY, np.nan)
        c_lo[idx] = np.where(signif, tl + x1 * DAY, np.nan)
        c_hi[idx] = np.where(signif, tl + x2 * DAY, np.nan)

    crossed = present & (latest >= thr)
    soon = np.isfinite(cross) & (cross - as_of <= horizon_days * DAY)
    aging = crossed | soon

    # ---- fleet view
    keys = tuple(lab if lab else f"tested {day}" for lab, day in zip(labels, _dates(t_latest)))
    uniq, codes = np.unique(np.asarray(keys, dtype=object).astype(str), return_inverse=True)
    fin = present & np.isfinite(latest)
    med, size = nan.copy(), np.zeros(m, np.int64)
    if fin.any():
        gm, gs = _group_median(codes[fin], latest[fin], uniq.size)
        med, size = gm[codes], gs[codes]
        med = np.where(fin, med, np.nan)
        size = np.where(fin, size, 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        excess = 100.0 * (latest / med - 1.0)
    outlier = fin & (size >= 3) & (excess > group_excess_pct)
    insufficient = present & ~enough

    flags = _flags(m, duts, aging, crossed, soon, outlier, insufficient, fallback, latest,
                   u_latest, thr, change, u_change, rate, u_rate, cross, c_lo, c_hi, as_of,
                   med, excess, keys, n, dates, min_records, group_excess_pct, horizon_days,
                   baseline, confidence)
    settings = {"baseline": baseline.describe(), "threshold": threshold.describe(),
                "shared_errors": ("records with the same instrument share its systematic "
                                  "error: not in the rate's weights, kept in the level"
                                  if bool(np.any(sh > 0)) else
                                  "none known (each record's uncertainty taken as "
                                  "independent)"),
                "horizon_days": float(horizon_days), "group_excess_pct": float(group_excess_pct),
                "confidence": float(confidence), "min_records": min_records,
                "as_of": iso_date(as_of)}
    return Trends(
        duts=duts, records=n, dates=dates, baseline_rth=b_rth, u_baseline=b_u,
        baseline_time=b_t, latest_rth=latest, u_latest=u_latest, latest_time=t_latest,
        threshold_rth=thr, change_pct=change, u_change_pct=u_change, rate=rate, u_rate=u_rate,
        rate_low=lo_r, rate_high=hi_r, fitted_latest=a_fit, chi2=chi2, dof=dof, scale=scale,
        k=k, crossing_time=cross, crossing_low=c_lo, crossing_high=c_hi, crossed=crossed,
        group_key=keys, group_median=med, group_size=size, excess_pct=excess,
        flags=flags, confidence=float(confidence), as_of=float(as_of), settings=settings)


def _shared_parts(g, x, sy, sh, inst, m):
    """What errors shared by the records of one DUT taken with the same instrument do to
    the weighted line: one common shift per (DUT, instrument) of size ``sh`` per record
    (perfectly correlated, GUM 5.2.2 with r = 1).

    Returns ``(var_a, var_b, cov_ab, extra_chi2)`` per DUT: the shifts propagated through
    the line by its sensitivities ∂b/∂y_i = w_i(x_i − x̄)/Sxx and
    ∂a/∂y_i = w_i/Σw − x̄·∂b/∂y_i (a is the level at x = 0), and how much they add to the
    expected weighted residual sum of squares, Σ_g ‖s_g − projection of s_g on the line‖²
    in the weights' norm (0 for one instrument with a constant shift: a line absorbs it;
    the step of a change of instrument shows in the residuals and must not be read as
    excess scatter)."""
    zero = np.zeros(m)
    if not np.any(sh > 0):
        return zero, zero, zero, zero
    w = 1.0 / (sy * sy)
    sw = np.bincount(g, w, m)
    with np.errstate(divide="ignore", invalid="ignore"):
        xbar = np.bincount(g, w * x, m) / sw
        dx = x - xbar[g]
        sxx = np.bincount(g, w * dx * dx, m)
        db = w * dx / sxx[g]
        da = w / sw[g] - xbar[g] * db
    # one code per (DUT, instrument)
    _, code = np.unique(np.char.add(g.astype(str), np.char.add("\x1f", inst.astype(str))),
                        return_inverse=True)
    code = code.ravel()
    nc = int(code.max()) + 1 if code.size else 0
    ca = np.bincount(code, np.nan_to_num(da * sh), nc)
    cb = np.bincount(code, np.nan_to_num(db * sh), nc)
    owner = np.zeros(nc, np.int64)
    owner[code] = g
    # residual norm of each shift pattern after a weighted line fit (centred design)
    s0 = np.bincount(code, w * sh, nc)
    s1 = np.bincount(code, w * sh * dx, nc)
    s2 = np.bincount(code, w * sh * sh, nc)
    with np.errstate(divide="ignore", invalid="ignore"):
        proj = s0 * s0 / sw[owner] + s1 * s1 / sxx[owner]
    q = np.maximum(np.nan_to_num(s2 - proj), 0.0)
    return (np.bincount(owner, ca * ca, m), np.bincount(owner, cb * cb, m),
            np.bincount(owner, ca * cb, m), np.bincount(owner, q, m))


def _flags(m, duts, aging, crossed, soon, outlier, insufficient, fallback, latest, u_latest,
           thr, change, u_change, rate, u_rate, cross, c_lo, c_hi, as_of, med, excess, keys,
           n, dates, min_records, group_excess_pct, horizon_days, baseline, confidence):
    """Flag messages, built only for the DUTs that carry a flag."""
    flags: list[list[Flag]] = [[] for _ in range(m)]
    lvl = f"{confidence * 100:g} %"
    for i in np.flatnonzero(aging):
        z = float(special.ndtri(0.5 * (1.0 + confidence)))
        now = format_estimate(latest[i], z * u_latest[i], "Ω") + f" (U at {lvl})"
        ch = format_percent(change[i], u_change[i])
        if crossed[i]:
            msg = (f"latest Rth {now} is at or above the threshold {format_value(thr[i], 'Ω')} "
                   f"({ch} from baseline)")
        else:
            days = (cross[i] - as_of) / DAY
            when = (f"about {days:.0f} days after {iso_date(as_of)}" if days >= 0
                    else "already, by the trend line")
            hi = iso_date(c_hi[i]) or "later"
            msg = (f"Rth rising {format_estimate(rate[i], u_rate[i], 'Ω')} per 30 days "
                   f"(significantly above zero at {lvl}); the trend crosses the threshold "
                   f"{format_value(thr[i], 'Ω')} on {iso_date(cross[i])} ({when}; interval "
                   f"{iso_date(c_lo[i])} to {hi}), within the {horizon_days:g}-day horizon")
        flags[i].append(Flag("aging", "warning", msg + "; plan a capacity test or replacement"))
    for i in np.flatnonzero(outlier):
        flags[i].append(Flag(
            "outlier-in-group", "warning",
            f"latest Rth {format_value(latest[i], 'Ω')} is {excess[i]:.0f} % above the median "
            f"{format_value(med[i], 'Ω')} of its group ({keys[i]}); the limit is "
            f"{group_excess_pct:g} % (common practice): check connections, then the cell"))
    for i in np.flatnonzero(insufficient):
        flags[i].append(Flag(
            "insufficient-history", "info",
            f"{n[i]} record(s) on {dates[i]} date(s): a trend needs {min_records} records on "
            "two or more dates; no rate or projection yet"))
    if baseline.kind == "date":
        for i in np.flatnonzero(fallback):
            flags[i].append(Flag(
                "baseline-fallback", "info",
                f"no record on the baseline date {iso_date(baseline.time)}; the first record "
                "was used as the baseline"))
    return tuple(tuple(f) for f in flags)
