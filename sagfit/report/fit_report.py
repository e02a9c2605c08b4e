"""The report of ``sagfit fit FILE --report DIR``: one self-contained HTML file, a PNG per
figure, and the results as JSON and CSV.

Why this module stays whole at about 660 lines (over the ~500 of the house rule): one
page: its sections share the escaping, the figure embedding and the tables, and are read
in the order the page shows them.

Edge module (writes files, inside ``DIR`` only, atomically, via :mod:`sagfit.outputs`).
``report.html`` carries its figures inline as SVG (glyphs as paths), its style sheet
inline, no script, no font, no network reference of any kind, and prints on A4 or
Letter. Every string that came from a user (file names, DUT ids, flag messages, bench
identifiers) is HTML-escaped.

For a file of many DUTs the report stays small and fast: a summary table of at most
``MAX_TABLE_ROWS`` rows (DUTs with errors or warnings first), histograms of Vth and Rth,
the count of DUTs per limiting input, and per-DUT sections (figures and budget) only for
flagged DUTs — at most ``MAX_DUT_SECTIONS`` of them, said so in the report.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
import math
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from ..core.budget import GROUP_LABELS, budget_arrays
from ..core.errors import OptionError
from ..core.formatting import format_estimate, format_interval, format_p, format_value
from ..io.outputs import atomic_write, document_pieces, prepare_folder
from ..core.safety import DEFERRAL, HAZARDOUS_V, HIGH_CURRENT_A, HOT_RESISTOR_W, fit_cautions
from ..core.traceability import calibration_warnings, date_of_test, instrument_rows
from .style import STYLESHEET
from .style import REPORT_HTML, RESULTS_CSV, RESULTS_JSON, batch_figure_name, dut_figure_name

__all__ = ["write_report", "build_html", "MAX_TABLE_ROWS", "MAX_DUT_SECTIONS",
           "SMALL_FILE_DUTS", "FIGURE_CHOICES"]

MAX_TABLE_ROWS = 300     # rows of the summary table
MAX_DUT_SECTIONS = 20    # per-DUT sections with figures (3 figures each)
SMALL_FILE_DUTS = 6      # with "flagged", a file this small gets a section for every DUT
HISTOGRAM_MIN_DUTS = 8   # histograms across DUTs from this many fitted DUTs
FIGURE_CHOICES = ("flagged", "all", "none")

METHODS = (
    ("Straight line with uncertainties in both current and voltage (correlated where one "
     "was computed from the other through the load)",
     "D. York, N. M. Evensen, M. López Martínez, J. De Basabe Delgado, “Unified equations "
     "for the slope, intercept, and standard errors of the best straight line”, "
     "Am. J. Phys. 72(3), 367–375 (2004)"),
    ("Weighted and ordinary least squares (voltage uncertainty only, or none stated)",
     "N. R. Draper, H. Smith, Applied Regression Analysis, 3rd ed., Wiley (1998), ch. 9"),
    ("Uncertainty model of the readings (rectangular meter and resistor specifications, "
     "propagation through I = V/R or V = I·R), the uncertainty budget, coverage factors and "
     "the rounding of results",
     "JCGM 100:2008, Evaluation of measurement data — Guide to the expression of "
     "uncertainty in measurement (GUM), clauses 4.2, 4.3.7, 5.1.2, 5.2.2, 7.2.6"),
    ("Scale factor S = √(χ²/ν) applied to the covariance when the scatter exceeds the "
     "stated uncertainties (never below 1)",
     "Particle Data Group, Review of Particle Physics, Introduction, “Averages and fits” "
     "(S. Navas et al., Phys. Rev. D 110, 030001 (2024))"),
    ("Goodness of fit: χ² with ν = n − 2 degrees of freedom and its p-value",
     "JCGM 100:2008 and York et al. (2004), as above"),
    ("Pattern of the residual signs ordered by current: runs test",
     "A. Wald, J. Wolfowitz, “On a test whether two samples are from the same population”, "
     "Ann. Math. Statist. 11, 147–162 (1940)"),
    # Which citations were written from memory is noted for developers in docs/method.md.
    ("Short-circuit current Isc = Vth/Rth and maximum power Pmax = Vth²/(4·Rth) with "
     "delta-method uncertainties (full covariance); confidence and prediction bands of the "
     "line by the same propagation",
     "JCGM 100:2008, clause 5.2.2"),
)


def _e(x) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _fmt_num(x, unit="", digits=4) -> str:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return _e(x)
    return format_value(x, unit, digits) if math.isfinite(x) else "n/a"


# ---------------------------------------------------------------------------- entry
def write_report(folder, fits, readings, doc: Mapping, settings: Mapping,
                 figures: str = "flagged", inputs: Sequence = (), *,
                 now: _dt.datetime | None = None) -> Path:
    """Write ``report.html``, one PNG per figure, ``results.json`` and ``results.csv``.

    Parameters
    ----------
    folder : path-like
        Output folder (created if needed; refused if it is an input file).
    fits, readings
        The fit and the readings it came from.
    doc : mapping
        The ``sagfit fit --json`` document, written as results.json with the results of
        ``fits`` (in pieces for a large batch; see :func:`sagfit.outputs.document_pieces`).
    settings : mapping
        The fit settings (``instruments`` for the traceability list).
    figures : {"flagged", "all", "none"}
        Which DUTs get per-DUT figures.
    inputs : sequence of path-like
        Input files, never overwritten.
    now : datetime, optional
        Time stamp of the report (default: now, UTC).

    Returns
    -------
    Path
        The report.html written.
    """
    if figures not in FIGURE_CHOICES:
        raise OptionError("--figures", f"{figures!r}: use one of {', '.join(FIGURE_CHOICES)}")
    inputs = [str(p) for p in inputs]
    root = prepare_folder(folder, inputs, option="--report")
    written: list[tuple[str, bytes]] = []
    page = build_html(fits, readings, doc, settings, figures=figures, now=now,
                      png_sink=written.append)
    for name, data in written:
        atomic_write(root / name, data, inputs=inputs, within=root, option="--report")
    # the same text as `sagfit fit --json`
    atomic_write(root / RESULTS_JSON, document_pieces(doc, fits),
                 inputs=inputs, within=root, option="--report")
    from ..io import readings_csv as io_csv

    atomic_write(root / RESULTS_CSV, io_csv.fits_csv(fits), inputs=inputs, within=root,
                 option="--report")
    return atomic_write(root / REPORT_HTML, page, inputs=inputs, within=root,
                        option="--report")


# ------------------------------------------------------------------------ selection
def _warned(fits) -> np.ndarray:
    """DUTs with a fit error or a warning-severity flag."""
    return ~fits.ok | fits.flag_mask(lambda fl: any(f.severity == "warning" for f in fl))


def _flag_codes(fits, i) -> str:
    return ", ".join(f.code for f in fits.flags[i] if f.code != "type-a")


def _section_duts(fits, figures: str) -> tuple[np.ndarray, int, str]:
    """Indices of the DUTs that get a section, the number eligible, and why."""
    m = len(fits)
    if figures == "none":
        return np.zeros(0, np.int64), 0, "per-DUT figures were not requested (--figures none)"
    if figures == "all" or m <= SMALL_FILE_DUTS:
        pick = np.arange(m)
        why = "every DUT" if figures == "all" else f"every DUT (a file of at most " \
                                                    f"{SMALL_FILE_DUTS} DUTs)"
    else:
        pick = np.flatnonzero(_warned(fits))
        why = "the DUTs with an error or a warning"
    total = pick.size
    return pick[:MAX_DUT_SECTIONS], total, why


# ----------------------------------------------------------------------------- html



def _kv(rows: Iterable[tuple[str, str]]) -> str:
    """A two-column table; values are already HTML."""
    body = "".join(f"<tr><th>{_e(k)}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<table class="kv">{body}</table>'


def _acc_text(a) -> str:
    if not a:
        return '<span class="muted">not stated</span>'
    if isinstance(a, Mapping):
        return _e(a.get("text") or f"{a.get('percent')} % + {a.get('offset')}")
    return _e(getattr(a, "text", a))


def _settings_rows(srec: Mapping) -> list[tuple[str, str]]:
    rows = []
    conf = srec.get("confidence")
    if conf is not None:
        rows.append(("Confidence level", _e(f"{100 * float(conf):.4g} %")))
    rows.append(("Voltage accuracy", _acc_text(srec.get("voltage_accuracy"))))
    rows.append(("Current accuracy", _acc_text(srec.get("current_accuracy"))))
    tol = srec.get("load_tolerance_pct")
    rows.append(("Load tolerance", _e(f"{tol:g} %") if isinstance(tol, (int, float))
                 else '<span class="muted">not stated</span>'))
    src = {"SAGFIT_BENCH": " (from $SAGFIT_BENCH)",
           "user configuration": " (the user's default profile)"}.get(
        srec.get("bench_source") or "", "")
    rows.append(("Bench profile", _e(str(srec.get("bench")) + src) if srec.get("bench")
                 else '<span class="muted">none</span>'))
    known = {"confidence", "voltage_accuracy", "current_accuracy", "load_tolerance_pct",
             "bench", "bench_source", "instruments"}
    for key in sorted(k for k in srec if k not in known):
        val = srec[key]
        if val is None or val is False or val == [] or val == {}:
            continue
        shown = json.dumps(val, ensure_ascii=False) if not isinstance(val, str) else val
        rows.append((key.replace("_", " ").capitalize(), _e(shown)))
    return rows


def _temperature(meta: Mapping) -> str | None:
    """Ambient temperature text from a '# temperature_C:' comment or a column."""
    col = meta.get("temperature_C")
    if col is not None:
        a = np.asarray(col, float)
        a = a[np.isfinite(a)]
        if a.size:
            lo, hi, med = float(a.min()), float(a.max()), float(np.median(a))
            if hi - lo < 0.05:
                return f"{med:.1f} °C (temperature column)"
            return f"{lo:.1f} … {hi:.1f} °C, median {med:.1f} °C (temperature column)"
    for key in ("temperature_c", "temperature", "ambient_c", "ambient"):
        val = meta.get(key)
        if val is not None and str(val).strip():
            text = str(val).strip()
            try:
                return f"{float(text.replace(',', '.')):.4g} °C (from the file's comment line)"
            except ValueError:
                return f"{text} (from the file's comment line, as written)"
    return None


def _cautions_box(fits, readings) -> str:
    raised = fit_cautions(fits, readings)
    raised = [c for c in raised if c != DEFERRAL]
    # the usual reminders, as far as they apply to this set-up: no resistor reminder for
    # electronic-load (I, V) readings, no assumption about what kind of source this is
    load = np.asarray(readings.load, dtype=float)
    standing = [
        "A source may deliver far more current into a short than any load tested: compute "
        "Isc from the fit, never measure it by shorting the terminals "
        f"(this report calls anything above {HIGH_CURRENT_A:g} A high current)."]
    if (np.isfinite(load) & (load > 0)).any():
        standing.append(
            "Load resistors get hot: rate and derate them for the power, keep readings short "
            f"(this report flags more than {HOT_RESISTOR_W:g} W in one load).")
    standing.append(
        f"Voltages above {HAZARDOUS_V:g} V DC are treated as hazardous (common practice).")
    items = "".join(f'<li class="warn">{_e(c)}</li>' for c in raised)
    items += "".join(f"<li>{_e(c)}</li>" for c in standing)
    head = ("Cautions raised by these results, and the usual ones" if raised
            else "Cautions")
    return (f'<div class="box" role="note"><h2>{_e(head)}</h2><ul>{items}</ul>'
            f"<p>{_e(DEFERRAL)}</p></div>")


def _note_box(doc: Mapping) -> str:
    """The run's note (no uncertainty stated: what that means), once, or nothing."""
    note = doc.get("note")
    if not note:
        return ""
    return (f'<div class="box" role="note" id="type-a-note"><h2>No uncertainty stated</h2>'
            f"<p>{_e(note)}</p></div>")


def _traceability(settings: Mapping, doc: Mapping, readings) -> tuple[str, list[str]]:
    instruments = settings.get("instruments") or (doc.get("settings") or {}).get(
        "instruments") or ()
    when, source = date_of_test(readings.meta)
    rows = instrument_rows(instruments, when)
    warns = calibration_warnings(instruments, when)
    where = "" if source == "file" else f" — {source}"
    out = [f"<p>Test date: <strong>{_e(when.isoformat())}</strong>{_e(where)}.</p>"]
    if not rows:
        out.append('<p class="muted">No instruments named: add <code>instrument</code> and '
                   "<code>calibration_due</code> to the sections of the bench profile "
                   "(<code>--bench</code>) to list them here.</p>")
    else:
        body = []
        for r in rows:
            status = r["status"]
            cls = ' class="warn"' if status == "past due" else ""
            left = "" if r["days_left"] is None else f" ({r['days_left']:+d} days)"
            body.append(f"<tr><td>{_e(r['role'])}</td><td>{_e(r['identifier'])}</td>"
                        f"<td>{_e(r['spec'])}</td><td>{_e(r['calibration_due'] or '—')}</td>"
                        f"<td{cls}>{_e(status + left)}</td></tr>")
        out.append("<table><tr><th>Role</th><th>Instrument</th><th>Specification</th>"
                   "<th>Calibration due</th><th>Status on the test date</th></tr>"
                   + "".join(body) + "</table>")
    for w in warns:
        out.append(f'<p class="warn">Warning: {_e(w)}</p>')
    return "\n".join(out), warns


def _summary_table(fits, warned: np.ndarray, anchors: Mapping[int, str]) -> tuple[str, str]:
    m = len(fits)
    if m <= MAX_TABLE_ROWS:
        order = np.arange(m)
        note = ""
    else:
        first = np.flatnonzero(warned)
        rest = np.flatnonzero(~warned)
        order = np.concatenate([first, rest])[:MAX_TABLE_ROWS]
        note = (f"Showing {MAX_TABLE_ROWS} of {m} DUTs: the {min(first.size, MAX_TABLE_ROWS)} "
                "with an error or a warning first, then the others in file order. "
                "results.csv has every DUT.")
    head = ("<tr><th>DUT</th><th>Method</th><th class='num'>n</th><th class='num'>Vth</th>"
            "<th class='num'>Rth</th><th class='num'>Isc</th><th class='num'>χ²/ν</th>"
            "<th class='num'>p</th><th>Flags</th></tr>")
    body = []
    for i in order:
        i = int(i)
        name = _e(fits.duts[i])
        if i in anchors:
            name = f'<a href="#{anchors[i]}">{name}</a>'
        if fits.error[i] is not None:
            body.append(f"<tr class='hl'><td>{name}</td><td colspan='8' class='warn'>not fitted: "
                        f"{_e(fits.error[i])}</td></tr>")
            continue
        dof = int(fits.dof[i])
        red = f"{float(fits.chi2[i]) / dof:.3g}" if dof > 0 else "n/a"
        cls = " class='hl'" if warned[i] else ""
        body.append(
            f"<tr{cls}><td>{name}</td><td>{_e(fits.method[i])}</td>"
            f"<td class='num'>{int(fits.n[i])}</td>"
            f"<td class='num'>{_e(format_estimate(fits.vth[i], fits.u_vth[i], 'V'))}</td>"
            f"<td class='num'>{_e(format_estimate(fits.rth[i], fits.u_rth[i], 'Ω'))}</td>"
            f"<td class='num'>{_e(format_estimate(fits.isc[i], fits.u_isc[i], 'A'))}</td>"
            f"<td class='num'>{_e(red)}</td><td class='num'>{_e(format_p(fits.p_value[i]))}</td>"
            f"<td>{_e(_flag_codes(fits, i))}</td></tr>")
    table = f"<table>{head}{''.join(body)}</table>"
    return table, note


def _stats_rows(fits) -> str:
    ok = fits.ok & np.isfinite(fits.vth)
    if ok.sum() < 2:
        return ""
    rows = []
    for label, arr, unit in (("Vth", fits.vth, "V"), ("Rth", fits.rth, "Ω"),
                             ("Isc", fits.isc, "A")):
        a = np.asarray(arr, float)[ok]
        a = a[np.isfinite(a)]
        if not a.size:
            continue
        q = np.percentile(a, [0, 25, 50, 75, 100])
        rows.append(f"<tr><td>{label}</td>" + "".join(
            f"<td class='num'>{_e(format_value(float(v), unit, 4))}</td>" for v in q) + "</tr>")
    return ("<table><tr><th>Across fitted DUTs</th><th class='num'>min</th>"
            "<th class='num'>25 %</th><th class='num'>median</th><th class='num'>75 %</th>"
            "<th class='num'>max</th></tr>" + "".join(rows) + "</table>")


def _limiting_table(bud) -> str:
    """How many DUTs each input group limits (largest contribution)."""
    names = ("type_a", "voltage", "current", "load", "scale")
    rows = []
    doms = {y: bud.dominant(y) for y in ("vth", "rth")}
    for gname in names:
        nv = int(np.sum(doms["vth"] == gname))
        nr = int(np.sum(doms["rth"] == gname))
        if nv or nr:
            rows.append(f"<tr><td>{_e(GROUP_LABELS[gname])}</td><td class='num'>{nv}</td>"
                        f"<td class='num'>{nr}</td></tr>")
    if not rows:
        return ""
    return ("<table><tr><th>Largest contribution to the uncertainty</th>"
            "<th class='num'>DUTs, Vth</th><th class='num'>DUTs, Rth</th></tr>"
            + "".join(rows) + "</table>")


def _budget_table(bud, i: int) -> str:
    if not bud.valid[i]:
        reason = bud.reason[i] or "no budget"
        return f'<p class="muted">No uncertainty budget: {_e(reason)}.</p>'
    names = ("type_a",) if bud.type_a[i] else ("voltage", "current", "load", "scale")
    body = []
    for y, unit, label in (("vth", "V", "Vth"), ("rth", "Ω", "Rth")):
        total = float(bud.u_combined[y][i])
        dom = bud.dominant(y)[i]
        first = True
        for gname in names:
            c = float(bud.contribution[(y, gname)][i])
            if not c > 0:
                continue
            u_in = float(bud.u_input[(y, gname)][i])
            sens = float(bud.sensitivity[(y, gname)][i])
            if gname == "scale":
                u_txt, s_txt = f"S = {u_in:.3g}", "—"
            else:
                u_unit = {"voltage": "V", "current": "A", "load": "Ω", "type_a": "V"}[gname]
                u_txt = format_value(u_in, u_unit, 2)
                s_unit = {"voltage": f"{unit}/V", "current": f"{unit}/A",
                          "load": f"{unit}/Ω", "type_a": f"{unit}/V"}[gname]
                s_txt = format_value(sens, s_unit, 3)
            n = int(bud.n_input[gname][i])
            share = c * c / (total * total) if total > 0 else float("nan")
            name = _e(GROUP_LABELS[gname]) + (f" <span class='muted'>({n})</span>" if n else "")
            if gname == dom:
                name = f"<strong>{name}</strong>"
            body.append(f"<tr><td>{label if first else ''}</td><td>{name}</td>"
                        f"<td class='num'>{_e(u_txt)}</td><td class='num'>{_e(s_txt)}</td>"
                        f"<td class='num'>{_e(format_value(c, unit, 2))}</td>"
                        f"<td class='num'>{100 * share:.1f} %</td></tr>")
            first = False
        body.append(f"<tr><td></td><td><em>combined standard uncertainty u({label})</em></td>"
                    f"<td></td><td></td><td class='num'><em>{_e(format_value(total, unit, 2))}"
                    f"</em></td><td class='num'>100 %</td></tr>")
    return ("<table><tr><th>Result</th><th>Input (readings)</th><th class='num'>u(input)</th>"
            "<th class='num'>sensitivity c</th><th class='num'>contribution c·u</th>"
            "<th class='num'>share of u²</th></tr>" + "".join(body) + "</table>")


_DIAG_UNITS = {"current": "A", "voltage": "V", "knee_current": "A", "knee_voltage": "V"}


def _diagnostics_rows(diag: Mapping) -> str:
    if not diag:
        return ""
    rows = []
    for name, fields in diag.items():
        if not isinstance(fields, Mapping):
            rows.append(f"<tr><td>{_e(name)}</td><td>{_e(fields)}</td></tr>")
            continue
        parts = []
        for key, val in fields.items():
            if isinstance(val, (bool, np.bool_)):
                txt = "yes" if val else "no"
            elif isinstance(val, (int, float, np.integer, np.floating)):
                v = float(val)
                if not math.isfinite(v):
                    continue
                low = key.lower()
                if low in ("p", "p_value", "pvalue") or low.startswith("p_"):
                    txt = format_p(v)
                elif low in _DIAG_UNITS and not isinstance(val, (int, np.integer)):
                    txt = format_value(v, _DIAG_UNITS[low], 4)
                else:
                    txt = f"{v:.4g}"
            elif val is None:
                continue
            else:
                txt = str(val)
            sep = " " if txt[:1] in "<>" else " = "  # "p_value < 0.001", not "= < 0.001"
            parts.append(f"{_e(key)}{sep}{_e(txt)}")
        if parts:
            rows.append(f"<tr><td>{_e(name)}</td><td>{'; '.join(parts)}</td></tr>")
    if not rows:
        return ""
    return ("<table><tr><th>Check</th><th>Statistic and p-value</th></tr>"
            + "".join(rows) + "</table>")


def used_rows(readings, fits) -> np.ndarray | None:
    """Rows the fit used, where the settings say (``current_range``); None when all were
    used or it cannot be told (the budget then checks the line itself)."""
    mask = getattr(fits, "used_rows", None)
    if mask is not None and len(mask) == len(readings):
        return np.asarray(mask, bool)
    rng = (getattr(fits, "settings", None) or {}).get("current_range")
    if not rng:
        return None
    lo, hi = (float(v) for v in rng)
    cur = np.asarray(readings.current)
    return (cur >= lo) & (cur <= hi)


def _figure(svg: str, caption: str, png: str | None) -> str:
    link = f' <a href="{_e(png)}">PNG</a>' if png else ""
    return f"<figure>{svg}<figcaption>{_e(caption)}{link}</figcaption></figure>"


def _dut_section(readings, fits, bud, i: int, anchor: str, png_sink, used=None) -> str:
    from . import plots

    fi = fits[i]
    parts = [f'<section class="dut" id="{anchor}"><h3>DUT {_e(fi.dut)}</h3>']
    if fi.error:
        parts.append(f'<p class="warn">Not fitted: {_e(fi.error)}</p>')
    else:
        lvl = f"{100 * fits.confidence:.4g} %"
        rows = []
        from ..core.extrapolation import extrapolated_isc_pmax

        ex_isc, ex_pmax = extrapolated_isc_pmax(fits, readings)
        ex = ", extrapolated beyond the tested currents"
        for label, est, unit in (("Vth (open-circuit voltage)", fi.vth, "V"),
                                 ("Rth (internal resistance)", fi.rth, "Ω"),
                                 ("Isc (Norton current, computed"
                                  + (ex if ex_isc[i] else "") + ")", fi.isc, "A"),
                                 ("Pmax (into R = Rth" + (ex if ex_pmax[i] else "") + ")",
                                  fi.pmax, "W")):
            rows.append(f"<tr><td>{_e(label)}</td>"
                        f"<td class='num'>{_e(format_estimate(est.value, est.u, unit))}</td>"
                        "<td class='num'>"
                        f"{_e(format_interval(est.ci_low, est.ci_high, unit, est.u, est.value))}</td></tr>")
        p = format_p(fi.p_value)
        parts.append("<table><tr><th>Quantity</th><th class='num'>value ± u</th>"
                     f"<th class='num'>{_e(lvl)} interval (k = {fi.coverage_factor:.3g})</th>"
                     "</tr>" + "".join(rows) + "</table>")
        parts.append(f"<p>Method {_e(fi.method)}, n = {fi.n} readings, χ² = {fi.chi2:.4g} "
                     f"with ν = {fi.dof}, p = {_e(p)}, correlation of Vth and Rth "
                     f"{fi.corr_vth_rth:.3f}, covariance scale S² = {fi.scale:.3g}.</p>")
    shown = [f for f in fi.flags if f.code != "type-a"]  # the page's note says it once
    if shown:
        items = "".join(f'<li class="{_e(f.severity)}"><strong>{_e(f.code)}</strong>: '
                        f"{_e(f.message)}</li>" for f in shown)
        parts.append(f'<ul class="flags">{items}</ul>')
    parts.append(_diagnostics_rows(fi.diagnostics))
    figs = [("fit", plots.fit_figure, "Terminal voltage against load current: readings with "
             "k·u error bars, fitted line, confidence band of the line and prediction band "
             "of one new reading."),
            ("residuals", plots.residual_figure, "Normalised residuals e/u(e) with the ±2 "
             "lines."),
            ("power", plots.power_figure, "Power delivered into a load R against R; the "
             "maximum is at R = Rth.")]
    for kind, fn, caption in figs:
        if kind != "fit" and fi.error:
            continue
        fig = fn(readings, fits, i) if kind == "power" else fn(readings, fits, i, used=used)
        if fig is None:
            parts.append(f'<p class="muted">No {kind} figure: Rth is not positive, so there is '
                         "no maximum-power point.</p>")
            continue
        name = dut_figure_name(fits.duts[i], kind)
        png_sink((name, plots.png_bytes(fig)))
        fig.set_layout_engine("none")  # laid out once for the PNG; the SVG reuses it
        parts.append(_figure(plots.figure_svg(fig, title=f"{fi.dut}: {kind}"), caption, name))
    if not fi.error:
        parts.append("<h4>Uncertainty budget</h4>")
        parts.append(_budget_table(bud, i))
    parts.append("</section>")
    return "\n".join(parts)


def build_html(fits, readings, doc: Mapping, settings: Mapping, *, figures: str = "flagged",
               now: _dt.datetime | None = None, png_sink=None) -> str:
    """The report page as one HTML string; PNGs go to ``png_sink((name, bytes))``."""
    from .. import __version__

    png_sink = png_sink or (lambda item: None)
    now = now or _dt.datetime.now(_dt.timezone.utc)
    meta = readings.meta or {}
    srec = doc.get("settings") or {}
    inp = doc.get("input") or {}
    src = inp.get("file") or readings.source
    warned = _warned(fits)
    used = used_rows(readings, fits)
    bud = budget_arrays(readings, fits, used=used)
    pick, eligible, why = _section_duts(fits, figures)
    anchors = {int(i): f"dut-{int(i)}" for i in pick}

    head = [("Input file", f"<code>{_e(src)}</code>"),
            ("SHA-256", f'<span class="hash">{_e(meta.get("sha256") or inp.get("sha256") or "n/a")}'
                        "</span>"),
            ("Test date", _e(meta.get("date") or "not stated in the file")),
            ("DUTs / readings", _e(f"{len(fits)} / {len(readings)}"))]
    temp = _temperature(meta)
    if temp:
        head.append(("Ambient temperature", _e(temp)))
    head += [("Tool", _e(f"sagfit {doc.get('version') or __version__}")),
             ("Report written", _e(now.strftime("%Y-%m-%d %H:%M UTC")))]
    trace_html, _ = _traceability(settings, doc, readings)

    n_ok = int(fits.ok.sum())
    n_err = len(fits) - n_ok
    n_warn = int(warned.sum()) - n_err
    summary = [f"<p>{n_ok} of {len(fits)} DUT(s) fitted"
               + (f", <span class='warn'>{n_err} not fitted</span>" if n_err else "")
               + (f", <span class='warn'>{n_warn} with a warning</span>" if n_warn > 0 else "")
               + ".</p>"]
    table, note = _summary_table(fits, warned, anchors)
    if note:
        summary.append(f"<p class='muted'>{_e(note)}</p>")
    summary.append(table)
    summary.append(_stats_rows(fits))

    hist_html = ""
    figs = []
    if n_ok >= 2:
        # the batch at a glance, flagged or not: every DUT's Vth and Rth with its interval
        from . import plots

        fig = plots.batch_figure(fits, highlight=warned)
        name = batch_figure_name("batch", "vth-rth")
        png_sink((name, plots.png_bytes(fig)))
        figs.append(_figure(plots.figure_svg(fig, title="Vth against Rth of every DUT"),
                            f"Vth against Rth of the {n_ok} fitted DUTs, each with its "
                            f"{fits.confidence * 100:g} % interval on both axes; DUTs with a "
                            "warning in orange.", name))
    if n_ok >= HISTOGRAM_MIN_DUTS:
        from . import plots

        for key, arr, unit, label in (("vth", fits.vth, "V", "Open-circuit voltage Vth"),
                                      ("rth", fits.rth, "Ω", "Internal resistance Rth")):
            fig = plots.histogram_figure(np.where(fits.ok, arr, np.nan), unit, label,
                                         highlight=warned, highlight_label="with a warning")
            name = batch_figure_name("histogram", key)
            png_sink((name, plots.png_bytes(fig)))
            figs.append(_figure(plots.figure_svg(fig, title=f"histogram of {key}"),
                                f"Distribution of {label} across the {n_ok} fitted DUTs.", name))
    if figs:
        hist_html = "<div class='figrow'>" + "".join(figs) + "</div>"

    sections = [_dut_section(readings, fits, bud, int(i), anchors[int(i)], png_sink, used)
                for i in pick]
    if figures == "none":
        sec_note = why + "."
    elif eligible == 0:
        sec_note = f"No per-DUT sections: none of the {len(fits)} DUTs has an error or a " \
                   "warning (use --figures all to draw every DUT)."
    elif eligible > pick.size:
        sec_note = (f"Per-DUT sections for {why}: the first {pick.size} of {eligible} are "
                    f"shown (the report caps them at {MAX_DUT_SECTIONS}); results.json has "
                    "every DUT.")
    else:
        sec_note = f"Per-DUT sections for {why}."

    methods = "".join(f"<li>{_e(what)} — {_e(src_)}</li>" for what, src_ in METHODS)
    limiting = ""
    if len(fits) > 1 and bud.valid.any():
        limiting = "<h3>Which input limits the result</h3>" + _limiting_table(bud)
    page = f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; style-src 'unsafe-inline'">
<title>sagfit report: {_e(Path(str(src)).name)}</title>
<style>{STYLESHEET}</style>
</head>
<body>
<header>
<h1>Thevenin equivalents: {_e(Path(str(src)).name)}</h1>
<p class="sub">V = Vth − Rth·I fitted to bench readings, with uncertainties
(intervals at {_e(f"{100 * fits.confidence:.4g} %")}).</p>
{_kv(head)}
</header>
{_cautions_box(fits, readings)}
{_note_box(doc)}
<h2>Settings used</h2>
{_kv(_settings_rows(srec))}
<h2>Traceability</h2>
{trace_html}
<h2>Results</h2>
{''.join(summary)}
{hist_html}
{limiting}
<h2>Per-DUT results</h2>
<p class="muted">{_e(sec_note)}</p>
{''.join(sections)}
<h2>Methods</h2>
<ul>{methods}</ul>
<p class="muted">The uncertainty budget splits the combined standard uncertainty of Vth and
Rth into the contributions of each input group (voltage readings, current readings, load
resistors, scale factor), using the sensitivity coefficients of the fitted line linearised
about York's adjusted points (GUM 5.1.2); the contributions add in quadrature to the
reported uncertainty. Each reading's error is taken as independent of the others', as in
the fit; a gain error common to all readings of one meter is not part of this model.</p>
<h2>Files</h2>
<p>results.json (the <code>sagfit fit --json</code> document), results.csv (one row per DUT,
SI units, full precision) and one PNG per figure, in the same folder as this page.</p>
</body>
</html>
"""
    return page
