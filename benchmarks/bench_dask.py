"""Data sets on Dask against the single-process fit, on the same readings in the same run.

    python benchmarks/bench_dask.py [--readings 5000000] [--files 20] [--repeat 3]

Writes an invented, seeded data set (DUTs of 10 readings, Parquet files in a temporary
folder), then alternates, ``--repeat`` times:

* single process: all files read with pandas, one ``Readings.from_arrays`` and ``sagfit.fit``;
* Dask, 1 and 2 worker processes (LocalCluster, one thread each): ``fit_dataset`` →
  ``to_parquet``.

Prints the minimum and median wall time of each, the speed-up of 2 workers over 1, the overhead
of Dask (1 worker) over the single process, and the peak resident memory of each worker
process (sampled by the nanny's monitor, read via ``psutil`` on the worker's own process).
"""

from __future__ import annotations

import argparse
import logging
import os
import statistics
import tempfile
import time

import numpy as np
import pandas as pd


def make_dataset(root: str, readings: int, files: int, per_dut: int = 10, seed: int = 5):
    rng = np.random.default_rng(seed)
    per_file = readings // files // per_dut
    for f in range(files):
        cur = np.tile(np.linspace(0.0, 2.0, per_dut), per_file)
        vth = np.repeat(rng.normal(3.7, 0.05, per_file), per_dut)
        rth = np.repeat(rng.normal(0.04, 0.004, per_file), per_dut)
        v = vth - rth * cur + rng.normal(0, 1e-3, cur.size)
        dut = np.repeat(np.array([f"F{f:03d}-{k:06d}" for k in range(per_file)]), per_dut)
        pd.DataFrame({"dut": dut, "voltage": v, "current": cur, "u_voltage": 1e-3,
                      "u_current": 1e-3}).to_parquet(os.path.join(root, f"p{f:03d}.parquet"))
    return per_file * files * per_dut


def single_process(root: str) -> float:
    from sagfit.core.analysis import fit
    from sagfit.core.readings import Readings

    t = time.perf_counter()
    whole = pd.concat([pd.read_parquet(os.path.join(root, f))
                       for f in sorted(os.listdir(root))], ignore_index=True)
    r = Readings.from_arrays(dut=whole["dut"].to_numpy(dtype=str),
                             voltage=whole["voltage"].to_numpy(),
                             current=whole["current"].to_numpy(),
                             u_voltage=whole["u_voltage"].to_numpy(),
                             u_current=whole["u_current"].to_numpy())
    fit(r)
    return time.perf_counter() - t


def _peak_rss() -> int:
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux: KiB


def on_dask(client, root: str, out: str) -> float:
    from sagfit.io.dataset import fit_dataset, read_dataset

    t = time.perf_counter()
    fit_dataset(read_dataset(root)).to_parquet(out, write_index=False,
                                               compute_kwargs={"scheduler": client})
    return time.perf_counter() - t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--readings", type=int, default=5_000_000)
    ap.add_argument("--files", type=int, default=20)
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    from distributed import Client, LocalCluster

    with tempfile.TemporaryDirectory() as tmp:
        data = os.path.join(tmp, "data")
        os.mkdir(data)
        n = make_dataset(data, a.readings, a.files)
        print(f"{n:,} readings, {n // 10:,} DUTs, {a.files} Parquet files")
        times: dict[str, list[float]] = {"single": [], "dask1": [], "dask2": []}
        peaks: dict[str, int] = {"dask1": 0, "dask2": 0}
        clusters = {k: LocalCluster(n_workers=w, threads_per_worker=1, processes=True,
                                    dashboard_address=":0", silence_logs=logging.ERROR)
                    for k, w in (("dask1", 1), ("dask2", 2))}
        clients = {k: Client(c) for k, c in clusters.items()}
        try:
            for i in range(a.repeat):
                times["single"].append(single_process(data))
                for k in ("dask1", "dask2"):
                    times[k].append(on_dask(clients[k], data, os.path.join(tmp, f"{k}-{i}")))
                    rss = clients[k].run(_peak_rss)
                    peaks[k] = max(peaks[k], *rss.values())
        finally:
            for k in clients:
                clients[k].close()
                clusters[k].close()
        for k, v in times.items():
            print(f"{k:7s} min {min(v):7.2f} s  median {statistics.median(v):7.2f} s")
        m = {k: min(v) for k, v in times.items()}
        print(f"speed-up 2 workers / 1 worker (ratio of minima): {m['dask1'] / m['dask2']:.2f}")
        print(f"Dask 1 worker / single process (ratio of minima): "
              f"{m['dask1'] / m['single']:.2f}")
        print(f"Dask 2 workers / single process (ratio of minima): "
              f"{m['dask2'] / m['single']:.2f}")
        for k, p in peaks.items():
            print(f"peak memory per worker, {k}: {p / 2**20:.0f} MiB")
        print(f"single process peak (this process, whole run): {_peak_rss() / 2**20:.0f} MiB")


if __name__ == "__main__":
    main()
