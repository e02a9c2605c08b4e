"""The design equivalent against independent references: the circuit simulator ngspice
(Debian package ``ngspice``; ``.op`` for the open-circuit voltage, ``.tf`` for the output
resistance) and the symbolic circuit library lcapy (PyPI)."""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import numpy as np
import pytest

from sagfit.core.mna import equivalent
from sagfit.core.netlist import parse_netlist

NGSPICE = shutil.which("ngspice")
need_ngspice = pytest.mark.skipif(
    NGSPICE is None and os.environ.get("CI") != "true",
    reason="ngspice not installed (apt-get install -y ngspice); CI installs it")


def _network(rng, k):
    """One seeded random network (invented): a ladder, a bridge, or either with a
    controlled source; returns netlist text without port, and the port nodes."""
    kind = k % 4
    r = lambda: f"{rng.uniform(10, 100e3):.6g}"  # noqa: E731
    lines = [f"V1 n0 0 {rng.uniform(1, 50):.6g}"]
    if kind in (0, 2):
        n = int(rng.integers(3, 9))
        for i in range(n):
            lines.append(f"RS{i} n{i} n{i + 1} {r()}")
            lines.append(f"RP{i} n{i + 1} 0 {r()}")
        out = f"n{n}"
    else:
        lines += [f"RA n0 a {r()}", f"RB n0 b {r()}", f"RC a 0 {r()}", f"RD b 0 {r()}",
                  f"RM a b {r()}", f"RO b o {r()}", f"RQ o 0 {r()}"]
        out = "o"
    lines.append(f"I1 0 n1x {rng.uniform(1e-4, 1e-2):.6g}")
    lines.append(f"RI n1x 0 {r()}")
    lines.append(f"RJ n1x {out} {r()}")
    if kind >= 2:
        c = int(rng.integers(4))
        if c == 0:
            lines += [f"E1 e 0 n1x 0 {rng.uniform(-5, 5):.6g}", f"RE e {out} {r()}"]
        elif c == 1:
            lines += [f"G1 {out} 0 n1x 0 {rng.uniform(-1e-4, 1e-4):.6g}"]
        elif c == 2:
            lines += ["VS n1x s 0", f"RS s 0 {r()}", f"F1 0 {out} VS {rng.uniform(-2, 2):.6g}"]
        else:
            lines += ["VS n1x s 0", f"RS s 0 {r()}", f"H1 h 0 VS {r()}", f"RH h {out} {r()}"]
    return "\n".join(lines), out


def _ngspice(text, out):
    deck = (f"random network\n{text}\n.control\nset numdgt=15\nop\nprint v({out})\n"
            f"tf v({out},0) V1\nprint all\n.endc\n.end\n")
    res = subprocess.run([NGSPICE or "ngspice", "-b", "/dev/stdin"], input=deck,
                         capture_output=True, text=True, timeout=60)
    vo = float(re.search(rf"^v\({out}\) = (\S+)", res.stdout, re.M).group(1))
    ro = float(re.search(r"^output_impedance\S* = (\S+)", res.stdout, re.M).group(1))
    return vo, ro


@need_ngspice
def test_against_ngspice_on_36_random_networks():
    rng = np.random.default_rng(20261205)
    for k in range(36):
        text, out = _network(rng, k)
        vth, rth = equivalent(parse_netlist(text + f"\n.port {out} 0\n", f"net{k}.cir"))
        vo, ro = _ngspice(text, out)
        assert vth == pytest.approx(vo, rel=1e-9, abs=1e-12), (k, text)
        assert rth == pytest.approx(ro, rel=1e-9), (k, text)


def test_against_lcapy_symbolic_thevenin():
    lcapy = pytest.importorskip("lcapy", reason="lcapy (PyPI) not installed")
    cases = [
        ("V1 1 0 12\nR1 1 2 2000\nR2 2 0 2000\nR3 2 3 470\nR4 3 0 3300\n", "3"),
        ("V1 1 0 5\nR1 1 2 1000\nR2 1 3 2200\nR3 2 0 4700\nR4 3 0 1500\nR5 2 3 680\n", "2"),
        ("V1 1 0 9\nR1 1 2 100\nR2 2 0 330\nI1 0 2 0.01\nR3 2 3 47\n", "3"),
    ]
    for text, out in cases:
        # lcapy drives a current source's current out of its first node, SPICE (and
        # sagfit) through the source from the first node to the second: swap the nodes.
        text_lcapy = text.replace("I1 0 2 ", "I1 2 0 ")
        th = lcapy.Circuit(text_lcapy).thevenin(out, 0)  # exact rational expressions
        vo = float(th.Voc.dc.sympy)
        ro = float(th.Z.sympy)
        vth, rth = equivalent(parse_netlist(text + f".port {out} 0\n"))
        assert vth == pytest.approx(vo, rel=1e-12)
        assert rth == pytest.approx(ro, rel=1e-12)
