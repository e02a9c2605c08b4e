"""``sagfit pulses``: pulse resistance of a cell from a logged trace (IEC 61960-3 DC
resistance, HPPC pulse resistances)."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from . import app
from .common import (BenchOpt, ConfidenceOpt, CurrentAccOpt, JsonOpt, QuietOpt, VoltageAccOpt,
                     announce_bench, check_out_option, fit_settings, guarded, progress,
                     resolve_bench, show_progress, write_document)
from .trace_cmd import (DischargeNegOpt, MinSamplesOpt, ThresholdOpt, WindowOpt,
                        _records, read_and_split)

METHODS = ("hppc", "iec")


def parse_times(text: str | None, method: str) -> tuple[float, ...]:
    """``--at '0,1s,10s'`` → seconds; ``ohmic`` or 0 is the first sample after the edge."""
    from ..core.errors import InputError, OptionError
    from ..core.pulse import METHOD_TIMES
    from ..core.units import parse_quantity

    if text is None:
        return METHOD_TIMES[method]
    out = []
    for part in (p.strip() for p in text.split(",")):
        if not part:
            continue
        if part.lower() in ("ohmic", "0"):
            out.append(0.0)
            continue
        try:
            value = parse_quantity(part, "s", what="--at")
        except InputError as exc:
            raise OptionError("--at", str(exc).split(": ", 1)[-1]) from None
        if not value > 0:
            raise OptionError("--at", f"{part!r}: a time into the pulse must be positive")
        out.append(value)
    if not out:
        raise OptionError("--at", "give at least one time, e.g. 'ohmic,1s,10s'")
    return tuple(sorted(set(out)))


@app.command("pulses")
def pulses_command(
    file: Annotated[str, typer.Argument(help="Logged trace with current pulses, CSV or "
                                             "Parquet (docs/traces.md).")],
    method: Annotated[str, typer.Option(
        "--method", help="hppc: R at the first sample (ohmic), 1 s and 10 s into each pulse "
                         "(FreedomCAR/USABC HPPC); iec: R_dc at 1 s of the high-current "
                         "step after the low one (IEC 61960-3).")] = "hppc",
    at: Annotated[Optional[str], typer.Option(
        "--at", help="Other times into each pulse, e.g. 'ohmic,0.1s,2s,10s'.")] = None,
    max_pulse: Annotated[str, typer.Option(
        "--max-pulse", help="Longest step counted as a pulse.")] = "30s",
    threshold: ThresholdOpt = None,
    window: WindowOpt = None,
    min_samples: MinSamplesOpt = 5,
    discharge_negative: DischargeNegOpt = False,
    rc: Annotated[str, typer.Option(
        "--rc", help="Fit R0 + RC branches to each pulse and its relaxation: auto (one or "
                     "two, by BIC), 1, 2 or none.")] = "auto",
    relax: Annotated[str, typer.Option(
        "--relax", help="Longest stretch of the relaxation after a pulse used in the fit.")]
        = "120s",
    confidence: ConfidenceOpt = None,
    voltage_accuracy: VoltageAccOpt = None,
    current_accuracy: CurrentAccOpt = None,
    bench: BenchOpt = None,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Write the pulse table to this .csv or .json file.")] = None,
    report: Annotated[Optional[str], typer.Option(
        "--report", help="Write an HTML report into this folder: the trace with its steps, "
                         "each pulse's response with the fitted model and residuals.")]
        = None,
    json_out: JsonOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Resistance of each current pulse in a trace, ΔU/ΔI from the sample before the edge
    to stated times into the pulse, with uncertainties (meter offsets cancel, gains do
    not)."""
    with guarded(file):
        from ..core.errors import OptionError
        from ..core.pulse import find_pulses
        from ..core.safety import pulse_cautions

        if method not in METHODS:
            raise OptionError("--method", f"{method!r}: choose one of {', '.join(METHODS)}")
        if rc not in ("auto", "1", "2", "none"):
            raise OptionError("--rc", f"{rc!r}: choose auto, 1, 2 or none")
        times = parse_times(at, method)
        longest = _seconds(max_pulse, "--max-pulse")
        relax_s = _seconds(relax, "--relax")
        bench, bench_source = resolve_bench(bench)  # --bench none, $SAGFIT_BENCH, default
        settings = fit_settings(voltage_accuracy, current_accuracy, None, bench, confidence,
                                bench_source=bench_source)
        announce_bench(settings, json_out)
        inputs = [file] + ([bench] if bench else [])
        check_out_option(out, inputs, formats=(".csv", ".json"))
        with progress("reading " + file, show_progress(file, json_out), total=3) as step:
            trace, steps = read_and_split(file, threshold, window, min_samples,
                                          discharge_negative, step)
            step("pulse resistances")
            pulses = find_pulses(trace, steps, times=times, max_duration=longest,
                                 voltage_accuracy=settings["voltage_accuracy"],
                                 current_accuracy=settings["current_accuracy"])
            models = []
            if rc != "none" and len(pulses):
                from ..core.rc_model import fit_pulses

                step(f"fitting the RC equivalent of {len(pulses)} pulse(s)")
                models = fit_pulses(trace, steps, pulses, branches=rc,
                                    level=settings["confidence"], relax=relax_s)
            warnings = pulse_warnings(pulses, method) + model_warnings(models)
            cautions = pulse_cautions(peak_current=steps.current, voltages=steps.voltage)
            doc = _document(file, trace, pulses, method, warnings, cautions, models)
            if out:
                from ..io.outputs import atomic_write, document_text
                from ..io.trace_file import columns_csv

                atomic_write(out, document_text(doc) if out.lower().endswith(".json")
                             else columns_csv(_columns(pulses, models)), inputs=inputs)
            if report:
                from ..report.trace_report import write_trace_report

                write_trace_report(report, trace, steps, pulses=pulses, models=models,
                                   doc=doc, cautions=cautions, inputs=inputs)
        if json_out:
            write_document(doc)
        else:
            _print(trace, pulses, warnings, [] if quiet else cautions, models)
    if len(pulses) == 0:
        raise typer.Exit(3)


def _seconds(text: str, option: str) -> float:
    from ..core.errors import InputError, OptionError
    from ..core.units import parse_quantity

    try:
        value = parse_quantity(text, "s", what=option)
    except InputError:
        raise OptionError(option, f"{text!r}: write a time, e.g. '30s'") from None
    if not value > 0:
        raise OptionError(option, f"{text!r} must be positive")
    return value


def _columns(pulses, models) -> dict:
    from ..core.rc_model import model_columns

    return {**pulses.columns(), **(model_columns(models) if models else {})}


def model_warnings(models) -> list[str]:
    """The RC fits' warnings, one line per kind with the pulses it concerns."""
    by_text: dict[str, list[int]] = {}
    for j, m in enumerate(models):
        for w in m.warnings + ((m.error,) if m.error else ()):
            key = w.split(":", 1)[-1].strip() if w.startswith(("sampling", "pulse of")) else w
            seen = by_text.setdefault(key if len(by_text) < 50 else w, [])
            if not seen or seen[-1] != j + 1:
                seen.append(j + 1)
    return [f"RC fit, pulse(s) {_list(k)}: {w}" for w, k in by_text.items()]


def pulse_warnings(pulses, method: str) -> list[str]:
    """Where a pulse departs from its method's stated test, or a value is missing."""
    import numpy as np

    out = []
    if len(pulses) == 0:
        out.append("no pulse found: no step of at most --max-pulse that follows a longer "
                   "step at another current")
        return out
    miss = np.flatnonzero(np.isnan(pulses.resistance).any(axis=1)) + 1
    if miss.size:
        out.append(f"pulse(s) {_list(miss)}: shorter than a stated time; that value is "
                   "left empty")
    if method == "iec":
        # a base below 5 % of the pulse current is a rest, not the standard's 0.2 It step
        bad = np.flatnonzero((pulses.kind != "discharge")
                             | (pulses.i_before < 0.05 * pulses.i_pulse)) + 1
        if bad.size:
            out.append(f"pulse(s) {_list(bad)}: IEC 61960-3 steps from a lower to a higher "
                       "discharge current (0.2 It, then 1 It); these are not such steps")
    return out


def _list(k) -> str:
    return ", ".join(str(x) for x in k[:10]) + (", …" if len(k) > 10 else "")


def _document(file, trace, pulses, method, warnings, cautions, models=()) -> dict:
    from .. import __version__

    return {"tool": "sagfit", "version": __version__,
            "input": {"file": file, "rows": len(trace), "channels": list(trace.channels)},
            "method": method, "times_s": list(pulses.times),
            "uncertainty": "standard uncertainties (k = 1); meter offsets cancel in ΔU and "
                           "ΔI, gains do not; u_uncorrelated: had the offsets not "
                           "cancelled",
            "charge_from_start": "Ah delivered since the start of the trace, counted from "
                                 "the current (not a state of charge)",
            "warnings": warnings, "cautions": cautions,
            "pulses": [{**rec, "model": models[j].as_record() if models else None}
                       for j, rec in enumerate(_records(pulses.columns()))]}


def _print(trace, pulses, warnings, cautions, models=()) -> None:
    from rich.table import Table

    from ..core.formatting import format_estimate, format_value
    from .render import _console

    console = _console()
    t = Table(title=f"{trace.source}: {len(pulses)} pulse(s)", title_justify="left",
              show_edge=False)
    for col in ("pulse", "channel", "kind", "edge", "ΔI", "Ah from start"):
        t.add_column(col, justify="left" if col in ("channel", "kind") else "right")
    for s in pulses.times:
        t.add_column("R ohmic" if s == 0 else f"R {s:g} s", justify="right")

    cols = pulses.columns()
    n = len(pulses)
    shown = range(n) if n <= 40 else list(range(20)) + list(range(n - 20, n))
    for k in shown:
        row = [str(k + 1), str(cols["channel"][k]), str(pulses.kind[k]),
               format_value(pulses.t_edge[k], "s", 5),
               format_value(pulses.i_pulse[k] - pulses.i_before[k], "A", 3),
               format_value(pulses.charge_ah[k], "Ah", 3)]
        for j in range(len(pulses.times)):
            r = pulses.resistance[k, j]
            row.append("—" if r != r else format_estimate(r, pulses.u_resistance[k, j], "Ω"))
        t.add_row(*row)
    console.print(t)
    if models:
        _print_models(console, pulses, models, shown)
    if len(pulses) and pulses.times and pulses.times[0] == 0:
        console.print(f"ohmic: the first sample after each edge, "
                      f"{format_value(float(pulses.t_at[:, 0].max()), 's', 2)} after it at "
                      "most; faster sampling gives a lower value", markup=False)
    for w in warnings:
        console.print(f"warning: {w}", markup=False)
    for c in cautions:
        console.print(f"caution: {c}", markup=False)


def _print_models(console, pulses, models, shown) -> None:
    from rich.table import Table

    from ..core.formatting import format_estimate, format_value

    two = any(m.branches == 2 for m in models)
    t = Table(title=f"dynamic equivalent R0 + RC branches ({models[0].level * 100:g} % "
                    "intervals in --json)", title_justify="left", show_edge=False)
    heads = ["pulse", "branches", "R0", "R1", "τ1"] + (["R2", "τ2"] if two else []) + ["rms"]
    for h in heads:
        t.add_column(h, justify="right")
    names = [("r0", "Ω"), ("r1", "Ω"), ("tau1", "s")] + ([("r2", "Ω"), ("tau2", "s")]
                                                         if two else [])
    for k in shown:
        m = models[k]
        row = [str(k + 1), str(m.branches) if m.branches else "failed"]
        for name, unit in names:
            row.append(format_estimate(m[name], m.u_of(name), unit)
                       if m.branches and name in m.names else "—")
        row.append(format_value(m.rms, "V", 2) if m.branches else "—")
        t.add_row(*row)
    console.print(t)


@app.command("respond")
def respond_command(
    model: Annotated[str, typer.Argument(help="The pulses document (`sagfit pulses --out "
                                              "x.json` or --json) holding fitted models.")],
    profile: Annotated[str, typer.Argument(help="Current profile, CSV or Parquet: time and "
                                                "current (each current holds until the "
                                                "next row).")],
    pulse: Annotated[Optional[int], typer.Option(
        "--pulse", help="Which pulse's model [default: the first with a fit].")] = None,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Write time, current and predicted voltage to this .csv file.")]
        = None,
    json_out: JsonOpt = False,
) -> None:
    """Terminal voltage for a current profile, from a fitted R0 + RC model (open-circuit
    voltage held at the pulse's; no change of state of charge)."""
    with guarded(model):
        import json

        import numpy as np

        from ..core.errors import OptionError, ReadingsFileError
        from ..core.rc_model import RCFit, predict_voltage
        from ..io.trace_file import columns_csv, read_profile

        check_out_option(out, [model, profile], formats=(".csv",))
        try:
            with open(model, encoding="utf-8") as fh:
                doc = json.load(fh)
            recs = [p.get("model") for p in doc["pulses"]]
        except FileNotFoundError:
            raise ReadingsFileError(model, "no such file") from None
        except (ValueError, KeyError, TypeError, AttributeError):
            raise ReadingsFileError(model, "not a pulses document (write one with `sagfit "
                                           "pulses TRACE --out pulses.json`)") from None
        usable = [j for j, r in enumerate(recs) if r and r.get("branches")]
        if not usable:
            raise ReadingsFileError(model, "no pulse with a fitted model (run `sagfit pulses` "
                                           "with --rc auto, 1 or 2)")
        j = usable[0] if pulse is None else pulse - 1
        if j not in usable:
            raise OptionError("--pulse", f"{pulse}: pulses with a model: "
                                         f"{_list([k + 1 for k in usable])}")
        fit = RCFit.from_record(recs[j])
        t, i = read_profile(profile)
        v = predict_voltage(fit, t, i)
        cols = {"time_s": t, "current_A": i, "voltage_V": v}
        if out:
            from ..io.outputs import atomic_write

            atomic_write(out, columns_csv(cols), inputs=[model, profile])
        if json_out:
            write_document({"tool": "sagfit", "model": model, "pulse": j + 1,
                            "profile": profile, "ocv_V": fit.ocv,
                            "rows": _records(cols)})
            return
        from .render import _console
        from ..core.formatting import format_value

        console = _console()
        console.print(f"pulse {j + 1} model ({fit.branches} RC branch(es), OCV "
                      f"{format_value(fit.ocv, 'V', 5)}) on {profile}: {t.size} rows, voltage "
                      f"{format_value(float(np.min(v)), 'V', 5)} to "
                      f"{format_value(float(np.max(v)), 'V', 5)}"
                      + (f"; written to {out}" if out else " (--out to write it)"),
                      markup=False)
