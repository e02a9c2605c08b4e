"""``sagfit steps``: a logged trace → its constant-current steps and settled readings,
optionally fitted like any readings file."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from . import app
from .common import (BenchOpt, ConfidenceOpt, CurrentAccOpt, JsonOpt, QuietOpt, VoltageAccOpt,
                     announce_bench, check_out_option, fit_settings, guarded, progress,
                     resolve_bench, show_progress, require_some_fit, write_document)

MAX_TABLE_ROWS = 40

ThresholdOpt = Annotated[Optional[str], typer.Option(
    "--threshold", help="Current change that starts a new step, e.g. '50mA' [default: from "
                        "the trace's own noise].")]
WindowOpt = Annotated[Optional[str], typer.Option(
    "--window", help="Settling window at the end of each step, e.g. '10s' [default: the "
                     "last quarter of the step].")]
MinSamplesOpt = Annotated[int, typer.Option(
    "--min-samples", help="Fewest samples in a step and in its settling window.")]
DischargeNegOpt = Annotated[bool, typer.Option(
    "--discharge-negative", help="The file writes discharge current as negative (as many "
                                 "cyclers do).")]


def read_and_split(file, threshold, window, min_samples, discharge_negative, step):
    """Read a trace and find its steps (shared by ``steps`` and ``pulses``)."""
    from ..core.errors import InputError, OptionError
    from ..core.trace import find_steps
    from ..core.units import parse_quantity
    from ..io.trace_file import read_trace

    def qty(text, dim, opt):
        if text is None:
            return None
        try:
            value = parse_quantity(text, dim, what=opt)
        except InputError as exc:
            raise OptionError(opt, str(exc).split(": ", 1)[-1]) from None
        if not value > 0:
            raise OptionError(opt, f"{text!r} must be positive")
        return value

    thr = qty(threshold, "A", "--threshold")
    win = qty(window, "s", "--window")
    if min_samples < 2:
        raise OptionError("--min-samples", "must be at least 2")
    trace = read_trace(file, discharge_negative=discharge_negative)
    step(f"finding the steps in {len(trace):,} rows")
    steps = find_steps(trace, threshold=thr, window=win, min_samples=min_samples)
    return trace, steps


@app.command("steps")
def steps_command(
    file: Annotated[str, typer.Argument(help="Logged trace, CSV or Parquet: time, current, "
                                             "voltage (docs/traces.md).")],
    threshold: ThresholdOpt = None,
    window: WindowOpt = None,
    min_samples: MinSamplesOpt = 5,
    discharge_negative: DischargeNegOpt = False,
    keep_unsettled: Annotated[bool, typer.Option(
        "--keep-unsettled", help="Also use steps still drifting at their end.")] = False,
    readings_out: Annotated[Optional[str], typer.Option(
        "--readings-out", help="Write the settled readings as a readings CSV (the input "
                               "of `sagfit fit`).")] = None,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Write the steps table to this .csv or .json file.")] = None,
    fit_: Annotated[bool, typer.Option(
        "--fit", help="Fit the settled readings (as `sagfit fit` would).")] = False,
    confidence: ConfidenceOpt = None,
    voltage_accuracy: VoltageAccOpt = None,
    current_accuracy: CurrentAccOpt = None,
    bench: BenchOpt = None,
    report: Annotated[Optional[str], typer.Option(
        "--report", help="Write an HTML report into this folder: the trace with its steps "
                         "(trace.html) and, with --fit, the fit report (report.html).")]
        = None,
    json_out: JsonOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Split a logged trace into constant-current steps and take the settled voltage and
    current of each, with Type A uncertainties; optionally fit them."""
    with guarded(file):
        from ..core.trace import settled_readings_arrays, step_warnings, steps_columns

        bench, bench_source = resolve_bench(bench)  # --bench none, $SAGFIT_BENCH, default
        settings = fit_settings(voltage_accuracy, current_accuracy, None, bench, confidence,
                                bench_source=bench_source)
        announce_bench(settings, json_out)
        inputs = [file] + ([bench] if bench else [])
        check_out_option(out, inputs, formats=(".csv", ".json"))
        if readings_out:
            check_out_option(readings_out, inputs, formats=(".csv",), option="--readings-out")
        with progress("reading " + file, show_progress(file, json_out), total=4) as step:
            trace, steps = read_and_split(file, threshold, window, min_samples,
                                          discharge_negative, step)
            step("settled readings")
            cols = steps_columns(steps)
            warnings = step_warnings(steps)
            fits = readings = doc = None
            if fit_:
                step("fitting")
                from ..core.analysis import fit
                from ..core.trace import steps_to_readings
                from .fit_cmd import fit_document

                readings = steps_to_readings(
                    steps, source=file, voltage_accuracy=settings["voltage_accuracy"],
                    current_accuracy=settings["current_accuracy"],
                    include_unsettled=keep_unsettled)
                fits = fit(readings, confidence=settings["confidence"])
                require_some_fit(file, fits)
                doc = fit_document(fits, readings, settings)
            from ..io.outputs import atomic_write
            from ..io.trace_file import columns_csv

            if readings_out:
                a = settled_readings_arrays(steps, include_unsettled=keep_unsettled)
                atomic_write(readings_out, columns_csv(
                    {"dut": a["dut"], "step": a["step"], "time_s": a["time"],
                     "current_A": a["current"], "voltage_V": a["voltage"],
                     "u_current_A": a["u_current"], "u_voltage_V": a["u_voltage"]}),
                    inputs=inputs, option="--readings-out")
            sdoc = _steps_document(file, trace, steps, cols, warnings)
            if report:
                step("writing the report")
                from ..report.trace_report import write_trace_report

                write_trace_report(report, trace, steps, doc=sdoc, inputs=inputs)
                if fits is not None:
                    from ..report.fit_report import write_report

                    write_report(report, fits, readings, doc, settings, inputs=inputs)
            if out:
                from ..io.outputs import document_text

                atomic_write(out, document_text(sdoc) if out.lower().endswith(".json")
                             else columns_csv(cols), inputs=inputs)
        if json_out:
            if doc is not None:
                write_document({**doc, "steps": sdoc}, fits)
            else:
                write_document(sdoc)
            return
        _print_steps(trace, steps, cols, warnings)
        if fits is not None:
            from .render import print_fits

            print_fits(fits, readings, doc, quiet=quiet)
    if fits is not None and fits.error.count(None) != len(fits.error):
        raise typer.Exit(3)


def _steps_document(file, trace, steps, cols, warnings) -> dict:
    from .. import __version__

    return {"tool": "sagfit", "version": __version__,
            "input": {"file": file, "rows": len(trace), "channels": list(trace.channels),
                      "t0": trace.meta.get("t0")},
            "threshold_A": [float(x) for x in steps.threshold],
            "current_noise_A": [float(x) for x in steps.noise],
            "warnings": warnings,
            "steps": _records(cols)}


def _records(cols: dict) -> list[dict]:
    """Columns → list of plain JSON records (NaN → None); one record per step."""
    import math

    import numpy as np

    names = list(cols)
    lists = [np.asarray(cols[n]).tolist() for n in names]
    out = []
    for row in zip(*lists):
        out.append({n: (None if isinstance(v, float) and not math.isfinite(v) else v)
                    for n, v in zip(names, row)})
    return out


def _print_steps(trace, steps, cols, warnings) -> None:
    import numpy as np
    from rich.table import Table

    from ..core.formatting import format_estimate, format_value
    from .render import _console

    console = _console()
    n = len(steps)
    t = Table(title=f"{trace.source}: {n} step(s) in {len(trace):,} rows, "
                    f"{len(trace.channels)} channel(s)", title_justify="left",
              show_edge=False)
    for col, just in (("step", "right"), ("channel", "left"), ("from", "right"),
                      ("length", "right"), ("current", "right"), ("voltage", "right"),
                      ("window", "right"), ("state", "left")):
        t.add_column(col, justify=just)
    shown = range(n) if n <= MAX_TABLE_ROWS else list(range(MAX_TABLE_ROWS // 2)) + list(
        range(n - MAX_TABLE_ROWS // 2, n))
    last = -1
    for k in shown:
        if k != last + 1:
            t.add_row("…", "", "", "", "", "", "", "")
        last = k
        state = ("clipped" if steps.clipped[k] else "unsettled" if not steps.settled[k]
                 else "rest" if cols["rest"][k] else "settled")
        t.add_row(str(k + 1), str(cols["channel"][k]), format_value(steps.t_start[k], "s", 4),
                  format_value(steps.duration[k], "s", 3),
                  format_estimate(steps.current[k], steps.u_current[k], "A"),
                  format_estimate(steps.voltage[k], steps.u_voltage[k], "V"),
                  f"{int(steps.n_window[k])} ({np.round(steps.n_eff[k]):g} eff.)", state)
    console.print(t)
    for w in warnings:
        console.print(f"warning: {w}", markup=False)
