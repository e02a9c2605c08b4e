"""Benchmark: tolerance draws of a 200-node network, batched MNA solve against a peer
(one numpy.linalg.solve per draw, the plain loop) in the same run.

Network (invented): a 200-node resistor ladder with cross links every 10 nodes, one
source, 1 % parts. Alternates the two methods, repeats, quotes minima and medians.
Run: OPENBLAS_NUM_THREADS=1 python benchmarks/bench_design.py [draws] [repeats]
(multi-threaded BLAS on many small batched solves was measured 40x slower on a loaded
2-core machine, 2026-12-05).
"""

from __future__ import annotations

import sys
import time

import numpy as np

from sagfit.core.mna import Circuit
from sagfit.core.netlist import parse_netlist


def network(n=200):
    lines = ["V1 n0 0 10 tol=1%"]
    for i in range(n - 1):
        lines.append(f"RS{i} n{i} n{i + 1} {1000 + i} tol=1%")
        lines.append(f"RP{i} n{i + 1} 0 {10000 + 7 * i} tol=1%")
        if i % 10 == 0 and i + 10 < n:
            lines.append(f"RX{i} n{i} n{i + 10} 4.7k tol=1%")
    lines.append(f".port n{n - 1} 0")
    return "\n".join(lines)


def main():
    draws = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000
    repeats = int(sys.argv[2]) if len(sys.argv) > 2 else 3
    c = Circuit(parse_netlist(network()))
    rng = np.random.default_rng(1)
    x = c.nominal * (1 + c.tol * rng.uniform(-1, 1, (draws, c.nominal.size)))
    peer_n = max(draws // 200, 10)  # the loop is timed on a slice and scaled
    tb, tl = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        eq = c.solve(x)
        tb.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        loop = [c.solve(row) for row in x[:peer_n]]
        tl.append((time.perf_counter() - t0) * draws / peer_n)
    np.testing.assert_allclose(eq.vth[:peer_n], [e.vth[0] for e in loop], rtol=1e-12)
    print(f"network: {c.size} unknowns ({len(c.net.elements)} elements), {draws} draws")
    print(f"batched: min {min(tb):.3f} s, median {np.median(tb):.3f} s")
    print(f"per-draw loop (scaled from {peer_n}): min {min(tl):.3f} s, "
          f"median {np.median(tl):.3f} s")
    print(f"ratio loop/batched: minima {min(tl) / min(tb):.2f}, "
          f"medians {np.median(tl) / np.median(tb):.2f}")


if __name__ == "__main__":
    main()
