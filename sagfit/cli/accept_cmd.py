"""``sagfit accept``: pass / fail / inconclusive for every DUT against a spec.

Exit status (production-line scripts rely on it): 0 every DUT passed; 1 at least one
failed; 3 none failed but at least one was inconclusive or could not be fitted; 2 bad
input or usage.
"""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from . import app
from .common import (BenchOpt, ColumnsOpt, ConfidenceOpt, CurrentAccOpt, CurrentNoiseOpt,
                     DutOpt, IndependentOpt, JsonOpt, LoadTolOpt, QuietOpt, SheetOpt,
                     VerboseOpt, VoltageAccOpt, WideOpt, VoltageNoiseOpt, announce_bench,
                     check_out_option, resolve_bench, fit_settings, guarded, load_readings,
                     progress, settings_record, show_progress, write_document)

MAX_TABLE_ROWS = 40


@app.command("accept")
def accept_command(
    file: Annotated[str, typer.Argument(help="Readings file (CSV, Parquet, Excel, "
                                            "OpenDocument; '-' for standard input), one "
                                            "load sweep per DUT; or a "
                                            "folder or glob of Parquet/CSV files (a data set, "
                                            "on Dask: docs/cluster.md; a Parquet set "
                                            "without Dask: read in one process).")],
    spec: Annotated[str, typer.Option("--spec", help="Acceptance spec (TOML, see "
                                                     "docs/accept.md).")],
    rule: Annotated[Optional[str], typer.Option(
        "--rule", help="Decision rule: simple, guarded or risk [default: the spec's, "
                       "else guarded].")] = None,
    dut: DutOpt = None,
    confidence: ConfidenceOpt = None,
    voltage_accuracy: VoltageAccOpt = None,
    current_accuracy: CurrentAccOpt = None,
    load_tolerance: LoadTolOpt = None,
    voltage_noise: VoltageNoiseOpt = None,
    current_noise: CurrentNoiseOpt = None,
    independent_errors: IndependentOpt = False,
    bench: BenchOpt = None,
    columns: ColumnsOpt = None,
    sheet: SheetOpt = None,
    json_out: JsonOpt = False,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Also write the decisions to this .csv, .parquet or .json file.")] = None,
    report: Annotated[Optional[str], typer.Option(
        "--report", help="Write a report into this folder: report.html with figures, "
                         "results.json, results.csv, PNGs.")] = None,
    verbose: VerboseOpt = False,
    quiet: QuietOpt = False,
    wide: WideOpt = False,
    scheduler: Annotated[Optional[str], typer.Option(
        "--scheduler", help="Dask scheduler address (tcp://host:8786) for a data set; "
                            "default: local worker processes.")] = None,
    workers: Annotated[Optional[int], typer.Option(
        "--workers", help="Local Dask worker processes for a data set.")] = None,
) -> None:
    """Decide every DUT against the spec's limits, taking the measurement uncertainty
    into account (JCGM 106:2012, ILAC-G8:09/2019)."""
    with guarded(file):
        from ..core.acceptance import RULES, accept
        from ..core.analysis import fit
        from ..core.errors import OptionError
        from ..io.spec import read_spec

        if rule is not None and rule not in RULES:
            raise OptionError("--rule", f"{rule!r}: use one of {', '.join(RULES)}")
        bench, bench_source = resolve_bench(bench)
        inputs = [file, spec] + ([bench] if bench else [])
        the_spec = read_spec(spec)
        if confidence is None:
            confidence = the_spec.decision.confidence
        settings = fit_settings(voltage_accuracy, current_accuracy, load_tolerance, bench,
                                confidence, voltage_noise=voltage_noise,
                                current_noise=current_noise,
                                independent_errors=independent_errors,
                                columns=columns, sheet=sheet, bench_source=bench_source)
        announce_bench(settings, json_out)
        from .dataset_run import runs_on_dask, set_inputs

        if runs_on_dask(file, scheduler, workers):  # a folder or glob, partitioned
            from .dataset_run import refuse_single_file_options, run_dataset_fit

            refuse_single_file_options({"--dut": dut, "--report": report, "--verbose": verbose,
                                        "--sheet": sheet})
            raise typer.Exit(run_dataset_fit(file, settings, 0.01, out, json_out, scheduler,
                                             workers, spec=the_spec, rule=rule))
        check_out_option(out, set_inputs(file, out) + inputs[1:])
        with progress("reading " + file, show_progress(file, json_out), total=3) as step:
            readings = load_readings(file, settings, dut)
            step(f"fitting {readings.n_duts} DUT(s)")
            fits = fit(readings, confidence=settings["confidence"])
            step(f"deciding {readings.n_duts} DUT(s)")
            acc = accept(fits, the_spec, rule=rule, readings=readings)
        doc = accept_document(acc, fits, readings, settings)
        if out:
            from ..io.outputs import atomic_write, document_pieces
            from ..report.accept_report import acceptance_csv

            if out.lower().endswith(".json"):
                atomic_write(out, document_pieces(doc, acc), inputs=inputs)
            elif out.lower().endswith(".parquet"):
                from ..report.accept_report import acceptance_parquet

                atomic_write(out, acceptance_parquet(acc), inputs=inputs)
            else:
                atomic_write(out, acceptance_csv(acc), inputs=inputs)
        if report:
            from ..report.accept_report import write_accept_report

            write_accept_report(report, acc, fits, readings,
                                {**doc, "results": acc.to_dicts()}, inputs=inputs)
        if json_out:
            write_document(doc, acc)
        else:
            print_acceptance(acc, fits, readings, settings, verbose=verbose,
                             warnings=doc["warnings"], quiet=quiet, wide=wide)
    raise typer.Exit(acc.exit_code)


def accept_document(acc, fits, readings, settings) -> dict:
    """The JSON document of ``sagfit accept --json``, with an empty ``results`` list: the
    decisions are built where they are written (``outputs.document_pieces(doc, acc)``)."""
    from .. import __version__
    from ..core.acceptance import DECISIONS
    from ..core.safety import fit_cautions
    from ..core.traceability import traceability_record

    spec = acc.spec
    r = acc.rule
    trace = traceability_record(settings.get("instruments", ()), readings.meta)
    overdue = any(row["status"] == "past due" for row in trace["instruments"])
    return {
        "tool": "sagfit",
        "version": __version__,
        "command": "accept",
        "confidence": acc.confidence,
        "input": {"file": readings.source, "sha256": readings.meta.get("sha256"),
                  "date": readings.meta.get("date"), "duts": len(fits),
                  "readings": len(readings)},
        "spec": {"file": spec.source, "sha256": spec.sha256, "name": spec.name or None,
                 "revision": spec.revision or None,
                 "checks": [_check_record(c) for c in spec.checks]},
        "decision_rule": {"rule": r.rule, "k": r.k, "guard": r.guard,
                          "min_conformance": r.min_conformance, "cap_flagged": r.cap_flagged,
                          "ignore_flags": list(r.ignore_flags),
                          "decisions": list(DECISIONS),
                          # decisions taken with a meter past its calibration due date
                          # (ISO/IEC 17025:2017, 6.4.7): marked, never silent
                          "calibration_overdue": overdue},
        "settings": settings_record(settings),
        "traceability": trace,
        "warnings": trace["warnings"],
        "results": [],
        "summary": acc.summary(),
        "cautions": fit_cautions(fits, readings),
    }


def _check_record(c) -> dict:
    import math

    def f(x):
        return x if math.isfinite(x) else None

    d = {"quantity": c.name, "kind": c.quantity, "unit": c.unit, "lower": f(c.lower),
         "upper": f(c.upper), "key": c.key}
    if c.at is not None:
        d["at"] = {"kind": c.at.kind, "value": f(c.at.value), "text": c.at.label}
    if c.light is not None:
        d["light"] = {"kind": c.light.kind, "value": f(c.light.value), "text": c.light.label}
        d["heavy"] = {"kind": c.heavy.kind, "value": f(c.heavy.value), "text": c.heavy.label}
    if c.note:
        d["note"] = c.note
    return d


def print_acceptance(acc, fits, readings, settings, *, verbose: bool = False,
                     warnings=(), quiet: bool = False, wide: bool = False) -> None:
    """The terminal view: a table of (at most 40) DUTs, worst first, then the summary."""
    import numpy as np

    from ..core.acceptance import ERROR
    from ..core.safety import fit_cautions
    from .render import _console

    console = _console()
    if len(acc) == 1 and acc.decision[0] != ERROR:
        _print_one(console, acc, wide)
    else:
        _print_many(console, acc, wide)
    k = acc.k[np.isfinite(acc.k)]
    kt = f"k = {float(k[0]):.3g}" if k.size and np.all(k == k[0]) else "k per DUT"
    console.print(f"values ± U (expanded uncertainty, {kt}); ✗ outside the rejection limit, "
                  "? inconclusive.", markup=False)
    s = acc.summary()
    console.print(f"summary: {s['pass']} pass, {s['fail']} fail, {s['inconclusive']} "
                  f"inconclusive, {s['error']} error of {s['total']} DUT(s); yield "
                  f"{100 * s['yield']:.1f} %" if s["total"] else "summary: no DUTs",
                  markup=False)
    if warnings:
        console.print("decisions taken with an instrument past its calibration due date: "
                      "review them before release", markup=False)
    if s["failed_most"]:
        worst = ", ".join(f"{r['quantity']} ({r['fail']} fail, {r['inconclusive']} "
                          "inconclusive)" for r in s["failed_most"][:5])
        console.print(f"limits that failed most: {worst}", markup=False)
    if s["capped_by_flags"]:
        console.print(f"{s['capped_by_flags']} DUT(s) inside the limits but flagged "
                      "(non-linear or doubtful fit) are inconclusive; see --json for the flags.",
                      markup=False)
    for name, count in s.get("extrapolated", {}).items():
        console.print(f"note: {name}: the operating point lies outside the measured "
                      f"currents for {count} DUT(s); the line is extrapolated there.",
                      markup=False)
    errors = [i for i in np.flatnonzero(acc.decision == ERROR)]
    for i in errors[:MAX_TABLE_ROWS]:
        console.print(f"error {acc.duts[i]}: {acc.error[i]}", markup=False)
    if len(errors) > MAX_TABLE_ROWS:
        console.print(f"… and {len(errors) - MAX_TABLE_ROWS} more DUTs could not be fitted",
                      markup=False)
    if verbose:
        console.print(f"spec: {acc.spec.source} (sha256 {acc.spec.sha256[:16]}…); input: "
                      f"{readings.source} (sha256 {str(readings.meta.get('sha256', ''))[:16]}…)",
                      markup=False)
        for i in list(acc.warning_codes)[:MAX_TABLE_ROWS]:
            console.print(f"flagged {acc.duts[i]}: {', '.join(acc.warning_codes[i])}",
                          markup=False)
    for w in warnings:
        console.print(f"warning: {w}", markup=False)
    for c in [] if quiet else fit_cautions(fits, readings):
        console.print(f"caution: {c}", markup=False)


def _print_many(console, acc, wide: bool = False) -> None:
    """One row per DUT (at most 40, worst first), one column per check."""
    import numpy as np

    from ..core.acceptance import DECISIONS, ERROR, FAIL, PASS
    from ..report.accept_report import format_check, limits_text
    from .render import Col, print_table

    order = np.argsort(-_rank(acc.decision), kind="stable")
    shown = order[:MAX_TABLE_ROWS]
    n_checks = len(acc.checks)
    # on a narrow terminal the last checks go first; the decision and the DUT stay
    cols = [Col("DUT", "left"), Col("decision", "left", wrap=True)]
    cols += [Col(f"{cr.name}\n{limits_text(cr.check)}", drop=n_checks - k)
             for k, cr in enumerate(acc.checks)]
    rows = []
    for i in shown:
        cells = [acc.duts[i], DECISIONS[acc.decision[i]] + _flagged_note(acc, i)]
        for cr in acc.checks:
            if acc.decision[i] == ERROR:
                cells.append("")
                continue
            mark = {PASS: "", FAIL: " ✗"}.get(int(cr.decision[i]), " ?")
            cells.append(format_check(float(cr.value[i]), float(cr.U[i]), cr.check.unit)
                         + mark)
        rows.append(cells)
    print_table(console, cols, rows, wide=wide,
                title=f"acceptance: {acc.rule.rule} rule"
                + (f", {acc.spec.name}" if acc.spec.name else ""), title_justify="left")
    if len(acc) > MAX_TABLE_ROWS:
        console.print(f"… {len(acc) - MAX_TABLE_ROWS} more DUTs not shown (worst first; all "
                      "of them are in --out results.csv or --json).", markup=False)


def _print_one(console, acc, wide: bool = False) -> None:
    """One DUT: every check with its limits, acceptance limits, p_c and statement."""
    import numpy as np

    from ..core.acceptance import DECISIONS, STATEMENTS
    from ..core.formatting import format_p, format_value
    from ..report.accept_report import format_check, limits_text
    from .render import Col, print_table

    def lim(x, unit):
        if not np.isfinite(x):
            return ""
        return f"{x:.4g} %" if unit == "%" else format_value(float(x), unit, 5)

    name = DECISIONS[acc.decision[0]] + _flagged_note(acc, 0)
    cols = [Col("check", "left", wrap=True), Col("value ± U"), Col("tolerance", drop=3),
            Col("acceptance limits", drop=2), Col("p_c", drop=4),
            Col("decision", "left", wrap=True), Col("statement", "left", wrap=True, drop=1)]
    rows = []
    for cr in acc.checks:
        u = cr.check.unit
        lo, hi = cr.accept_lower[0], cr.accept_upper[0]
        if np.isnan(lo) and np.isnan(hi):
            acc_text = "none (no value can pass)"
        elif not np.isfinite(lo):
            acc_text = f"≤ {lim(hi, u)}"
        elif not np.isfinite(hi):
            acc_text = f"≥ {lim(lo, u)}"
        else:
            acc_text = f"{lim(lo, u)} … {lim(hi, u)}"
        rows.append((cr.name, format_check(float(cr.value[0]), float(cr.U[0]), u),
                     limits_text(cr.check), acc_text, format_p(float(cr.p_c[0])),
                     DECISIONS[int(cr.decision[0])], STATEMENTS[int(cr.statement[0])]))
    print_table(console, cols, rows, wide=wide,
                title=f"{acc.duts[0]}: {name} ({acc.rule.rule} rule"
                + (f", {acc.spec.name})" if acc.spec.name else ")"), title_justify="left")


def _flagged_note(acc, i) -> str:
    """' (flagged: knee, outlier)' when a flag turned a pass into inconclusive, else ''."""
    if not acc.capped[i]:
        return ""
    return f" (flagged: {', '.join(acc.warning_codes.get(int(i), ()))})"


def _rank(decision):
    """Sort key: fail first, then error, inconclusive, pass."""
    import numpy as np

    return np.array([0, 1, 3, 2], dtype=np.int16)[decision]
