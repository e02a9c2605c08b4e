"""Netlist files (edge module): read bytes, decode, hand the text to core.netlist; the
text of an acceptance spec whose limits come from a design's tolerance analysis (written
by the command through ``io.outputs.atomic_write``)."""

from __future__ import annotations

import json
import os

from ..core.netlist import Netlist, NetlistError, apply_tolerances, parse_netlist
from .files import read_input

#: a netlist larger than this is refused before it is read
LIMIT = 64 << 20


def _text(path: str, what: str) -> str:
    raw = read_input(path, NetlistError, what=what, limit=LIMIT,
                     too_large=lambda n: f"{n / 1e6:.0f} MB is larger than a {what} "
                                         f"sagfit reads ({LIMIT >> 20} MB)")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return raw.decode("latin-1")


def read_netlist(path: str, port: tuple[str, str] | None = None,
                 tolerances: str | None = None) -> Netlist:
    """Read a SPICE-subset netlist file (UTF-8 or Latin-1), with the tolerances of a side
    table file (``core.netlist.apply_tolerances``) when given."""
    net = parse_netlist(_text(path, "netlist"), path, port)
    if tolerances is not None:
        net = apply_tolerances(net, _text(tolerances, "tolerance table"), tolerances)
    return net


def spec_text(name: str, vth: tuple[float, float], rth: tuple[float, float], method: str,
              source: str) -> str:
    """The TOML of an ``accept`` spec (format of sagfit.io.spec) with vth/rth limits."""
    rlo = max(rth[0], 0.0)
    return (f"# limits from a design netlist, {method} tolerance analysis\n"
            f"[spec]\nname = {json.dumps(name)}\nnotes = "
            f"{json.dumps(f'limits from {method} analysis of {os.path.basename(source)}')}\n\n"
            f"[limits.vth]\nmin = \"{vth[0]!r}V\"\nmax = \"{vth[1]!r}V\"\n\n"
            f"[limits.rth]\nmin = \"{rlo!r}ohm\"\nmax = \"{rth[1]!r}ohm\"\n")
