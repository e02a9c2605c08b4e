"""``sagfit predict``: the operating point of a fitted source at other loads."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from . import app
from .common import (ConfidenceOpt, DutOpt, JsonOpt, WideOpt, check_out_option, guarded,
                     write_document, write_out)


@app.command("predict")
def predict_command(
    results: Annotated[str, typer.Argument(
        help="A saved fit: the JSON of `sagfit fit --json` or `sagfit fit --out x.json`.")],
    load: Annotated[Optional[str], typer.Option(
        "--load", help="Load resistances, comma-separated: 3.3,4k7,470R,1M5,open.")] = None,
    current: Annotated[Optional[str], typer.Option(
        "--current", help="Set load currents, comma-separated: 0.5,1A,250mA.")] = None,
    dut: DutOpt = None,
    confidence: ConfidenceOpt = None,
    json_out: JsonOpt = False,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Also write the predictions to this .csv or .json file.")] = None,
    wide: WideOpt = False,
) -> None:
    """Terminal voltage, current and power of each fitted source at other loads, each
    with a confidence interval for the mean and, for the voltage, a prediction interval
    for one new reading."""
    with guarded(results):
        from ..core.errors import OptionError
        from ..core.predict import models_from_document, predict

        loads = _parse_list(load, "--load", _resistance)
        currents = _parse_list(current, "--current", _current)
        if not loads and not currents:
            raise OptionError("--load", "give at least one load (e.g. --load 3.3,4.7,10) or "
                                        "a current (--current 0.5,1)")
        check_out_option(out, [results])
        doc = _read_document(results)
        names = [d.strip() for d in dut.split(",") if d.strip()] if dut else None
        models = models_from_document(doc, results, names)
        preds = predict(models, loads=loads, currents=currents, confidence=confidence)
        warnings, cautions = _warnings_and_cautions(preds, models)
        document = {"tool": "sagfit", "source": results,
                    "predictions": [p.to_dict() for p in preds],
                    "warnings": warnings, "cautions": cautions}
        if out:
            write_out(out, document, _prediction_columns(preds), [results])
        if json_out:
            write_document(document)
        else:
            _print(preds, models, wide)
            from .render import _console

            console = _console()
            for w in warnings:
                console.print(f"warning: {w}", markup=False)
            for c in cautions:
                console.print(f"caution: {c}", markup=False)


def _prediction_columns(preds) -> dict:
    """One CSV row per prediction (SI units; an open circuit has an empty load_ohm)."""
    import numpy as np

    def arr(get):
        return np.array([get(p) for p in preds], dtype=float)

    nan2 = (np.nan, np.nan)
    return {
        "dut": [p.dut for p in preds], "given": [p.given for p in preds],
        "load_ohm": arr(lambda p: p.load_ohm),
        "current_A": arr(lambda p: p.current.value), "current_u": arr(lambda p: p.current.u),
        "voltage_V": arr(lambda p: p.voltage.value), "voltage_u": arr(lambda p: p.voltage.u),
        "voltage_ci_low": arr(lambda p: p.voltage.ci[0]),
        "voltage_ci_high": arr(lambda p: p.voltage.ci[1]),
        "voltage_pi_low": arr(lambda p: (p.voltage.pi or nan2)[0]),
        "voltage_pi_high": arr(lambda p: (p.voltage.pi or nan2)[1]),
        "power_W": arr(lambda p: p.power.value), "power_u": arr(lambda p: p.power.u),
        "confidence": arr(lambda p: p.level),
        "extrapolated": ["yes" if p.extrapolated else "no" for p in preds],
    }


def _warnings_and_cautions(preds, models) -> tuple[list[str], list[str]]:
    """Operating points no passive load reaches, and the usual safety cautions."""
    from ..core.formatting import format_value
    from ..core.safety import cautions

    warnings = []
    for p in preds:
        if p.voltage.value < 0:
            warnings.append(
                f"{p.dut}: at {format_value(p.current.value, 'A')} the terminal voltage would "
                "be negative: beyond the short-circuit current no passive load draws this; "
                "the source would have to be driven by another supply")
    # dissipation in the predicted load: V·I at the operating point
    load_power = [p.voltage.value * p.current.value for p in preds
                  if p.voltage.value > 0 and p.current.value > 0]
    text = cautions(vth=[m.vth for m in models],
                    isc=[p.current.value for p in preds if p.load_ohm == 0] +
                        [m.vth / m.rth for m in models if m.rth > 0],
                    reading_power=load_power)
    return warnings, text


def _resistance(text: str) -> float:
    from ..core.units import parse_resistance

    return parse_resistance(text)


def _current(text: str) -> float:
    from ..core.units import parse_quantity

    return parse_quantity(text, "A", what="current")


def _parse_list(text, option, parse):
    from ..core.errors import InputError, OptionError

    if text is None:
        return []
    out = []
    for part in text.split(","):
        if not part.strip():
            raise OptionError(option, f"{text!r}: empty item in the list")
        try:
            value = parse(part.strip())
        except (ValueError, InputError) as exc:
            raise OptionError(option, str(exc).split(": ", 1)[-1]) from None
        if option == "--load" and value < 0:
            raise OptionError(option, f"{part.strip()!r}: a load resistance must be ≥ 0 Ω")
        out.append(value)
    return out


def _read_document(path: str):
    import json

    from ..core.errors import InputError

    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except IsADirectoryError:
        raise InputError(f"{path}: is a folder, not a results file") from None
    try:
        return json.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise InputError(f"{path}: not a text file (expected the JSON of `sagfit fit --json`)") \
            from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}, line {exc.lineno}, column {exc.colno}: not valid JSON "
                         f"({exc.msg}); expected the output of `sagfit fit --json`") from None


def _print(preds, models, wide: bool = False) -> None:
    from ..core.formatting import format_estimate, format_interval, format_value
    from .render import Col, _console, print_table

    console = _console()
    by_dut: dict[str, list] = {}
    for p in preds:
        by_dut.setdefault(p.dut, []).append(p)
    for dut, rows in by_dut.items():
        lvl = f"{rows[0].level * 100:g} %"
        same = any(p.voltage.pi_same is not None for p in rows)
        cols = [Col("load"), Col("current", drop=3), Col("voltage"),
                Col("V interval (true value)", drop=1), Col("V interval (one reading)")]
        if same:
            cols.append(Col("V interval (same meter)", drop=4))
        cols.append(Col("power", drop=2))
        cells = []
        for p in rows:
            load = "open" if p.load_ohm == float("inf") else format_value(p.load_ohm, "Ω")
            if p.given == "current":
                load = f"≈ {load}"
            if p.extrapolated:
                load += " *"
            v = p.voltage
            row = [load, format_estimate(p.current.value, p.current.u, "A"),
                   format_estimate(v.value, v.u, "V"),
                   format_interval(v.ci[0], v.ci[1], "V", v.u, v.value),
                   format_interval(v.pi[0], v.pi[1], "V", v.u_pi, v.value) if v.pi else "n/a"]
            if same:
                row.append(format_interval(v.pi_same[0], v.pi_same[1], "V", v.u_pi_same,
                                           v.value) if v.pi_same else "n/a")
            row.append(format_estimate(p.power.value, p.power.u, "W"))
            cells.append(tuple(row))
        print_table(console, cols, cells, wide=wide,
                    title=f"{dut}: predicted operating points ({lvl} intervals)",
                    title_justify="left")
    if any(p.extrapolated for p in preds):
        console.print("* beyond the current range of the fitted readings: an extrapolation "
                      "that holds only if the source stays linear there", markup=False)
    for m in models:
        if m.knee:
            console.print(f"warning: {m.dut}: the fit found a knee (current limit, dropout); "
                          "predictions past it do not describe the source", markup=False)
    if any(p.voltage.pi is None for p in preds):
        console.print("note: the saved fit carries no model of a new reading's uncertainty "
                      "(an older results file): refit with this version for prediction "
                      "intervals", markup=False)
    console.print("Values ± standard uncertainty. True value: the source's own voltage, "
                  "meters' calibration included (compare with a specification). One "
                  "reading: a new reading with another meter of the same spec (adds its "
                  "uncertainty and the load tolerance, when stated).", markup=False)
    if any(p.voltage.pi_same is not None for p in preds):
        console.print("Same meter: a new reading with the very voltmeter of the sweep, before "
                      "its calibration changes; its gain and offset errors moved the fitted "
                      "line too, so they cancel (docs/predict.md).", markup=False)
