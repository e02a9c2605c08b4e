"""``sagfit pulses``: pulse resistance of a cell from a logged trace (IEC 61960-3 DC
resistance, HPPC pulse resistances)."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from . import app
from .common import (BenchOpt, CurrentAccOpt, JsonOpt, QuietOpt, VoltageAccOpt,
                     check_out_option, fit_settings, guarded, progress, write_document)
from .trace_cmd import (DischargeNegOpt, MinSamplesOpt, ThresholdOpt, WindowOpt,
                        _records, read_and_split, trace_progress)

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
    voltage_accuracy: VoltageAccOpt = None,
    current_accuracy: CurrentAccOpt = None,
    bench: BenchOpt = None,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Write the pulse table to this .csv or .json file.")] = None,
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
        from ..core.units import parse_quantity

        if method not in METHODS:
            raise OptionError("--method", f"{method!r}: choose one of {', '.join(METHODS)}")
        times = parse_times(at, method)
        try:
            longest = parse_quantity(max_pulse, "s", what="--max-pulse")
        except Exception:  # noqa: BLE001 - any unreadable text is an option error
            raise OptionError("--max-pulse", f"{max_pulse!r}: write e.g. '30s'") from None
        settings = fit_settings(voltage_accuracy, current_accuracy, None, bench)
        inputs = [file] + ([bench] if bench else [])
        check_out_option(out, inputs)
        with progress("reading " + file, trace_progress(file, json_out), total=3) as step:
            trace, steps = read_and_split(file, threshold, window, min_samples,
                                          discharge_negative, step)
            step("pulse resistances")
            pulses = find_pulses(trace, steps, times=times, max_duration=longest,
                                 voltage_accuracy=settings["voltage_accuracy"],
                                 current_accuracy=settings["current_accuracy"])
            warnings = pulse_warnings(pulses, method)
            cautions = pulse_cautions(peak_current=steps.current, voltages=steps.voltage)
            doc = _document(file, trace, pulses, method, warnings, cautions)
            if out:
                from ..io.outputs import atomic_write, document_text
                from ..io.trace_file import columns_csv

                atomic_write(out, document_text(doc) if out.lower().endswith(".json")
                             else columns_csv(pulses.columns()), inputs=inputs)
        if json_out:
            write_document(doc)
        else:
            _print(trace, pulses, warnings, [] if quiet else cautions)
    if len(pulses) == 0:
        raise typer.Exit(3)


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


def _document(file, trace, pulses, method, warnings, cautions) -> dict:
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
            "pulses": _records(pulses.columns())}


def _print(trace, pulses, warnings, cautions) -> None:
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
    if len(pulses) and pulses.times and pulses.times[0] == 0:
        console.print(f"ohmic: the first sample after each edge, "
                      f"{format_value(float(pulses.t_at[:, 0].max()), 's', 2)} after it at "
                      "most; faster sampling gives a lower value", markup=False)
    for w in warnings:
        console.print(f"warning: {w}", markup=False)
    for c in cautions:
        console.print(f"caution: {c}", markup=False)
