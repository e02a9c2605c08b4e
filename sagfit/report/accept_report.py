"""Outputs of ``sagfit accept``: the decisions as CSV, and an acceptance report folder.

Edge module (pandas for the CSV; matplotlib, through :mod:`sagfit.plots`, for the
figures — both imported inside the functions). The report folder holds
``report.html`` (self-contained: inline SVG figures, escaped text), ``results.csv``,
``results.json`` and one PNG histogram per check (``fig-histogram-<check>.png``; the
names of :mod:`sagfit.report.style`), written atomically and only inside the folder.
"""

from __future__ import annotations

import html
import math

import numpy as np

from ..core.acceptance import DECISIONS, ERROR, FAIL, INCONCLUSIVE, PASS, STATEMENTS
from ..core.formatting import format_estimate, format_percent, format_value
from .style import REPORT_HTML, RESULTS_CSV, RESULTS_JSON, STYLESHEET, batch_figure_name

__all__ = ["acceptance_table", "acceptance_csv", "limits_text", "format_check",
           "write_accept_report"]

MAX_REPORT_ROWS = 500
# decision colours (a plain traffic-light convention, common practice), tuned to sit with
# the house palette of sagfit.plots
DECISION_COLORS = {"pass": "#3d7a57", "inconclusive": "#c99a2e", "fail": "#b3402f",
                   "error": "#6b7280"}


def format_check(value: float, U: float, unit: str) -> str:
    """``value ± U`` as the trade writes it (per cent without an SI prefix)."""
    if unit == "%":
        return format_percent(value, U)
    return format_estimate(value, U, unit)


def limits_text(check) -> str:
    """``'4.900 V … 5.100 V'``, ``'≤ 40.00 mΩ'`` or ``'≥ 50.00 A'`` (plus the condition)."""
    unit = check.unit

    def v(x):
        return f"{x:.4g} %" if unit == "%" else format_value(x, unit)

    if math.isfinite(check.lower) and math.isfinite(check.upper):
        text = f"{v(check.lower)} … {v(check.upper)}"
    elif math.isfinite(check.upper):
        text = f"≤ {v(check.upper)}"
    else:
        text = f"≥ {v(check.lower)}"
    if check.at is not None:
        text += f" at {check.at.label}"
    if check.light is not None:
        text += f", {check.light.label} → {check.heavy.label}"
    return text


def _columns(acc) -> list[tuple[str, str, object]]:
    """The CSV columns as (name, kind, data): kind ``num`` (float array), ``word`` (our own
    vocabulary: decisions, rule, booleans) or ``text`` (from user data, neutralised)."""
    from ..io.readings_csv import neutralise

    names = np.array(DECISIONS, dtype=object)
    check_names = np.array(DECISIONS[:3] + ("",), dtype=object)
    m = len(acc)
    flags = [""] * m
    for i, codes in acc.warning_codes.items():
        flags[i] = neutralise(";".join(codes))
    cols = [("dut", "text", [neutralise(d) for d in acc.duts]),
            ("decision", "word", names[acc.decision]),
            ("rule", "word", np.full(m, acc.rule.rule, dtype=object)),
            ("coverage_factor", "num", acc.k),
            ("capped_by_flags", "word", acc.capped),
            ("flags", "text", flags)]
    ok = acc.decision != ERROR

    def finite(a):
        return np.where(np.isfinite(a), a, np.nan)

    for cr in acc.checks:
        n = cr.name
        cols += [(f"{n}_value", "num", cr.value), (f"{n}_U", "num", cr.U),
                 (f"{n}_lower", "num", np.full(m, finite(cr.check.lower))),
                 (f"{n}_upper", "num", np.full(m, finite(cr.check.upper))),
                 (f"{n}_acceptance_lower", "num", finite(cr.accept_lower)),
                 (f"{n}_acceptance_upper", "num", finite(cr.accept_upper)),
                 (f"{n}_p_c", "num", cr.p_c),
                 (f"{n}_decision", "word", check_names[np.where(ok, cr.decision, 3)])]
        if cr.extrapolated is not None:
            cols.append((f"{n}_extrapolated", "word", cr.extrapolated & ok))
    cols.append(("error", "text", [neutralise(e) if e else "" for e in acc.error]))
    return cols


def acceptance_table(acc):
    """The decisions as a pandas DataFrame, one row per DUT, SI units, full precision.

    Text cells from user data (DUT names, messages) are formula-neutralised; numeric
    columns stay numeric (NaN = empty cell).
    """
    import pandas as pd

    return pd.DataFrame({name: data for name, _, data in _columns(acc)})


def _quote(text: str) -> str:
    """A text cell, always quoted (RFC 4180: inner quotes doubled)."""
    return '"' + text.replace('"', '""') + '"' if text else ""


def acceptance_csv(acc) -> str:
    """The CSV text of :func:`acceptance_table`: one row per DUT, numbers at full
    precision (unquoted, so they stay numeric), text quoted, NaN and ±inf as empty cells.

    Written whole columns at a time by the same writer as ``fit --out``
    (:func:`sagfit.io_csv.csv_rows`), not with ``DataFrame.to_csv``.
    """
    from ..io.readings_csv import coded, csv_rows

    cols, header = {}, []
    for j, (name, kind, data) in enumerate(_columns(acc)):
        header.append(_quote(name) if any(ch in name for ch in ',"\n') else name)
        if kind == "num":
            cols[j] = np.asarray(data, float)
        elif kind == "word":  # our own vocabulary: nothing to quote
            cols[j] = coded(data)
        else:
            cols[j] = ["" if x is None else str(x) for x in data]
    body = b"".join(csv_rows(cols)).decode("utf-8")
    return ",".join(header) + "\n" + body


def acceptance_parquet(acc) -> bytes:
    """The columns of :func:`acceptance_table` as a Parquet file (bytes)."""
    from ..io.readings_csv import coded
    from ..io.results_csv import table_parquet

    cols = {}
    for name, kind, data in _columns(acc):
        cols[name] = (np.asarray(data, float) if kind == "num" else
                      coded(data) if kind == "word" else
                      [None if x is None else str(x) for x in data])
    return table_parquet(cols)


# ---------------------------------------------------------------------- figures
def histogram(acc, j: int):
    """Histogram of check ``j`` across the fitted DUTs, stacked by decision, with the
    tolerance limits (solid), the median acceptance limits (dashed) and the guard band
    between them shaded."""
    from .plots import COLORS, house_style, new_figure, si_axis

    cr = acc.checks[j]
    c = cr.check
    ok = (acc.decision != ERROR) & np.isfinite(cr.value)
    v = cr.value[ok]
    d = cr.decision[ok]
    scale_pct = c.unit == "%"
    with house_style():
        fig, ax = new_figure(5.2, 3.1)
        if v.size == 0:
            ax.text(0.5, 0.5, "no fitted values", transform=ax.transAxes, ha="center")
            return fig
        lims = [x for x in (c.lower, c.upper) if math.isfinite(x)]
        lo = min(float(v.min()), *lims)
        hi = max(float(v.max()), *lims)
        pad = 0.04 * (hi - lo) if hi > lo else max(abs(hi) * 1e-3, 1e-12)
        edges = np.histogram_bin_edges(v, bins=min(60, max(10, int(np.sqrt(v.size)))),
                                       range=(lo - pad, hi + pad))
        bottom = np.zeros(edges.size - 1)
        for code in (PASS, INCONCLUSIVE, FAIL):
            h, _ = np.histogram(v[d == code], bins=edges)
            if h.any():
                ax.bar(edges[:-1], h, width=np.diff(edges), bottom=bottom, align="edge",
                       color=DECISION_COLORS[DECISIONS[code]], edgecolor="white",
                       linewidth=0.3, label=DECISIONS[code])
                bottom += h
        top = float(bottom.max()) if bottom.size else 1.0
        for t, a in ((c.lower, cr.accept_lower[ok]), (c.upper, cr.accept_upper[ok])):
            if not math.isfinite(t):
                continue
            ax.axvline(t, color=COLORS["ink"], linewidth=1.2)
            a = a[np.isfinite(a)]
            if a.size and acc.rule.rule != "simple":
                med = float(np.median(a))
                ax.axvspan(min(t, med), max(t, med), color=COLORS["muted"], alpha=0.18,
                           linewidth=0, zorder=0)
                ax.axvline(med, color=COLORS["ink"], linewidth=0.9, linestyle="--")
        ax.set_ylim(0, top * 1.12 + 0.5)
        ax.grid(axis="x", visible=False)
        label = {"vth": "Open-circuit voltage Vth", "rth": "Internal resistance Rth",
                 "isc": "Short-circuit current Isc", "pmax": "Maximum power Pmax"}.get(
            c.quantity, c.name)
        if scale_pct:
            ax.set_xlabel(f"{label} (%)")
        else:
            si_axis(ax, "x", c.unit, label)
        ax.set_ylabel("DUTs")
        ax.legend(loc="best", frameon=False)
    return fig


# ---------------------------------------------------------------------- the report



def _e(x) -> str:
    return html.escape(str(x), quote=True)


def write_accept_report(folder, acc, fits, readings, doc, *, inputs=()) -> None:
    """Write the acceptance report into ``folder`` (created if needed)."""
    from pathlib import Path

    from ..io.outputs import atomic_write, prepare_folder
    from .plots import figure_svg, save_png

    root = prepare_folder(folder, inputs)
    import json

    atomic_write(root / RESULTS_JSON, json.dumps(doc, indent=2, ensure_ascii=False,
                                                  allow_nan=False) + "\n",
                 inputs=inputs, within=root, option="--report")
    atomic_write(root / RESULTS_CSV, acceptance_csv(acc), inputs=inputs, within=root,
                 option="--report")
    figures = []
    for j, cr in enumerate(acc.checks):
        fig = histogram(acc, j)
        name = batch_figure_name("histogram", cr.name)
        save_png(fig, root / name, root, inputs=inputs)
        figures.append((cr, figure_svg(fig, title=f"Histogram of {cr.name}"), name))
    s = doc["summary"]
    spec = acc.spec
    r = acc.rule
    parts = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
             "<meta name='viewport' content='width=device-width,initial-scale=1'>",
             f"<title>Acceptance report: {_e(spec.name or Path(spec.source).name)}</title>",
             f"<style>{STYLESHEET}</style></head><body>",
             f"<h1>Acceptance report: {_e(spec.name or Path(spec.source).name)}</h1>",
             "<p>", f"Readings: {_e(readings.source)} (sha256 "
             f"{_e(str(readings.meta.get('sha256', ''))[:16])}…), {len(readings)} readings, "
             f"{len(acc)} DUT(s). Spec: {_e(spec.source)}"
             + (f", revision {_e(spec.revision)}" if spec.revision else "")
             + f" (sha256 {_e(spec.sha256[:16])}…).</p>",
             f"<p>Decision rule: <b>{_e(r.rule)}</b> — {_e(_rule_text(r, acc))}</p>"]
    parts.append(_instruments(doc.get("settings", {}), acc))
    if doc.get("decision_rule", {}).get("calibration_overdue"):
        parts.append("<p class='caution'><b>Decisions taken with an instrument past its "
                     "calibration due date</b>: review them before release.</p>")
    for w in doc.get("warnings", []):
        parts.append(f"<p class='caution'>warning: {_e(w)}</p>")
    for c in doc.get("cautions", []):
        parts.append(f"<p class='caution'>{_e(c)}</p>")
    parts.append("<h2>Summary</h2><table class='grid'><tr><th>decision</th><th>DUTs</th></tr>")
    for name in DECISIONS:
        parts.append(f"<tr><td class='{name}'>{name}</td><td>{s[name]}</td></tr>")
    parts.append(f"<tr><td>total</td><td>{s['total']}</td></tr></table>")
    if s["total"]:
        parts.append(f"<p>Yield (passed / tested): {100 * s['yield']:.1f} %."
                     + (f" {s['capped_by_flags']} DUT(s) inside the limits but flagged are "
                        "inconclusive." if s["capped_by_flags"] else "") + "</p>")
    parts.append("<h2>Limits</h2><table class='grid'><tr><th>check</th><th>tolerance</th>"
                 "<th>fail</th><th>inconclusive</th><th>extrapolated</th><th>note</th></tr>")
    ranked = {x["quantity"]: x for x in s["failed_most"]}
    extra = s.get("extrapolated", {})
    for cr in acc.checks:
        x = ranked.get(cr.name, {"fail": 0, "inconclusive": 0})
        parts.append(f"<tr><td>{_e(cr.name)}</td><td>{_e(limits_text(cr.check))}</td>"
                     f"<td>{x['fail']}</td><td>{x['inconclusive']}</td>"
                     f"<td>{extra.get(cr.name, 0) if cr.extrapolated is not None else ''}</td>"
                     f"<td>{_e(cr.check.note)}</td></tr>")
    if extra:
        parts.append("<p class='note'>Extrapolated: DUTs whose readings do not reach the "
                     "check's operating point; the fitted line is used beyond the measured "
                     "currents there.</p>")
    parts.append("</table><h2>Distributions</h2><p class='note'>Solid lines: tolerance "
                 "limits. Dashed lines and shading: the guard band up to the median "
                 "acceptance limit (each DUT's own limit depends on its uncertainty).</p>")
    for cr, svg, name in figures:
        parts.append(f"<figure>{svg}<figcaption class='note'>{_e(cr.name)} "
                     f"({_e(name)})</figcaption></figure>")
    parts.append(_units_table(acc))
    parts.append("<p class='note'>Values are shown ± U, the expanded uncertainty used for "
                 "the decision. Full precision, SI units: results.csv and results.json. "
                 "Statements per ILAC-G8:09/2019 §4.2.3 are in results.json.</p>")
    parts.append("</body></html>\n")
    atomic_write(root / REPORT_HTML, "".join(parts), inputs=inputs, within=root,
                 option="--report")


def _instruments(settings, acc) -> str:
    """The measurement set-up: meter specs, load tolerance and the instruments' identities
    with their calibration due dates (for traceability)."""
    bits = []
    for key, label in (("voltage_accuracy", "voltage"), ("current_accuracy", "current")):
        a = settings.get(key)
        bits.append(f"{label} ±({_e(a['text'])})" if a else f"{label}: no accuracy stated")
    tol = settings.get("load_tolerance_pct")
    if tol is not None:
        bits.append(f"load tolerance {tol:g} %")
    text = (f"<p>Measurement: {'; '.join(bits)}; confidence {100 * acc.confidence:g} %."
            "</p>")
    rows = settings.get("instruments") or []
    if rows:
        text += ("<table><tr><th>role</th><th>instrument</th><th>spec</th>"
                 "<th>calibration due</th></tr>")
        for r in rows:
            text += (f"<tr><td>{_e(r.get('role', ''))}</td><td>{_e(r.get('identifier', ''))}"
                     f"</td><td>{_e(r.get('spec', ''))}</td>"
                     f"<td>{_e(r.get('calibration_due') or '')}</td></tr>")
        text += "</table>"
    return text


def _rule_text(r, acc) -> str:
    k = acc.k[np.isfinite(acc.k)]
    kt = (f"k = {float(k[0]):.3g}" if k.size and np.all(k == k[0])
          else "k from each fit (Student t for Type A fits)")
    if r.rule == "simple":
        return ("simple acceptance (shared risk): pass inside the tolerance limits, fail "
                "outside (ILAC-G8:09/2019 §4.2.1).")
    if r.rule == "guarded":
        return (f"guarded acceptance, guard band w = {r.guard:g}·U with U = k·u ({kt}): pass "
                "when the whole interval lies inside the limits, fail when it lies wholly "
                "outside, inconclusive otherwise (ILAC-G8:09/2019 §4.2.2–4.2.3; JCGM "
                "106:2012).")
    return (f"conformance probability p_c for a normal PDF (JCGM 106:2012): pass when p_c ≥ "
            f"{r.min_conformance:g}, fail when p_c ≤ {1 - r.min_conformance:.3g}, "
            "inconclusive otherwise.")


def _units_table(acc) -> str:
    rank = np.array([0, 1, 3, 2])[acc.decision]
    order = np.argsort(-rank, kind="stable")[:MAX_REPORT_ROWS]
    head = "".join(f"<th>{_e(cr.name)}</th>" for cr in acc.checks)
    rows = [f"<h2>Units</h2><table class='grid'><tr><th>DUT</th><th>decision</th>{head}</tr>"]
    for i in order:
        name = DECISIONS[acc.decision[i]]
        cells = []
        for cr in acc.checks:
            if acc.decision[i] == ERROR:
                cells.append("<td></td>")
                continue
            dn = DECISIONS[int(cr.decision[i])]
            text = format_check(float(cr.value[i]), float(cr.U[i]), cr.check.unit)
            cells.append(f"<td class='{dn}' title='{_e(STATEMENTS[int(cr.statement[i])])}"
                         f", p_c = {float(cr.p_c[i]):.4g}'>{_e(text)}</td>")
        extra = ""
        if acc.decision[i] == ERROR:
            extra = f" — {_e(acc.error[i])}"
        elif acc.capped[i]:
            extra = f" (flagged: {_e(', '.join(acc.warning_codes.get(int(i), ())))})"
        rows.append(f"<tr><td>{_e(acc.duts[i])}</td><td class='{name}'>{name}{extra}</td>"
                    + "".join(cells) + "</tr>")
    rows.append("</table>")
    if len(acc) > MAX_REPORT_ROWS:
        rows.append(f"<p class='note'>{len(acc) - MAX_REPORT_ROWS} more DUTs (worst first "
                    "above) are in results.csv.</p>")
    return "".join(rows)
