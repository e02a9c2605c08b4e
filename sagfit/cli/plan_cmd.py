"""``sagfit plan`` (choose the loads before a test) and ``sagfit simulate`` (invented runs)."""

from __future__ import annotations

import math
import re
import shlex
from typing import Annotated, Optional

import typer

from . import app
from .common import (BenchOpt, CurrentAccOpt, CurrentNoiseOpt, IndependentOpt, JsonOpt,
                     LoadTolOpt, VoltageAccOpt, VoltageNoiseOpt, WideOpt, announce_bench,
                     check_out_option, fit_settings, guarded, interactive, progress,
                     resolve_bench, write_document, write_out, write_stdout)

INVENTED_TAG = "# INVENTED DATA (sagfit simulate"


# ------------------------------------------------------------------ option parsing
def _opt_error(option: str, exc: Exception):
    from ..core.errors import OptionError

    msg = str(exc)
    if msg.startswith(option + ": "):
        msg = msg[len(option) + 2:]
    return OptionError(option, msg)


def _quantity(text: str | None, dimension: str, option: str, *, positive=True):
    if text is None:
        return None
    from ..core.errors import InputError
    from ..core.units import parse_quantity

    try:
        value = parse_quantity(text, dimension, what=option)
    except InputError as exc:
        raise _opt_error(option, exc) from None
    if not math.isfinite(value) or (positive and value <= 0):
        raise _opt_error(option, ValueError(f"{text!r} must be a finite value greater than 0"))
    return value


def _resistance(text: str, option: str, *, allow_open=True, allow_short=True) -> float:
    from ..core.units import parse_resistance

    try:
        r = parse_resistance(text)
    except ValueError as exc:
        raise _opt_error(option, exc) from None
    if math.isnan(r) or r < 0:
        raise _opt_error(option, ValueError(f"{text!r} is not a resistance ≥ 0"))
    if math.isinf(r) and not allow_open:
        raise _opt_error(option, ValueError(f"{text!r}: an open circuit is not allowed here"))
    if r == 0 and not allow_short:
        raise _opt_error(option, ValueError(f"{text!r} must be greater than 0 Ω"))
    return r


def _resistances(text: str, option: str) -> list[float]:
    items = [s.strip() for s in text.split(",")]
    if not any(items):
        raise _opt_error(option, ValueError("give a comma-separated list, e.g. 1,2.2,4k7,open"))
    out = []
    for s in items:
        if not s:
            raise _opt_error(option, ValueError(f"empty item in {text!r}"))
        out.append(_resistance(s, option))
    return out


def _percent(text: str | None, option: str, *, upper: float = 100.0) -> float | None:
    if text is None:
        return None
    from ..core.errors import InputError
    from ..core.units import parse_percent

    try:
        value = parse_percent(text, what=option)
    except InputError as exc:
        raise _opt_error(option, exc) from None
    if not (0.0 <= value < upper):
        raise _opt_error(option, ValueError(f"{text!r} must be from 0 % to below {upper:g} %"))
    return value


_TIME_UNITS = {"s": 1.0, "sec": 1.0, "ms": 1e-3, "min": 60.0, "h": 3600.0, "hr": 3600.0}


def _time(text: str, option: str) -> float:
    m = re.match(r"^\s*([+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*([a-z]*)\s*$", text)
    if not m or m.group(2) not in {"", *_TIME_UNITS}:
        raise _opt_error(option, ValueError(f"cannot read {text!r} as a time (e.g. 10s, 2min)"))
    return float(m.group(1)) * _TIME_UNITS.get(m.group(2), 1.0)


def _drift(text: str | None) -> float:
    """``'2mV/h'``, ``'-0.1 mV/s'``, ``'1e-5'`` (V/s) → V/s."""
    if text is None:
        return 0.0
    from ..core.errors import InputError
    from ..core.units import parse_quantity

    num, _, per = text.partition("/")
    try:
        value = parse_quantity(num, "V", what="--drift")
    except InputError as exc:
        raise _opt_error("--drift", exc) from None
    if per:
        per = per.strip()
        if per not in _TIME_UNITS:
            raise _opt_error("--drift", ValueError(f"{text!r}: write the rate per s, min or h, "
                                                   "e.g. '2mV/h'"))
        value /= _TIME_UNITS[per]
    if not math.isfinite(value):
        raise _opt_error("--drift", ValueError(f"{text!r} must be finite"))
    return value


def _curvature(text: str | None) -> float:
    """``'0.002'``, ``'2m'``, ``'2mV/A2'``, ``'2 mΩ/A'`` → V/A²."""
    if text is None:
        return 0.0
    from ..core.errors import InputError
    from ..core.units import parse_quantity

    s = text.strip()
    for suffix in ("V/A²", "V/A^2", "V/A2", "ohm/A", "Ω/A", "Ω/A"):
        if s.endswith(suffix):
            s = s[: -len(suffix)] + "V"
            break
    try:
        value = parse_quantity(s, "V", what="--curvature")
    except InputError:
        raise _opt_error("--curvature", ValueError(
            f"cannot read {text!r}; give the quadratic sag in V/A², e.g. '2mV/A2' or 0.002"))
    if not math.isfinite(value) or value < 0:
        raise _opt_error("--curvature", ValueError(f"{text!r} must be ≥ 0 (a sag)"))
    return value


# ------------------------------------------------------------------ simulate
@app.command("simulate")
def simulate_command(
    vth: Annotated[str, typer.Option("--vth", help="Open-circuit voltage, e.g. 12.6V.")],
    rth: Annotated[str, typer.Option("--rth", help="Internal resistance, e.g. 50mohm or R05.")],
    loads: Annotated[str, typer.Option(
        "--loads", help="Loads in reading order, e.g. 'open,10,4.7,2.2,1'.")],
    out: Annotated[str, typer.Option("--out", help="Readings CSV to write ('-' for standard "
                                                   "output; input format of "
                                                   "'sagfit fit').")],
    duts: Annotated[int, typer.Option("--duts", help="Number of DUTs.")] = 1,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Random seed (same seed, same file).")] = 1,
    voltage_accuracy: VoltageAccOpt = None,
    current_accuracy: CurrentAccOpt = None,
    load_tolerance: LoadTolOpt = None,
    measure_current: Annotated[bool, typer.Option(
        "--measure-current", help="Also read the current with an ammeter.")] = False,
    knee: Annotated[Optional[str], typer.Option(
        "--knee", help="Current limit of the source, e.g. 5A.")] = None,
    curvature: Annotated[Optional[str], typer.Option(
        "--curvature",
        help="Quadratic sag c in V = Vth − Rth·I − c·I², e.g. 2mV/A2.")] = None,
    drift: Annotated[Optional[str], typer.Option(
        "--drift", help="Drift of Vth during each DUT's test, e.g. 5mV/h.")] = None,
    vth_spread: Annotated[Optional[str], typer.Option(
        "--vth-spread", help="Spread of Vth across DUTs (relative SD), e.g. 0.5%.")] = None,
    rth_spread: Annotated[Optional[str], typer.Option(
        "--rth-spread", help="Spread of Rth across DUTs (relative SD), e.g. 10%.")] = None,
    interval: Annotated[str, typer.Option(
        "--interval", help="Time between readings, e.g. 10s.")] = "10s",
    prefix: Annotated[str, typer.Option("--prefix", help="DUT name prefix.")] = "SIM-",
    per_dut_loads: Annotated[bool, typer.Option(
        "--per-dut-loads", help="Draw the resistor errors per DUT instead of once per "
                                "resistor.")] = False,
    distribution: Annotated[str, typer.Option(
        "--distribution", help="Distribution of the meter errors: rectangular (uniform) or "
                               "normal, as design's --distribution.")] = "rectangular",
    # the name before --distribution, kept working but not shown
    errors_old: Annotated[Optional[str], typer.Option("--errors", hidden=True)] = None,
    truth: Annotated[Optional[str], typer.Option(
        "--truth", help="Also write the true Vth and Rth of each DUT to this CSV.")] = None,
) -> None:
    """Write invented bench readings (labelled as such) for demos, tests and benchmarks."""
    with guarded(out):
        from ..core.errors import InputError, OptionError
        from ..io.outputs import atomic_write, check_output_path
        from ..core.simulate import run_csv_text, simulate

        v = _quantity(vth, "V", "--vth")
        r = _resistance(rth, "--rth", allow_open=False, allow_short=False)
        load_list = _resistances(loads, "--loads")
        settings = fit_settings(voltage_accuracy, current_accuracy, load_tolerance)
        if settings["current_accuracy"] is not None and not measure_current:
            raise OptionError("--current-accuracy", "is used only with --measure-current")
        if 0.0 in load_list and not measure_current:
            raise OptionError("--loads", "a short (0 Ω) needs --measure-current: the voltage "
                                         "alone gives no current")
        if duts < 1:
            raise OptionError("--duts", f"must be at least 1 (got {duts})")
        d_name = "--errors" if errors_old is not None else "--distribution"
        errors = errors_old if errors_old is not None else distribution
        errors = {"uniform": "rectangular"}.get(errors, errors)
        if errors not in ("rectangular", "normal"):
            raise OptionError(d_name, f"use rectangular (uniform) or normal (got {errors!r})")
        spread_v = (_percent(vth_spread, "--vth-spread") or 0.0) / 100.0
        spread_r = (_percent(rth_spread, "--rth-spread") or 0.0) / 100.0
        interval_s = _time(interval, "--interval")
        if interval_s < 0:
            raise OptionError("--interval", "must not be negative")
        to_stdout = out == "-"  # as in every Unix tool: '-' is standard output
        if not to_stdout:
            check_output_path(out)
            _refuse_real_file(out)
        if truth is not None:
            check_output_path(truth, [] if to_stdout else [out], option="--truth")
            _refuse_real_file(truth, option="--truth")
        with progress(f"simulating {duts} DUT(s)", interactive() and duts >= 1000) as say:
            try:
                run = simulate(
                    v, r, load_list, duts=duts, seed=seed,
                    voltage_accuracy=settings["voltage_accuracy"],
                    current_accuracy=settings["current_accuracy"],
                    load_tolerance=settings["load_tolerance"], measure_current=measure_current,
                    vth_spread=spread_v, rth_spread=spread_r,
                    knee_current=_quantity(knee, "A", "--knee"), curvature=_curvature(curvature),
                    drift=_drift(drift), interval_s=interval_s, dut_prefix=prefix,
                    per_dut_loads=per_dut_loads, error_distribution=errors)
            except OptionError:
                raise
            except InputError as exc:
                head, _, rest = str(exc).partition(": ")
                raise OptionError(_SIM_OPTIONS.get(head, "--" + head.replace("_", "-")),
                                  rest) from None
            comments = _simulate_comments(_reproducing_argv(
                vth=vth, rth=rth, loads=loads, duts=duts, seed=seed,
                voltage_accuracy=voltage_accuracy, current_accuracy=current_accuracy,
                load_tolerance=load_tolerance, measure_current=measure_current, knee=knee,
                curvature=curvature, drift=drift, vth_spread=vth_spread, rth_spread=rth_spread,
                interval=interval, prefix=prefix, per_dut_loads=per_dut_loads,
                distribution=errors,
                out=out), run)
            if to_stdout:
                write_stdout(run_csv_text(run, comments))
            else:
                say(f"writing {out}")
                atomic_write(out, run_csv_text(run, comments))
            if truth is not None:
                atomic_write(truth, _truth_csv(run, comments),
                             inputs=[] if to_stdout else [out], option="--truth")
    if to_stdout:
        return  # standard output carries the readings only, ready for a pipe
    limited = int(run.limited.sum())
    write_stdout(f"wrote {len(run)} invented readings of {len(run.duts)} DUT(s) to {out} "
                 f"(seed {seed})" + (f"; {limited} reading(s) in current limit" if limited
                                     else "") + "\n")


_SIM_OPTIONS = {"vth_spread": "--vth-spread", "rth_spread": "--rth-spread",
                "knee_current": "--knee", "dut_prefix": "--prefix", "interval_s": "--interval",
                "error_distribution": "--distribution", "load_tolerance": "--load-tolerance"}


def _reproducing_argv(**opts) -> list[str]:
    """The command line that reproduces a simulated file, options in a fixed order."""
    parts = ["sagfit", "simulate"]
    for key, value in opts.items():
        if key in ("out", "truth") or value is None or value is False:
            continue
        flag = "--" + key.replace("_", "-")
        if value is True:
            parts.append(flag)
        elif key == "interval" and value == "10s" or key == "prefix" and value == "SIM-" \
                or key == "distribution" and value == "rectangular":
            continue
        else:
            parts += [flag, " ".join(str(value).split())]
    return parts


def _simulate_comments(argv: list[str], run) -> list[str]:
    line = " ".join(shlex.quote(a) for a in argv)
    return [
        f"INVENTED DATA ({line})",
        "Simulated bench readings, not measurements of any real source.",
        f"seed: {run.settings['seed']}; DUTs: {len(run.duts)}; true Vth and Rth are drawn "
        "per DUT as the options say (see docs/plan.md)",
    ]


def _truth_csv(run, comments) -> str:
    """The true parameters of each simulated DUT, labelled like the readings."""
    lines = ["# " + c for c in comments] + ["dut,vth_V,rth_ohm"]
    lines += [f"{d},{v:.12g},{r:.12g}" for d, v, r in zip(run.duts, run.vth.tolist(),
                                                            run.rth.tolist())]
    return "\n".join(lines) + "\n"


def _refuse_real_file(out: str, option: str = "--out") -> None:
    """Never overwrite a file that is not itself a simulation (it may be real readings)."""
    import os

    from ..core.errors import OptionError

    if not os.path.exists(out):
        return
    try:
        with open(out, "rb") as fh:
            head = fh.read(len(INVENTED_TAG) + 3)
    except OSError as exc:
        raise OptionError(option, f"{out}: {exc.strerror or exc}") from None
    if not head.lstrip(b"\xef\xbb\xbf").startswith(INVENTED_TAG.encode()):
        raise OptionError(option, f"{out} exists and is not a file written by 'sagfit "
                                   "simulate'; refusing to overwrite what may be real "
                                   "readings (choose another name or delete it first)")


# ------------------------------------------------------------------ plan
@app.command("plan")
def plan_command(
    voltage: Annotated[Optional[str], typer.Option(
        "--vth", help="Expected open-circuit voltage Vth, e.g. 12.6V.  [required]")] = None,
    resistance: Annotated[Optional[str], typer.Option(
        "--rth", help="Expected internal resistance Rth, e.g. 50mohm.  [required]")] = None,
    # the names before --vth/--rth (as 'simulate' has them), kept working but not shown
    voltage_old: Annotated[Optional[str], typer.Option("--voltage", hidden=True)] = None,
    resistance_old: Annotated[Optional[str], typer.Option("--resistance", hidden=True)] = None,
    max_current: Annotated[Optional[str], typer.Option(
        "--max-current", help="The source's safe current, e.g. 10A.")] = None,
    max_power: Annotated[Optional[str], typer.Option(
        "--max-power", help="Power rating of each load resistor, e.g. 25W.")] = None,
    series: Annotated[str, typer.Option(
        "--series", help="Resistor series (IEC 60063): E6, E12, E24, E48, E96, E192.")] = "E12",
    points: Annotated[int, typer.Option(
        "--points", help="Readings including the open circuit (3–30).")] = 6,
    voltage_accuracy: VoltageAccOpt = None,
    current_accuracy: CurrentAccOpt = None,
    load_tolerance: LoadTolOpt = None,
    voltage_noise: VoltageNoiseOpt = None,
    current_noise: CurrentNoiseOpt = None,
    independent_errors: IndependentOpt = False,
    bench: BenchOpt = None,
    have: Annotated[Optional[str], typer.Option(
        "--have", help="Your own resistors instead of a series, e.g. '1,2.2,4.7,10'.")] = None,
    derating: Annotated[str, typer.Option(
        "--derating", help="Margin below each resistor's rating.")] = "50%",
    battery: Annotated[bool, typer.Option(
        "--battery/--no-battery", help="The source is a battery (no short-circuit step); "
                                       "--no-battery for a current-limited supply.")] = True,
    json_out: JsonOpt = False,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Also write the plan to this .csv (one row per step) or .json "
                      "file.")] = None,
    wide: WideOpt = False,
) -> None:
    """Propose loads for a load test: expected readings, dissipation, and the predicted
    uncertainties of Vth and Rth, with the usual cautions."""
    with guarded("plan"):
        from ..core.errors import OptionError
        from ..core.planning import plan

        v_name = "--vth" if voltage is not None or voltage_old is None else "--voltage"
        r_name = "--rth" if resistance is not None or resistance_old is None else "--resistance"
        voltage = voltage if voltage is not None else voltage_old
        resistance = resistance if resistance is not None else resistance_old
        for value, name, example in ((voltage, "--vth", "12.6V"),
                                     (resistance, "--rth", "50mohm")):
            if value is None:
                raise OptionError(name, f"is required (the expected value, e.g. {example})")

        bench, bench_source = resolve_bench(bench)
        check_out_option(out, [bench] if bench else [])
        settings = fit_settings(voltage_accuracy, current_accuracy, load_tolerance, bench,
                                voltage_noise=voltage_noise, current_noise=current_noise,
                                independent_errors=independent_errors,
                                bench_source=bench_source)
        announce_bench(settings, json_out)
        from ..core.errors import InputError

        try:
            result = plan(
                _quantity(voltage, "V", v_name),
                _resistance(resistance, r_name, allow_open=False, allow_short=False),
                max_current=_quantity(max_current, "A", "--max-current"),
                max_power=_quantity(max_power, "W", "--max-power"),
                series=_series(series), points=_points(points),
                voltage_accuracy=settings["voltage_accuracy"],
                current_accuracy=settings["current_accuracy"],
                load_tolerance=settings["load_tolerance"],
                have=None if have is None else _resistances(have, "--have"),
                derating=_percent(derating, "--derating"), battery=battery)
        except InputError as exc:
            from ..core.errors import OptionError

            if isinstance(exc, OptionError):
                raise
            raise _plan_option_error(exc, v_name, r_name) from None
        from .. import __version__

        doc = {"tool": "sagfit", "version": __version__, **result.to_dict()}
        if out:
            import numpy as np

            write_out(out, doc, {
                "step": np.arange(1, len(result.labels) + 1), "load": list(result.labels),
                "load_ohm": np.asarray(result.load, float),
                "current_A": np.asarray(result.current, float),
                "voltage_V": np.asarray(result.voltage, float),
                "power_W": np.asarray(result.power, float),
                "source_power_W": np.asarray(result.source_power, float)},
                [bench] if bench else [])
        if json_out:
            write_document(doc)
        else:
            _print_plan(result, wide)


def _series(text: str) -> str:
    from ..core.eseries import series_name
    from ..core.errors import InputError

    try:
        return series_name(text)
    except InputError as exc:
        raise _opt_error("--series", exc) from None


def _points(n: int) -> int:
    from ..core.planning import MAX_POINTS, MIN_POINTS

    if not MIN_POINTS <= n <= MAX_POINTS:
        raise _opt_error("--points", ValueError(
            f"must be from {MIN_POINTS} to {MAX_POINTS} (got {n}); the open circuit counts "
            "as one"))
    return n


def _plan_option_error(exc, v_name: str = "--vth", r_name: str = "--rth"):
    """A planning refusal: name the option when the message names a parameter."""
    from ..core.errors import InputError, OptionError

    msg = str(exc)
    head, _, rest = msg.partition(": ")
    opt = {"have": "--have", "derating": "--derating", "load_tolerance": "--load-tolerance",
           "voltage": v_name, "resistance": r_name}.get(head)
    if opt:
        return OptionError(opt, rest)
    return InputError("plan refused: " + msg)


def _print_plan(p, wide: bool = False) -> None:
    from ..core.formatting import format_value
    from .render import Col, _console, print_table

    console = _console()
    cols = [Col("step", "left", drop=2), Col("load", "left"), Col("current"), Col("voltage"),
            Col("in resistor"), Col("in source", drop=1)]
    rows = [(str(k), lab, format_value(i, "A", 3), format_value(v, "V", 5),
             format_value(pw, "W", 3), format_value(ps, "W", 3))
            for k, (lab, i, v, pw, ps) in enumerate(zip(p.labels, p.current, p.voltage,
                                                        p.power, p.source_power), start=1)]
    print_table(console, cols, rows, wide=wide,
                title=f"Load plan for Vth ≈ {format_value(p.vth, 'V', 4)}, "
                      f"Rth ≈ {format_value(p.rth, 'Ω', 3)}", title_justify="left")
    lim = f"limits: current ≤ {format_value(p.current_limit, 'A', 3)}"
    if math.isfinite(p.power_limit):
        lim += f", ≤ {format_value(p.power_limit, 'W', 3)} in each resistor (after derating)"
    console.print(lim, markup=False)
    if math.isfinite(p.u_rth):
        console.print(f"predicted standard uncertainties: u(Vth) = "
                      f"{format_value(p.u_vth, 'V', 2)}, u(Rth) = {format_value(p.u_rth, 'Ω', 2)} "
                      f"({p.u_rth / p.rth:.1%} of Rth)", markup=False)
    else:
        console.print("predicted standard uncertainties: not available (see the warnings)",
                      markup=False)
    for w in p.warnings:
        console.print(f"warning: {w}", markup=False)
    for n in p.notes:
        console.print(f"note: {n}", markup=False)
    for c in p.cautions:
        console.print(f"caution: {c}", markup=False)
