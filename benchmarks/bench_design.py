"""Benchmark: tolerance draws of a 200-node network. The elimination path
(``Circuit.solve``) against two peers in the same run: the plain batched dense solve
(``Circuit.solve_dense``, timed on a slice and scaled) and a per-draw loop (one dense
solve per draw, timed on a smaller slice and scaled); then the whole tolerance analysis
(``tolerance.analyse``: sensitivities, worst case, Monte Carlo) as ``sagfit design`` runs it.

Network (invented): a 200-node resistor ladder with cross links every 10 nodes, one
source, 1 % parts. Alternates the methods, repeats, quotes minima and medians.
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
from sagfit.core.tolerance import analyse


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
    t0 = time.perf_counter()
    c.solve(x[:1])  # records the elimination program once
    t_build = time.perf_counter() - t0
    dense_n = max(draws // 10, 10)
    loop_n = max(draws // 200, 10)
    tf, td, tl, ta = [], [], [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        eq = c.solve(x)
        tf.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        ref = c.solve_dense(x[:dense_n])
        td.append((time.perf_counter() - t0) * draws / dense_n)
        t0 = time.perf_counter()
        loop = [c.solve_dense(row) for row in x[:loop_n]]
        tl.append((time.perf_counter() - t0) * draws / loop_n)
        t0 = time.perf_counter()
        analyse(Circuit(c.net), draws=draws, seed=1)
        ta.append(time.perf_counter() - t0)
    np.testing.assert_allclose(eq.vth[:dense_n], ref.vth, rtol=1e-9)
    np.testing.assert_allclose(eq.rth[:dense_n], ref.rth, rtol=1e-9)
    np.testing.assert_allclose(eq.vth[:loop_n], [e.vth[0] for e in loop], rtol=1e-9)
    print(f"network: {c.size} unknowns ({len(c.net.elements)} elements), {draws} draws; "
          f"elimination program {c._program.entries} entries, recorded in {t_build:.3f} s")
    for name, t in (("elimination (solve)", tf),
                    (f"batched dense (solve_dense, scaled from {dense_n})", td),
                    (f"per-draw dense loop (scaled from {loop_n})", tl),
                    ("whole analyse() with Monte Carlo", ta)):
        print(f"{name}: min {min(t):.3f} s, median {np.median(t):.3f} s")
    print(f"ratio batched dense/elimination: minima {min(td) / min(tf):.1f}, "
          f"medians {np.median(td) / np.median(tf):.1f}")
    print(f"ratio per-draw loop/elimination: minima {min(tl) / min(tf):.1f}, "
          f"medians {np.median(tl) / np.median(tf):.1f}")


if __name__ == "__main__":
    main()
