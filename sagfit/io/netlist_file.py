"""Netlist files (edge module): read bytes, decode, hand the text to core.netlist; write
an acceptance spec whose limits come from a design's tolerance analysis."""

from __future__ import annotations

import json
import os
import tempfile

from ..core.errors import InputError
from ..core.netlist import Netlist, parse_netlist


def read_netlist(path: str, port: tuple[str, str] | None = None) -> Netlist:
    """Read a SPICE-subset netlist file (UTF-8 or Latin-1)."""
    with open(path, "rb") as fh:
        raw = fh.read()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        text = raw.decode("latin-1")
    return parse_netlist(text, path, port)


def spec_text(name: str, vth: tuple[float, float], rth: tuple[float, float], method: str,
              source: str) -> str:
    """The TOML of an ``accept`` spec (format of sagfit.io.spec) with vth/rth limits."""
    rlo = max(rth[0], 0.0)
    return (f"# limits from a design netlist, {method} tolerance analysis\n"
            f"[spec]\nname = {json.dumps(name)}\nnotes = "
            f"{json.dumps(f'limits from {method} analysis of {os.path.basename(source)}')}\n\n"
            f"[limits.vth]\nmin = \"{vth[0]!r}V\"\nmax = \"{vth[1]!r}V\"\n\n"
            f"[limits.rth]\nmin = \"{rlo!r}ohm\"\nmax = \"{rth[1]!r}ohm\"\n")


def write_spec(path: str, text: str, inputs: tuple[str, ...]) -> None:
    """Write ``text`` atomically; refuse to overwrite an input file."""
    if any(os.path.abspath(path) == os.path.abspath(i) for i in inputs):
        raise InputError(f"{path}: would overwrite an input file; choose another name")
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=d, prefix=".spec-", suffix=".tmp")
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(text)
    os.replace(tmp, path)
