"""The elimination path of the design equivalent (sagfit.core.elimination) against the
plain batched dense solve it replaces (Circuit.solve_dense), to 1e-9 relative."""

from __future__ import annotations

import numpy as np
import pytest

from sagfit.core.errors import SagfitError
from sagfit.core.mna import Circuit
from sagfit.core.netlist import parse_netlist


def _network(rng, kind):
    """A seeded random network (invented): ladder or bridge, with a current source and,
    for kinds 2–5, one controlled source of each type; returns the text without port and
    the output node."""
    r = lambda: f"{rng.uniform(10, 100e3):.6g} tol={rng.uniform(0.1, 5):.3g}%"
    lines = [f"V1 n0 0 {rng.uniform(1, 50):.6g} tol=1%"]
    if kind % 2 == 0:
        n = int(rng.integers(3, 12))
        for i in range(n):
            lines += [f"RS{i} n{i} n{i + 1} {r()}", f"RP{i} n{i + 1} 0 {r()}"]
        out = f"n{n}"
    else:
        lines += [f"RA n0 a {r()}", f"RB n0 b {r()}", f"RC a 0 {r()}", f"RD b 0 {r()}",
                  f"RM a b {r()}", f"RO b o {r()}", f"RQ o 0 {r()}"]
        out = "o"
    lines += [f"I1 0 x {rng.uniform(1e-4, 1e-2):.6g} tol=2%", f"RI x 0 {r()}",
              f"RJ x {out} {r()}"]
    if kind == 2:
        lines += [f"E1 e 0 x 0 {rng.uniform(-5, 5):.6g} tol=1%", f"RE e {out} {r()}"]
    elif kind == 3:
        lines += [f"G1 {out} 0 x 0 {rng.uniform(-1e-4, 1e-4):.6g} tol=1%"]
    elif kind == 4:
        lines += ["VS x s 0", f"RS s 0 {r()}", f"F1 0 {out} VS {rng.uniform(-2, 2):.6g}"]
    elif kind == 5:
        lines += ["VS x s 0", f"RS s 0 {r()}", f"H1 h 0 VS {r()}", f"RH h {out} {r()}"]
    return "\n".join(lines), out


def _draws(c, rng, n=200):
    return c.nominal * (1 + c.tol * rng.uniform(-1, 1, (n, c.nominal.size)))


@pytest.mark.parametrize("kind", range(6))
def test_elimination_equals_dense_reference(kind):
    """Random ladders and bridges, each controlled-source type, ports to ground, from
    ground and between two nodes: the two paths agree to 1e-9 relative on every draw."""
    rng = np.random.default_rng(100 + kind)
    for _ in range(5):
        text, out = _network(rng, kind)
        for port in (f"{out} 0", f"0 {out}", f"{out} x", f"x {out}"):
            c = Circuit(parse_netlist(text + f"\n.port {port}\n"))
            x = _draws(c, rng)
            fast, ref = c.solve(x), c.solve_dense(x)
            assert c._program is not None  # the elimination path really ran
            np.testing.assert_allclose(fast.vth, ref.vth, rtol=1e-9, atol=1e-12 * np.max(
                np.abs(ref.vth)))
            np.testing.assert_allclose(fast.rth, ref.rth, rtol=1e-9)


def test_two_hundred_node_ladder_agrees():
    """The benchmark's kind of network (a 200-node ladder with cross links), on 8 draws
    (the dense reference is slow here)."""
    lines = ["V1 n0 0 10 tol=1%"]
    for i in range(199):
        lines += [f"RS{i} n{i} n{i + 1} {1000 + i} tol=1%",
                  f"RP{i} n{i + 1} 0 {10000 + 7 * i} tol=1%"]
        if i % 10 == 0 and i + 10 < 200:
            lines.append(f"RX{i} n{i} n{i + 10} 4.7k tol=1%")
    c = Circuit(parse_netlist("\n".join(lines) + "\n.port n199 0\n"))
    x = _draws(c, np.random.default_rng(5), 8)
    fast, ref = c.solve(x), c.solve_dense(x)
    np.testing.assert_allclose(fast.vth, ref.vth, rtol=1e-9)
    np.testing.assert_allclose(fast.rth, ref.rth, rtol=1e-9)
    # the recorded program is sparse: far fewer entries than the 201² of the full matrix
    assert c._program.entries < 2000


def test_voltage_source_at_the_port_gives_zero_resistance():
    """An ideal source straight across the port: Rth = 0 on both paths (a pivot on a
    branch-current row, not on a node's own conductance)."""
    c = Circuit(parse_netlist("V1 a 0 5\nR1 a b 1k\nR2 b 0 1k\n.port a 0\n"))
    fast, ref = c.solve(c.nominal), c.solve_dense(c.nominal)
    assert fast.vth[0] == pytest.approx(5.0, rel=1e-12) and abs(fast.rth[0]) < 1e-12
    assert ref.vth[0] == pytest.approx(fast.vth[0], rel=1e-12)


def test_singular_network_still_reported():
    """No sound pivot at the nominal values: the dense reference takes over and reports a
    singular network, as before."""
    text = "I1 0 a 1m\nR1 a b 1k\nG1 b 0 b 0 -1m\nR2 b 0 1k\n.port a 0\n"
    c = Circuit(parse_netlist(text, "s.cir"))
    with pytest.raises(SagfitError, match="singular"):
        c.solve(c.nominal)


def test_wide_value_range_as_accurate_as_the_dense_path():
    """Resistors from 1 mΩ to 1 GΩ in one network (invented, seeded): against a 50-digit
    solve of the same matrix (mpmath, an independent arbitrary-precision reference) the
    elimination path is as accurate as the dense LU with partial pivoting."""
    mpmath = pytest.importorskip("mpmath", reason="mpmath (a dependency of lcapy/sympy)")
    mpmath.mp.dps = 50
    rng = np.random.default_rng(4)
    for _ in range(8):
        n = int(rng.integers(5, 20))
        lines = ["V1 n0 0 5"]
        for i in range(n):
            lines += [f"RS{i} n{i} n{i + 1} {10 ** rng.uniform(-3, 9):.6g}",
                      f"RP{i} n{i + 1} 0 {10 ** rng.uniform(-3, 9):.6g}"]
        lines += [f"I1 0 n{n // 2} 1m", f".port n{n} n{n // 3}"]
        c = Circuit(parse_netlist("\n".join(lines)))
        fast, dense = c.solve(c.nominal), c.solve_dense(c.nominal)
        # the same matrix, by the stamps of the elimination path, solved at 50 digits
        a = mpmath.zeros(c.size, c.size)
        b = mpmath.zeros(c.size, 2)
        q = c._quantities(c.nominal[None, :])[:, 0]
        for r, col, k, coef in c._stamps():
            if col < c.size:
                a[r, col] += mpmath.mpf(coef) * mpmath.mpf(q[k])
            else:
                b[r, col - c.size] += mpmath.mpf(coef) * mpmath.mpf(q[k])
        p, m = c.port
        exact = []
        for s in (0, 1):
            x = mpmath.lu_solve(a, b[:, s])
            exact.append((x[p] if p >= 0 else 0) - (x[m] if m >= 0 else 0))
        for got, ref in ((fast, dense),):
            for s, name in ((0, "vth"), (1, "rth")):
                e_fast = abs(float(getattr(got, name)[0] / exact[s] - 1))
                e_dense = abs(float(getattr(ref, name)[0] / exact[s] - 1))
                assert e_fast <= 10 * e_dense + 1e-12
