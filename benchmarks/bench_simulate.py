"""Benchmark of ``sagfit.core.simulate.simulate`` against two peers timed in the same run.

Peers, alternating, repeated, in this process:
  (a) a per-DUT Python loop drawing the same model (what an ad-hoc generator does),
  (b) a numpy floor: only the random draws the model needs (two normals per DUT, one
      uniform per resistor, one uniform per reading) and one line evaluation.

Targets (issue "Plan a load test … and simulate bench runs"): 100,000 DUTs × 8 readings
in well under a second (< 0.5 s here), within 6× of the floor (b), and the loop (a)
at least 10× slower per DUT (measured at a size where the loop is bearable).

Usage: python benchmarks/bench_simulate.py [--duts N] [--repeat N] [--quick]
The data are invented and never written to disk.
"""

from __future__ import annotations

import argparse
import json
import math
import platform
import statistics
import time

import numpy as np

LOADS = [math.inf, 100, 47, 22, 10, 4.7, 2.2, 1.0]


def run_sagfit(duts: int):
    from sagfit.core.simulate import simulate
    from sagfit.core.units import parse_accuracy

    return simulate(12.6, 0.05, LOADS, duts=duts, seed=1, vth_spread=0.01, rth_spread=0.2,
                    voltage_accuracy=parse_accuracy("0.015%+2mV", "V"), load_tolerance=1.0)


def run_floor(duts: int):
    rng = np.random.default_rng(1)
    k = len(LOADS)
    z = rng.standard_normal((2, duts))
    w = rng.uniform(-1, 1, k)
    r = np.tile(np.asarray(LOADS) * (1 + 0.01 * w), duts)
    vth = np.repeat(12.6 * (1 + 0.01 * z[0]), k)
    rth = np.repeat(0.05 * np.exp(0.2 * z[1]), k)
    i = np.where(np.isinf(r), 0.0, vth / (np.where(np.isinf(r), 1.0, r) + rth))
    v = vth - rth * i
    return v + (0.00015 * v + 0.002) * rng.uniform(-1, 1, v.size)


def run_loop(duts: int):
    rng = np.random.default_rng(1)
    w = rng.uniform(-1, 1, len(LOADS))
    rows = []
    for d in range(duts):
        vth = 12.6 * (1 + 0.01 * rng.standard_normal())
        rth = 0.05 * math.exp(0.2 * rng.standard_normal())
        for r_nom, wk in zip(LOADS, w):
            r = r_nom * (1 + 0.01 * wk)
            i = 0.0 if math.isinf(r) else vth / (r + rth)
            v = vth - rth * i
            v += (0.00015 * v + 0.002) * rng.uniform(-1, 1)
            rows.append((f"SIM-{d + 1:06d}", r_nom, v))
    return rows


def timed(fn, n, repeat):
    out = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn(n)
        out.append(time.perf_counter() - t0)
    return {"min": min(out), "median": statistics.median(out), "runs": out}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--duts", type=int, default=100_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--quick", action="store_true", help="10,000 DUTs, 3 repeats")
    a = ap.parse_args()
    duts, repeat = (10_000, 3) if a.quick else (a.duts, a.repeat)
    loop_duts = min(duts, 5_000)
    run_sagfit(100)  # warm imports
    res = {"sagfit": [], "floor": []}
    for _ in range(repeat):  # alternate the two so that machine load hits both alike
        res["sagfit"].append(timed(run_sagfit, duts, 1)["min"])
        res["floor"].append(timed(run_floor, duts, 1)["min"])
    summary = {k: {"min": min(v), "median": statistics.median(v), "runs": v}
               for k, v in res.items()}
    loop = timed(run_loop, loop_duts, 1)
    small = timed(run_sagfit, loop_duts, repeat)
    per_dut_ratio = (loop["min"] / loop_duts) / (small["min"] / loop_duts)
    scale = 100_000 / duts
    doc = {
        "machine": platform.machine(), "duts": duts, "readings_per_dut": len(LOADS),
        "repeat": repeat, "simulate": summary["sagfit"], "floor": summary["floor"],
        "loop": {"duts": loop_duts, **loop}, "sagfit_at_loop_size": small,
        "checks": {
            "time_100k_s_estimate": summary["sagfit"]["min"] * scale,
            "under_0.5s_at_100k": summary["sagfit"]["min"] * scale < 0.5,
            "ratio_to_floor": summary["sagfit"]["min"] / summary["floor"]["min"],
            "within_6x_floor": summary["sagfit"]["min"] < 6 * summary["floor"]["min"],
            "loop_slower_per_dut": per_dut_ratio,
            "loop_at_least_10x": per_dut_ratio >= 10,
        },
    }
    print(json.dumps(doc, indent=2))


if __name__ == "__main__":
    main()
