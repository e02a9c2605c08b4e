"""Figures of fits, in sagfit's house style; they are drawn only when asked for.

Why this module stays whole at about 700 lines (over the ~500 of the house rule): one
set of figures in one house style: the shared axis, unit and colour helpers sit beside
the figures that use them (the public ``sagfit.plots`` API).

Edge module (matplotlib). Nothing here touches pyplot: figures are plain
``matplotlib.figure.Figure`` objects drawn by the Agg canvas, so no global backend or
GUI state is touched and thousands of figures can be made and dropped without leaking.
matplotlib is imported inside the functions, so importing this module costs nothing.

Shared helpers, for any command that writes figures into a report:

- :func:`house_style` — a context manager with sagfit's rcParams;
- :func:`si_axis` — SI-prefixed tick labels with the prefixed unit in the axis label;
- :func:`figure_svg` — a figure as an inline ``<svg>`` element (ids made unique);
- :func:`save_png` — a figure as a PNG, written atomically inside a folder.

Figures of one DUT: :func:`fit_figure` (terminal voltage against current with both-axis
error bars, the fitted line, confidence and prediction bands), :func:`residual_figure`
(normalised residuals against current and time) and :func:`power_figure` (delivered
power against load resistance). Across DUTs: :func:`histogram_figure` and
:func:`batch_figure` (Vth against Rth of every DUT with its interval).
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import math
import re
from typing import Iterator, Mapping, Sequence

import numpy as np

from ..core.formatting import format_estimate, format_interval, format_value, si_prefix

__all__ = ["house_style", "si_axis", "format_like", "figure_svg", "save_png", "new_figure", "COLORS",
           "fit_figure", "residual_figure", "power_figure", "histogram_figure", "batch_figure",
           "flagged_lines", "knee_point", "dut_curves"]

# A restrained palette of sagfit's own: dark ink, one steel-blue accent for the model,
# a burnt orange for anything flagged, a violet for the knee.
COLORS = {
    "ink": "#222831",
    "muted": "#6b7280",
    "grid": "#e5e7eb",
    "model": "#1d5f8a",
    "band_ci": "#1d5f8a",
    "band_pi": "#8fb8d6",
    "flag": "#c2410c",
    "knee": "#6d28d9",
    "point": "#222831",
    "open": "#047857",
    "short": "#b45309",
    "hist": "#6f93b0",
}

_STYLE = {
    "figure.figsize": (6.4, 4.0),
    "figure.dpi": 100,
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
    "savefig.dpi": 150,
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "axes.titlesize": 9.5,
    "axes.labelsize": 9.0,
    "axes.labelcolor": COLORS["ink"],
    "axes.edgecolor": COLORS["muted"],
    "axes.linewidth": 0.7,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "axes.formatter.useoffset": False,
    "grid.color": COLORS["grid"],
    "grid.linewidth": 0.6,
    "xtick.color": COLORS["muted"],
    "ytick.color": COLORS["muted"],
    "xtick.labelcolor": COLORS["ink"],
    "ytick.labelcolor": COLORS["ink"],
    "xtick.direction": "out",
    "ytick.direction": "out",
    "xtick.major.size": 3.0,
    "ytick.major.size": 3.0,
    "legend.frameon": False,
    "legend.fontsize": 8.0,
    "lines.linewidth": 1.4,
    "lines.markersize": 4.5,
    "errorbar.capsize": 0.0,
    # glyphs as paths: the SVG needs no font on the reader's machine and prints the same
    "svg.fonttype": "path",
    "svg.hashsalt": "sagfit",
    "pdf.fonttype": 42,
}


@contextlib.contextmanager
def house_style() -> Iterator[None]:
    """Apply sagfit's rcParams inside the ``with`` block (restored afterwards).

    Quiet axes (no top/right spines, light grid below the data), no titles by default,
    no offset notation, DejaVu Sans (shipped with matplotlib), glyphs as paths in SVG.
    """
    import matplotlib
    from cycler import cycler  # a matplotlib dependency

    style = dict(_STYLE)
    style["axes.prop_cycle"] = cycler(color=[COLORS["model"], COLORS["flag"], COLORS["knee"],
                                             COLORS["open"]])
    with matplotlib.rc_context(style):
        yield


def new_figure(width: float = 6.4, height: float = 4.0, *, nrows: int = 1, ncols: int = 1,
               **subplot_kw):
    """A pyplot-free Figure on the Agg canvas, with its axes: ``(fig, ax)``.

    Create it inside :func:`house_style` for the house look.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.subplots(nrows, ncols, **subplot_kw)
    return fig, ax


def _tick_decimals(values: np.ndarray) -> int:
    """Fewest decimals that keep distinct ticks distinct (at most 6)."""
    v = np.unique(np.round(values, 9))
    if v.size < 2:
        return 0 if v.size == 0 or float(v[0]).is_integer() else 3
    step = float(np.min(np.diff(v)))
    if step <= 0:
        return 3
    d = max(0, -int(math.floor(math.log10(step) + 1e-9)))
    for _ in range(3):  # 0.25-steps need two decimals, not one
        if np.allclose(np.round(v, d), v, rtol=0, atol=step * 1e-3):
            break
        d += 1
    return min(d, 6)


def _shared_prefix_formatter(quantity: str, unit: str, like: float | None = None):
    """Tick labels that share one SI prefix, chosen at draw time from the ticks shown
    (or fixed as the prefix of ``like``); the axis label becomes
    ``"<quantity> (<prefix><unit>)"`` to match."""
    from matplotlib import ticker

    class Fmt(ticker.Formatter):
        def __init__(self):
            self.quantity, self.unit = quantity, unit
            self._scale, self._prefix, self._dec = 1.0, "", 2

        def _choose(self, values):
            vals = np.asarray([v for v in values if np.isfinite(v)], float)
            if vals.size and self.axis is not None:
                # ticks just outside the view are not drawn; let the visible ones decide
                lo, hi = sorted(self.axis.get_view_interval())
                inside = (vals >= lo - 1e-12 * abs(lo)) & (vals <= hi + 1e-12 * abs(hi))
                if inside.any():
                    vals = vals[inside]
            big = float(np.max(np.abs(vals))) if vals.size else 0.0
            if like is not None and math.isfinite(like) and like != 0:
                big = abs(like)
            self._scale, self._prefix = si_prefix(big) if big > 0 else (1.0, "")
            self._dec = _tick_decimals(vals / self._scale) if vals.size else 2
            if self.axis is not None:
                unit = f"{self._prefix}{self.unit}"
                text = f"{self.quantity} ({unit})" if unit else self.quantity
                self.axis.label.set_text(text)

        def format_ticks(self, values):
            self._choose(values)
            return [self._one(v) for v in values]

        def _one(self, x):
            y = x / self._scale
            if abs(y) < 0.5 * 10.0 ** (-self._dec):
                y = 0.0
            return f"{y:.{self._dec}f}".replace("-", "\u2212")

        def __call__(self, x, pos=None):
            return self._one(x)

        def format_data(self, value):
            return format_value(float(value), self.unit)

    return Fmt()


def si_axis(ax, which: str, unit: str, label: str | None = None, *,
            like: float | None = None) -> None:
    """SI-prefixed tick labels on one axis of ``ax`` and the unit in its label.

    Parameters
    ----------
    ax : matplotlib Axes
    which : {"x", "y"}
    unit : str
        SI unit of the data on that axis (``"V"``, ``"A"``, ``"Ω"``, ``"W"``; ``""`` for
        dimensionless).
    label : str, optional
        The quantity, e.g. ``"Terminal voltage"``. On a linear axis every tick shares
        one prefix and the label reads ``"Terminal voltage (mV)"``; on a log axis each
        tick carries its own prefix and unit (``100 mΩ``, ``1 Ω``, ``10 Ω``) and the label
        reads just the quantity.
    like : float, optional
        Fix the linear axis's prefix to the one of this value, so that a legend or note
        giving values with :func:`format_like` uses the same unit as the axis (one unit
        per axis and legend); by default the prefix follows the ticks shown.
    """
    from matplotlib import ticker

    axis = ax.xaxis if which == "x" else ax.yaxis
    scale = ax.get_xscale() if which == "x" else ax.get_yscale()
    quantity = label if label is not None else axis.get_label_text()
    if scale == "log":
        axis.set_major_formatter(ticker.EngFormatter(unit=unit, sep="\u2009"))
        axis.set_minor_formatter(ticker.NullFormatter())
        axis.set_label_text(quantity)
    else:
        axis.set_major_formatter(_shared_prefix_formatter(quantity, unit, like))
        axis.set_label_text(f"{quantity} ({unit})" if unit else quantity)


def format_like(value: float, unit: str, like: float, digits: int = 4) -> str:
    """``value`` in the SI prefix of ``like`` (the prefix of an axis drawn with
    ``si_axis(..., like=like)``), with ``digits`` significant digits."""
    if value is None or not math.isfinite(value):
        return format_value(value, unit, digits)
    scale, prefix = si_prefix(like) if like and math.isfinite(like) else si_prefix(value)
    v = value / scale
    decimals = 0 if v == 0 else max(0, digits - 1 - int(math.floor(math.log10(abs(v)))))
    return f"{v:.{decimals}f} {prefix}{unit}".rstrip()


_XML_HEAD = re.compile(r"^.*?(?=<svg\b)", re.S)
_ID_RE = re.compile(r'\bid="([^"]+)"')


def figure_svg(fig, *, title: str | None = None) -> str:
    """The figure as one ``<svg>`` element for inlining in HTML.

    No XML prolog, no DOCTYPE, no date metadata; every ``id`` (clip paths, glyphs) gets a
    prefix derived from the content so several figures in one page never collide. The
    fixed width/height stay for the printed size; the page's CSS may scale it.
    ``title`` becomes an accessible ``<title>`` (escaped).
    """
    buf = io.StringIO()
    with house_style():
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    svg = _XML_HEAD.sub("", buf.getvalue(), count=1)
    # drop the comment/metadata block: it carries nothing a reader needs
    svg = re.sub(r"<metadata>.*?</metadata>\s*", "", svg, flags=re.S)
    tag = "s" + hashlib.sha1(svg.encode("utf-8")).hexdigest()[:8] + "-"
    ids = set(_ID_RE.findall(svg))
    if ids:
        def rid(m):
            return f'id="{tag}{m.group(1)}"'

        def rref(m):
            name = m.group(2)
            return f"{m.group(1)}#{tag}{name}" if name in ids else m.group(0)

        svg = _ID_RE.sub(rid, svg)
        svg = re.sub(r'((?:xlink:)?href="|url\()#([^")]+)', rref, svg)
    if title:
        import html

        svg = re.sub(r"(<svg\b[^>]*>)", lambda m: m.group(1) + "<title>"
                     + html.escape(title) + "</title>", svg, count=1)
    return svg.strip() + "\n"


def png_bytes(fig, dpi: float | None = None) -> bytes:
    """The figure rendered as PNG bytes (house style applied)."""
    buf = io.BytesIO()
    with house_style():
        fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()


def save_png(fig, path, within, *, inputs: Sequence = (), dpi: float | None = None):
    """Write the figure as a PNG at ``path``, atomically, refusing any path outside the
    folder ``within`` (and any input file); returns the path written."""
    from ..io.outputs import atomic_write

    return atomic_write(path, png_bytes(fig, dpi), inputs=list(inputs), within=within,
                        option="--report")


# ---------------------------------------------------------------------- one DUT's data
def _rows(readings, i: int) -> slice:
    """The contiguous rows of DUT ``i`` (rows of one DUT are contiguous by construction)."""
    g = readings.group
    lo = int(np.searchsorted(g, i, side="left"))
    hi = int(np.searchsorted(g, i, side="right"))
    return slice(lo, hi)


_LINE_WORD = re.compile(r"\blines?(?:\s*\(s\))?\s+(?=\d)", re.I)
_NUMBER_LIST = re.compile(r"\d+(?:\s*,\s*\d+|\s+and\s+\d+)*")


def flagged_lines(flags: Sequence, codes: Sequence[str] | None = None) -> set[int]:
    """Input line numbers named in the messages of ``flags`` (``outlier`` flags say
    "line 14", cross-checks "line(s) 12, 14 and 3 more"); all flag codes when ``codes``
    is None. A count ("and 3 more") is not a line number."""
    out: set[int] = set()
    for f in flags:
        code = getattr(f, "code", None) or (f.get("code") if isinstance(f, Mapping) else None)
        msg = getattr(f, "message", None) or (f.get("message") if isinstance(f, Mapping) else "")
        if codes is not None and code not in codes:
            continue
        msg = msg or ""
        for m in _LINE_WORD.finditer(msg):
            run = _NUMBER_LIST.match(msg, m.end())
            if run is None:
                continue
            nums = re.findall(r"\d+", run.group(0))
            if re.match(r"\s*more\b", msg[run.end():]):
                nums = nums[:-1]
            out.update(int(t) for t in nums)
    return out


_KNEE_I = ("current", "knee_current", "i_knee", "current_a", "knee_current_a", "i")
_KNEE_V = ("voltage", "knee_voltage", "v_knee", "voltage_v", "knee_voltage_v", "v")


def knee_point(fits, i: int) -> tuple[float, float] | None:
    """(current A, voltage V) of the knee of DUT ``i`` from ``fits.diagnostics["knee"]``,
    when a knee was flagged (or the diagnostic says it is significant); else None."""
    diag = getattr(fits, "diagnostics", {}) or {}
    knee = diag.get("knee")
    if not knee:
        return None
    flagged = any(getattr(f, "code", "") == "knee" for f in fits.flags[i])
    for key in ("significant", "flagged", "found", "detected"):
        if key in knee:
            try:
                flagged = flagged or bool(np.asarray(knee[key])[i])
            except (IndexError, TypeError, ValueError):
                pass
    if not flagged:
        return None

    def pick(names):
        low = {str(k).lower(): k for k in knee}
        for n in names:
            if n in low:
                try:
                    v = float(np.asarray(knee[low[n]], dtype=float)[i])
                except (IndexError, TypeError, ValueError):
                    continue
                if math.isfinite(v):
                    return v
        return None

    ik, vk = pick(_KNEE_I), pick(_KNEE_V)
    if ik is None or vk is None:
        return None
    return ik, vk


def dut_curves(readings, fits, i: int, currents: np.ndarray) -> dict:
    """Line, confidence and prediction half-widths of DUT ``i`` at ``currents``.

    The confidence band is k·u(V̂(I)) with
    u²(V̂) = u²(Vth) + I²·u²(Rth) − 2·I·u(Vth, Rth)
    (scale factor included, GUM 5.2.2). The prediction band for one new reading adds the
    variance of that reading's own error e = δV + Rth·δI, u²(e) = u²(V) + Rth²u²(I) +
    2·Rth·u(I, V), interpolated in current from the readings and multiplied by the same
    scale factor S² (for an OLS fit: the residual variance s²).
    """
    rows = _rows(readings, i)
    cur = np.asarray(readings.current[rows], float)
    vth, rth, k = float(fits.vth[i]), float(fits.rth[i]), float(fits.k[i])
    var_v, var_r, cov = float(fits.u_vth[i]) ** 2, float(fits.u_rth[i]) ** 2, float(fits.cov_vr[i])
    line = vth - rth * currents
    var_line = np.maximum(var_v + currents ** 2 * var_r - 2.0 * currents * cov, 0.0)
    if str(fits.method[i]) == "ols":
        e_var = np.ones_like(currents)
    else:
        uv, ui, c = (np.asarray(a[rows], float) for a in (readings.u_voltage, readings.u_current,
                                                          readings.cov_iv))
        e_row = uv ** 2 + rth ** 2 * ui ** 2 + 2.0 * rth * c
        order = np.argsort(cur, kind="stable")
        e_var = np.interp(currents, cur[order], np.maximum(e_row[order], 0.0))
    scale = float(fits.scale[i]) if math.isfinite(float(fits.scale[i])) else 1.0
    var_pred = var_line + scale * e_var
    return {"line": line, "ci": k * np.sqrt(var_line), "pi": k * np.sqrt(var_pred), "k": k}


def _level(fits) -> str:
    return f"{100 * fits.confidence:.4g} %"


# ------------------------------------------------------------------------ the figures
def fit_figure(readings, fits, i: int, *, used=None):
    """Terminal voltage against current for DUT ``i``: readings with k·u error bars on
    both axes, the fitted line, its confidence band and the prediction band of one new
    reading, open- and short-circuit points, flagged readings and the knee.

    ``used`` (boolean mask over all rows of ``readings``) marks the rows the fit used;
    the others are drawn hollow as "left out of the fit". Returns a matplotlib Figure
    (not saved). ``i`` is the DUT's index or its name.
    """
    i = fits.index(i)
    rows = _rows(readings, i)
    left_out = (np.zeros(rows.stop - rows.start, bool) if used is None
                else ~np.asarray(used, bool)[rows])
    cur = np.asarray(readings.current[rows], float)
    vol = np.asarray(readings.voltage[rows], float)
    ln = np.asarray(readings.line[rows])
    load = np.asarray(readings.load[rows], float)
    k = float(fits.k[i])
    vth, rth = float(fits.vth[i]), float(fits.rth[i])
    with house_style():
        fig, ax = new_figure(6.4, 5.0)
        ok = fits.error[i] is None and math.isfinite(vth) and math.isfinite(rth)
        span_lo = min(0.0, float(cur.min()))
        span_hi = max(float(cur.max()), 0.0)
        pad = 0.04 * (span_hi - span_lo or 1.0)
        grid = np.linspace(span_lo - pad, span_hi + pad, 200)
        if ok:
            c = dut_curves(readings, fits, i, grid)
            lvl = _level(fits)
            ax.fill_between(grid, c["line"] - c["pi"], c["line"] + c["pi"],
                            color=COLORS["band_pi"], alpha=0.28, lw=0,
                            label=f"prediction band, one new reading ({lvl})")
            ax.fill_between(grid, c["line"] - c["ci"], c["line"] + c["ci"],
                            color=COLORS["band_ci"], alpha=0.30, lw=0,
                            label=f"confidence band of the line ({lvl})")
            fi = fits[i]
            legend = (f"fit ({fi.method}): Vth = {format_estimate(vth, fi.vth.u, 'V')}, "
                      f"{lvl} {format_interval(fi.vth.ci_low, fi.vth.ci_high, 'V', fi.vth.u, fi.vth.value)}\n"
                      f"Rth = {format_estimate(rth, fi.rth.u, 'Ω')}, "
                      f"{lvl} {format_interval(fi.rth.ci_low, fi.rth.ci_high, 'Ω', fi.rth.u, fi.rth.value)}")
            ax.plot(grid, c["line"], color=COLORS["model"], lw=1.5, label=legend, zorder=3)
        hot = flagged_lines(fits.flags[i])
        is_flag = np.isin(ln, list(hot)) & (ln > 0) if hot else np.zeros(cur.size, bool)
        is_flag &= ~left_out
        is_open = (np.isinf(load) | ((cur == 0) & ~is_flag)) & ~left_out
        is_short = (load == 0) & ~is_flag & ~left_out
        plain = ~(is_flag | is_open | is_short | left_out)
        xe, ye = k * np.asarray(readings.u_current[rows]), k * np.asarray(readings.u_voltage[rows])
        for mask, style in (
                (plain, dict(fmt="o", color=COLORS["point"], ms=4.5,
                             label=f"readings (bars ± k·u, k = {k:.3g})")),
                (is_open, dict(fmt="D", color=COLORS["open"], ms=5, label="open-circuit reading")),
                (is_short, dict(fmt="s", color=COLORS["short"], ms=5,
                                label="short-circuit reading")),
                (is_flag, dict(fmt="o", color=COLORS["flag"], ms=6.5, mfc="white", mew=1.6,
                               label="flagged reading")),
                (left_out, dict(fmt="o", color=COLORS["muted"], ms=4.5, mfc="white", mew=1.0,
                                label="left out of the fit"))):
            if mask.any():
                ax.errorbar(cur[mask], vol[mask], xerr=xe[mask], yerr=ye[mask], elinewidth=0.9,
                            zorder=4, **style)
        for x, y, n in zip(cur[is_flag], vol[is_flag], ln[is_flag]):
            ax.annotate(f"line {int(n)}", (x, y), textcoords="offset points", xytext=(6, 6),
                        fontsize=7.5, color=COLORS["flag"])
        if ok:
            ax.plot([0.0], [vth], marker="<", ms=8, color=COLORS["model"], ls="none",
                    label="open circuit (fitted, I = 0)", zorder=5)
            isc = float(fits.isc[i])
            if math.isfinite(isc) and isc <= span_hi + 3 * pad:
                ax.plot([isc], [0.0], marker="v", ms=8, color=COLORS["short"], ls="none",
                        label="short circuit (computed Isc)", zorder=5)
            elif math.isfinite(isc):
                ax.text(0.99, 0.02, f"computed Isc = {format_value(isc, 'A', 3)} lies off the "
                                    "tested range", transform=ax.transAxes, ha="right",
                        va="bottom", fontsize=7.5, color=COLORS["muted"])
        knee = knee_point(fits, i) if ok else None
        # one unit per axis and legend: the axes take fixed prefixes (current: the
        # largest on the axis; voltage: Vth's, as in the legend) and the knee is given in them
        x_like = float(np.max(np.abs(grid))) if grid.size else None
        y_like = vth if ok and math.isfinite(vth) and vth != 0 else (
            float(np.nanmax(np.abs(vol))) if vol.size else None)
        if knee is not None:
            ax.plot([knee[0]], [knee[1]], marker="X", ms=9, color=COLORS["knee"], ls="none",
                    label=f"knee at {format_like(knee[0], 'A', x_like, 3)}, "
                          f"{format_like(knee[1], 'V', y_like, 4)}", zorder=6)
        ax.set_xlim(grid[0], grid[-1])
        si_axis(ax, "x", "A", "Load current", like=x_like)
        si_axis(ax, "y", "V", "Terminal voltage", like=y_like)
        # below the axes, so it never hides a reading
        fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2,
                   fontsize=7.5, handlelength=1.6)
    return fig


def _residuals(readings, fits, i: int):
    rows = _rows(readings, i)
    cur = np.asarray(readings.current[rows], float)
    vol = np.asarray(readings.voltage[rows], float)
    vth, rth = float(fits.vth[i]), float(fits.rth[i])
    e = vol - (vth - rth * cur)
    if str(fits.method[i]) == "ols":
        s = math.sqrt(float(fits.scale[i])) if float(fits.scale[i]) > 0 else 1.0
        sig = np.full(cur.size, s)
    else:
        uv, ui, c = (np.asarray(a[rows], float) for a in (readings.u_voltage, readings.u_current,
                                                          readings.cov_iv))
        sig = np.sqrt(np.maximum(uv ** 2 + rth ** 2 * ui ** 2 + 2 * rth * c, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(sig > 0, e / sig, np.nan)
    return rows, cur, z


def residual_figure(readings, fits, i: int, *, used=None):
    """Normalised residuals e/u(e) of DUT ``i`` against current, and against time when
    the readings have times, with the ±2 lines. u(e) is the stated uncertainty of each
    reading's deviation from the line (the scatter s for an OLS fit); rows outside
    ``used`` are drawn hollow grey. ``i`` is the DUT's index or its name."""
    i = fits.index(i)
    rows, cur, z = _residuals(readings, fits, i)
    left_out = (np.zeros(cur.size, bool) if used is None
                else ~np.asarray(used, bool)[rows])
    t = np.asarray(readings.time[rows], float)
    has_t = bool(np.isfinite(t).any())
    ln = np.asarray(readings.line[rows])
    hot = flagged_lines(fits.flags[i])
    is_flag = np.isin(ln, list(hot)) & (ln > 0) if hot else np.zeros(cur.size, bool)
    with house_style():
        fig, axes = new_figure(6.4 if not has_t else 8.4, 2.8, ncols=2 if has_t else 1,
                               sharey=True)
        axes = np.atleast_1d(axes)
        panels = [(axes[0], cur, "A", "Load current")]
        if has_t:
            t0 = float(np.nanmin(t))
            panels.append((axes[1], t - t0, "s", "Time since first reading"))
        for ax, x, unit, label in panels:
            for yy in (-2.0, 2.0):
                ax.axhline(yy, color=COLORS["flag"], lw=0.8, ls=(0, (4, 3)))
            ax.axhline(0.0, color=COLORS["muted"], lw=0.7)
            plain = ~is_flag & ~left_out
            ax.plot(x[plain], z[plain], "o", color=COLORS["point"], ms=4.5)
            if left_out.any():
                ax.plot(x[left_out], z[left_out], "o", color=COLORS["muted"], mfc="white",
                        ms=4.5)
            if is_flag.any():
                ax.plot(x[is_flag], z[is_flag], "o", color=COLORS["flag"], mfc="white",
                        mew=1.6, ms=6.5)
            si_axis(ax, "x", unit, label)
        lim = max(3.0, float(np.nanmax(np.abs(z))) * 1.15) if np.isfinite(z).any() else 3.0
        axes[0].set_ylim(-lim, lim)
        axes[0].set_ylabel("Normalised residual e/u(e)")
    return fig


def power_figure(readings, fits, i: int):
    """Power delivered into a load R, P = Vth²·R/(Rth + R)², against R (log axis), with
    its k·u band (delta method), the maximum-power point R = Rth and the tested loads.

    Power is never negative, so the band stops at zero. Loads below the smallest one
    tested draw more current than the sweep reached: there the curve is dashed, the
    region shaded and labelled "extrapolated", and so is the maximum-power point when the
    sweep did not come near it (``sagfit.core.extrapolation``).
    Returns None when Rth ≤ 0 or the DUT was not fitted (no maximum-power point).
    ``i`` is the DUT's index or its name."""
    from ..core.extrapolation import REACHED

    i = fits.index(i)
    vth, rth = float(fits.vth[i]), float(fits.rth[i])
    if fits.error[i] is not None or not (math.isfinite(vth) and math.isfinite(rth)) or rth <= 0:
        return None
    rows = _rows(readings, i)
    cur = np.asarray(readings.current[rows], float)
    vol = np.asarray(readings.voltage[rows], float)
    load = np.asarray(readings.load[rows], float)
    with np.errstate(divide="ignore", invalid="ignore"):
        r_test = np.where(np.isfinite(load) & (load > 0), load,
                          np.where(np.isnan(load) & (cur > 0), vol / cur, np.nan))
    tested = np.isfinite(r_test) & (r_test > 0)
    lo = min([rth] + list(r_test[tested])) / 4.0
    hi = max([rth] + list(r_test[tested])) * 4.0
    grid = np.geomspace(lo, hi, 240)
    p = vth ** 2 * grid / (rth + grid) ** 2
    dv = 2.0 * vth * grid / (rth + grid) ** 2
    dr = -2.0 * vth ** 2 * grid / (rth + grid) ** 3
    var = (dv ** 2 * fits.u_vth[i] ** 2 + dr ** 2 * fits.u_rth[i] ** 2
           + 2.0 * dv * dr * fits.cov_vr[i])
    band = float(fits.k[i]) * np.sqrt(np.maximum(var, 0.0))
    fi = fits[i]
    # the smallest load the sweep reached; below it the curve is read off the fitted line
    r_min = float(np.min(r_test[tested])) if tested.any() else math.inf
    i_max = float(np.max(np.abs(cur))) if cur.size else 0.0
    pmax_extrapolated = not i_max >= REACHED * abs(float(fits.isc[i])) / 2
    beyond = grid < r_min
    with house_style():
        fig, ax = new_figure(6.4, 4.2)
        ax.set_xscale("log")
        ax.fill_between(grid, np.maximum(p - band, 0.0), p + band, color=COLORS["band_ci"],
                        alpha=0.25, lw=0, label=f"confidence band ({_level(fits)})")
        if beyond.any():
            ax.axvspan(lo, min(r_min, hi), color=COLORS["grid"], alpha=0.6, lw=0,
                       label="extrapolated: loads below the smallest tested")
            cut = int(np.count_nonzero(beyond))
            ax.plot(grid[:cut + 1], p[:cut + 1], color=COLORS["model"], ls="--")
        ax.plot(grid[beyond.sum():], p[beyond.sum():], color=COLORS["model"],
                label="P = Vth²·R/(Rth + R)²")
        star = (f"maximum power at R = Rth{' (extrapolated)' if pmax_extrapolated else ''}:\n"
                f"{format_estimate(fi.pmax.value, fi.pmax.u, 'W')} at "
                f"{format_value(rth, 'Ω', 3)}")
        ax.plot([rth], [fi.pmax.value], marker="*", ms=11, color=COLORS["knee"], ls="none",
                mfc="white" if pmax_extrapolated else COLORS["knee"], label=star)
        if tested.any():
            ax.plot(r_test[tested], (vol * cur)[tested], "o", color=COLORS["point"],
                    label="tested loads (V·I measured)")
        ax.set_xlim(lo, hi)
        ax.set_ylim(bottom=0.0)
        si_axis(ax, "x", "Ω", "Load resistance")
        si_axis(ax, "y", "W", "Delivered power", like=fi.pmax.value)  # the legend's unit
        fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2,
                   fontsize=7.5)
    return fig


def histogram_figure(values, unit: str, label: str, *, highlight=None,
                     highlight_label: str = "flagged DUTs", bins: int | None = None):
    """Histogram of one quantity across DUTs (finite values only), with an optional
    subset (``highlight``, a boolean mask) stacked on top in the flag colour."""
    v = np.asarray(values, float)
    fin = np.isfinite(v)
    hl = np.zeros(v.size, bool) if highlight is None else np.asarray(highlight, bool) & fin
    with house_style():
        fig, ax = new_figure(4.6, 3.0)
        data = v[fin]
        if data.size == 0:
            ax.text(0.5, 0.5, "no fitted values", transform=ax.transAxes, ha="center")
            si_axis(ax, "x", unit, label)
            return fig
        if bins is None:
            edges = np.histogram_bin_edges(data, bins="auto")
            if edges.size - 1 > 60:
                edges = np.histogram_bin_edges(data, bins=60)
        else:
            edges = np.histogram_bin_edges(data, bins=bins)
        base, _ = np.histogram(v[fin & ~hl], bins=edges)
        top, _ = np.histogram(v[hl], bins=edges)
        widths = np.diff(edges)
        ax.bar(edges[:-1], base, width=widths, align="edge", color=COLORS["hist"],
               edgecolor="white", linewidth=0.4, label="DUTs")
        if hl.any():
            ax.bar(edges[:-1], top, width=widths, bottom=base, align="edge",
                   color=COLORS["flag"], edgecolor="white", linewidth=0.4,
                   label=highlight_label)
            ax.legend(loc="best")
        ax.grid(axis="x", visible=False)
        si_axis(ax, "x", unit, label)
        ax.set_ylabel("DUTs")
    return fig


#: Above this many DUTs the points and bars of the batch figure are drawn as an image
#: inside the SVG (a page stays a few hundred kB with 10,000 DUTs).
RASTER_ABOVE = 500


def batch_figure(fits, *, highlight=None, highlight_label: str = "with a warning"):
    """Every fitted DUT of a batch at once: Vth against Rth, each with its interval
    (±k·u on both axes, k the DUT's coverage factors for Vth and Rth), the DUTs in ``highlight`` (a boolean
    mask) in the flag colour.

    Drawn with two ``errorbar`` calls (one collection of bars per group, not one artist
    per DUT), so 10,000 DUTs cost about what 10 do; above ``RASTER_ABOVE`` DUTs the
    marks are rasterised inside the vector figure.
    """
    ok = np.asarray(fits.ok, bool) & np.isfinite(fits.vth) & np.isfinite(fits.rth)
    hl = (np.zeros(len(fits), bool) if highlight is None else np.asarray(highlight, bool)) & ok
    x, y = np.asarray(fits.rth, float), np.asarray(fits.vth, float)
    ex = np.nan_to_num(np.asarray(fits.k_rth, float) * fits.u_rth)
    ey = np.nan_to_num(np.asarray(fits.k, float) * fits.u_vth)
    raster = int(ok.sum()) > RASTER_ABOVE
    small = int(ok.sum()) > 200
    with house_style():
        fig, ax = new_figure(6.4, 4.4)
        for mask, color, label in ((ok & ~hl, COLORS["model"], "DUTs (bars: interval, ±k·u)"),
                                   (hl, COLORS["flag"], highlight_label)):
            if not mask.any():
                continue
            ax.errorbar(x[mask], y[mask], xerr=ex[mask], yerr=ey[mask], fmt="o",
                        ms=2.0 if small else 4.0, color=color, ecolor=color,
                        elinewidth=0.5 if small else 0.8, alpha=0.6 if small else 1.0,
                        label=f"{label} ({int(mask.sum())})", rasterized=raster)
        if not ok.any():
            ax.text(0.5, 0.5, "no fitted DUTs", transform=ax.transAxes, ha="center")
        si_axis(ax, "x", "Ω", "Internal resistance Rth")
        si_axis(ax, "y", "V", "Open-circuit voltage Vth")
        if ok.any():
            ax.legend(loc="best")
    return fig
