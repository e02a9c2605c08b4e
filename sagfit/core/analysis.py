"""The whole analysis of one readings set: fit every DUT, then check it.

This is what ``sagfit.fit`` runs and what every command builds on. Pure core: arrays
in, frozen results out.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from ._parallel import WORKERS, map_parallel
from .checks import diagnose, knee_rows
from .errors import InputError
from .fit import chi2_upper, fit_lines, segment_scope
from .formatting import format_value
from .predict import prediction_fields
from .readings import Readings
from .results import Fits, Flag

__all__ = ["fit", "type_a_note"]

#: Huber's tuning constant (95 % efficiency at the normal distribution): P. J. Huber,
#: E. M. Ronchetti, *Robust Statistics*, 2nd ed. (2009), ch. 4 (value from memory: 1.345).
HUBER_C = 1.345
_IRLS_MAX = 50
#: A weight change below this moves the estimate by well under 0.1 % of its uncertainty.
_W_TOL = 1e-4


def fit(readings: Readings, *, confidence: float = 0.95, level: float = 0.01,
        current_range: tuple[float, float] | None = None, below_knee: bool = False,
        robust: bool = False) -> Fits:
    """Fit the Thevenin equivalent V = Vth − Rth·I of every DUT in ``readings``, then check it.

    Parameters
    ----------
    readings : Readings
        From :func:`sagfit.read_readings` or :meth:`sagfit.Readings.from_arrays`.
    confidence : float
        Level of the confidence intervals (default 0.95).
    level : float
        Significance level of the non-linearity checks (default 0.01).
    current_range : (lo, hi), optional
        Fit only readings with lo ≤ I ≤ hi (A).
    below_knee : bool
        Where a knee is found, refit only the readings below it (before it along the
        source curve) and check the refit again.
    robust : bool
        Refit with Huber's loss (iteratively reweighted York/WLS/OLS fits) so that an
        outlying reading loses weight instead of pulling the line.

    Returns
    -------
    Fits
        Columnar results; ``fits["U17"]`` gives one DUT's :class:`FitResult`. Every DUT
        carries the checks of :mod:`sagfit.core.checks` in ``diagnostics`` and ``flags``;
        ``settings`` records the options used.

    See :func:`sagfit.fit.fit_lines` for the method and its references.
    """
    if not (0.0 < level < 0.5) or not math.isfinite(level):
        raise InputError(f"level must be between 0 and 0.5 (got {level!r})")
    notes: dict[int, list[Flag]] = {}
    used = readings
    rows = np.arange(len(readings))           # rows of ``readings`` still in ``used``
    # why a reading was left out: 0 kept, 1 current range, 2 below the knee
    reason = np.zeros(len(readings), dtype=np.int8)
    if current_range is not None:
        lo, hi = (float(v) for v in current_range)
        if not lo < hi:
            raise InputError(f"current range: the low end {lo:g} A must be below the high "
                             f"end {hi:g} A")
        keep = (readings.current >= lo) & (readings.current <= hi)
        dropped = np.bincount(readings.group[~keep], minlength=readings.n_duts)
        used = readings.select(keep)
        reason[~keep] = 1
        rows = rows[keep]
        kept = used.counts()
        text = _range_text(lo, hi)
        for k in np.flatnonzero(dropped):
            notes.setdefault(int(k), []).append(Flag(
                "current-range", "info",
                f"fitted only the {kept[k]} readings with {text}; {dropped[k]} outside it "
                "were left out (--current-range)"))
    fits = _fit_checked(used, confidence, level, robust)
    if below_knee:
        fits, used, keep = _refit_below_knee(used, fits, confidence, level, robust, notes)
        reason[rows[~keep]] = 2
    extra = dict(fits.extra)
    excluded = reason != 0
    if excluded.any():
        extra["excluded_readings"] = _excluded(readings, reason)
    if notes:
        new = [tuple(notes.get(k, ())) for k in range(len(fits))]
        fits = fits.add_flags(new)
    extra["prediction"] = prediction_fields(used, fits)
    fits = fits.replace(extra=extra, used_rows=~excluded if excluded.any() else None)
    settings = dict(fits.settings)
    settings.update(level=float(level),
                    current_range=None if current_range is None
                    else [float(current_range[0]), float(current_range[1])],
                    below_knee=bool(below_knee), robust="huber" if robust else None)
    return fits.replace(settings=settings)


def _range_text(lo, hi):
    if math.isinf(lo):
        return f"I ≤ {format_value(hi, 'A')}"
    if math.isinf(hi):
        return f"I ≥ {format_value(lo, 'A')}"
    return f"{format_value(lo, 'A')} ≤ I ≤ {format_value(hi, 'A')}"


#: From this many DUTs on, the fit and the checks run on slices of the batch of about
#: ``CHUNK_DUTS`` DUTs each, two at a time in two threads. numpy releases the GIL inside its
#: array operations, so on a 2-core machine two slices run in about 60 % of the time of one
#: after the other; and slices of a bounded size reuse the same memory one after the other
#: instead of touching fresh pages for the whole batch (on 100,000 DUTs the page faults of
#: one whole-batch pass cost as much as the arithmetic). The slices are of equal size and
#: come in a multiple of the thread count, so that both threads finish together; larger
#: slices mean fewer numpy calls, so fewer hand-overs of the GIL between the threads
#: (100,000 DUTs in 8 slices of 12,500 were 5–20 % faster than in 13 of 8,192, whole
#: processes, alternated; 4 slices of 25,000 touched 20 % more fresh memory). Every DUT is
#: computed independently, so the results are the same as from one pass.
PARALLEL_DUTS = 20_000
CHUNK_DUTS = 12_500


def _fit_checked(readings, confidence, level, robust):
    m = readings.n_duts
    if robust or WORKERS < 2 or m < PARALLEL_DUTS:
        return _fit_checked_one(readings, confidence, level, robust)
    cuts = _cuts(m, CHUNK_DUTS, WORKERS)
    slices = [readings.dut_range(a, b) for a, b in zip(cuts[:-1], cuts[1:])]
    parts = map_parallel(lambda r: _fit_checked_one(r, confidence, level, robust), slices)
    return Fits.concat(parts).replace(settings={**parts[0].settings,
                                                "source": readings.source})


def _cuts(m: int, size: int, workers: int) -> list[int]:
    """Slice boundaries of ``m`` DUTs: a multiple of ``workers`` slices of equal size (±1),
    each close to ``size`` DUTs, so that the threads finish together."""
    k = workers * max(1, round(m / (size * workers)))
    return [m * j // k for j in range(k + 1)]


@segment_scope
def _fit_checked_one(readings, confidence, level, robust):
    fits = fit_lines(readings, confidence=confidence)
    if robust:
        fits = _robust(readings, fits, confidence)
    return diagnose(readings, fits, level=level)


def _refit_below_knee(readings, fits, confidence, level, robust, notes):
    keep = knee_rows(readings, fits)
    if keep.all():
        return fits, readings, keep
    g = readings.group
    before = readings.counts()
    kept = np.bincount(g[keep], minlength=readings.n_duts)
    changed = kept < before
    # a refit needs three readings to say anything; otherwise keep the full fit
    enough = kept >= 3
    keep = keep | ~(changed & enough)[g]
    sub = readings.select(keep)
    refit = _fit_checked(sub, confidence, level, robust)
    use = changed & enough
    knee = fits.diagnostics["knee"]
    for k in np.flatnonzero(changed):
        if use[k]:
            notes.setdefault(int(k), []).append(Flag(
                "below-knee", "info",
                f"refitted on the {kept[k]} readings below the knee at "
                f"I = {format_value(knee['current'][k], 'A')}, "
                f"V = {format_value(knee['voltage'][k], 'V')}; {before[k] - kept[k]} readings "
                "beyond it were left out (--below-knee). Isc and Pmax extrapolate this linear "
                "part: the source itself delivers no more than about "
                f"{format_value(knee['current'][k], 'A')}"))
        else:
            notes.setdefault(int(k), []).append(Flag(
                "below-knee", "warning",
                f"only {kept[k]} readings lie below the knee: too few to refit, so the fit "
                "uses all readings; take more readings below the knee"))
    # DUTs that were not refitted keep their first fit: rebuild them from the full set
    if (changed & ~enough).any():
        refit = _merge(refit, fits, use | ~changed)
    return refit, sub, keep


_REASONS = {1: "current-range", 2: "below-knee"}


def _excluded(readings: Readings, reason) -> list:
    """Per DUT, the readings an option left out (None for DUTs with none left out)."""
    out: list = [None] * readings.n_duts
    g = readings.group
    starts = np.concatenate(([0], np.cumsum(readings.counts())[:-1]))
    for r in np.flatnonzero(reason != 0):  # only the excluded rows
        k = int(g[r])
        if out[k] is None:
            out[k] = []
        ln = int(readings.line[r])
        out[k].append({"line": ln or None, "reading": int(r - starts[k] + 1),
                       "current_A": float(readings.current[r]),
                       "voltage_V": float(readings.voltage[r]),
                       "reason": _REASONS[int(reason[r])]})
    return out


def _merge(new: Fits, old: Fits, take_new: np.ndarray) -> Fits:
    """Per DUT, ``new`` where ``take_new`` else ``old`` (same DUT list)."""
    changes = {}
    for f in dataclasses.fields(Fits):
        a, b = getattr(new, f.name), getattr(old, f.name)
        if isinstance(a, np.ndarray):
            changes[f.name] = np.where(take_new, a, b)
        elif f.name in ("error", "flags"):
            changes[f.name] = tuple(x if t else y for x, y, t in zip(a, b, take_new))
    diag = {}
    for name, cols in new.diagnostics.items():
        oc = old.diagnostics.get(name, {})
        diag[name] = {c: (np.where(take_new, v, oc[c]) if c in oc else v)
                      for c, v in cols.items()}
    changes["diagnostics"] = diag
    return new.replace(**changes)


def _robust(readings: Readings, fits: Fits, confidence: float) -> Fits:
    """Huber M-estimate by iteratively reweighted fits (all DUTs at once).

    Each reading's variances are divided by its Huber weight ψ(z)/z = min(1, c/|z|), with
    z its residual in units of the effective standard deviation (of the stated
    uncertainties, or of the robust scale 1.4826·MAD for a fit without them), and the
    York/WLS/OLS fit is repeated until the weights settle.
    """
    ok = fits.ok
    g = readings.group
    ols = ok & (fits.method == "ols")
    stated = ok & ~ols
    weight = np.ones(len(readings))
    uv0, ui0, cv0 = readings.u_voltage, readings.u_current, readings.cov_iv
    cur = fits
    active = ok.copy()
    m = len(fits)
    for _ in range(_IRLS_MAX):
        b = -np.where(ok, cur.rth, 0.0)
        a = np.where(ok, cur.vth, 0.0)
        res = readings.voltage - a[g] - b[g] * readings.current
        with np.errstate(divide="ignore", invalid="ignore"):
            var = uv0 ** 2 + b[g] ** 2 * ui0 ** 2 - 2 * b[g] * cv0
            z = res / np.sqrt(np.where(stated[g], var, 1.0))
        rob_scale = _mad_scale(np.where(ols[g], z, 0.0), g, m)
        zz = np.where(ols[g], z / rob_scale[g], z)
        with np.errstate(divide="ignore", invalid="ignore"):
            w_new = np.where(np.abs(zz) > HUBER_C, HUBER_C / np.abs(zz), 1.0)
        w_new = np.where(active[g] & np.isfinite(w_new), w_new, weight)
        # only DUTs whose weights moved are refitted; a DUT with every |z| ≤ c keeps its
        # least-squares fit, which is then its Huber estimate
        moved = np.bincount(g, weights=np.abs(w_new - weight) > _W_TOL, minlength=m) > 0
        weight = w_new
        if not moved.any():
            break
        inflate = 1.0 / np.sqrt(weight)
        # for a fit without stated uncertainties the Huber weights act on the robust scale
        uv = np.where(ols[g], rob_scale[g] * inflate, uv0 * inflate)
        ui = np.where(ols[g], 0.0, ui0 * inflate)
        cv = np.where(ols[g], 0.0, cv0 / weight)
        rd = dataclasses.replace(readings, u_voltage=uv, u_current=ui, cov_iv=cv)
        cur = _merge(fit_lines(rd.select(moved[g]), confidence=confidence), cur, moved)
        active = moved
    # the checks judge the robust line against the readings as stated: χ² with the
    # original uncertainties (the plain residual sum of squares without them)
    b = -np.where(ok, cur.rth, 0.0)
    res = readings.voltage - np.where(ok, cur.vth, 0.0)[g] - b[g] * readings.current
    with np.errstate(divide="ignore", invalid="ignore"):
        var = np.where(stated[g], uv0 ** 2 + b[g] ** 2 * ui0 ** 2 - 2 * b[g] * cv0, 1.0)
        chi2 = np.bincount(g, weights=np.where(ok[g], res * res / var, 0.0),
                           minlength=len(fits))
    chi2 = np.where(ok, chi2, np.nan)
    dof = np.maximum(fits.dof, 1)
    p_value = np.where(stated, chi2_upper(dof, chi2), np.nan)
    # a fit without stated uncertainties stays Type A: keep its method, Student-t k and scale
    k = np.where(ols, fits.k, cur.k)
    method = np.where(ols, fits.method, cur.method)
    n_down = np.bincount(g, weights=weight < 1.0, minlength=len(fits)).astype(np.int64)
    # the flags depend on a few per-DUT values only: build them once per combination
    cur_codes, cur_distinct = cur.flag_groups
    old_codes, old_distinct = fits.flag_groups
    combo = np.stack([cur_codes, old_codes, ols, ok, n_down, fits.n], axis=1).astype(np.int64)
    uniq, which = np.unique(combo, axis=0, return_inverse=True)
    built = np.empty(len(uniq), dtype=object)
    for j, (c_cur, c_old, is_ols, is_ok, down, n) in enumerate(uniq.tolist()):
        kept = tuple(f for f in cur_distinct[c_cur]
                     if not (is_ols and f.code == "scale-applied"))
        if is_ok:
            fl = Flag("robust", "info",
                      f"robust refit (Huber loss, c = {HUBER_C}): {down} of {n} readings were "
                      "down-weighted" + ("; the uncertainties are those of the reweighted fit"
                                         if down else ", so the fit is the ordinary one"))
            kept = tuple(f for f in old_distinct[c_old] if f.code == "type-a") + tuple(
                f for f in kept if f.code != "type-a") + (fl,)
        built[j] = kept
    flags = built[which.reshape(-1)].tolist()
    weights = [None] * len(fits)
    starts = np.concatenate(([0], np.cumsum(readings.counts())[:-1]))
    for i in np.flatnonzero(n_down):
        weights[i] = weight[starts[i]:starts[i] + fits.n[i]].tolist()
    return cur.replace(k=k, method=method, flags=tuple(flags), chi2=chi2, p_value=p_value,
                       extra={**cur.extra, "robust_weights": weights})


def _mad_scale(z, g, m):
    """1.4826 × median |z| per group (median absolute residual, a robust σ)."""
    order = np.lexsort((np.abs(z), g))
    az = np.abs(z)[order]
    n = np.bincount(g, minlength=m)
    starts = np.concatenate(([0], np.cumsum(n)[:-1]))
    lo = starts + (n - 1) // 2
    hi = starts + n // 2
    med = np.where(n > 0, 0.5 * (az[np.minimum(lo, az.size - 1)] + az[np.minimum(hi, az.size - 1)]), 1.0)
    s = 1.4826 * med
    return np.where(s > 0, s, 1.0)




def type_a_note(fits: Fits) -> str | None:
    """One plain paragraph for a run in which some fitted DUTs had no stated uncertainty
    (method ``ols``): what a Type A result means and how to state the meters; ``None``
    when every fitted DUT had stated uncertainties.

    Said once per run (terminal, JSON ``note``, HTML report) instead of once per DUT.
    The coverage factor quoted is Student's t at the run's confidence level for the
    fewest degrees of freedom among those DUTs (JCGM 100:2008, G.3)."""
    from scipy import special

    ols = fits.ok & (np.asarray(fits.method) == "ols")
    if not ols.any():
        return None
    dof = np.asarray(fits.dof)[ols]
    lo, hi = int(dof.min()), int(dof.max())
    conf = float(fits.confidence)
    k = float(special.stdtrit(max(lo, 1), 0.5 + conf / 2))
    who = ("this DUT" if len(fits) == 1 else
           f"all {len(fits)} DUTs" if ols.all() else f"{int(ols.sum())} of {len(fits)} DUTs")
    dofs = f"{lo}" if lo == hi else f"{lo} to {hi}"
    z = float(special.ndtri(0.5 + conf / 2))
    few = (f"; with {'so few' if lo < 10 else lo}{' at the fewest' if lo != hi else ''}, "
           f"the {100 * conf:g} % interval spans ±{k:.3g} standard uncertainties (±{z:.3g} "
           "when the uncertainty is known)")
    return (f"No measurement uncertainty was stated for {who}, so the uncertainties and "
            "intervals come from the scatter of the readings about each line alone (Type "
            f"A), with n − 2 = {dofs} degrees of freedom{few}. The meters' calibration "
            "errors, which the scatter cannot show, are not in them, and the checks judge "
            "each line by its own scatter. To state the meters, give a bench profile "
            "(--bench bench.toml) or the specs on the command line (--voltage-accuracy "
            "'0.015%+2mV', with --current-accuracy or --load-tolerance).")
