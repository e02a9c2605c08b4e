"""``sagfit record`` and ``sagfit trend``: keep a history of fits and read its trends."""

from __future__ import annotations

import math
import re
from typing import Annotated, Optional

import typer

from . import app
from .common import (BenchOpt, ColumnsOpt, ConfidenceOpt, CurrentAccOpt, CurrentNoiseOpt,
                     DutOpt, IndependentOpt, JsonOpt, LoadTolOpt, QuietOpt, SheetOpt,
                     VoltageAccOpt, VoltageNoiseOpt, WideOpt, announce_bench, check_out_option,
                     fit_settings, guarded, interactive, load_readings, progress,
                     require_some_fit, resolve_bench, settings_record, show_progress,
                     write_document, write_stdout)

MAX_TABLE_ROWS = 40
DEFAULT_DB = "sagfit-history.sqlite"  # the same name as sagfit.history.DEFAULT_DB

DbOpt = Annotated[str, typer.Option(
    "--db", help="History database (SQLite file).")]


@app.command("record")
def record_command(
    files: Annotated[list[str], typer.Argument(
        help="Readings files of one test date each (CSV, Parquet, Excel or OpenDocument; "
             "'-' for standard input); several files are recorded in one run.",
        metavar="FILE...")],
    date: Annotated[Optional[str], typer.Option(
        "--date", help="Test date YYYY-MM-DD [default: the time column, else the file's "
                       "'# date:' comment].")] = None,
    db: DbOpt = DEFAULT_DB,
    force: Annotated[bool, typer.Option(
        "--force", help="Replace the records of a file already recorded.")] = False,
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
    quiet: QuietOpt = False,
) -> None:
    """Fit every DUT in each FILE and append the results to the history database.

    Every file is read and fitted before anything is recorded (a bad file records
    nothing); the safety cautions are given once for the whole run."""
    from ..core.safety import merged_cautions

    with guarded(files[0]):
        bench, bench_source = resolve_bench(bench)
        inputs = list(files) + ([bench] if bench else [])
        from ..io.history import check_db_path

        check_db_path(db, inputs)
        settings = fit_settings(voltage_accuracy, current_accuracy, load_tolerance, bench,
                                confidence, voltage_noise=voltage_noise,
                                current_noise=current_noise,
                                independent_errors=independent_errors,
                                columns=columns, sheet=sheet, bench_source=bench_source)
        announce_bench(settings, json_out)
    fitted = []
    for file in files:
        with guarded(file):
            fitted.append(_fit_for_record(file, dict(settings), dut, date, json_out))
    docs = []
    with guarded(db):
        for file, run in zip(files, fitted):
            docs.append(_record_one(file, run, db, date, force))
    cautions = merged_cautions([run["caution_inputs"] for run in fitted])
    failed = any(d["not_fitted"] for d in docs)
    if len(docs) == 1:
        doc = {**docs[0], "cautions": cautions}
    else:
        from .. import __version__

        warnings = list(dict.fromkeys(w for d in docs for w in d["warnings"]))
        doc = {"tool": "sagfit", "version": __version__, "database": db, "runs": docs,
               "warnings": warnings, "cautions": cautions}
    if json_out:
        write_document(doc)
    else:
        _print_record(docs, cautions=[] if quiet else cautions)
    raise typer.Exit(3 if failed else 0)


def _fit_for_record(file: str, settings: dict, dut, date, json_out: bool) -> dict:
    """Read and fit one file for ``record`` (nothing written yet)."""
    from ..core.analysis import fit
    from ..core.safety import caution_inputs
    from ..io.history import dut_group_labels, dut_test_times

    with progress("reading " + file, show_progress(file, json_out), total=2) as step:
        readings = load_readings(file, settings, None)
        labels = dict(zip(readings.duts, dut_group_labels(readings)))
        if dut:
            readings = readings.only_duts([d.strip() for d in dut.split(",") if d.strip()])
        times, date_source = dut_test_times(readings, date)
        step(f"fitting {readings.n_duts} DUT(s)")
        fits = fit(readings, confidence=settings["confidence"])
    require_some_fit(file, fits)
    return {"settings": settings, "readings": readings, "labels": labels, "times": times,
            "date_source": date_source, "fits": fits,
            "caution_inputs": caution_inputs(fits, readings)}


def _record_one(file: str, run: dict, db: str, date, force: bool) -> dict:
    """Append one fitted file to the history; its part of the output document."""
    from .. import __version__
    from ..core.traceability import traceability_record
    from ..core.trend import iso_date
    from ..io.history import History

    settings, readings, fits, times = (run["settings"], run["readings"], run["fits"],
                                       run["times"])
    trace = traceability_record(settings.get("instruments", ()),
                                {**readings.meta, **({"date": date} if date else {})})
    # stored with the settings of every record, so the history keeps the fact
    srec = {**settings_record(settings), "calibration_warnings": trace["warnings"]}
    with History(db, create=True) as hist:
        outcome = hist.record(
            fits, test_time=times, file_name=file, sha256=str(readings.meta["sha256"]),
            group_labels=[run["labels"].get(d, "") for d in fits.duts], settings=srec,
            date_source=run["date_source"], tool_version=__version__, force=force)
        total = hist.count()
    failed = [(d, e) for d, e in zip(fits.duts, fits.error) if e is not None]
    dates = sorted({iso_date(t) for t, e in zip(times, fits.error) if e is None})
    return {"tool": "sagfit", "version": __version__, "database": db,
            "input": {"file": file, "sha256": readings.meta["sha256"],
                      "dates": dates, "date_source": run["date_source"]},
            "settings": srec,
            "recorded": list(outcome.added), "replaced": list(outcome.replaced),
            "already_recorded": list(outcome.skipped),
            "not_fitted": [{"dut": d, "error": e} for d, e in failed],
            "records_in_database": total,
            "traceability": trace, "warnings": trace["warnings"]}


def _count(n: int, noun: str) -> str:
    """'1 record', '16 records'."""
    return f"{n} {noun}" if n == 1 else f"{n} {noun}s"


def _print_record(docs, cautions=()) -> None:
    lines = []
    seen_warnings = set()
    for doc in docs:
        dates = doc["input"]["dates"]
        when = ", ".join(dates[:3]) + ("…" if len(dates) > 3 else "")
        n_new = len(doc["recorded"]) + len(doc["replaced"])
        if n_new:
            rep = f" ({len(doc['replaced'])} replaced)" if doc["replaced"] else ""
            lines.append(f"recorded {n_new} DUT(s){rep} from {doc['input']['file']}, tested "
                         f"{when} ({doc['input']['date_source']}), into {doc['database']} "
                         f"({_count(doc['records_in_database'], 'record')} in all)")
        if doc["already_recorded"]:
            lines.append(f"{len(doc['already_recorded'])} DUT(s) of {doc['input']['file']} "
                         "were already recorded and were left as they are (--force replaces "
                         "them)")
        for item in doc["not_fitted"][:MAX_TABLE_ROWS]:
            lines.append(f"not recorded {item['dut']}: {item['error']}")
        if len(doc["not_fitted"]) > MAX_TABLE_ROWS:
            lines.append(f"… and {len(doc['not_fitted']) - MAX_TABLE_ROWS} more DUTs not "
                         "fitted")
        for w in doc.get("warnings", []):
            if w not in seen_warnings:
                seen_warnings.add(w)
                lines.append(f"warning: {w}")
    for c in cautions:
        lines.append(f"caution: {c}")
    write_stdout("\n".join(lines) + "\n")


# ---------------------------------------------------------------------- option parsing
_DATE_RE = re.compile(r"^\d{4}-\d{2}-\d{2}")


def parse_baseline(text: str):
    """``first``, a date ``YYYY-MM-DD`` or a resistance with its unit (``0.6mohm``)."""
    from ..core.errors import InputError, OptionError
    from ..io.history import parse_date
    from ..core.trend import Baseline
    from ..core.units import parse_quantity

    s = text.strip()
    if s.lower() == "first":
        return Baseline("first")
    if _DATE_RE.match(s):
        try:
            return Baseline("date", time=parse_date(s))
        except ValueError as exc:
            raise OptionError("--baseline", str(exc)) from None
    try:
        v = parse_quantity(s, "ohm")
    except InputError:
        raise OptionError("--baseline", f"{text!r}: write first, a date YYYY-MM-DD, or a "
                                        "resistance such as 0.6mohm") from None
    if not (math.isfinite(v) and v > 0):
        raise OptionError("--baseline", f"{text!r}: a baseline resistance must be positive")
    return Baseline("value", value=v)


def parse_threshold(text: str):
    """``1.5x`` (× baseline), ``25%`` (above baseline) or ``0.8mohm`` (absolute)."""
    from ..core.errors import InputError, OptionError
    from ..core.trend import Threshold
    from ..core.units import parse_quantity

    s = text.strip().replace(" ", "")
    hint = "write e.g. 1.5x, 25% or 0.8mohm"
    try:
        if s[-1:] in ("x", "X", "×"):
            return Threshold("ratio", float(s[:-1]))
        if s.endswith("%"):
            return Threshold("percent", float(s[:-1]))
        if re.fullmatch(r"[-+0-9.eE]+", s):
            raise OptionError("--threshold", f"{text!r} has no unit; {hint}")
        return Threshold("absolute", parse_quantity(s, "ohm"))
    except (ValueError, InputError) as exc:
        if isinstance(exc, OptionError):
            raise
        msg = str(exc) if "threshold must" in str(exc) else hint
        raise OptionError("--threshold", f"{text!r}: {msg}") from None


def parse_days(text: str, option: str = "--horizon") -> float:
    """``180d``, ``26w``, ``6mo`` (30 d), ``1y`` (365 d) or a bare number of days."""
    from ..core.errors import OptionError

    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*(d|days?|w|weeks?|mo|months?|y|years?)?\s*",
                     text.lower())
    if not m:
        raise OptionError(option, f"{text!r}: write a duration such as 180d, 26w, 6mo or 1y")
    factor = {"d": 1, "w": 7, "m": 30, "y": 365}[(m.group(2) or "d")[0]]
    return float(m.group(1)) * factor


def parse_excess(text: str) -> float:
    from ..core.errors import OptionError

    s = text.strip().rstrip("%").strip()
    try:
        v = float(s)
    except ValueError:
        raise OptionError("--group-excess", f"{text!r}: write a percentage such as 30%") \
            from None
    if not (math.isfinite(v) and v > 0):
        raise OptionError("--group-excess", f"{text!r}: must be a positive percentage")
    return v


@app.command("trend")
def trend_command(
    db: DbOpt = DEFAULT_DB,
    dut: DutOpt = None,
    baseline: Annotated[str, typer.Option(
        "--baseline", help="Baseline Rth: first (record), a date YYYY-MM-DD, or a value "
                           "such as 0.6mohm.")] = "first",
    threshold: Annotated[str, typer.Option(
        "--threshold", help="Aged at: 1.5x (× baseline), 25% (above baseline) or an "
                            "absolute 0.8mohm. The 1.5x default is common practice.")] = "1.5x",
    horizon: Annotated[str, typer.Option(
        "--horizon", help="Flag a projected crossing within this time, e.g. 180d, 6mo.")
    ] = "180d",
    group_excess: Annotated[str, typer.Option(
        "--group-excess", help="Flag a DUT this far above its group's median Rth (30% is "
                               "common practice).")] = "30%",
    as_of: Annotated[Optional[str], typer.Option(
        "--as-of", help="Count the horizon from this date [default: the latest test].")
    ] = None,
    confidence: ConfidenceOpt = None,
    json_out: JsonOpt = False,
    report: Annotated[Optional[str], typer.Option(
        "--report", help="Write a report into this folder: report.html with figures, "
                         "results.json, results.csv, PNGs.")] = None,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Also write the trends to this .csv or .json file.")] = None,
    wide: WideOpt = False,
) -> None:
    """Aging trends of internal resistance: change from baseline, rate, projected
    threshold crossing, and each DUT against its group. Exit 1 when a DUT is flagged."""
    with guarded(db):
        from .. import __version__
        from ..core.errors import HistoryError, OptionError
        from ..io.history import History, parse_date
        from ..core.trend import analyse_trends

        conf = 0.95 if confidence is None else confidence
        if not (0 < conf < 1 and math.isfinite(conf)):
            raise OptionError("--confidence", f"must be between 0 and 1 (got {confidence})")
        base = parse_baseline(baseline)
        thr = parse_threshold(threshold)
        hz = parse_days(horizon)
        excess = parse_excess(group_excess)
        t_as_of = None
        if as_of is not None:
            try:
                t_as_of = parse_date(as_of)
            except ValueError as exc:
                raise OptionError("--as-of", str(exc)) from None
        names = list(dict.fromkeys(d.strip() for d in dut.split(",") if d.strip())) \
            if dut else None
        check_out_option(out, [db], formats=(".csv", ".json"))
        show = interactive() and not json_out
        with progress("reading " + db, show), History(db, create=False) as hist:
            recs = hist.records()  # all DUTs: --dut narrows the output, not the fleet view
        if len(recs) == 0:
            raise HistoryError(f"{db}: no records yet; add tests with 'sagfit record FILE "
                               f"--db {db}'")
        if names:
            missing = [d for d in names if d not in set(recs.duts)]
            if missing:
                raise OptionError("--dut", f"no records of {missing[0]!r} in {db}")
        trends = analyse_trends(
            recs.dut_index, recs.duts, recs.time, recs.rth, recs.u_rth,
            labels=recs.labels_per_dut(), baseline=base, threshold=thr, horizon_days=hz,
            group_excess_pct=excess, confidence=conf, as_of=t_as_of,
            u_rth_shared=recs.u_rth_shared, instrument=recs.instrument)
        if names:
            trends = trends.take(names)
            recs = _records_of(recs, names)
        doc = trend_document(trends, db, __version__, len(recs))
        if out:
            from ..io.outputs import atomic_write, document_text
            from ..report.trend_report import trends_csv

            atomic_write(out, document_text(doc) if out.lower().endswith(".json")
                         else trends_csv(trends), inputs=[db])
        if report:
            from ..report.trend_report import write_trend_report

            write_trend_report(report, trends, recs, doc, inputs=[db])
        if json_out:
            write_document(doc)
        else:
            print_trends(trends, doc, wide=wide)
    raise typer.Exit(1 if trends.flagged.any() else 0)


def _records_of(recs, names):
    """The records of the named DUTs, renumbered in that order (for the report figures)."""
    import dataclasses

    import numpy as np

    pos = {d: k for k, d in enumerate(recs.duts)}
    old = np.array([pos[d] for d in names], np.int64)
    remap = np.full(len(recs.duts), -1, np.int64)
    remap[old] = np.arange(old.size)
    new = remap[recs.dut_index]
    rows = np.flatnonzero(new >= 0)
    rows = rows[np.lexsort((recs.time[rows], new[rows]))]
    pick = rows.tolist()
    return dataclasses.replace(
        recs, duts=tuple(names), dut_index=new[rows], time=recs.time[rows],
        rth=recs.rth[rows], u_rth=recs.u_rth[rows], vth=recs.vth[rows], u_vth=recs.u_vth[rows],
        cov_vth_rth=recs.cov_vth_rth[rows], chi2=recs.chi2[rows], dof=recs.dof[rows],
        group_label=tuple(recs.group_label[k] for k in pick),
        file_name=tuple(recs.file_name[k] for k in pick),
        file_sha256=tuple(recs.file_sha256[k] for k in pick),
        u_rth_shared=recs.u_rth_shared[rows],
        instrument=tuple(recs.instrument[k] for k in pick))


def trend_document(trends, db: str, version: str, n_records: int) -> dict:
    """The JSON document of ``sagfit trend --json``."""
    flagged = trends.flagged
    codes: dict[str, int] = {}
    for fl in trends.flags:
        for f in fl:
            codes[f.code] = codes.get(f.code, 0) + 1
    return {
        "tool": "sagfit", "version": version, "database": db,
        "records": n_records, "as_of": trends.settings["as_of"],
        "settings": dict(trends.settings),
        "summary": {"duts": len(trends), "flagged": int(flagged.sum()), "flag_counts": codes},
        "results": trends.to_dicts(),
    }


def print_trends(trends, doc, *, wide: bool = False) -> None:
    """The trend table (flagged DUTs first), then the flag messages."""
    import numpy as np

    from ..core.formatting import format_estimate, format_percent, format_value
    from ..core.trend import iso_date
    from .render import Col, _console, print_table

    console = _console()
    lvl = f"{trends.confidence * 100:g} %"
    s = trends.settings
    cols = [Col("DUT", "left"), Col("n", drop=5), Col("baseline Rth", drop=4),
            Col(f"latest Rth ± U ({lvl})"), Col("change"), Col("rate per 30 d", drop=3),
            Col("projected crossing", "left", wrap=True), Col("vs group median", drop=2),
            Col("flags", "left", wrap=True, drop=1)]
    rows = []
    flagged = trends.flagged
    order = np.concatenate((np.flatnonzero(flagged), np.flatnonzero(~flagged)))
    U = trends.expanded_latest
    for i in order[:MAX_TABLE_ROWS]:
        if trends.crossed[i]:
            cross = "crossed" + (f" (trend: {iso_date(trends.crossing_time[i])})"
                                 if np.isfinite(trends.crossing_time[i]) else "")
        elif np.isfinite(trends.crossing_time[i]):
            cross = iso_date(trends.crossing_time[i])
        elif np.isfinite(trends.rate[i]):
            cross = "not within the tested trend"
        else:
            cross = "n/a"
        grp = (f"{trends.excess_pct[i]:+.0f} % of {format_value(trends.group_median[i], 'Ω')}"
               if trends.group_size[i] >= 3 else "group < 3")
        rows.append((trends.duts[i], str(int(trends.records[i])),
                     format_value(trends.baseline_rth[i], "Ω"),
                     format_estimate(trends.latest_rth[i], U[i], "Ω"),
                     format_percent(trends.change_pct[i], trends.u_change_pct[i]),
                     format_estimate(trends.rate[i], trends.u_rate[i], "Ω")
                     if np.isfinite(trends.rate[i]) else "n/a",
                     cross, grp, ", ".join(trends.codes(i))))
    print_table(console, cols, rows, wide=wide,
                title=f"Rth trends as of {s['as_of']}: baseline {s['baseline']}, threshold "
                      f"{s['threshold']}, horizon {s['horizon_days']:g} d",
                title_justify="left")
    if len(trends) > MAX_TABLE_ROWS:
        console.print(f"… {len(trends) - MAX_TABLE_ROWS} more DUTs not shown (all in --json "
                      "or --report)")
    console.print(f"{int(flagged.sum())} of {len(trends)} DUT(s) flagged. Rates are the slope "
                  "of a weighted line through the recorded Rth (± standard uncertainty).")
    console.print(f"Meter errors shared by records: {s.get('shared_errors', 'not modelled')}.",
                  markup=False)
    shown = 0
    for i in order:
        for f in trends.flags[i]:
            if f.severity != "warning" and len(trends) > 1:
                continue
            if shown >= 2 * MAX_TABLE_ROWS:
                console.print("… more flags in --json")
                return
            console.print(f"warning {trends.duts[i]} [{f.code}]: {f.message}"
                          if f.severity == "warning" else
                          f"note {trends.duts[i]} [{f.code}]: {f.message}", markup=False)
            shown += 1
    info = sum(1 for fl in trends.flags for f in fl if f.severity == "info")
    if info and len(trends) > 1:
        console.print(f"{info} note(s) (e.g. insufficient-history) in --json", markup=False)
