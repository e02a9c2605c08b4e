"""Terminal rendering of results with rich (tables built from ``formatting`` strings)."""

from __future__ import annotations

import numpy as np

from ..core.formatting import format_estimate, format_interval, format_p, format_value

MAX_TABLE_ROWS = 40


def _console():
    """The console of the terminal; piped output is not cut to a width."""
    from rich.console import Console

    from .common import interactive

    tty = interactive()
    return Console(highlight=False, width=None if tty else 160, soft_wrap=not tty)


class Col:
    """A table column: header, justification, whether its cells may wrap at spaces
    (text) or stay on one line (numbers), and how soon it is left out on a narrow
    terminal (``drop``: 0 never; the highest goes first)."""

    __slots__ = ("header", "justify", "wrap", "drop")

    def __init__(self, header: str, justify: str = "right", *, wrap: bool = False,
                 drop: int = 0):
        self.header, self.justify, self.wrap, self.drop = header, justify, wrap, drop


def print_table(console, cols, rows, *, wide: bool = False, **table_kw) -> list[str]:
    """Print a table whose numbers are never cut.

    On an interactive terminal narrower than the table, columns are left out first (the
    empty ones, then by ``Col.drop``, highest first) until the table fits; text cells
    wrap at spaces; a note names what was left out and says that ``--wide`` shows it.
    With ``wide`` or when the output is piped, every column is printed at its full width.
    A cell too long for the terminal even then is folded onto the next line, never
    ellipsised. Returns the headers left out.
    """
    from rich.cells import cell_len
    from rich.table import Table

    from .common import interactive

    rows = [[str(c) for c in r] for r in rows]

    def widths(k):
        """(least, natural) width of column k: a number column needs its longest cell on
        one line, a text column at least its longest word."""
        texts = [cols[k].header] + [r[k] for r in rows]
        lines = [ln for t in texts for ln in t.split("\n")] or [""]
        natural = max(cell_len(ln) for ln in lines)
        if not cols[k].wrap:
            return natural, natural
        return max(cell_len(w) for ln in lines for w in ln.split() or [""]), natural

    def total(keep, which):
        # one space of padding either side of each column and one rule between columns
        return len(keep) - 1 + sum(widths(k)[which] + 2 for k in keep)

    keep = list(range(len(cols)))
    dropped: list[str] = []
    fixed: dict[int, int] = {}
    if wide or not interactive():
        console.width = max(console.width, total(keep, 1))
    else:
        limit = console.width
        empty = [k for k in keep if cols[k].drop and all(not r[k].strip() for r in rows)]
        order = empty + sorted((k for k in keep if cols[k].drop and k not in empty),
                               key=lambda k: (-cols[k].drop, -k))
        for k in order:
            if total(keep, 0) <= limit:
                break
            keep.remove(k)
            dropped.append(cols[k].header.split("\n")[0])
        if total(keep, 1) > limit:
            # text columns share what is left beyond their longest words, in proportion
            # to what they would take unwrapped (rich alone may cut a word)
            spare = max(limit - total(keep, 0), 0)
            extra = {k: widths(k)[1] - widths(k)[0] for k in keep}
            grow = sum(extra.values()) or 1
            fixed = {k: widths(k)[0] + (spare * extra[k]) // grow for k in keep}
    t = Table(show_edge=False, **table_kw)
    for k in keep:
        c = cols[k]
        t.add_column(c.header, justify=c.justify, no_wrap=not c.wrap, overflow="fold",
                     width=fixed.get(k))
    for r in rows:
        t.add_row(*(r[k] for k in keep))
    console.print(t, markup=False)
    if dropped:
        console.print(f"(left out to fit {console.width} columns: {', '.join(dropped)}; "
                      "--wide or a wider terminal shows them)", markup=False)
    return dropped


def print_fits(fits, readings, doc, *, verbose: bool = False, quiet: bool = False,
               wide: bool = False) -> None:
    console = _console()
    lvl = f"{fits.confidence * 100:g} %"
    if len(fits) == 1 and fits.error[0] is None:
        r = fits[0]
        from ..core.extrapolation import extrapolated_isc_pmax

        ex_isc, ex_pmax = extrapolated_isc_pmax(fits, readings)
        xi = " (extrapolated)" if ex_isc[0] else ""
        xp = " (extrapolated)" if ex_pmax[0] else ""
        rows = []
        for label, est, unit in (("open-circuit voltage Vth", r.vth, "V"),
                                 ("internal resistance Rth", r.rth, "Ω"),
                                 ("short-circuit current Isc" + xi, r.isc, "A"),
                                 ("maximum power Pmax" + xp, r.pmax, "W")):
            rows.append((label, format_estimate(est.value, est.u, unit),
                         format_interval(est.ci_low, est.ci_high, unit, est.u, est.value)))
        print_table(console, [Col("quantity", "left", wrap=True), Col("value ± u"),
                              Col(f"{lvl} interval", drop=1)], rows, wide=wide,
                    title=f"{r.dut}: Thevenin/Norton equivalent ({r.n} readings, {r.method})",
                    title_justify="left")
        console.print(_quality(r.chi2, r.dof, r.p_value, r.method, r.corr_vth_rth))
        knee = _knee_line(fits, 0)
        if knee:
            console.print(knee, markup=False)
    else:
        cols = [Col("DUT", "left"), Col("n", drop=4), Col("Vth"), Col("Rth"),
                Col("Isc", drop=6), Col("Pmax", drop=7), Col("method", "left", drop=5),
                Col("χ²/ν", drop=1), Col("p", drop=2), Col("flags", "left", wrap=True, drop=3)]
        rows = []
        shown = range(min(len(fits), MAX_TABLE_ROWS))
        for i in shown:
            if fits.error[i] is not None:
                rows.append([fits.duts[i], str(fits.n[i]), "error"] + [""] * 7)
                continue
            red = fits.chi2[i] / fits.dof[i] if fits.dof[i] > 0 else np.nan
            type_a = str(fits.method[i]) == "ols"  # residual SS, not χ²: no χ²/ν nor p
            rows.append([fits.duts[i], str(fits.n[i]),
                         format_estimate(fits.vth[i], fits.u_vth[i], "V"),
                         format_estimate(fits.rth[i], fits.u_rth[i], "Ω"),
                         format_estimate(fits.isc[i], fits.u_isc[i], "A"),
                         format_estimate(fits.pmax[i], fits.u_pmax[i], "W"),
                         str(fits.method[i]),
                         "—" if type_a else f"{red:.2f}" if np.isfinite(red) else "",
                         "—" if type_a else
                         format_p(fits.p_value[i]) if np.isfinite(fits.p_value[i]) else "",
                         ", ".join(f.code for f in fits.flags[i] if f.severity == "warning")])
        print_table(console, cols, rows, wide=wide)
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
