"""``sagfit fit``: the equivalent of each DUT in a readings file."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from . import app
from .common import (BenchOpt, ColumnsOpt, ConfidenceOpt, CurrentAccOpt, CurrentNoiseOpt,
                     DutOpt, IndependentOpt, JsonOpt, LoadTolOpt, QuietOpt, SheetOpt,
                     VerboseOpt, VoltageAccOpt, WideOpt, VoltageNoiseOpt, announce_bench,
                     check_out_option, resolve_bench, fit_settings, guarded, load_readings,
                     progress, require_some_fit, settings_record, show_progress,
                     write_document)

MAX_TABLE_ROWS = 40


@app.command("fit")
def fit_command(
    file: Annotated[str, typer.Argument(help="Readings file: CSV, Parquet, Excel or "
                                            "OpenDocument (see docs/input-format.md); '-' "
                                            "for standard input; or a folder or glob of "
                                            "Parquet/CSV files: a data set fitted on Dask "
                                            "(docs/cluster.md; a Parquet set without Dask: "
                                            "read in one process).")],
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
        "--out", help="Also write the results to this .csv, .parquet or .json file.")] = None,
    verbose: VerboseOpt = False,
    quiet: QuietOpt = False,
    wide: WideOpt = False,
    level: Annotated[float, typer.Option(
        "--level", help="Significance level of the non-linearity checks.")] = 0.01,
    current_range: Annotated[Optional[str], typer.Option(
        "--current-range", help="Fit only readings with LO ≤ I ≤ HI, e.g. '0:2.5A' or "
                                "'100mA:2A'.")] = None,
    below_knee: Annotated[bool, typer.Option(
        "--below-knee", help="Where a knee is found, refit only the readings below it.")] = False,
    robust: Annotated[bool, typer.Option(
        "--robust", help="Refit with Huber's loss (c = 1.345): readings beyond c standard "
                                "residuals lose weight.")] = False,
    monte_carlo: Annotated[Optional[int], typer.Option(
        "--monte-carlo", metavar="DRAWS",
        help="Also give Monte Carlo coverage intervals of Vth and Rth (JCGM 101:2008) from "
             "DRAWS draws per DUT of the meters' errors and the readings' noise (seeded, "
             "repeatable), and say whether the GUM interval agrees; e.g. 100000.")] = None,
    report: Annotated[Optional[str], typer.Option(
        "--report", help="Write a report into this folder: report.html with figures, "
                         "results.json, results.csv, PNGs.")] = None,
    figures: Annotated[str, typer.Option(
        "--figures", help="Per-DUT figures in the report: flagged, all or none.")] = "flagged",
    scheduler: Annotated[Optional[str], typer.Option(
        "--scheduler", help="Dask scheduler address (tcp://host:8786) for a data set; "
                            "default: local worker processes.")] = None,
    workers: Annotated[Optional[int], typer.Option(
        "--workers", help="Local Dask worker processes for a data set.")] = None,
) -> None:
    """Fit V = Vth − Rth·I for every DUT: open-circuit voltage, internal resistance,
    short-circuit current and maximum power, with uncertainties."""
    with guarded(file):
        from ..core.analysis import fit
        from ..core.errors import OptionError

        bench, bench_source = resolve_bench(bench)
        settings = fit_settings(voltage_accuracy, current_accuracy, load_tolerance, bench,
                                confidence, voltage_noise=voltage_noise,
                                current_noise=current_noise,
                                independent_errors=independent_errors,
                                columns=columns, sheet=sheet, bench_source=bench_source)
        announce_bench(settings, json_out)
        if not 0.0 < level < 0.5:
            raise OptionError("--level", f"must be between 0 and 0.5 (got {level:g}); "
                                         "0.01 is the default, 0.05 is more sensitive")
        from .dataset_run import runs_on_dask, set_inputs

        if runs_on_dask(file, scheduler, workers):  # a folder or glob, partitioned
            from .dataset_run import refuse_single_file_options, run_dataset_fit

            refuse_single_file_options({"--dut": dut, "--current-range": current_range,
                                        "--below-knee": below_knee, "--robust": robust,
                                        "--monte-carlo": monte_carlo,
                                        "--report": report, "--verbose": verbose,
                                        "--sheet": sheet})
            code = run_dataset_fit(file, settings, level, out, json_out, scheduler, workers)
            raise typer.Exit(code)
        if report:
            from ..report.fit_report import FIGURE_CHOICES

            if figures not in FIGURE_CHOICES:
                raise OptionError("--figures", f"{figures!r}: choose one of "
                                               f"{', '.join(FIGURE_CHOICES)}")
        check_out_option(out, set_inputs(file, out) + ([bench] if bench else []))
        if monte_carlo is not None and robust:
            raise OptionError("--monte-carlo", "not with --robust (a Huber fit's weights "
                                               "depend on its residuals)")
        if monte_carlo is not None and monte_carlo < 1000:
            raise OptionError("--monte-carlo", f"at least 1000 draws (got {monte_carlo}); "
                                               "100000 is a good start")
        with progress("reading " + file, show_progress(file, json_out),
                      total=5 if monte_carlo else 4) as step:
            readings = load_readings(file, settings, dut)
            step(f"fitting and checking {readings.n_duts} DUT(s)")
            fits = fit(readings, confidence=settings["confidence"], level=level,
                       current_range=parse_current_range(current_range),
                       below_knee=below_knee, robust=robust)
            mc = None
            if monte_carlo:
                from ..core.montecarlo import monte_carlo as run_monte_carlo
                from ..core.results import ColumnRows

                step(f"Monte Carlo, {monte_carlo:,} draws per DUT")
                used = readings if fits.used_rows is None else readings.select(fits.used_rows)
                mc = run_monte_carlo(used, fits, draws=monte_carlo)
                fits = fits.replace(extra={**fits.extra, "monte_carlo": ColumnRows(
                    {"i": list(range(len(fits)))}, lambda c, i, mc=mc: mc.row(int(c["i"][i])))})
            step("preparing the results")
            need_results = bool(json_out or report or (out and out.lower().endswith(".json")))
            if need_results:
                from ..core.budget import budgets

                fits = fits.replace(extra={**fits.extra, "budget": budgets(
                    readings, fits, used=fits.used_rows)})
            doc = fit_document(fits, readings, settings)
            require_some_fit(file, fits)
            step("writing")
            if out:
                write_results(out, fits, doc, [file])
            if report:
                from ..report.fit_report import write_report

                write_report(report, fits, readings, doc, settings, figures=figures,
                             inputs=[file] + ([bench] if bench else []))
        if json_out:
            write_document(doc, fits)
        else:
            from .render import print_fits

            print_fits(fits, readings, doc, verbose=verbose, quiet=quiet, wide=wide)
            if mc is not None:
                print_monte_carlo(fits, mc)
    raise typer.Exit(3 if fits.error.count(None) != len(fits.error) else 0)


def print_monte_carlo(fits, mc, limit: int = 10) -> None:
    """The Monte Carlo intervals of the first ``limit`` DUTs and a line for the batch."""
    import math

    from ..core.formatting import format_interval, format_value
    from ..core.montecarlo import coverage_probability_note
    from .render import _console

    console = _console()
    lvl = f"{mc.confidence * 100:g} %"
    shown = 0
    for i in range(len(fits)):
        if shown >= limit or not math.isfinite(float(mc.vth_low[i])):
            continue
        shown += 1

        def verdict(valid, diff, delta, unit):
            return ("GUM interval agrees within δ = " + format_value(delta, unit) if valid else
                    "GUM interval ends differ by up to " + format_value(diff, unit))

        console.print(
            f"{fits.duts[i]}: Monte Carlo {lvl} Vth "
            f"{format_interval(mc.vth_low[i], mc.vth_high[i], 'V', mc.u_vth[i], fits.vth[i])} "
            f"({verdict(mc.gum_valid_vth[i], mc.diff_vth[i], mc.delta_vth[i], 'V')}), Rth "
            f"{format_interval(mc.rth_low[i], mc.rth_high[i], 'Ω', mc.u_rth[i], fits.rth[i])} "
            f"({verdict(mc.gum_valid_rth[i], mc.diff_rth[i], mc.delta_rth[i], 'Ω')})",
            markup=False, soft_wrap=True)
    console.print(coverage_probability_note(fits, mc), markup=False)


def parse_current_range(text: str | None):
    """``'LO:HI'`` with optional units (either end may be empty) → (lo, hi) in A, or None."""
    if text is None:
        return None
    from ..core.errors import InputError, OptionError
    from ..core.units import parse_quantity

    if ":" not in text:
        raise OptionError("--current-range", f"{text!r}: write LO:HI, e.g. '0:2.5A'")
    lo_s, hi_s = text.split(":", 1)
    try:
        lo = parse_quantity(lo_s, "A") if lo_s.strip() else float("-inf")
        hi = parse_quantity(hi_s, "A") if hi_s.strip() else float("inf")
    except InputError as exc:
        raise OptionError("--current-range", str(exc)) from None
    if not lo < hi:
        raise OptionError("--current-range", f"{text!r}: LO must be below HI")
    return lo, hi


def fit_document(fits, readings, settings) -> dict:
    """The JSON document of ``sagfit fit --json``, with an empty ``results`` list: the
    per-DUT results are built only where they are written (``outputs.document_pieces(doc,
    fits)``, in pieces for a large batch); the terminal view does not need them."""
    from .. import __version__
    from ..core.analysis import type_a_note
    from ..core.extrapolation import REACHED, extrapolated_isc_pmax
    from ..core.safety import fit_cautions
    from ..core.traceability import traceability_record

    trace = traceability_record(settings.get("instruments", ()), readings.meta)
    ex_isc, ex_pmax = extrapolated_isc_pmax(fits, readings)
    return {
        "tool": "sagfit",
        "version": __version__,
        "confidence": fits.confidence,
        "input": {"file": readings.source, "sha256": readings.meta.get("sha256"),
                  "date": readings.meta.get("date"),
                  "duts": len(fits), "readings": len(readings)},
        "settings": settings_record(settings),
        "traceability": trace,
        "warnings": trace["warnings"],
        # once per run: what a fit without stated uncertainties means (None otherwise)
        "note": type_a_note(fits),
        "results": [],
        # Isc and Pmax read off the line beyond the tested currents, by DUT
        "extrapolated": {"isc": [d for d, x in zip(fits.duts, ex_isc) if x],
                         "pmax": [d for d, x in zip(fits.duts, ex_pmax) if x],
                         "rule": f"tested current below {REACHED:g}·Isc (Isc) or "
                                 f"{REACHED:g}·Isc/2 (Pmax)"},
        "cautions": fit_cautions(fits, readings),
    }


def write_results(out: str, fits, doc, inputs) -> None:
    """``--out``: CSV or Parquet (one row per DUT) or JSON (the same document as --json)."""
    from ..io.outputs import atomic_write, document_pieces

    if out.lower().endswith(".json"):
        atomic_write(out, document_pieces(doc, fits), inputs=inputs)
    elif out.lower().endswith(".parquet"):
        from ..io.results_csv import fits_parquet

        atomic_write(out, fits_parquet(fits), inputs=inputs)
    else:
        from ..io.readings_csv import fits_csv

        atomic_write(out, fits_csv(fits), inputs=inputs)
