"""Running every check on every fitted DUT, and turning findings into flags.

:func:`diagnose` builds the shared per-DUT state once, runs the checks of the sibling
modules (shape, sequence, scatter, residuals), stores each check's statistic and p-value
in ``Fits.diagnostics[name]`` (columnar arrays, NaN where the check was not run) so a
user can audit every decision, and writes the flag messages, only for the DUTs that carry
a flag.
"""

from __future__ import annotations

import collections

import numpy as np

from ..fit import segment_scope
from ..readings import Readings
from ..results import Fits, Flag
from .common import Rows, level_col
from .residuals import check_outliers
from .scatter import check_lack_of_fit, check_scatter, check_slope
from .sequence import check_drift, check_pattern, runs_min_p
from .shape import check_curvature, check_knee

CODES = ("curvature", "knee", "pattern", "excess-scatter", "too-good", "outlier", "drift",
         "lack-of-fit", "few-points", "weak-slope", "negative-resistance")


def _fmt(x, unit):
    from ..formatting import format_value

    return format_value(float(x), unit, 4)


@segment_scope
def diagnose(readings: Readings, fits: Fits, *, level: float = 0.01) -> Fits:
    """Run every check on every fitted DUT; return ``fits`` with diagnostics and flags.

    Parameters
    ----------
    readings : Readings
        The readings the fit used (same rows).
    fits : Fits
        From :func:`sagfit.core.fit.fit_lines`.
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
        from ..errors import InputError

        raise InputError(f"level must be between 0 and 0.5 (got {level!r})")
    R = Rows(readings, fits)
    m = R.m
    curv, curv_test, curv_run = check_curvature(R, level)
    knee, knee_test, knee_run = check_knee(R, level)
    patt, patt_run = check_pattern(R, level)
    patt_run = patt_run & (runs_min_p(R.n) <= level)
    drift, drift_basis, drift_run = check_drift(R, level, readings.has_time)
    lof = check_lack_of_fit(R)
    outl, t_row, outl_run = check_outliers(R, level)
    scat, f_exc, f_good = check_scatter(R, fits)
    slp, f_weak, f_neg = check_slope(R, fits, level)
    p_fit, rel, p_neg = scat["p_value"], slp["relative_u_rth"], slp["p_negative"]

    f_curv = curv_run & (curv["p_value"] < level)
    f_knee = knee_run & (knee["p_value"] < level)
    f_patt = patt_run & (patt["p_value"] < level)
    f_drift = drift_run & (drift["p_value"] < level)
    f_lof = np.isfinite(lof["p_value"]) & (lof["p_value"] < level)
    f_out = outl_run & (outl["max_abs_t"] > outl["limit"])
    skipped = R.ok & ~(curv_run & knee_run & patt_run & drift_run & outl_run)

    diagnostics = dict(fits.diagnostics)
    diagnostics.update({
        "curvature": {**curv, "test": curv_test, "level": level_col(curv_run, level)},
        "knee": {**knee, "test": knee_test, "level": level_col(knee_run, level)},
        "pattern": {**patt, "level": level_col(patt_run, level)},
        "drift": {**drift, "basis": drift_basis, "level": level_col(drift_run, level)},
        "lack_of_fit": lof,
        "scatter": scat,
        "outlier": outl,
        "slope": slp,
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
                             f"(χ² = {fits.chi2[k]:.3g} on {_dof_text(fits.dof[k])}, "
                             f"p {_p(p_fit[k])}): the meter accuracy or resistor tolerance is "
                             "understated, or the source was unstable (temperature, state of "
                             "charge, a loose contact); the uncertainty was enlarged by the "
                             "scale factor" + (
                                 "; here a non-linearity (see the knee/curvature findings) "
                                 "explains much of it" if f_knee[k] or f_curv[k] else "")))
    for k in np.flatnonzero(f_good):
        flags[k].append(Flag("too-good", "info",
                             f"the readings agree with the line far better than the stated "
                             f"uncertainties suggest (χ² = {fits.chi2[k]:.3g} on "
                             f"{_dof_text(fits.dof[k])}, p {_p(p_fit[k])}): the stated "
                             "uncertainties are probably overstated (a spec used for a meter "
                             "that does much better, or correlated errors); the intervals are "
                             "then wider than they need to be"))
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
    runs_mask = (curv_run.astype(np.int64) | knee_run << 1 | patt_run << 2 | drift_run << 3
                 | outl_run << 4)
    code = np.where(skipped, R.n * 32 + runs_mask, -1)
    for c in np.unique(code[skipped]):
        nk, bits = int(c) // 32, int(c) % 32
        miss = [name for bit, name in enumerate(("curvature", "knee", "pattern (runs test)",
                                                 "drift", "outlier")) if not bits >> bit & 1]
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


def _p(p):
    """'p = 0.004' or 'p < 0.001' (format_p's wording after an equals sign)."""
    from ..formatting import format_p

    text = format_p(float(p))
    return text if text[0] in "<>" else "= " + text


def _where(line, row, start):
    ln = int(line[row])
    return f"line {ln}" if ln else f"reading {row - start + 1}"


def _dof_text(dof) -> str:
    """'1 degree of freedom', '4 degrees of freedom'."""
    d = int(dof)
    return f"{d} degree of freedom" if d == 1 else f"{d} degrees of freedom"
