"""``sagfit design``: the expected Thevenin/Norton equivalent of a netlist with its
component tolerances, test limits from it, and measured units against it."""

from __future__ import annotations

import csv
import io
import math
import os
from typing import Annotated, Optional

import numpy as np
import typer

from . import app
from .common import (BenchOpt, CurrentAccOpt, DutOpt, JsonOpt, LoadTolOpt, VoltageAccOpt,
                     guarded, interactive, progress, write_stdout)
from ..core.errors import OptionError
from ..core.formatting import format_estimate, format_value
from ..core.mna import Circuit
from ..core.tolerance import MC_CHUNK, PERCENTILES, analyse, compare
from ..core.units import parse_quantity

_METHODS = ("worst-case", "rss", "monte-carlo")
#: Monte Carlo work (draws × unknowns) from which a terminal shows a progress bar (50,000
#: draws of a 200-node network: about a second with the tolerance analysis around it on
#: the 2-core development machine, 2026-12-05)
PROGRESS_WORK = 10_000_000


def _q(text, dim, option):
    if text is None:
        return None
    try:
        return parse_quantity(text, dim, what=option)
    except ValueError as exc:
        raise OptionError(option, str(exc).split(": ", 1)[-1]) from None


@app.command("design")
def design_command(
    netlist: Annotated[str, typer.Argument(help="SPICE-subset netlist (R V I E F G H; "
                                                "tol=1% per element; .port node+ node-).")],
    port: Annotated[Optional[str], typer.Option(
        "--port", help="The two port nodes, 'out,0' (overrides the .port line).")] = None,
    tolerances: Annotated[Optional[str], typer.Option(
        "--tolerances", help="Side table of tolerances, one 'PART-OR-PATTERN TOL' a line "
                             "(R* 1%, RC? 15%); overrides tol= in the netlist.")] = None,
    draws: Annotated[int, typer.Option("--draws", help="Monte Carlo draws (0: none).")] = 10_000,
    distribution: Annotated[str, typer.Option(
        "--distribution", help="Per-part spread: uniform (±tol; also 'rectangular') or "
                               "normal (tol = 3σ).")
    ] = "uniform",
    seed: Annotated[int, typer.Option("--seed", help="Random seed of the draws.")] = 1,
    limits: Annotated[str, typer.Option(
        "--limits", help="Analysis behind the limits: worst-case, rss, monte-carlo "
                         "(0.135–99.865 percentiles).")] = "worst-case",
    spec_out: Annotated[Optional[str], typer.Option(
        "--spec-out", help="Write an accept spec (TOML) with these vth/rth limits.")] = None,
    measured: Annotated[Optional[str], typer.Option(
        "--measured", help="Measured units: a results file of `sagfit fit` (--out .csv or "
                           ".json, or --json), or a readings file, fitted here.")] = None,
    dut: DutOpt = None,
    voltage_accuracy: VoltageAccOpt = None,
    current_accuracy: CurrentAccOpt = None,
    load_tolerance: LoadTolOpt = None,
    bench: BenchOpt = None,
    vth_meas: Annotated[Optional[str], typer.Option(
        "--measured-vth", help="One unit's measured open-circuit voltage, e.g. 6.05V.")] = None,
    u_vth: Annotated[Optional[str], typer.Option(
        "--u-vth", help="Its expanded uncertainty U (k=2), e.g. 20mV.")] = None,
    rth_meas: Annotated[Optional[str], typer.Option(
        "--measured-rth", help="One unit's measured internal resistance, e.g. 1.02kohm.")
    ] = None,
    u_rth: Annotated[Optional[str], typer.Option(
        "--u-rth", help="Its expanded uncertainty U (k=2), e.g. 5ohm.")] = None,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="x.csv: the measured units against the design (with --measured or "
                      "--measured-vth/-rth), else the per-part sensitivities; x.json: the "
                      "whole document.")] = None,
    report: Annotated[Optional[str], typer.Option(
        "--report", help="Write an HTML report (histograms of the expected Vth and Rth, "
                         "measured units marked) into this folder.")] = None,
    json_out: JsonOpt = False,
) -> None:
    """Expected equivalent of a circuit from its netlist and tolerances; test limits from
    it; measured units against it."""
    with guarded(netlist):
        if limits not in _METHODS:
            raise OptionError("--limits", f"choose one of {', '.join(_METHODS)}, not {limits!r}")
        distribution = {"rectangular": "uniform"}.get(distribution, distribution)
        if distribution not in ("uniform", "normal"):
            raise OptionError("--distribution", f"uniform or normal, not {distribution!r}")
        if draws < 0 or (limits == "monte-carlo" and draws < 100):
            raise OptionError("--draws", "at least 100 for monte-carlo limits, never negative")
        if measured and (vth_meas or rth_meas):
            raise OptionError("--measured", "give a file or one unit's --measured-vth/-rth, "
                                            "not both")
        if bench and bench.strip().lower() == "none":  # as for every command: no profile
            bench = None
        fit_options = {"--dut": dut, "--voltage-accuracy": voltage_accuracy,
                       "--current-accuracy": current_accuracy,
                       "--load-tolerance": load_tolerance, "--bench": bench}
        for option, given in fit_options.items():
            if given and not measured:
                raise OptionError(option, "applies to the units of --measured FILE; give one")
        inputs = [netlist] + [f for f in (measured, bench, tolerances) if f]
        from ..io.outputs import check_output_path

        for path, option in ((spec_out, "--spec-out"), (out, "--out")):
            if path:
                check_output_path(path, inputs, option=option)
        if out and not out.lower().endswith((".csv", ".json")):
            raise OptionError("--out", f"{out}: use a .csv or .json file name")
        p = None
        if port is not None:
            parts = [s.strip() for s in port.split(",")]
            if len(parts) != 2 or not all(parts):
                raise OptionError("--port", f"give two nodes as 'out,0', not {port!r}")
            p = (parts[0], parts[1])
        from ..io.netlist_file import read_netlist

        net = read_netlist(netlist, p, tolerances)
        units = _single_unit(vth_meas, u_vth, rth_meas, u_rth)
        if measured:
            units = _load_measured(measured, dut, voltage_accuracy, current_accuracy,
                                   load_tolerance, bench)
        circuit = Circuit(net)
        show = (not json_out and interactive() and draws * circuit.size >= PROGRESS_WORK)
        passes = -(-draws // MC_CHUNK)
        with progress(f"Monte Carlo: {draws:,} draws", show, total=passes) as step:
            t = analyse(circuit, draws=draws, distribution=distribution, seed=seed,
                        on_progress=lambda done, total: step(
                            f"Monte Carlo: {done:,} of {total:,} draws"))
        doc = _document(net, t, limits)
        cmp = None
        if units is not None:
            cmp = compare(t, units.duts, units.vth, units.U_vth, units.rth, units.U_rth,
                          circuit=circuit)
            doc["measured"] = _measured_doc(cmp, units)
        from ..core.safety import cautions

        doc["cautions"] = cautions(vth=[t.vth, *t.wc_vth], isc=[doc["nominal"]["isc_A"]]
                                   if doc["nominal"]["isc_A"] is not None else None)
        from ..io.outputs import atomic_write

        if spec_out:
            from ..io.netlist_file import spec_text

            text = spec_text(f"design {os.path.basename(net.path)}", doc["limits"]["vth"],
                             doc["limits"]["rth"], limits, net.path)
            atomic_write(spec_out, text, inputs=inputs, option="--spec-out")
        if out and out.lower().endswith(".json"):
            from ..io.outputs import document_text

            atomic_write(out, document_text(doc, rows=_rows(doc)), inputs=inputs)
        elif out:
            atomic_write(out, _measured_csv(doc) if cmp is not None else _sensitivity_csv(doc),
                         inputs=inputs)
        if report:
            from ..report.design_report import write_design_report

            write_design_report(report, doc, t, cmp, inputs=inputs)
        if json_out:
            from ..io.outputs import document_text

            write_stdout(document_text(doc, rows=_rows(doc)))
        else:
            write_stdout(_table(doc))
            if cmp is not None:
                _print_units(doc["measured"])
            for c in doc["cautions"]:
                write_stdout(f"caution: {c}\n")
    if cmp is not None and not bool(np.all(cmp.consistent)):
        raise typer.Exit(1)


def _rows(doc) -> int:
    """Per-unit entries of the document (a large one is written compact)."""
    return len(doc.get("measured", {}).get("units", ()))


def _single_unit(vm, uv, rm, ur):
    """--measured-vth/--u-vth and --measured-rth/--u-rth as one unit, or None."""
    from ..io.fit_results import MeasuredUnits

    vals = {}
    for key, m, u, dim in (("vth", vm, uv, "V"), ("rth", rm, ur, "ohm")):
        mv = _q(m, dim, f"--measured-{key}")
        Uv = _q(u, dim, f"--u-{key}")
        if mv is not None and Uv is None:
            raise OptionError(f"--u-{key}", f"give the expanded uncertainty of --measured-{key}")
        if Uv is not None and not Uv > 0:
            raise OptionError(f"--u-{key}", "must be above zero")
        vals[key] = (math.nan, math.nan) if mv is None else (mv, Uv)
    if all(math.isnan(v[0]) for v in vals.values()):
        return None
    a = lambda x: np.array([x], dtype=float)
    return MeasuredUnits("options", ("measured",), a(vals["vth"][0]), a(vals["vth"][1]),
                         a(vals["rth"][0]), a(vals["rth"][1]), math.nan)


def _load_measured(path, dut, voltage_accuracy, current_accuracy, load_tolerance, bench):
    """A results file read back, or a readings file fitted with the usual settings."""
    from ..io.fit_results import is_results_file, measured_from_fits, read_fit_results

    if is_results_file(path):
        if any((voltage_accuracy, current_accuracy, load_tolerance, bench)):
            raise OptionError("--bench", f"{path} holds fitted results: meter settings apply "
                                         "only to a readings file")
        units = read_fit_results(path)
        if dut:
            names = [d.strip() for d in dut.split(",") if d.strip()]
            keep = [i for i, d in enumerate(units.duts) if d in names]
            missing = [n for n in names if n not in units.duts]
            if missing:
                raise OptionError("--dut", f"not in {path}: {', '.join(missing)}")
            units = type(units)(units.source, tuple(units.duts[i] for i in keep),
                                units.vth[keep], units.U_vth[keep], units.rth[keep],
                                units.U_rth[keep], units.confidence,
                                tuple(s for s in units.skipped if s[0] in names))
        return units
    from ..core.analysis import fit
    from .common import fit_settings, load_readings

    settings = fit_settings(voltage_accuracy, current_accuracy, load_tolerance, bench)
    readings = load_readings(path, settings, dut)
    fits = fit(readings, confidence=settings["confidence"])
    return measured_from_fits(fits, path, settings["confidence"])


def _band(lo, hi):
    return [float(lo), float(hi)]


def _document(net, t, method):
    doc = {"tool": "sagfit", "netlist": net.path, "port": list(net.port),
           "notes": list(net.notes),
           "nominal": {"vth_V": t.vth, "rth_ohm": t.rth,
                       "isc_A": (t.vth / t.rth) if t.rth else None},
           "rss": {"vth_V": t.rss_vth, "rth_ohm": t.rss_rth},
           "worst_case": {"vth_V": _band(*t.wc_vth), "rth_ohm": _band(*t.wc_rth)}}
    if t.vertex_vth is not None:
        doc["vertices"] = {"vth_V": _band(*t.vertex_vth), "rth_ohm": _band(*t.vertex_rth),
                           "agrees_with_worst_case": bool(
                               np.allclose(t.vertex_vth, t.wc_vth, rtol=1e-9, atol=0)
                               and np.allclose(t.vertex_rth, t.wc_rth, rtol=1e-9, atol=0))}
    if t.mc_vth is not None:
        doc["monte_carlo"] = {
            "draws": int(t.mc_vth.size), "distribution": t.distribution, "seed": t.seed,
            "percentiles": list(PERCENTILES),
            "vth_V": [float(x) for x in np.percentile(t.mc_vth, PERCENTILES)],
            "rth_ohm": [float(x) for x in np.percentile(t.mc_rth, PERCENTILES)],
            "std": {"vth_V": float(np.std(t.mc_vth, ddof=1)) if t.mc_vth.size > 1 else None,
                    "rth_ohm": float(np.std(t.mc_rth, ddof=1)) if t.mc_rth.size > 1 else None}}
    if method == "worst-case":
        lim = {"vth": t.wc_vth, "rth": t.wc_rth}
    elif method == "rss":
        lim = {"vth": (t.vth - t.rss_vth, t.vth + t.rss_vth),
               "rth": (t.rth - t.rss_rth, t.rth + t.rss_rth)}
    else:
        mc = doc["monte_carlo"]
        lim = {"vth": (mc["vth_V"][0], mc["vth_V"][-1]),
               "rth": (mc["rth_ohm"][0], mc["rth_ohm"][-1])}
    doc["limits"] = {"method": method, "vth": _band(*lim["vth"]), "rth": _band(*lim["rth"])}
    doc["methods_compared"] = _compare_methods(doc)
    rank_r = {int(i): k + 1 for k, i in enumerate(t.ranking("rth"))}
    doc["sensitivities"] = [
        {"part": t.names[i], "value": float(t.nominal_values[i]),
         "tol_pct": float(t.tol[i] * 100), "dvth_V": float(t.dvth[i]),
         "drth_ohm": float(t.drth[i]), "rank_vth": k + 1, "rank_rth": rank_r[int(i)]}
        for k, i in enumerate(t.ranking("vth"))]
    return doc


def _compare_methods(doc) -> list[str]:
    """Plain sentences on how the methods' bands relate (which gives which number)."""
    out = []
    for key, unit, name in (("vth_V", "V", "Vth"), ("rth_ohm", "Ω", "Rth")):
        wc = doc["worst_case"][key]
        half_wc = (wc[1] - wc[0]) / 2
        rss = doc["rss"][key]
        if half_wc > 0:
            out.append(f"{name}: RSS ±{format_value(rss, unit)} is {100 * rss / half_wc:.0f} % "
                       f"of the worst-case half-width ±{format_value(half_wc, unit)}")
        if "monte_carlo" in doc and half_wc > 0:
            mc = doc["monte_carlo"][key]
            out.append(f"{name}: the Monte Carlo 0.135–99.865 % band spans "
                       f"{100 * (mc[-1] - mc[0]) / (2 * half_wc):.0f} % of the worst-case band")
        v = doc.get("vertices")
        if v is not None and not v["agrees_with_worst_case"]:
            out.append(f"{name}: the vertices of the tolerance box reach "
                       f"{format_value(v[key][0], unit)} … {format_value(v[key][1], unit)}, "
                       "beyond the sign-based worst case: an output is not monotone in some "
                       "part, trust the vertices")
    return out


def _num(x):
    return None if x is None or not math.isfinite(x) else float(x)


def _measured_doc(cmp, units) -> dict:
    rows = []
    for i, d in enumerate(cmp.duts):
        rows.append({"dut": d, "vth_V": _num(cmp.vth[i]), "U_vth_V": _num(cmp.U_vth[i]),
                     "En_vth": _num(cmp.en_vth[i]), "rth_ohm": _num(cmp.rth[i]),
                     "U_rth_ohm": _num(cmp.U_rth[i]), "En_rth": _num(cmp.en_rth[i]),
                     "consistent": bool(cmp.consistent[i]),
                     "explanation": [{"part": e.part, "relative_change": e.relative_change,
                                      "value": e.value, "within_tolerance": e.within_tolerance,
                                      "misfit": e.misfit, "alike": list(e.alike)}
                                     for e in cmp.explanations[i]]})
    n_bad = int(np.count_nonzero(~cmp.consistent))
    return {"source": units.source,
            "expected": {"vth_V": cmp.expected_vth, "rth_ohm": cmp.expected_rth},
            "U_design": {"vth_V": cmp.U_design_vth, "rth_ohm": cmp.U_design_rth,
                         "from": cmp.U_design_from, "k": 2},
            "confidence": _num(units.confidence),
            "summary": {"units": len(cmp.duts), "consistent": len(cmp.duts) - n_bad,
                        "not_consistent": n_bad, "skipped": len(units.skipped)},
            "units": rows,
            "skipped": [{"dut": d, "reason": r} for d, r in units.skipped]}


def _csv_text(header, rows) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    w.writerows(rows)
    return buf.getvalue()


def _r(x):
    return "" if x is None else repr(x)


def _sensitivity_csv(doc) -> str:
    return _csv_text(["part", "value", "tol_pct", "dVth_V", "dRth_ohm", "rank_vth",
                      "rank_rth"],
                     [[s["part"], _r(s["value"]), _r(s["tol_pct"]), _r(s["dvth_V"]),
                       _r(s["drth_ohm"]), s["rank_vth"], s["rank_rth"]]
                      for s in doc["sensitivities"]])


def _measured_csv(doc) -> str:
    from ..io.readings_csv import neutralise

    m = doc["measured"]
    ex, ud = m["expected"], m["U_design"]
    rows = []
    for u in m["units"]:
        e = u["explanation"][0] if u["explanation"] else None
        rows.append([neutralise(u["dut"]), _r(u["vth_V"]), _r(u["U_vth_V"]), _r(u["En_vth"]),
                     _r(u["rth_ohm"]), _r(u["U_rth_ohm"]), _r(u["En_rth"]),
                     "yes" if u["consistent"] else "no", _r(ex["vth_V"]), _r(ud["vth_V"]),
                     _r(ex["rth_ohm"]), _r(ud["rth_ohm"]), e["part"] if e else "",
                     _r(100 * e["relative_change"]) if e else "",
                     ("yes" if e["within_tolerance"] else "no") if e else "",
                     _r(e["misfit"]) if e else "", " ".join(e["alike"]) if e else ""])
    return _csv_text(["dut", "vth_V", "U_vth_V", "En_vth", "rth_ohm", "U_rth_ohm", "En_rth",
                      "consistent", "expected_vth_V", "U_design_vth_V", "expected_rth_ohm",
                      "U_design_rth_ohm", "likely_part", "likely_change_pct",
                      "likely_within_tolerance", "likely_misfit", "likely_alike"], rows)


def _table(doc):
    nv, nr = doc["nominal"]["vth_V"], doc["nominal"]["rth_ohm"]
    lines = [f"design {doc['netlist']}, port {doc['port'][0]}–{doc['port'][1]}"]
    lines += [f"  note: {n}" for n in doc["notes"]]
    lines.append(f"  nominal      Vth {format_value(nv, 'V')}   Rth {format_value(nr, 'Ω')}"
                 + (f"   Isc {format_value(doc['nominal']['isc_A'], 'A')}"
                    if doc["nominal"]["isc_A"] is not None else ""))
    r = doc["rss"]
    lines.append(f"  RSS          Vth ± {format_value(r['vth_V'], 'V')}   Rth ± "
                 f"{format_value(r['rth_ohm'], 'Ω')}")
    w = doc["worst_case"]
    lines.append(f"  worst case   Vth {format_value(w['vth_V'][0], 'V')} … "
                 f"{format_value(w['vth_V'][1], 'V')}   Rth {format_value(w['rth_ohm'][0], 'Ω')}"
                 f" … {format_value(w['rth_ohm'][1], 'Ω')}")
    if "vertices" in doc:
        v = doc["vertices"]
        ok = "agrees" if v["agrees_with_worst_case"] else "DIFFERS (non-monotone part)"
        lines.append(f"  vertices     Vth {format_value(v['vth_V'][0], 'V')} … "
                     f"{format_value(v['vth_V'][1], 'V')}   Rth "
                     f"{format_value(v['rth_ohm'][0], 'Ω')} … "
                     f"{format_value(v['rth_ohm'][1], 'Ω')}: {ok}")
    if "monte_carlo" in doc:
        m = doc["monte_carlo"]
        lines.append(f"  Monte Carlo  {m['draws']} {m['distribution']} draws, seed {m['seed']}: "
                     f"Vth {format_value(m['vth_V'][0], 'V')} … "
                     f"{format_value(m['vth_V'][-1], 'V')}, Rth {format_value(m['rth_ohm'][0], 'Ω')} … "
                     f"{format_value(m['rth_ohm'][-1], 'Ω')} (0.135–99.865 %)")
    li = doc["limits"]
    lines.append(f"  limits ({li['method']}): Vth {format_value(li['vth'][0], 'V')} … "
                 f"{format_value(li['vth'][1], 'V')}, Rth {format_value(li['rth'][0], 'Ω')} … "
                 f"{format_value(li['rth'][1], 'Ω')}")
    lines += [f"  {s}" for s in doc["methods_compared"]]
    lines.append("  part      value        tol      ΔVth at tol    ΔRth at tol   rank Rth")
    for s in doc["sensitivities"][:15]:
        lines.append(f"  {s['part']:<8} {format_value(s['value']):>10} {s['tol_pct']:>7.3g} %"
                     f"  {format_value(s['dvth_V'], 'V'):>12}  "
                     f"{format_value(s['drth_ohm'], 'Ω'):>12}   {s['rank_rth']:>5}")
    if len(doc["sensitivities"]) > 15:
        lines.append(f"  … {len(doc['sensitivities']) - 15} more parts in --json and --out")
    return "\n".join(lines) + "\n"


def _print_units(m) -> None:
    """The measured units against the design: a table, worst E_n first."""
    from rich.table import Table

    from .render import _console

    console = _console()
    ex, ud = m["expected"], m["U_design"]
    console.print(f"measured units ({m['source']}) against expected Vth "
                  f"{format_estimate(ex['vth_V'], ud['vth_V'], 'V')}, Rth "
                  f"{format_estimate(ex['rth_ohm'], ud['rth_ohm'], 'Ω')} (± U, k = 2, from "
                  f"{ud['from']})", markup=False)
    tab = Table(show_edge=False)
    for col in ("DUT", "Vth ± U", "E_n", "Rth ± U", "E_n ", "verdict",
                "single part that would explain it"):
        tab.add_column(col, justify="left" if col in ("DUT", "verdict") or col.startswith(
            "single") else "right")

    def worst(u):
        return max(abs(u["En_vth"] or 0.0), abs(u["En_rth"] or 0.0))

    rows = sorted(m["units"], key=worst, reverse=True)
    for u in rows[:40]:
        e = u["explanation"][0] if u["explanation"] else None
        why = ""
        if e:
            why = (f"{e['part']} {100 * e['relative_change']:+.3g} % "
                   f"({'within' if e['within_tolerance'] else 'beyond'} its tolerance"
                   + ("" if e["misfit"] <= 1 else f"; misfit {e['misfit']:.2f}") + ")")
            if e["alike"]:
                why += f", or alike: {', '.join(e['alike'][:5])}" + (
                    "…" if len(e["alike"]) > 5 else "")
        tab.add_row(u["dut"],
                    format_estimate(u["vth_V"], u["U_vth_V"], "V") if u["vth_V"] is not None
                    else "—", "—" if u["En_vth"] is None else f"{u['En_vth']:.2f}",
                    format_estimate(u["rth_ohm"], u["U_rth_ohm"], "Ω")
                    if u["rth_ohm"] is not None else "—",
                    "—" if u["En_rth"] is None else f"{u['En_rth']:.2f}",
                    "consistent" if u["consistent"] else "NOT consistent", why)
    console.print(tab)
    s = m["summary"]
    if len(rows) > 40:
        console.print(f"… {len(rows) - 40} more units (worst first above) in --json and --out",
                      markup=False)
    console.print(f"{s['consistent']} of {s['units']} unit(s) consistent with the design "
                  "(|E_n| ≤ 1, ISO 13528:2022 9.7)"
                  + (f"; {s['skipped']} without a fit: " + ", ".join(
                      f"{x['dut']} ({x['reason']})" for x in m["skipped"][:5])
                     if s["skipped"] else ""), markup=False)
    if any(u["explanation"] for u in rows):
        console.print("The part named is the one that, changed alone by the amount shown "
                      "(solved on the network), best accounts for the difference; a change "
                      "far beyond its tolerance points to a wrong or damaged part.",
                      markup=False)
