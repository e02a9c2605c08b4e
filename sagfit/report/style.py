"""One look and one naming scheme for the HTML reports (fit, accept, trend, design).

Every report folder holds ``report.html`` (self-contained, this style sheet inline),
``results.json`` and ``results.csv``, and PNG figures named ``fig-<DUT>-<kind>.png`` for a
figure of one DUT (``fig-PK-07-fit.png``, ``fig-C05-trend.png``) or
``fig-<kind>-<what>.png`` for a figure across DUTs (``fig-histogram-vth.png``,
``fig-group-ST-A.png``, ``fig-batch-vth-rth.png``). Names from users go through
:func:`sagfit.io.outputs.safe_filename`. Figures share ``plots.house_style``.
"""

from __future__ import annotations

from ..io.outputs import safe_filename

__all__ = ["STYLESHEET", "REPORT_HTML", "RESULTS_JSON", "RESULTS_CSV", "dut_figure_name",
           "batch_figure_name"]

REPORT_HTML = "report.html"
RESULTS_JSON = "results.json"
RESULTS_CSV = "results.csv"


def dut_figure_name(dut: str, kind: str) -> str:
    """``fig-<DUT>-<kind>.png``: a figure of one DUT."""
    return f"fig-{safe_filename(str(dut))}-{kind}.png"


def batch_figure_name(kind: str, what: str) -> str:
    """``fig-<kind>-<what>.png``: a figure across DUTs (a histogram, a group)."""
    return f"fig-{kind}-{safe_filename(str(what))}.png"


STYLESHEET = """
:root { --ink:#222831; --muted:#5b6472; --rule:#d9dde3; --accent:#1d5f8a; --warn:#a23b0b;
        --soft:#f4f6f8; }
* { box-sizing: border-box; }
body { font: 10.5pt/1.45 "DejaVu Sans", "Segoe UI", Helvetica, Arial, sans-serif;
       color: var(--ink); margin: 0 auto; max-width: 60rem; padding: 1.5rem; }
h1 { font-size: 1.45rem; margin: 0 0 .2rem; }
h2 { font-size: 1.15rem; margin: 2rem 0 .6rem; border-bottom: 1px solid var(--rule);
     padding-bottom: .2rem; }
h3 { font-size: 1rem; margin: 1.4rem 0 .4rem; }
p.sub { color: var(--muted); margin: 0 0 1rem; }
table { border-collapse: collapse; margin: .4rem 0 1rem; font-size: .9rem; }
th, td { text-align: left; padding: .2rem .6rem .2rem 0; vertical-align: top;
         border-bottom: 1px solid var(--rule); }
th { font-weight: 600; color: var(--muted); }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { width: 13rem; }
code, .hash { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: .85rem;
              word-break: break-all; }
.box { border: 1px solid var(--rule); border-left: 4px solid var(--warn); padding: .5rem 1rem;
       margin: 1rem 0; background: var(--soft); }
.box h2 { border: 0; margin: .2rem 0 .4rem; font-size: 1rem; }
.box ul { margin: .2rem 0 .4rem 1.1rem; padding: 0; }
.warn { color: var(--warn); font-weight: 600; }
.muted { color: var(--muted); }
ul.flags { margin: .2rem 0 .8rem 1.1rem; padding: 0; }
ul.flags li.warning { color: var(--warn); }
figure { margin: .6rem 0 1.2rem; break-inside: avoid; page-break-inside: avoid; }
figure svg { max-width: 100%; height: auto; display: block; }
figcaption { font-size: .85rem; color: var(--muted); margin-top: .2rem; }
.figrow { display: flex; flex-wrap: wrap; gap: 1rem; }
.figrow figure { flex: 1 1 22rem; }
section.dut { break-inside: auto; }
tr.hl td { background: #fdf0e8; }
/* decisions, flags and notes (accept and trend reports) */
.pass { color: #3d7a57; }
.fail { color: #b3402f; font-weight: 600; }
.inconclusive { color: #8a6412; }
.error, .note { color: var(--muted); }
.note { font-size: .9rem; }
.flag { color: var(--warn); font-weight: 600; }
.caution { border-left: 4px solid var(--warn); padding: .3rem .8rem; background: var(--soft); }
/* tables of numbers: every column right-aligned but the first */
table.grid th, table.grid td { text-align: right; font-variant-numeric: tabular-nums; }
table.grid th:first-child, table.grid td:first-child { text-align: left; }
@media print {
  body { max-width: none; padding: 0; font-size: 9.5pt; }
  a { color: inherit; text-decoration: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
  section.dut { break-before: page; page-break-before: always; }
  table { break-inside: auto; }
  tr { break-inside: avoid; page-break-inside: avoid; }
  .box { background: none; }
  figure svg { width: 12cm; height: auto; max-width: 100%; }
}
@page { margin: 15mm 14mm; }
"""
