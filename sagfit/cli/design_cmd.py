"""``sagfit design``: the expected Thevenin/Norton equivalent of a netlist with its
component tolerances, test limits from it, and a measured unit against it."""

from __future__ import annotations

import csv
import io
import json
import math
from typing import Annotated, Optional

import numpy as np
import typer

from . import app
from .common import JsonOpt, check_out_option, guarded, write_stdout
from ..core.errors import OptionError
from ..core.formatting import format_value
from ..core.mna import Circuit
from ..core.tolerance import PERCENTILES, analyse, explain, normalised_error
from ..core.units import parse_quantity
from ..io.netlist_file import read_netlist, spec_text, write_spec

_METHODS = ("worst-case", "rss", "monte-carlo")


def _q(text, dim, option):
    if text is None:
        return None
    try:
        return parse_quantity(text, dim, what=option)
    except ValueError as exc:
        raise OptionError(f"{option}: {exc}") from None


@app.command("design")
def design_command(
    netlist: Annotated[str, typer.Argument(help="SPICE-subset netlist (R V I E F G H; "
                                                "tol=1% per element; .port node+ node-).")],
    port: Annotated[Optional[str], typer.Option(
        "--port", help="The two port nodes, 'out,0' (overrides the .port line).")] = None,
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
    vth_meas: Annotated[Optional[str], typer.Option(
        "--measured-vth", help="Measured open-circuit voltage, e.g. 6.05V.")] = None,
    u_vth: Annotated[Optional[str], typer.Option(
        "--u-vth", help="Its expanded uncertainty U (k=2), e.g. 20mV.")] = None,
    rth_meas: Annotated[Optional[str], typer.Option(
        "--measured-rth", help="Measured internal resistance, e.g. 1.02kohm.")] = None,
    u_rth: Annotated[Optional[str], typer.Option(
        "--u-rth", help="Its expanded uncertainty U (k=2), e.g. 5ohm.")] = None,
    out: Annotated[Optional[str], typer.Option(
        "--out", help="Also write the results: a .csv file gets the per-part "
                      "sensitivities, a .json file the document of --json.")] = None,
    json_out: JsonOpt = False,
) -> None:
    """Expected equivalent of a circuit from its netlist and tolerances."""
    with guarded(netlist):
        if limits not in _METHODS:
            raise OptionError(f"--limits: choose one of {', '.join(_METHODS)}, not {limits!r}")
        distribution = {"rectangular": "uniform"}.get(distribution, distribution)
        if distribution not in ("uniform", "normal"):
            raise OptionError(f"--distribution: uniform or normal, not {distribution!r}")
        if draws < 0 or (limits == "monte-carlo" and draws < 100):
            raise OptionError("--draws: at least 100 for monte-carlo limits, never negative")
        check_out_option(out, [netlist])
        p = None
        if port is not None:
            parts = [s.strip() for s in port.split(",")]
            if len(parts) != 2 or not all(parts):
                raise OptionError(f"--port: give two nodes as 'out,0', not {port!r}")
            p = (parts[0], parts[1])
        net = read_netlist(netlist, p)
        t = analyse(Circuit(net), draws=draws, distribution=distribution, seed=seed)
        doc = _document(net, t, limits)
        meas = _measured(t, doc, _q(vth_meas, "V", "--measured-vth"),
                         _q(u_vth, "V", "--u-vth"), _q(rth_meas, "ohm", "--measured-rth"),
                         _q(u_rth, "ohm", "--u-rth"))
        if meas:
            doc["measured"] = meas
        if spec_out:
            write_spec(spec_out, spec_text(f"design {net.path}", doc["limits"]["vth"],
                                           doc["limits"]["rth"], limits, net.path), (netlist,))
        if out and out.lower().endswith(".json"):
            write_spec(out, json.dumps(doc, indent=2, allow_nan=False, default=float) + "\n",
                       (netlist,))
        elif out:
            buf = io.StringIO()
            w = csv.writer(buf)
            w.writerow(["part", "value", "tol_pct", "dVth_V", "dRth_ohm"])
            for s in doc["sensitivities"]:
                w.writerow([s["part"], repr(s["value"]), repr(s["tol_pct"]),
                            repr(s["dvth_V"]), repr(s["drth_ohm"])])
            write_spec(out, buf.getvalue(), (netlist,))
        if json_out:
            write_stdout(json.dumps(doc, indent=2, allow_nan=False, default=float) + "\n")
        else:
            write_stdout(_table(doc))
    if meas and any(abs(m["En"]) > 1 for m in meas.values()):
        raise typer.Exit(1)


def _band(lo, hi):
    return [float(lo), float(hi)]


def _document(net, t, method):
    doc = {"netlist": net.path, "port": list(net.port), "notes": list(net.notes),
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
            "rth_ohm": [float(x) for x in np.percentile(t.mc_rth, PERCENTILES)]}
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
    order = t.ranking("vth")
    doc["sensitivities"] = [
        {"part": t.names[i], "value": float(t.nominal_values[i]),
         "tol_pct": float(t.tol[i] * 100), "dvth_V": float(t.dvth[i]),
         "drth_ohm": float(t.drth[i])} for i in order]
    return doc


def _measured(t, doc, vm, uv, rm, ur):
    meas = {}
    for key, m, u, unit, rss in (("vth", vm, uv, "V", t.rss_vth), ("rth", rm, ur, "ohm",
                                                                    t.rss_rth)):
        if m is None:
            continue
        if u is None:
            raise OptionError(f"--u-{key}: give the expanded uncertainty of --measured-{key}")
        nominal = t.vth if key == "vth" else t.rth
        # the design's expanded uncertainty: the RSS band read as a uniform ±a, k = 2
        u_design = 2 * rss / math.sqrt(3)
        meas[key] = {"measured": m, "U": u, "expected": nominal, "U_design": u_design,
                     "En": normalised_error(m, u, nominal, u_design)}
    if meas:
        dv = meas["vth"]["measured"] - t.vth if "vth" in meas else 0.0
        dr = meas["rth"]["measured"] - t.rth if "rth" in meas else 0.0
        meas["explanation"] = [{"part": n, "relative_change": r, "misfit": f}
                               for n, r, f in explain(t, dv, dr)[:3]]
    return meas


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
                     f"{format_value(v['vth_V'][1], 'V')}: {ok}")
    if "monte_carlo" in doc:
        m = doc["monte_carlo"]
        lines.append(f"  Monte Carlo  {m['draws']} {m['distribution']} draws, seed {m['seed']}: "
                     f"Vth {format_value(m['vth_V'][0], 'V')} … {format_value(m['vth_V'][-1], 'V')}"
                     f", Rth {format_value(m['rth_ohm'][0], 'Ω')} … "
                     f"{format_value(m['rth_ohm'][-1], 'Ω')} (0.135–99.865 %)")
    li = doc["limits"]
    lines.append(f"  limits ({li['method']}): Vth {format_value(li['vth'][0], 'V')} … "
                 f"{format_value(li['vth'][1], 'V')}, Rth {format_value(li['rth'][0], 'Ω')} … "
                 f"{format_value(li['rth'][1], 'Ω')}")
    lines.append("  part      value        tol      ΔVth at tol    ΔRth at tol")
    for s in doc["sensitivities"][:15]:
        lines.append(f"  {s['part']:<8} {format_value(s['value']):>10} {s['tol_pct']:>7.3g} %"
                     f"  {format_value(s['dvth_V'], 'V'):>12}  {format_value(s['drth_ohm'], 'Ω'):>12}")
    meas = doc.get("measured")
    if meas:
        for k, unit in (("vth", "V"), ("rth", "Ω")):
            if k in meas:
                m = meas[k]
                verdict = "consistent" if abs(m["En"]) <= 1 else "NOT consistent"
                lines.append(f"  measured {k}: {format_value(m['measured'], unit)} vs expected "
                             f"{format_value(m['expected'], unit)}: E_n = {m['En']:.2f} "
                             f"({verdict})")
        for e in meas["explanation"]:
            lines.append(f"  would explain it: {e['part']} changed by "
                         f"{100 * e['relative_change']:+.3g} % (misfit {e['misfit']:.2g})")
    return "\n".join(lines) + "\n"
