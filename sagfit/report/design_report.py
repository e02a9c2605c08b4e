"""The report of ``sagfit design``: the expected Vth and Rth of a netlist with its
tolerances, and measured units against them.

Edge module (matplotlib, through :mod:`sagfit.report.plots`, imported inside the
functions). The report folder follows the scheme of :mod:`sagfit.report.style`:
``report.html`` (self-contained: inline SVG figures, escaped text, the house style
sheet), ``results.json`` (the document of ``--json``) and one PNG histogram per quantity
(``fig-expected-vth.png``, ``fig-expected-rth.png``), all written atomically and only
inside the folder.
"""

from __future__ import annotations

import html

import numpy as np

from ..core.formatting import format_estimate, format_value

__all__ = ["expected_histogram", "write_design_report"]

MAX_REPORT_ROWS = 500
#: up to this many measured units are drawn one by one with their intervals; above it
#: they are shown as ticks under the histogram
MAX_MARKED_UNITS = 30
_LABELS = {"vth": ("Open-circuit voltage Vth", "V", "vth_V", "En_vth", "U_vth_V"),
           "rth": ("Internal resistance Rth", "Ω", "rth_ohm", "En_rth", "U_rth_ohm")}


def expected_histogram(draws, quantity: str, doc: dict):
    """Histogram of the Monte Carlo draws of ``quantity`` ("vth" or "rth"), with the
    nominal value, the test limits and the worst-case band marked, and the measured units
    of ``doc["measured"]`` (if any) as points with their intervals ± U."""
    from .plots import COLORS, house_style, new_figure, si_axis

    label, unit, key, en_key, u_key = _LABELS[quantity]
    nominal = doc["nominal"][key]
    lim = doc["limits"][quantity]
    wc = doc["worst_case"][key]
    units = [u for u in doc.get("measured", {}).get("units", []) if u[key] is not None]
    with house_style():
        fig, ax = new_figure(5.6, 3.8)
        span = [*lim, *wc, nominal]
        for u in units:
            span += [u[key] - u[u_key], u[key] + u[u_key]]
        d = np.asarray(draws, float) if draws is not None else np.empty(0)
        d = d[np.isfinite(d)]
        if d.size:
            span += [float(d.min()), float(d.max())]
        lo, hi = min(span), max(span)
        pad = 0.04 * (hi - lo) if hi > lo else max(abs(hi) * 1e-3, 1e-12)
        top = 1.0
        if d.size:
            edges = np.histogram_bin_edges(d, bins=min(60, max(10, int(np.sqrt(d.size)))))
            h, _ = np.histogram(d, bins=edges)
            ax.bar(edges[:-1], h, width=np.diff(edges), align="edge", color=COLORS["hist"],
                   edgecolor="white", linewidth=0.3,
                   label=f"expected ({d.size:,} Monte Carlo draws)")
            top = float(h.max())
            ax.set_ylabel("draws")
        else:
            ax.set_yticks([])
            ax.text(0.5, 0.92, "no Monte Carlo draws (--draws 0)", transform=ax.transAxes,
                    ha="center", color=COLORS["muted"])
        ax.axvspan(wc[0], wc[1], color=COLORS["muted"], alpha=0.12, linewidth=0, zorder=0,
                   label="worst-case band")
        ax.axvline(nominal, color=COLORS["model"], linewidth=1.0, linestyle=":",
                   label="nominal")
        for k, x in enumerate(lim):
            ax.axvline(x, color=COLORS["ink"], linewidth=1.2,
                       label=f"limits ({doc['limits']['method']})" if k == 0 else None)
        if units and len(units) <= MAX_MARKED_UNITS:
            ys = top * (1.08 + 0.5 * np.arange(len(units)) / max(len(units), 1))
            for y, u in zip(ys, units):
                bad = abs(u[en_key]) > 1
                ax.errorbar(u[key], y, xerr=u[u_key], fmt="o", markersize=4,
                            color=COLORS["flag"] if bad else COLORS["point"], linewidth=1.1,
                            capsize=2.5)
                ax.annotate(u["dut"], (u[key], y), xytext=(4, 3), textcoords="offset points",
                            fontsize=7, color=COLORS["ink"])
            ax.set_ylim(0, top * 1.7)
        elif units:
            x = np.array([u[key] for u in units])
            bad = np.array([abs(u[en_key]) > 1 for u in units])
            ax.plot(x[~bad], np.full((~bad).sum(), -0.03 * top), "|", color=COLORS["point"],
                    markersize=8, label="measured units")
            if bad.any():
                ax.plot(x[bad], np.full(bad.sum(), -0.03 * top), "|", color=COLORS["flag"],
                        markersize=8, label="|E_n| > 1")
            ax.set_ylim(-0.08 * top, top * 1.15)
        ax.set_xlim(lo - pad, hi + pad)
        ax.grid(axis="x", visible=False)
        si_axis(ax, "x", unit, label)
        fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=3,
                   fontsize=7)
    return fig


# the house style sheet (report/style.py) plus what only this report's tables need
_CSS = """
td.why, th.why { text-align: left; white-space: normal; }
"""


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _band(b, unit):
    return f"{format_value(b[0], unit)} … {format_value(b[1], unit)}"


def write_design_report(folder, doc: dict, t, cmp=None, *, inputs=()) -> None:
    """Write the design report into ``folder`` (created if needed).

    ``doc``: the document of ``sagfit design --json``; ``t``: the
    :class:`~sagfit.core.tolerance.Tolerances` behind it (for the Monte Carlo draws);
    ``cmp``: the :class:`~sagfit.core.tolerance.Comparison` of measured units, if any.
    """
    from pathlib import Path

    from ..io.outputs import atomic_write, document_text, prepare_folder
    from .plots import figure_svg, save_png
    from .style import REPORT_HTML, RESULTS_JSON, STYLESHEET, batch_figure_name

    root = prepare_folder(folder, inputs)
    rows = len(doc.get("measured", {}).get("units", ()))
    atomic_write(root / RESULTS_JSON, document_text(doc, rows=rows), inputs=inputs,
                 within=root, option="--report")
    figures = []
    for q, draws in (("vth", t.mc_vth), ("rth", t.mc_rth)):
        fig = expected_histogram(draws, q, doc)
        name = batch_figure_name("expected", q)
        save_png(fig, root / name, root, inputs=inputs)
        figures.append((_LABELS[q][0], figure_svg(fig, title=f"Expected {_LABELS[q][0]}"),
                        name))
    name = Path(doc["netlist"]).name
    n = doc["nominal"]
    parts = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
             "<meta name='viewport' content='width=device-width,initial-scale=1'>",
             f"<title>Design report: {_e(name)}</title><style>{STYLESHEET}{_CSS}</style></head><body>",
             f"<h1>Design report: {_e(name)}</h1>",
             f"<p>Netlist {_e(doc['netlist'])}, port {_e(doc['port'][0])}–"
             f"{_e(doc['port'][1])}: nominal Vth {_e(format_value(n['vth_V'], 'V'))}, Rth "
             f"{_e(format_value(n['rth_ohm'], 'Ω'))}"
             + (f", Isc {_e(format_value(n['isc_A'], 'A'))}" if n["isc_A"] is not None else "")
             + ".</p>"]
    for note in doc["notes"]:
        parts.append(f"<p class='note'>{_e(note)}</p>")
    for c in doc.get("cautions", []):
        parts.append(f"<p class='caution'>{_e(c)}</p>")
    parts.append(_methods_table(doc))
    parts.append("<h2>Expected distribution</h2><p class='note'>Bars: the Monte Carlo "
                 "draws. Shading: the worst-case band; solid lines: the test limits; dotted: "
                 "the nominal value. Points: measured units with their intervals ± U "
                 "(orange where |E_n| &gt; 1; their height only keeps them apart).</p>")
    for label, svg, fname in figures:
        parts.append(f"<figure>{svg}<figcaption class='note'>{_e(label)} ({_e(fname)})"
                     "</figcaption></figure>")
    parts.append(_sensitivity_table(doc))
    if "measured" in doc:
        parts.append(_units_table(doc["measured"]))
    parts.append(f"<p class='note'>Full precision, SI units: {RESULTS_JSON}. Safety: measuring "
                 "a board's output resistance loads or shorts its output; follow the "
                 "equipment manuals and local practice.</p></body></html>\n")
    atomic_write(root / REPORT_HTML, "".join(parts), inputs=inputs, within=root,
                 option="--report")


def _methods_table(doc) -> str:
    rows = ["<h2>Methods</h2><table><tr><th>method</th><th>Vth</th><th>Rth</th></tr>"]

    def row(name, v, r):
        rows.append(f"<tr><td>{_e(name)}</td><td>{_e(v)}</td><td>{_e(r)}</td></tr>")

    n = doc["nominal"]
    row("nominal", format_value(n["vth_V"], "V"), format_value(n["rth_ohm"], "Ω"))
    row("RSS (first order)", "± " + format_value(doc["rss"]["vth_V"], "V"),
        "± " + format_value(doc["rss"]["rth_ohm"], "Ω"))
    w = doc["worst_case"]
    row("worst case (sensitivity signs)", _band(w["vth_V"], "V"), _band(w["rth_ohm"], "Ω"))
    if "vertices" in doc:
        v = doc["vertices"]
        row("vertices of the tolerance box", _band(v["vth_V"], "V"), _band(v["rth_ohm"], "Ω"))
    if "monte_carlo" in doc:
        m = doc["monte_carlo"]
        row(f"Monte Carlo 0.135–99.865 % ({m['draws']:,} {m['distribution']} draws, seed "
            f"{m['seed']})", _band((m["vth_V"][0], m["vth_V"][-1]), "V"),
            _band((m["rth_ohm"][0], m["rth_ohm"][-1]), "Ω"))
    li = doc["limits"]
    row(f"test limits ({li['method']})", _band(li["vth"], "V"), _band(li["rth"], "Ω"))
    rows.append("</table><ul class='note'>")
    rows += [f"<li>{_e(s)}</li>" for s in doc["methods_compared"]]
    rows.append("</ul>")
    return "".join(rows)


def _sensitivity_table(doc) -> str:
    rows = [("<h2>Which parts matter</h2><table><tr><th>part</th><th>value</th><th>tol</th>"
             "<th>ΔVth at tol</th><th>rank</th><th>ΔRth at tol</th><th>rank</th></tr>")]
    for s in doc["sensitivities"][:MAX_REPORT_ROWS]:
        rows.append(f"<tr><td>{_e(s['part'])}</td><td>{_e(format_value(s['value']))}</td>"
                    f"<td>{s['tol_pct']:.3g} %</td>"
                    f"<td>{_e(format_value(s['dvth_V'], 'V'))}</td><td>{s['rank_vth']}</td>"
                    f"<td>{_e(format_value(s['drth_ohm'], 'Ω'))}</td><td>{s['rank_rth']}</td>"
                    "</tr>")
    rows.append("</table><p class='note'>The change of each output when the part alone "
                "moves by its full tolerance (first order, central differences).</p>")
    return "".join(rows)


def _units_table(m) -> str:
    ex, ud = m["expected"], m["U_design"]
    rows = [(f"<h2>Measured units against the design</h2><p>Source {_e(m['source'])}. "
            f"Expected Vth {_e(format_estimate(ex['vth_V'], ud['vth_V'], 'V'))}, Rth "
            f"{_e(format_estimate(ex['rth_ohm'], ud['rth_ohm'], 'Ω'))} (± U, k = 2, from "
            f"{_e(ud['from'])}). {m['summary']['consistent']} of {m['summary']['units']} "
            "unit(s) consistent.</p><table><tr><th>DUT</th><th>Vth ± U</th><th>E_n</th>"
            "<th>Rth ± U</th><th>E_n</th><th>verdict</th><th class='why'>single part that "
            "would explain it</th></tr>")]

    def worst(u):
        return max(abs(u["En_vth"] or 0.0), abs(u["En_rth"] or 0.0))

    units = sorted(m["units"], key=worst, reverse=True)
    for u in units[:MAX_REPORT_ROWS]:
        e = u["explanation"][0] if u["explanation"] else None
        why = ""
        if e:
            why = (f"{e['part']} {100 * e['relative_change']:+.3g} % "
                   f"({'within' if e['within_tolerance'] else 'beyond'} its tolerance"
                   + ("" if e["misfit"] <= 1 else f"; misfit {e['misfit']:.2f}") + ")"
                   + (f", or alike: {', '.join(e['alike'])}" if e["alike"] else ""))

        def cell(v, U, unit):
            return "—" if v is None else format_estimate(v, U, unit)

        def en(x):
            return "—" if x is None else f"{x:.2f}"

        cls = "pass" if u["consistent"] else "fail"
        rows.append(f"<tr><td>{_e(u['dut'])}</td><td>{_e(cell(u['vth_V'], u['U_vth_V'], 'V'))}"
                    f"</td><td>{en(u['En_vth'])}</td>"
                    f"<td>{_e(cell(u['rth_ohm'], u['U_rth_ohm'], 'Ω'))}</td>"
                    f"<td>{en(u['En_rth'])}</td><td class='{cls}'>"
                    f"{'consistent' if u['consistent'] else 'not consistent'}</td>"
                    f"<td class='why'>{_e(why)}</td></tr>")
    rows.append("</table>")
    if len(units) > MAX_REPORT_ROWS:
        rows.append(f"<p class='note'>{len(units) - MAX_REPORT_ROWS} more units (worst "
                    "first above) are in results.json.</p>")
    if m["skipped"]:
        rows.append("<p class='note'>Without a fit: " + _e(", ".join(
            f"{s['dut']} ({s['reason']})" for s in m["skipped"][:20])) + "</p>")
    rows.append("<p class='note'>E_n = (measured − expected)/√(U_meas² + U_design²), "
                "expanded uncertainties (ISO 13528:2022, 9.7; ISO/IEC 17043:2023); |E_n| ≤ 1 "
                "is consistent. The part named is the one that, changed alone (solved on the "
                "network), best accounts for the difference.</p>")
    return "".join(rows)
