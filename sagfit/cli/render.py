"""Terminal rendering of results with rich (tables built from ``formatting`` strings)."""

from __future__ import annotations

import numpy as np

from ..core.formatting import format_estimate, format_interval, format_p, format_value

MAX_TABLE_ROWS = 40


def _console():
    from rich.console import Console

    import sys

    tty = sys.stdout.isatty()
    return Console(highlight=False, width=None if tty else 160, soft_wrap=not tty)


def print_fits(fits, readings, doc, *, verbose: bool = False, quiet: bool = False) -> None:
    from rich.table import Table

    console = _console()
    lvl = f"{fits.confidence * 100:g} %"
    if len(fits) == 1 and fits.error[0] is None:
        r = fits[0]
        t = Table(title=f"{r.dut}: Thevenin/Norton equivalent ({r.n} readings, {r.method})",
                  title_justify="left", show_edge=False)
        t.add_column("quantity")
        t.add_column("value ± u", justify="right")
        t.add_column(f"{lvl} interval", justify="right")
        from ..core.extrapolation import extrapolated_isc_pmax

        ex_isc, ex_pmax = extrapolated_isc_pmax(fits, readings)
        xi = " (extrapolated)" if ex_isc[0] else ""
        xp = " (extrapolated)" if ex_pmax[0] else ""
        for label, est, unit in (("open-circuit voltage Vth", r.vth, "V"),
                                 ("internal resistance Rth", r.rth, "Ω"),
                                 ("short-circuit current Isc" + xi, r.isc, "A"),
                                 ("maximum power Pmax" + xp, r.pmax, "W")):
            t.add_row(label, format_estimate(est.value, est.u, unit),
                      format_interval(est.ci_low, est.ci_high, unit, est.u, est.value))
        console.print(t)
        console.print(_quality(r.chi2, r.dof, r.p_value, r.method, r.corr_vth_rth))
        knee = _knee_line(fits, 0)
        if knee:
            console.print(knee, markup=False)
    else:
        t = Table(show_edge=False)
        for col, just in (("DUT", "left"), ("n", "right"), ("Vth", "right"), ("Rth", "right"),
                          ("Isc", "right"), ("Pmax", "right"), ("method", "left"),
                          ("χ²/ν", "right"), ("p", "right"), ("flags", "left")):
            t.add_column(col, justify=just)
        shown = range(min(len(fits), MAX_TABLE_ROWS))
        for i in shown:
            if fits.error[i] is not None:
                t.add_row(fits.duts[i], str(fits.n[i]), "error", "", "", "", "", "", "",
                          "")
                continue
            red = fits.chi2[i] / fits.dof[i] if fits.dof[i] > 0 else np.nan
            type_a = str(fits.method[i]) == "ols"  # residual SS, not χ²: no χ²/ν nor p
            t.add_row(fits.duts[i], str(fits.n[i]),
                      format_estimate(fits.vth[i], fits.u_vth[i], "V"),
                      format_estimate(fits.rth[i], fits.u_rth[i], "Ω"),
                      format_estimate(fits.isc[i], fits.u_isc[i], "A"),
                      format_estimate(fits.pmax[i], fits.u_pmax[i], "W"),
                      str(fits.method[i]),
                      "—" if type_a else f"{red:.2f}" if np.isfinite(red) else "",
                      "—" if type_a else
                      format_p(fits.p_value[i]) if np.isfinite(fits.p_value[i]) else "",
                      ",".join(f.code for f in fits.flags[i] if f.severity == "warning"))
        console.print(t)
        if any(str(fits.method[i]) == "ols" for i in shown if fits.error[i] is None):
            console.print("χ²/ν and p — : Type A fit (no meter uncertainty stated), judged by "
                          "its scatter alone; χ²/ν and p do not apply (residual SS in --json).",
                          markup=False)
        if len(fits) > MAX_TABLE_ROWS:
            ok = fits.ok
            console.print(f"… {len(fits) - MAX_TABLE_ROWS} more DUTs not shown "
                          f"(write them all with --out results.csv or --json). Across "
                          f"{int(ok.sum())} fitted: median Vth "
                          f"{format_value(float(np.median(fits.vth[ok])), 'V', 5)}, median Rth "
                          f"{format_value(float(np.median(fits.rth[ok])), 'Ω', 4)}.")
        console.print(f"Uncertainties are standard uncertainties; intervals at {lvl} are in "
                      "--json and --out.")
    if doc.get("note"):
        console.print(f"note: {doc['note']}", markup=False)
    _print_flags(console, fits, verbose)
    errors = [(fits.duts[i], fits.error[i]) for i in np.flatnonzero(~fits.ok).tolist()]
    for d, e in errors[:MAX_TABLE_ROWS]:
        console.print(f"[bold]error[/bold] {_esc(d)}: {_esc(e)}", markup=True)
    if len(errors) > MAX_TABLE_ROWS:
        console.print(f"… and {len(errors) - MAX_TABLE_ROWS} more DUTs could not be fitted")
    if verbose:
        ign = readings.meta.get("ignored_columns") or []
        console.print(f"input: {readings.source} (sha256 {readings.meta.get('sha256', '')[:16]}…), "
                      f"{len(readings)} readings, {len(fits)} DUT(s)")
        console.print("ignored columns: " + (", ".join(ign) if ign else "none"))
        s = doc["settings"]
        for k in ("voltage_accuracy", "current_accuracy"):
            console.print(f"{k.replace('_', ' ')}: {s[k]['text'] if s[k] else 'not stated'}")
        console.print(f"load tolerance: "
                      f"{str(s['load_tolerance_pct']) + ' %' if s['load_tolerance_pct'] is not None else 'not stated'}")
    for w in doc.get("warnings", []):
        console.print(f"warning: {w}", markup=False)
    for c in [] if quiet else doc.get("cautions", []):
        console.print(f"caution: {c}", markup=False)


def _dof_text(dof) -> str:
    """"1 degree of freedom", "3 degrees of freedom"."""
    return f"{dof} degree of freedom" if dof == 1 else f"{dof} degrees of freedom"


def _quality(chi2, dof, p, method, corr) -> str:
    if method == "ols":
        return (f"fit quality: residual SS {chi2:.4g} on {_dof_text(dof)} (no uncertainty "
                f"stated: Type A, Student t); corr(Vth, Rth) = {corr:.3f}")
    pv = _p_text(p) if p is not None else "= n/a"
    return (f"fit quality: χ² = {chi2:.3g} on {_dof_text(dof)}, p {pv}; "
            f"corr(Vth, Rth) = {corr:.3f}")


def _knee_line(fits, i) -> str:
    """'knee at I = …, V = …' when the knee check flagged DUT i, else ''."""
    if not any(f.code == "knee" for f in fits.flags[i]):
        return ""
    k = fits.diagnostics.get("knee", {})
    ik, vk, p = (float(k[c][i]) for c in ("current", "voltage", "p_value"))
    return (f"knee at I = {format_value(ik, 'A')}, V = {format_value(vk, 'V')} "
            f"(p {_p_text(p)}): the line above describes neither segment well; "
            "refit with --below-knee")


def _p_text(p) -> str:
    t = format_p(p)
    return t if t[0] in "<>" else "= " + t


def _print_flags(console, fits, verbose):
    from collections import Counter

    shown = 0
    counts: Counter = Counter()
    # DUTs share flag tuples: count each distinct tuple once, then weight by its uses
    codes, distinct = fits.flag_groups
    uses = np.bincount(codes, minlength=len(distinct))
    for key, fl in enumerate(distinct):
        for f in fl:
            if f.severity == "warning":
                counts[f.code] += int(uses[key])
    if len(fits) > 1 and counts:
        summary = ", ".join(f"{code} {n}" for code, n in counts.most_common())
        level = float(fits.settings.get("level", 0.01))
        console.print(f"[bold]checks[/bold]: warnings across {len(fits)} DUTs: {summary} "
                      f"(each test flags up to {100 * level:g} % of linear DUTs by chance, "
                      "--level)", markup=True)

    def shows(f):
        if f.code == "type-a":  # said once for the run (the note above the flags)
            return False
        return not (f.severity == "info" and not verbose and len(fits) > 1)

    # only DUTs whose flag tuple holds something to show (a vector scan, not a loop)
    showable = fits.flag_mask(lambda fl: any(shows(f) for f in fl))
    for i in np.flatnonzero(showable).tolist():
        for f in fits.flags[i]:
            if not shows(f):
                continue
            if shown >= MAX_TABLE_ROWS * 2:
                console.print("… more flags in --json / --out")
                return
            if f.severity == "warning":
                console.print(f"[bold yellow]warning[/bold yellow] {_esc(fits.duts[i])} "
                              f"\\[{_esc(f.code)}]: {_esc(f.message)}", markup=True)
            else:
                console.print(f"note {fits.duts[i]} [{f.code}]: {f.message}", markup=False)
            shown += 1


def _esc(text) -> str:
    from rich.markup import escape

    return escape(str(text))
