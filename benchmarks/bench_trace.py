"""Benchmark of the trace path: reading a long trace, finding its steps and taking the
settled readings, against Arrow alone reading the same columns; and an evaluation of a
change-point library against sagfit's threshold-and-merge step detection.

Part 1 (target of the issue "Logged traces…"): a 10-million-row CSV trace (time, current,
voltage; a few thousand constant-current steps with RC responses, invented) is
  (a) read by ``pyarrow.csv.read_csv`` (the same three columns, as numpy arrays): the peer;
  (b) read by ``sagfit.io.trace_file.read_trace`` and split by ``sagfit.core.trace.
      find_steps`` (steps, settled readings, flags).
Each runs in its own process, in alternating rounds; reported are minima and medians and
the ratio of minima; peak memory is each process's maximum resident set size.
Target: (b) within 2× of (a); peak memory of (b) below 2 GB.

Part 2: step detection on smaller traces (invented, known truth), by
  - sagfit's threshold-and-merge (``find_steps``), and
  - ``ruptures`` (C. Truong, L. Oudre, N. Vayatis, "Selective review of offline change
    point detection methods", Signal Processing 167 (2020) 107299; BSD-2): Binseg and
    Pelt with the l2 cost on the current, the penalty 2·σ²·ln n from the same noise
    estimate (a BIC-type penalty, common practice).
Accuracy: share of true edges found within one sample, and false edges; time per trace.
ruptures is needed only here (``pip install ruptures``), never by sagfit.

Usage: python benchmarks/bench_trace.py [--rows N] [--repeat N] [--skip-ruptures]
"""

from __future__ import annotations

import argparse
import json
import pathlib
import statistics
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = pathlib.Path(__file__).resolve().parent

PEER = r"""
import resource, sys, time
import pyarrow.csv as pc
t0 = time.perf_counter()
tab = pc.read_csv(sys.argv[1], convert_options=pc.ConvertOptions(
    include_columns=["time_s", "current_A", "voltage_V"]))
cols = [tab.column(k).to_numpy() for k in range(3)]
dt = time.perf_counter() - t0
print(dt, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024, len(cols[0]))
"""

SAGFIT = r"""
import resource, sys, time
from sagfit.io.trace_file import read_trace
from sagfit.core.trace import find_steps
t0 = time.perf_counter()
tr = read_trace(sys.argv[1])
steps = find_steps(tr)
dt = time.perf_counter() - t0
print(dt, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024, len(steps))
"""


def simulate(rows: int, steps: int, seed: int = 1, dt: float = 0.01):
    """Invented trace: ``steps`` constant-current steps of random level (rests included),
    R0 = 20 mΩ, R1 = 15 mΩ, τ = 2 s, white noise; exact ZOH response per sample."""
    rng = np.random.default_rng(seed)
    per = rows // steps
    choices = np.array([0.0, 0.5, 1.0, 2.0, 5.0, -2.0])
    levels = rng.choice(choices, steps)
    while np.any(same := np.r_[False, levels[1:] == levels[:-1]]):  # every step a change
        levels[same] = rng.choice(choices, int(same.sum()))
    i = np.repeat(levels, per)
    n = i.size
    t = np.arange(n) * dt
    a = np.exp(-dt / 2.0)
    from scipy.signal import lfilter

    x = lfilter([0.0, 0.015 * (1 - a)], [1.0, -a], i)  # branch voltage, exact ZOH
    v = 3.7 - 0.02 * i - x + rng.normal(0, 2e-4, n)
    i = i + rng.normal(0, 2e-3, n)
    edges = np.arange(1, steps) * per
    return t, i, v, edges


def write_csv(path, t, i, v):
    import pyarrow as pa
    import pyarrow.csv as pc

    pc.write_csv(pa.table({"time_s": t, "current_A": i, "voltage_V": v}), path)


def run(code: str, path) -> tuple[float, float, int]:
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                         text=True, check=True).stdout.split()
    return float(out[0]), float(out[1]), int(out[2])


def part1(rows: int, repeat: int) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        path = pathlib.Path(tmp) / "trace.csv"
        t, i, v, edges = simulate(rows, 4000)
        write_csv(path, t, i, v)
        size = path.stat().st_size
        del t, i, v
        peer, ours = [], []
        for _ in range(repeat):  # alternate the two, so load swings hit both
            peer.append(run(PEER, path))
            ours.append(run(SAGFIT, path))
    pt = [x[0] for x in peer]
    ot = [x[0] for x in ours]
    return {"rows": rows, "file_MB": size / 1e6, "steps_true": int(edges.size + 1),
            "steps_found": ours[0][2],
            "arrow_min_s": min(pt), "arrow_median_s": statistics.median(pt),
            "sagfit_min_s": min(ot), "sagfit_median_s": statistics.median(ot),
            "ratio_min": min(ot) / min(pt),
            "ratio_median": statistics.median(ot) / statistics.median(pt),
            "arrow_peak_MB": max(x[1] for x in peer) / 1e6,
            "sagfit_peak_MB": max(x[1] for x in ours) / 1e6}


def part2(sizes=(5_000, 20_000), traces: int = 2) -> list[dict]:
    import ruptures as rpt

    from sagfit.core.trace import Trace, current_noise, find_steps

    out = []
    for n in sizes:
        for method in ("threshold-and-merge", "ruptures Binseg l2", "ruptures Pelt l2"):
            if method.endswith("Pelt l2") and n > 5_000:
                continue  # Pelt took about 90 s on 5,000 rows; the small size only
            found = missed = false = 0
            times = []
            for seed in range(traces):
                t, i, v, edges = simulate(n, max(n // 1000, 5), seed=seed + 10)
                t0 = time.perf_counter()
                if method == "threshold-and-merge":
                    st = find_steps(Trace.from_arrays(time=t, current=i, voltage=v))
                    bk = np.asarray(st.start[1:])
                else:
                    sigma = current_noise(i, np.array([0, i.size]))[0]
                    algo = (rpt.Binseg if "Binseg" in method else rpt.Pelt)(
                        model="l2", min_size=5, jump=1).fit(i)
                    bk = np.asarray(algo.predict(pen=2 * sigma ** 2 * np.log(n))[:-1])
                times.append(time.perf_counter() - t0)
                hit = np.min(np.abs(edges[:, None] - bk[None, :]), axis=1) <= 1 \
                    if bk.size else np.zeros(edges.size, bool)
                found += int(hit.sum())
                missed += int((~hit).sum())
                extra = (np.min(np.abs(bk[:, None] - edges[None, :]), axis=1) > 1
                         if bk.size else np.zeros(0, bool))
                false += int(extra.sum())
            out.append({"rows": n, "method": method, "edges_found": found,
                        "edges_missed": missed, "false_edges": false,
                        "median_s": statistics.median(times)})
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--skip-ruptures", action="store_true")
    a = ap.parse_args()
    res = {"part1": part1(a.rows, a.repeat)}
    print(json.dumps(res["part1"], indent=1), flush=True)
    if not a.skip_ruptures:
        res["part2"] = part2()
        for r in res["part2"]:
            print(json.dumps(r))


if __name__ == "__main__":
    main()
