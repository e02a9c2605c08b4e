"""The trend report (``sagfit trend --report DIR``): one HTML page with figures, plus the
JSON document and a CSV table.

Edge module: matplotlib (through :mod:`sagfit.plots`, imported lazily) and the file
system (through :mod:`sagfit.outputs`: atomic writes, nothing outside DIR, DUT names
through ``safe_filename``). Every piece of user text in the page is HTML-escaped.

Figures: Rth against test date per DUT (error bars ±U, the baseline and threshold
lines, the trend line and its projection to the threshold with the crossing interval
shaded) — for every DUT when there are at most ``ALL_FIGURES_UP_TO`` of them, else for
the flagged ones (at most ``MAX_FIGURES``); and a fleet chart per group of the latest Rth
of each DUT against the group median and the outlier limit.
"""

from __future__ import annotations

import datetime as _dt
import html
import math
from pathlib import Path

import numpy as np

from ..core.formatting import format_estimate, format_percent, format_value
from ..core.trend import DAY, iso_date
from .style import REPORT_HTML, RESULTS_CSV, RESULTS_JSON, STYLESHEET, batch_figure_name
from .style import dut_figure_name

__all__ = ["write_trend_report", "trends_csv", "ALL_FIGURES_UP_TO", "MAX_FIGURES"]

ALL_FIGURES_UP_TO = 60
MAX_FIGURES = 200
MAX_FLEET_CHARTS = 12
MAX_FLEET_POINTS = 400
MAX_TABLE_ROWS = 2000



def _dates(t):
    return [_dt.datetime.fromtimestamp(float(x), _dt.timezone.utc) for x in np.atleast_1d(t)]


def _dut_figure(trends, recs, i, rows, k_show):
    from .plots import COLORS, format_like, house_style, new_figure, si_axis

    t = recs.time[rows]
    r = recs.rth[rows]
    u = np.nan_to_num(recs.u_rth[rows]) * k_show
    # one unit on the axis and in the legend
    like = float(np.nanmax(np.abs(np.r_[r, trends.baseline_rth[i], trends.threshold_rth[i]])))
    with house_style():
        fig, ax = new_figure(6.4, 3.6)
        ax.errorbar(_dates(t), r, yerr=u, fmt="o", color=COLORS["point"], ecolor=COLORS["muted"],
                    elinewidth=0.8, label="recorded Rth (±U)", zorder=3)
        ax.axhline(trends.baseline_rth[i], color=COLORS["muted"], lw=0.9, ls=":",
                   label=f"baseline {format_like(trends.baseline_rth[i], 'Ω', like)}")
        ax.axhline(trends.threshold_rth[i], color=COLORS["flag"], lw=1.0, ls="--",
                   label=f"threshold {format_like(trends.threshold_rth[i], 'Ω', like)}")
        if math.isfinite(trends.rate[i]):
            tl = trends.latest_time[i]
            end = tl + 30 * DAY
            if math.isfinite(trends.crossing_time[i]):
                end = max(end, min(trends.crossing_time[i], tl + 3 * 365 * DAY)) + 15 * DAY
            else:
                end = max(end, trends.as_of + trends.settings["horizon_days"] * DAY)
            slope = trends.rate[i] / 30.0
            xs = np.array([t.min(), tl])
            ax.plot(_dates(xs), trends.fitted_latest[i] + slope * (xs - tl) / DAY,
                    color=COLORS["model"], label="weighted trend")
            xp = np.array([tl, end])
            ax.plot(_dates(xp), trends.fitted_latest[i] + slope * (xp - tl) / DAY,
                    color=COLORS["model"], ls="--", lw=1.0, label="projection")
            if math.isfinite(trends.crossing_time[i]):
                lo, hi = trends.crossing_low[i], trends.crossing_high[i]
                if math.isfinite(lo) and math.isfinite(hi):
                    ax.axvspan(*_dates([lo, min(hi, tl + 3 * 365 * DAY)]), color=COLORS["flag"],
                               alpha=0.12, lw=0, label="crossing interval")
                when = iso_date(trends.crossing_time[i])
                ax.plot(_dates([trends.crossing_time[i]]), [trends.threshold_rth[i]], "D",
                        color=COLORS["flag"], ms=5, label=f"crossing {when}")
        ax.set_xlabel("Test date")
        si_axis(ax, "y", "Ω", "Internal resistance", like=like)
        # rotated date labels; fig.autofmt_xdate() would call subplots_adjust, which a
        # constrained-layout figure refuses with a warning on some matplotlib releases
        ax.tick_params(axis="x", labelrotation=30)
        ax.legend(loc="best", ncols=2)
    return fig


def _fleet_figure(trends, members, key, excess_pct):
    from .plots import COLORS, format_like, house_style, new_figure, si_axis

    members = members[np.argsort(np.asarray(trends.duts, dtype=object)[members].astype(str))]
    members = members[:MAX_FLEET_POINTS]
    y = trends.latest_rth[members]
    U = trends.expanded_latest[members]
    flagged = trends.flagged[members]
    med = float(trends.group_median[members[0]])
    x = np.arange(members.size)
    like = float(np.nanmax(np.abs(np.r_[y, med * (1 + excess_pct / 100.0)])))
    with house_style():
        fig, ax = new_figure(max(6.4, min(16.0, 0.3 * members.size + 2)), 3.6)
        ax.errorbar(x[~flagged], y[~flagged], yerr=U[~flagged], fmt="o", color=COLORS["point"],
                    ecolor=COLORS["muted"], elinewidth=0.8, label="latest Rth (±U)")
        if flagged.any():
            ax.errorbar(x[flagged], y[flagged], yerr=U[flagged], fmt="o", color=COLORS["flag"],
                        ecolor=COLORS["flag"], elinewidth=0.8, label="flagged")
        ax.axhline(med, color=COLORS["model"], lw=1.0,
                   label=f"group median {format_like(med, 'Ω', like)}")
        ax.axhline(med * (1 + excess_pct / 100.0), color=COLORS["flag"], lw=1.0, ls="--",
                   label=f"median + {excess_pct:g} %")
        ax.set_xticks(x, [trends.duts[j] for j in members], rotation=90 if members.size > 12 else 0)
        ax.set_xlabel(f"DUT ({key})")
        si_axis(ax, "y", "Ω", "Latest internal resistance", like=like)
        ax.legend(loc="best", ncols=2)
    return fig


def trends_csv(trends) -> str:
    """``results.csv``: one row per DUT, through the project's CSV writer (numbers as
    ``%.10g``, non-finite values as empty cells, text neutralised and quoted as needed)."""
    from ..io.readings_csv import table_csv

    def dates(a):
        return [iso_date(t) or "" for t in np.asarray(a, float).tolist()]

    return table_csv({
        "dut": [str(d) for d in trends.duts],
        "records": np.asarray(trends.records, dtype=np.int64),
        "baseline_rth_ohm": np.asarray(trends.baseline_rth, float),
        "latest_rth_ohm": np.asarray(trends.latest_rth, float),
        "u_latest_rth_ohm": np.asarray(trends.u_latest, float),
        "latest_date": dates(trends.latest_time),
        "change_pct": np.asarray(trends.change_pct, float),
        "u_change_pct": np.asarray(trends.u_change_pct, float),
        "rate_ohm_per_30d": np.asarray(trends.rate, float),
        "u_rate_ohm_per_30d": np.asarray(trends.u_rate, float),
        "projected_crossing": dates(trends.crossing_time),
        "group": [str(k) for k in trends.group_key],
        "group_median_ohm": np.asarray(trends.group_median, float),
        "excess_pct": np.asarray(trends.excess_pct, float),
        "flags": [";".join(trends.codes(i)) for i in range(len(trends))],
    })


def write_trend_report(folder, trends, recs, doc, *, inputs=()) -> Path:
    """Write ``report.html``, ``results.json``, ``results.csv`` and PNG figures into
    ``folder`` (the names of :mod:`sagfit.report.style`).

    Parameters
    ----------
    folder : path-like
        Output folder (created if needed); nothing is written outside it.
    trends : Trends
    recs : HistoryRecords
        The records behind ``trends`` (same DUT order).
    doc : dict
        The JSON document of ``sagfit trend --json``.
    inputs : sequence of path-like
        Files never to overwrite (the database).
    """
    from scipy import special

    from ..io.outputs import atomic_write, document_text, prepare_folder
    from .plots import figure_svg, save_png

    root = prepare_folder(folder, inputs)
    esc = html.escape
    s = trends.settings
    k_show = float(special.ndtri(0.5 * (1 + trends.confidence)))
    flagged = trends.flagged
    n = len(trends)
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width,initial-scale=1'>",
        "<title>sagfit trend report</title>", f"<style>{STYLESHEET}</style></head><body>",
        "<h1>Internal resistance trends</h1>",
        f"<p>Database {esc(str(doc.get('database', '')))}: {int(doc.get('records', 0))} records "
        f"of {n} DUT(s), as of {esc(str(s['as_of']))}. Baseline: {esc(s['baseline'])}; "
        f"threshold: {esc(s['threshold'])}; horizon {s['horizon_days']:g} days; group outlier "
        f"limit {s['group_excess_pct']:g} % above the median (common practice); confidence "
        f"{trends.confidence * 100:g} %.</p>",
        f"<p><b>{int(flagged.sum())}</b> of {n} DUT(s) flagged.</p>",
        "<h2>Summary</h2><table class='grid'><tr><th>DUT</th><th>records</th><th>baseline Rth</th>"
        "<th>latest Rth ± U</th><th>change</th><th>rate per 30 d</th>"
        "<th>projected crossing</th><th>vs group</th><th>flags</th></tr>",
    ]
    order = np.concatenate((np.flatnonzero(flagged), np.flatnonzero(~flagged)))
    U = trends.expanded_latest
    for i in order[:MAX_TABLE_ROWS]:
        when = iso_date(trends.crossing_time[i])
        if trends.crossed[i]:
            cross = "crossed" + (f" (trend: {when})" if when else "")
        else:
            cross = when or ("not within the tested trend" if math.isfinite(trends.rate[i])
                             else "n/a")
        grp = (f"{trends.excess_pct[i]:+.0f} %" if trends.group_size[i] >= 3 else "")
        codes = ", ".join(trends.codes(i))
        parts.append(
            "<tr><td>" + esc(trends.duts[i]) + f"</td><td>{int(trends.records[i])}</td><td>"
            + esc(format_value(trends.baseline_rth[i], "Ω")) + "</td><td>"
            + esc(format_estimate(trends.latest_rth[i], U[i], "Ω")) + "</td><td>"
            + esc(format_percent(trends.change_pct[i], trends.u_change_pct[i])) + "</td><td>"
            + esc(format_estimate(trends.rate[i], trends.u_rate[i], "Ω")
                  if math.isfinite(trends.rate[i]) else "n/a") + "</td><td>" + esc(cross)
            + "</td><td>" + esc(grp) + "</td><td class='flag'>" + esc(codes) + "</td></tr>")
    parts.append("</table>")
    if n > MAX_TABLE_ROWS:
        parts.append(f"<p class='note'>{n - MAX_TABLE_ROWS} more DUTs in results.csv.</p>")
    msgs = [(trends.duts[i], f) for i in order for f in trends.flags[i]]
    if msgs:
        parts.append("<h2>Flags</h2><ul>")
        for d, f in msgs[:4 * MAX_TABLE_ROWS]:
            cls = "flag" if f.severity == "warning" else "note"
            parts.append(f"<li class='{cls}'>{esc(d)} [{esc(f.code)}]: {esc(f.message)}</li>")
        parts.append("</ul>")

    # ---- fleet charts, one per group
    parts.append("<h2>Fleet: latest Rth against the group median</h2>")
    keys = np.asarray(trends.group_key, dtype=object).astype(str)
    groups = [k for k in dict.fromkeys(keys.tolist())]
    for gi, key in enumerate(groups[:MAX_FLEET_CHARTS]):
        members = np.flatnonzero(keys == key)
        if members.size < 3:
            continue
        fig = _fleet_figure(trends, members, key, s["group_excess_pct"])
        name = batch_figure_name("group", key)
        save_png(fig, root / name, root, inputs=inputs)
        parts.append(f"<figure>{figure_svg(fig, title='Fleet ' + key)}<figcaption>"
                     f"{esc(key)}: {members.size} DUTs (PNG: {esc(name)})</figcaption></figure>")
    if len(groups) > MAX_FLEET_CHARTS:
        parts.append(f"<p class='note'>{len(groups) - MAX_FLEET_CHARTS} more groups: see "
                     "results.csv.</p>")

    # ---- per-DUT trend figures
    show = np.arange(n) if n <= ALL_FIGURES_UP_TO else np.flatnonzero(flagged)
    show = show[np.argsort(~flagged[show], kind="stable")][:MAX_FIGURES]
    if show.size:
        parts.append("<h2>Rth against test date</h2>")
    lo = np.searchsorted(recs.dut_index, np.arange(n), side="left")
    hi = np.searchsorted(recs.dut_index, np.arange(n), side="right")
    for i in show:
        rows = slice(int(lo[i]), int(hi[i]))
        fig = _dut_figure(trends, recs, i, rows, k_show)
        name = dut_figure_name(trends.duts[i], "trend")
        save_png(fig, root / name, root, inputs=inputs)
        parts.append(f"<figure>{figure_svg(fig, title='Rth trend of ' + trends.duts[i])}"
                     f"<figcaption>{esc(trends.duts[i])} (PNG: {esc(name)})</figcaption></figure>")
    if n > ALL_FIGURES_UP_TO:
        parts.append(f"<p class='note'>Figures are drawn for flagged DUTs only when there are "
                     f"more than {ALL_FIGURES_UP_TO} DUTs.</p>")
    parts.append("<p class='note'>Error bars are expanded uncertainties U = k·u with k = "
                 f"{k_show:.2f}. Generated by sagfit {esc(str(doc.get('version', '')))}.</p>")
    parts.append("</body></html>\n")
    atomic_write(root / RESULTS_JSON, document_text(doc), inputs=inputs, within=root,
                 option="--report")
    atomic_write(root / RESULTS_CSV, trends_csv(trends), inputs=inputs, within=root,
                 option="--report")
    atomic_write(root / REPORT_HTML, "\n".join(parts), inputs=inputs, within=root,
                 option="--report")
    return root
