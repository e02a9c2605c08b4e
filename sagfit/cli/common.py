"""Helpers shared by the commands: option parsing, loading, errors, output."""

from __future__ import annotations

import contextlib
import math
import sys
from typing import Annotated, Iterator, Optional

import typer

from ..core.errors import InputError, OptionError, SagfitError

# Options shared by every command that fits readings (declared once, used by each).
DutOpt = Annotated[Optional[str], typer.Option("--dut", help="Only these DUTs, e.g. "
                                                             "'A1' or 'A1,A7'.")]
ConfidenceOpt = Annotated[Optional[float], typer.Option(
    "--confidence", help="Confidence level of the intervals [default: 0.95].")]
VoltageAccOpt = Annotated[Optional[str], typer.Option(
    "--voltage-accuracy", help="Voltmeter spec ±(% of reading + offset), e.g. '0.05%+2mV', "
                               "or as a data sheet prints it: '35ppm + 5ppm of range, range "
                               "10V', '0.5% + 3 counts, resolution 1mV' (a rectangular "
                               "half-width).")]
CurrentAccOpt = Annotated[Optional[str], typer.Option(
    "--current-accuracy", help="Ammeter spec, e.g. '0.2%+1mA' or '0.1% of range, range "
                               "20A'.")]
LoadTolOpt = Annotated[Optional[str], typer.Option(
    "--load-tolerance", help="Load resistor tolerance, e.g. '1%'.")]
VoltageNoiseOpt = Annotated[Optional[str], typer.Option(
    "--voltage-noise", help="Voltmeter noise per reading, a standard deviation, e.g. '50uV' "
                            "or '0.001%+20uV' (independent from reading to reading).")]
CurrentNoiseOpt = Annotated[Optional[str], typer.Option(
    "--current-noise", help="Ammeter noise per reading, a standard deviation, e.g. '0.2mA'.")]
IndependentOpt = Annotated[bool, typer.Option(
    "--independent-errors", help="Treat each reading's meter error as independent (different "
                                 "meters, a range change mid-sweep, readings days apart) "
                                 "instead of one gain and one offset error per sweep.")]
BenchOpt = Annotated[Optional[str], typer.Option(
    "--bench", help="Bench profile (TOML) with the instruments' accuracies [default: "
                    "$SAGFIT_BENCH, else bench.toml in the user's sagfit configuration "
                    "folder; 'none' for no profile].")]
ColumnsOpt = Annotated[Optional[str], typer.Option(
    "--columns", help="Which column is which, where the headers do not say: ROLE=COLUMN "
                      "pairs, e.g. 'voltage=V (V),current=I_meas (A)'. Roles: dut, load, "
                      "voltage, current, u_voltage, u_current, u_load, load_tolerance, time, "
                      "group, temperature. A unit may follow the column: 'voltage=Ch1 [mV]'.")]
SheetOpt = Annotated[Optional[str], typer.Option(
    "--sheet", help="The sheet of an Excel or OpenDocument workbook [default: the first].")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print one JSON document to stdout.")]
QuietOpt = Annotated[bool, typer.Option(
    "--quiet", "-q", help="Routine run: leave out the safety cautions in the terminal "
                          "(they stay in --json and the reports).")]
WideOpt = Annotated[bool, typer.Option(
    "--wide", help="Print every table column at full width, however wide the terminal "
                   "(piped output always does).")]
VerboseOpt = Annotated[bool, typer.Option("--verbose", "-v", help="Also list ignored columns "
                                                                  "and the settings used.")]


def error_line(message: str) -> None:
    sys.stderr.write("error: " + " ".join(str(message).split()) + "\n")


@contextlib.contextmanager
def guarded(source: str = "") -> Iterator[None]:
    """Map every failure to one ``error:`` line and exit status 2 (130 on Ctrl-C)."""
    try:
        yield
    except typer.Exit:
        raise
    except SagfitError as exc:
        error_line(str(exc))
        raise typer.Exit(2) from None
    except KeyboardInterrupt:
        error_line("interrupted; no partial output file was left")
        raise typer.Exit(130) from None
    except MemoryError:
        error_line(f"{source}: not enough memory for this file".lstrip(": "))
        raise typer.Exit(2) from None
    except OSError as exc:
        error_line(f"{source}: {exc.strerror or exc}".lstrip(": "))
        raise typer.Exit(2) from None
    except Exception as exc:  # never a traceback for users; say what broke
        from . import interrupted

        if interrupted():  # the failure followed a Ctrl-C: it is the interruption
            error_line("interrupted; no partial output file was left")
            raise typer.Exit(130) from None
        error_line(f"{source}: internal error ({type(exc).__name__}: {exc}); please report it "
                   "with the input file".lstrip(": "))
        raise typer.Exit(2) from None


def resolve_bench(bench: str | None) -> tuple[str | None, str]:
    """The bench profile a command uses and where it came from: ``--bench`` (``none``
    for no profile), else the default of :func:`sagfit.io.bench.default_bench`."""
    if bench is not None:
        if bench.strip().lower() == "none":
            return None, ""
        return bench, "--bench"
    from ..io.bench import default_bench

    return default_bench()


def announce_bench(settings: dict, json_out: bool = False) -> None:
    """Say which profile applied when the user did not name it (terminal only; the JSON
    has ``settings.bench`` and ``settings.bench_source``)."""
    src = settings.get("bench_source")
    if json_out or not settings.get("bench") or src == "--bench":
        return
    where = "$SAGFIT_BENCH" if src == "SAGFIT_BENCH" else "the user's default"
    write_stdout(f"bench profile: {settings['bench']} ({where}; --bench names another, "
                 "--bench none uses none)\n")


def fit_settings(voltage_accuracy=None, current_accuracy=None, load_tolerance=None,
                 bench=None, confidence=None, *, voltage_noise=None, current_noise=None,
                 independent_errors=False, columns=None, sheet=None,
                 bench_source: str = "--bench") -> dict:
    """Merge the command-line options over a bench profile into fit settings.

    ``bench`` is the profile's path (resolved by :func:`resolve_bench`), ``bench_source``
    where it came from; ``columns`` a column mapping text, ``sheet`` a workbook's sheet."""
    from ..core.units import parse_accuracy, parse_percent

    settings: dict = {"voltage_accuracy": None, "current_accuracy": None,
                      "load_tolerance": None, "confidence": 0.95, "instruments": (),
                      "bench": None, "columns": {}, "sheet": sheet}
    if bench:
        from ..io.bench import read_bench

        prof = read_bench(bench)
        settings.update(voltage_accuracy=prof.voltage_accuracy,
                        current_accuracy=prof.current_accuracy,
                        load_tolerance=prof.load_tolerance, instruments=prof.instruments,
                        bench=bench, columns=dict(prof.columns), bench_source=bench_source)
        if prof.confidence is not None:
            settings["confidence"] = prof.confidence
    try:
        if voltage_accuracy is not None:
            settings["voltage_accuracy"] = parse_accuracy(voltage_accuracy, "V")
        if current_accuracy is not None:
            settings["current_accuracy"] = parse_accuracy(current_accuracy, "A")
        if load_tolerance is not None:
            settings["load_tolerance"] = parse_percent(load_tolerance)
    except InputError as exc:
        opt = ("--voltage-accuracy" if voltage_accuracy and "V" in str(exc) else
               "--current-accuracy" if current_accuracy and "A" in str(exc) else
               "--load-tolerance")
        raise OptionError(opt, str(exc).split(": ", 1)[-1]) from None
    for key, text, dim, opt in (("voltage_accuracy", voltage_noise, "V", "--voltage-noise"),
                                ("current_accuracy", current_noise, "A", "--current-noise")):
        if text is None:
            continue
        if settings[key] is None:
            raise OptionError(opt, f"give the meter's accuracy as well (--{key.replace('_', '-')})"
                                   ": the noise is its random part")
        try:
            noise = parse_accuracy(text, dim, what=opt)
        except InputError as exc:
            raise OptionError(opt, str(exc).split(": ", 1)[-1]) from None
        settings[key] = settings[key].with_noise(noise)
    if columns is not None:
        from ..io.columns import parse_column_mapping

        try:  # the option's roles over the bench profile's
            settings["columns"] = {**settings["columns"], **parse_column_mapping(columns)}
        except InputError as exc:
            raise OptionError("--columns", str(exc).split(": ", 1)[-1]) from None
    if independent_errors:
        for key in ("voltage_accuracy", "current_accuracy"):
            if settings[key] is not None:
                settings[key] = settings[key].with_shared(False)
    if settings["load_tolerance"] is not None and not 0 <= settings["load_tolerance"] < 100:
        raise OptionError("--load-tolerance", "must be between 0 % and 100 %")
    if confidence is not None:
        if not (isinstance(confidence, float) and 0 < confidence < 1 and math.isfinite(confidence)):
            raise OptionError("--confidence", f"must be between 0 and 1 (got {confidence})")
        settings["confidence"] = float(confidence)
    return settings


def settings_record(settings: dict) -> dict:
    """The settings as plain JSON values (for outputs, reports and the history)."""
    def acc(a):
        return None if a is None else {"text": a.text, "percent": a.percent, "offset": a.offset,
                                       "divisor": a.divisor,
                                       "errors": "shared" if a.shared else "independent",
                                       "noise_percent": a.noise_percent,
                                       "noise_offset": a.noise_offset}
    return {"confidence": settings["confidence"],
            "voltage_accuracy": acc(settings["voltage_accuracy"]),
            "current_accuracy": acc(settings["current_accuracy"]),
            "load_tolerance_pct": settings["load_tolerance"],
            "bench": settings.get("bench"),
            "columns": dict(settings.get("columns") or {}),
            "bench_source": settings.get("bench_source") if settings.get("bench") else None,
            "instruments": [i.to_dict() for i in settings.get("instruments", ())]}


def load_readings(file: str, settings: dict, dut: str | None = None):
    """Read a readings file (``-``: standard input) with the settings, optionally keeping
    some DUTs.

    ``settings["instruments"]`` is narrowed to the instruments the readings used."""
    from ..core.traceability import instruments_used
    from ..io.readings_csv import read_readings

    readings = read_readings(file, voltage_accuracy=settings["voltage_accuracy"],
                             current_accuracy=settings["current_accuracy"],
                             load_tolerance=settings["load_tolerance"],
                             columns=settings.get("columns") or None,
                             sheet=settings.get("sheet"))
    if dut:
        names = [d.strip() for d in dut.split(",") if d.strip()]
        readings = readings.only_duts(names)
    # only the instruments that entered the result are listed (and checked for their
    # calibration date): no ammeter where I = V/R
    settings["instruments"] = instruments_used(settings.get("instruments", ()),
                                               readings.current_from, readings.voltage_from)
    return readings


def check_out_option(out: str | None, inputs, formats=(".csv", ".parquet", ".json"),
                     option: str = "--out") -> None:
    """``--out``: a file name in an existing folder, never an input file, of one of the
    ``formats`` the command writes."""
    if not out:
        return
    from ..io.outputs import check_output_path

    check_output_path(out, inputs, option=option)
    if not out.lower().endswith(tuple(formats)):
        what = (", ".join(formats[:-1]) + " or " if len(formats) > 1 else "") + formats[-1]
        raise OptionError(option, f"{out}: use a {what} file name")


def write_out(out: str, doc: dict, csv_columns, inputs=()) -> None:
    """``--out``: ``.json`` → the document ``--json`` prints; ``.csv`` → one row per item
    (``csv_columns``: name → array or list; SI units, full precision, non-finite numbers
    as empty cells); ``.parquet`` → the same columns as Parquet. Written atomically, never
    over an input."""
    from ..io.outputs import atomic_write, document_text

    if out.lower().endswith(".json"):
        atomic_write(out, document_text(doc), inputs=inputs)
    elif out.lower().endswith(".parquet"):
        import numpy as np

        from ..io.results_csv import Coded, table_parquet

        def typed(col):  # a list of numbers is a numeric column, not text
            if isinstance(col, (np.ndarray, Coded)):
                return col
            a = np.asarray(col)
            return a if a.dtype.kind in "fiub" else col

        atomic_write(out, table_parquet({k: typed(c) for k, c in csv_columns.items()}),
                     inputs=inputs)
    else:
        from ..io.results_csv import table_csv_chunks

        atomic_write(out, table_csv_chunks(csv_columns), inputs=inputs)


def require_some_fit(file: str, fits) -> None:
    """A file in which no DUT could be fitted is bad input (exit 2), with the reason."""
    if len(fits) and not fits.ok.any():
        from ..core.errors import ReadingsFileError

        who = "" if len(fits) == 1 else f"no DUT could be fitted; {fits.duts[0]}: "
        raise ReadingsFileError(file, who + str(fits.error[0]))


def show_progress(file: str, json_out: bool) -> bool:
    """A progress bar is worth it on a terminal, without --json, for a file of more than
    a few megabytes (about 10,000 readings)."""
    import os

    if json_out or not interactive():
        return False
    try:
        return os.path.getsize(file) > 2_000_000
    except OSError:
        return False


def write_document(doc, results=None) -> None:
    """Print a JSON document to stdout, with the per-DUT ``results`` of a Fits or an
    Acceptance when given (``outputs.document_pieces``: in pieces for a large batch)."""
    from ..io.outputs import document_pieces

    for piece in document_pieces(doc, results):
        write_stdout(piece)


def write_stdout(text: str) -> None:
    try:
        sys.stdout.write(text)
        sys.stdout.flush()
    except BrokenPipeError:
        pass


def interactive() -> bool:
    try:
        return sys.stdout.isatty()
    except (AttributeError, ValueError):
        return False


@contextlib.contextmanager
def progress(label: str, enabled: bool, total: int | None = None):
    """A progress bar on stderr for an interactive terminal; silent otherwise.

    Yields ``step(text)``: the work moved on to ``text`` (one of ``total`` stages when
    given; a pulsing bar when the number of stages is not known).
    """
    if not enabled:
        yield lambda text: None
        return
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    bar = Progress(TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(),
                   console=Console(stderr=True), transient=True)
    with bar:
        task = bar.add_task(label, total=total)

        def step(text: str) -> None:
            bar.update(task, description=text, advance=1 if total else 0)

        yield step
        if total:
            bar.update(task, completed=total)
