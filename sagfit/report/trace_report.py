"""The trace report: the logged trace with its steps shaded and settling windows marked,
and for each pulse the measured response with the fitted RC model and its residuals.

Edge module (matplotlib, no pyplot). A long trace is drawn from a min/max envelope per
horizontal pixel (:func:`envelope`), so a 10-million-row trace costs a few thousand
points in the figure and looks the same as the full line would.
"""

from __future__ import annotations

import html
from pathlib import Path
from typing import Sequence

import numpy as np

from ..core.formatting import format_estimate, format_value
from .plots import COLORS, figure_svg, house_style, new_figure, save_png, si_axis

__all__ = ["trace_figure", "pulse_figure", "write_trace_report", "envelope"]

#: Pulse figures drawn in one report at most (the CSV and JSON hold every pulse).
MAX_PULSE_FIGURES = 24
#: Steps listed in the report's table at most.
MAX_TABLE_ROWS = 200
_BINS = 1500

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;color:#222831;margin:2rem;
max-width:72rem}h1{font-size:1.4rem}h2{font-size:1.1rem;margin-top:2rem}
table{border-collapse:collapse;font-size:.85rem}td,th{padding:.2rem .6rem;text-align:right;
border-bottom:1px solid #e5e7eb}td:first-child,th:first-child{text-align:left}
.flag{color:#c2410c}.note{color:#6b7280;font-size:.85rem}.caution{border-left:4px solid
#c2410c;padding:.4rem .8rem;background:#fff7ed}figure{margin:1rem 0}svg{max-width:100%;
height:auto}
"""


def envelope(t: np.ndarray, y: np.ndarray, bins: int = _BINS):
    """(t, y) thinned to the minimum and maximum of ``y`` in each of ``bins`` equal time
    bins, in time order; short series are returned as they are."""
    if t.size <= 2 * bins:
        return t, y
    edges = np.linspace(t[0], t[-1], bins + 1)
    starts = np.unique(np.searchsorted(t, edges[:-1]))
    starts = starts[starts < t.size]
    lo = np.minimum.reduceat(y, starts)
    hi = np.maximum.reduceat(y, starts)
    tb = t[starts]
    return np.repeat(tb, 2), np.column_stack([lo, hi]).ravel()


def trace_figure(trace, steps, channel: int = 0):
    """Current and voltage of one channel against time; steps shaded in turn, settling
    windows as a bar under the voltage, unsettled or clipped steps in the flag colour."""
    b = trace.channel_bounds()
    rows = slice(int(b[channel]), int(b[channel + 1]))
    t = np.asarray(trace.time[rows])
    mine = np.flatnonzero(steps.channel == channel)
    with house_style():
        fig, (ax_i, ax_v) = new_figure(7.2, 4.6, nrows=2, sharex=True)
        for ax, y, unit, label in ((ax_i, trace.current[rows], "A", "Current"),
                                   (ax_v, trace.voltage[rows], "V", "Terminal voltage")):
            te, ye = envelope(t, np.asarray(y))
            ax.plot(te, ye, color=COLORS["ink"], lw=0.7)
            for n, k in enumerate(mine[:2000]):  # shading per step (bounded)
                bad = (not steps.settled[k]) or steps.clipped[k]
                ax.axvspan(steps.t_start[k], steps.t_stop[k],
                           color=COLORS["flag"] if bad else COLORS["band_pi"],
                           alpha=0.18 if bad else (0.16 if n % 2 else 0.06), lw=0)
            si_axis(ax, "y", unit, label)
        lo, hi = ax_v.get_ylim()
        y_bar = lo + 0.03 * (hi - lo)
        for k in mine[:2000]:
            ax_v.plot([steps.t_window[k], steps.t_stop[k]], [y_bar, y_bar],
                      color=COLORS["model"], lw=3, solid_capstyle="butt")
        si_axis(ax_v, "x", "s", "Time from the start")
    return fig


def pulse_figure(fit, number: int):
    """Measured response of one pulse (points; every k-th sample of a long record), the
    fitted model (line) and the residuals."""
    with house_style():
        fig, (ax, ar) = new_figure(6.4, 4.4, nrows=2, sharex=True,
                                   gridspec_kw={"height_ratios": [3, 1]})
        order = np.argsort(fit.t)
        keep = order[::max(1, order.size // 2000)]  # every k-th sample: a fair scatter
        ax.plot(fit.t[keep], fit.v[keep], ".", ms=2, color=COLORS["point"], label="measured")
        ax.plot(fit.t[order], fit.fitted[order], color=COLORS["model"], lw=1.2,
                label=f"R0 + {fit.branches} RC branch(es)")
        ax.legend(loc="best")
        si_axis(ax, "y", "V", "Terminal voltage")
        res = fit.v - fit.fitted
        ar.plot(fit.t[keep], res[keep], ".", ms=2, color=COLORS["muted"])
        ar.axhline(0, color=COLORS["model"], lw=0.8)
        si_axis(ar, "y", "V", "Residual")
        si_axis(ar, "x", "s", f"Time from the edge of pulse {number}")
    return fig


def write_trace_report(folder, trace, steps, *, pulses=None, models=(), doc=None,
                       cautions: Sequence[str] = (), inputs: Sequence = (),
                       name: str = "trace.html") -> Path:
    """Write ``name`` (HTML with inline SVG figures), the figures as PNG, and
    ``trace.json`` when ``doc`` is given, into ``folder``."""
    from ..io.outputs import atomic_write, document_text, prepare_folder

    root = prepare_folder(folder, inputs)
    esc = html.escape
    parts = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
             f"<title>sagfit trace report: {esc(trace.source)}</title>",
             f"<style>{_CSS}</style></head><body>",
             f"<h1>Trace {esc(trace.source)}</h1>",
             f"<p>{len(trace):,} rows, {len(trace.channels)} channel(s), {len(steps)} step(s), "
             f"{int((~steps.settled).sum())} unsettled, {int(steps.clipped.sum())} clipped."
             + (f" {len(pulses)} pulse(s)." if pulses is not None else "") + "</p>"]
    if cautions:
        parts.append("<div class='caution'>" + "".join(f"<p>{esc(c)}</p>" for c in cautions)
                     + "</div>")
    parts.append("<h2>Trace and steps</h2>")
    for c in range(min(len(trace.channels), 8)):
        fig = trace_figure(trace, steps, c)
        png = f"trace_{c + 1}.png"
        save_png(fig, root / png, root, inputs=inputs)
        parts.append(f"<figure>{figure_svg(fig, title='Trace ' + trace.channels[c])}"
                     f"<figcaption>{esc(trace.channels[c])}: steps shaded in turn, flagged "
                     "steps in orange, settling windows as blue bars under the voltage "
                     f"(PNG: {esc(png)})</figcaption></figure>")
    parts.append("<h2>Steps</h2><table><tr><th>step</th><th>channel</th><th>from</th>"
                 "<th>length</th><th>current</th><th>voltage</th><th>state</th></tr>")
    for k in range(min(len(steps), MAX_TABLE_ROWS)):
        state = ("clipped" if steps.clipped[k] else "unsettled" if not steps.settled[k]
                 else "settled")
        parts.append(
            f"<tr><td>{k + 1}</td><td>{esc(steps.channels[steps.channel[k]])}</td><td>"
            + esc(format_value(steps.t_start[k], "s", 5)) + "</td><td>"
            + esc(format_value(steps.duration[k], "s", 3)) + "</td><td>"
            + esc(format_estimate(steps.current[k], steps.u_current[k], "A")) + "</td><td>"
            + esc(format_estimate(steps.voltage[k], steps.u_voltage[k], "V"))
            + f"</td><td class='{'flag' if state != 'settled' else ''}'>{state}</td></tr>")
    parts.append("</table>")
    if len(steps) > MAX_TABLE_ROWS:
        parts.append(f"<p class='note'>{len(steps) - MAX_TABLE_ROWS} more steps in the CSV "
                     "and JSON outputs.</p>")
    if pulses is not None and len(pulses):
        parts.append("<h2>Pulses</h2>")
        for j, m in enumerate(list(models)[:MAX_PULSE_FIGURES]):
            if not m.branches:
                parts.append(f"<p class='flag'>Pulse {j + 1}: no fit ({esc(str(m.error))})</p>")
                continue
            fig = pulse_figure(m, j + 1)
            png = f"pulse_{j + 1:03d}.png"
            save_png(fig, root / png, root, inputs=inputs)
            vals = ", ".join(esc(f"{n} = " + format_estimate(
                m[n], m.u_of(n), "s" if n.startswith("tau") else "Ω"))
                for n in m.names[1:])
            warn = "".join(f"<br><span class='flag'>{esc(w)}</span>" for w in m.warnings)
            parts.append(f"<figure>{figure_svg(fig, title=f'Pulse {j + 1}')}<figcaption>"
                         f"Pulse {j + 1} ({esc(str(pulses.kind[j]))}): {vals}; rms residual "
                         f"{esc(format_value(m.rms, 'V', 2))} (PNG: {esc(png)}){warn}"
                         "</figcaption></figure>")
        if len(models) > MAX_PULSE_FIGURES:
            parts.append(f"<p class='note'>Figures for the first {MAX_PULSE_FIGURES} pulses; "
                         "every pulse is in the CSV and JSON outputs.</p>")
    parts.append("<p class='note'>Generated by sagfit. Uncertainties are standard "
                 "uncertainties (k = 1).</p></body></html>\n")
    if doc is not None:
        atomic_write(root / "trace.json", document_text(doc), inputs=inputs, within=root,
                     option="--report")
    atomic_write(root / name, "\n".join(parts), inputs=inputs, within=root, option="--report")
    return root
