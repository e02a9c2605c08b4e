"""Benchmark: ``sagfit.core.trend.analyse_trends`` against a per-DUT loop peer, same run.

Peer: for each DUT, ``numpy.polyfit(t, rth, 1, w=1/u, cov="unscaled")`` plus the same
S² = max(1, χ²/ν) scaling — the obvious per-DUT way to get a weighted rate. Goal
(issue 5, "vectorised over DUTs"): on 20,000 DUTs × 8 records the vectorised trend, with
every flag and the fleet medians, takes at most 1/5 of the peer's time, which computes
the rates only. Also times a record + read round trip of the SQLite store.

The data are INVENTED (seeded numpy): stable 2 V cells with ±2 % scatter, 1 % fast agers.

Run:  python benchmarks/bench_trend.py [--duts 20000] [--repeat 3]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sagfit.core.trend import DAY, analyse_trends  # noqa: E402


def make(duts: int, per: int = 8, seed: int = 20261201):
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(duts), per)
    t = 1.775e9 + np.tile(np.arange(per) * 28.0, duts) * DAY
    fast = rng.random(duts) < 0.01
    rate = np.where(fast, 0.06, 0.004)[g]
    k = np.tile(np.arange(per), duts)
    r = 0.55e-3 * (1 + rate * k) * (1 + 0.02 * rng.standard_normal(g.size))
    u = np.full(g.size, 2e-6)
    return g, t, r, u


def peer(g, t, r, u, duts):
    rates = np.empty(duts)
    per = np.bincount(g, minlength=duts)
    start = np.concatenate(([0], np.cumsum(per)[:-1]))
    for k in range(duts):
        s = slice(start[k], start[k] + per[k])
        x = (t[s] - t[s][-1]) / DAY
        p, cov = np.polyfit(x, r[s], 1, w=1 / u[s], cov="unscaled")
        chi2 = np.sum(((r[s] - np.polyval(p, x)) / u[s]) ** 2)
        s2 = max(1.0, chi2 / (per[k] - 2))
        rates[k] = 30 * p[0]
        _ = np.sqrt(cov[0, 0] * s2)
    return rates


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--duts", type=int, default=20000)
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    g, t, r, u = make(a.duts)
    names = [f"C{k:06d}" for k in range(a.duts)]
    labels = [f"S{k // 24}" for k in range(a.duts)]
    ours, theirs = [], []
    for _ in range(a.repeat):
        t0 = time.perf_counter()
        tr = analyse_trends(g, names, t, r, u, labels=labels)
        ours.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        rates = peer(g, t, r, u, a.duts)
        theirs.append(time.perf_counter() - t0)
    assert np.allclose(tr.rate, rates, rtol=1e-8, atol=1e-15)
    ratio = min(ours) / min(theirs)
    print(f"{a.duts} DUTs × 8 records: analyse_trends min {min(ours):.3f} s "
          f"(median {statistics.median(ours):.3f}); per-DUT polyfit peer min "
          f"{min(theirs):.3f} s; ratio {ratio:.3f} (goal ≤ 0.2) -> "
          f"{'OK' if ratio <= 0.2 else 'MISSED'}; {int(tr.flagged.sum())} flagged")

    from sagfit.core.fit import fit_lines
    from sagfit.io.history import History
    from sagfit.core.readings import Readings

    rng = np.random.default_rng(1)
    i = np.tile([0.0, 25.0, 50.0, 75.0], a.duts)
    v = 2.14 - 0.55e-3 * i + rng.normal(0, 5e-5, i.size)
    fits = fit_lines(Readings.from_arrays(voltage=v, current=i, dut=np.repeat(names, 4),
                                          u_voltage=np.full(i.size, 5e-5)))
    with tempfile.TemporaryDirectory() as d:
        with History(Path(d) / "h.sqlite") as h:
            t0 = time.perf_counter()
            h.record(fits, test_time=1.775e9, file_name="bench.csv", sha256="0" * 64)
            t1 = time.perf_counter()
            n = len(h.records())
            t2 = time.perf_counter()
    print(f"history: record {a.duts} DUTs {t1 - t0:.3f} s, read {n} records {t2 - t1:.3f} s")


if __name__ == "__main__":
    main()
