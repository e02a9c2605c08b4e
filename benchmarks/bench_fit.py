"""Benchmark of ``sagfit fit`` against its peers, all timed as whole processes.

Peers, run on the same files in the same session, in rounds (each round times sagfit and
the floor on both sizes; the statsmodels loop's rounds fall between them), repeated:
  (a) a per-DUT statsmodels WLS loop (peers/statsmodels_loop.py),
  (b) a hand-vectorised numpy WLS floor (peers/floor_wls.py),
  start-up: a bare ``python -c "import pandas, scipy.special, typer"``.

Targets (issue "Fit a source's equivalent…"): cost per additional DUT, (t(100k) − t(10k))/90k,
at least 30× below the statsmodels loop's; ``sagfit fit`` on 100k DUTs × 8 readings,
diagnostics included, within 1.5× of (b); peak memory < 1 GB for 1,000,000 rows; a
one-DUT ``sagfit fit`` within 1.3× of the bare import.

Usage: python benchmarks/bench_fit.py [--repeat N] [--sm-repeat N] [--quick] [--skip-statsmodels]
The data are invented (sagfit.simulate, fixed seed) and written to a temporary folder.
Reported: minima and medians of each command's runs, and the ratios of both.
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import pathlib
import statistics
import subprocess
import sys
import tempfile
import time

HERE = pathlib.Path(__file__).resolve().parent
LOADS = [float("inf"), 100, 47, 22, 10, 4.7, 2.2, 1.0]
SPEC = ("0.015", "0.002")  # voltmeter ±(0.015 % + 2 mV)


def make(path: pathlib.Path, duts: int, seed: int = 1) -> None:
    from sagfit.core.simulate import run_csv_text, simulate
    from sagfit.core.units import parse_accuracy

    run = simulate(12.6, 0.05, LOADS, duts=duts, seed=seed, vth_spread=0.01, rth_spread=0.2,
                   voltage_accuracy=parse_accuracy("0.015%+2mV", "V"), load_tolerance=1.0)
    path.write_text(run_csv_text(run, [f"INVENTED benchmark data: {duts} simulated DUTs"]))


def timed(cmd: list[str], cwd) -> tuple[float, int]:
    """Wall time (s) and peak RSS (kB) of one whole process."""
    t0 = time.perf_counter()
    p = subprocess.Popen(cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(p.pid, 0)
    dt = time.perf_counter() - t0
    err = p.stderr.read().decode()
    p.stderr.close()
    code = os.waitstatus_to_exitcode(status)
    if code not in (0, 3):
        raise SystemExit(f"{' '.join(cmd)} failed ({code}): {err}")
    return dt, usage.ru_maxrss


def sagfit_cmd(src, dst):
    return [sys.executable, "-m", "sagfit", "fit", str(src), "--voltage-accuracy",
            "0.015%+2mV", "--load-tolerance", "1%", "--out", str(dst)]


def floor_cmd(src, dst):
    return [sys.executable, str(HERE / "peers" / "floor_wls.py"), str(src), str(dst), *SPEC]


def sm_cmd(src, dst):
    return [sys.executable, str(HERE / "peers" / "statsmodels_loop.py"), str(src), str(dst), *SPEC]


def alternate(cmds: dict, repeat: int, cwd) -> dict:
    times = {k: [] for k in cmds}
    for _ in range(repeat):
        for k, c in cmds.items():
            times[k].append(timed(c, cwd)[0])
    return {k: {"min": min(v), "median": statistics.median(v), "runs": v} for k, v in times.items()}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--quick", action="store_true", help="1,000 and 10,000 DUTs only")
    ap.add_argument("--skip-statsmodels", action="store_true")
    ap.add_argument("--sm-repeat", type=int, default=2,
                    help="runs of the statsmodels loop per size (it takes ~30 s at 100k)")
    args = ap.parse_args()
    small, large = (1_000, 10_000) if args.quick else (10_000, 100_000)
    # A normal installation caches bytecode on first use; this sandbox sets
    # PYTHONDONTWRITEBYTECODE, so compile once, as a user's first run would.
    import compileall

    compileall.compile_dir(str(HERE.parent / "sagfit"), quiet=1)
    compileall.compile_file(str(HERE.parent / "_sagfit_entry.py"), quiet=1)
    res: dict = {"machine": os.uname().machine, "cpus": os.cpu_count(), "repeat": args.repeat}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = pathlib.Path(tmp)
        files = {}
        for n in (1, small, large):
            files[n] = tmp / f"sim_{n}.csv"
            make(files[n], n)
        out = tmp / "out.csv"

        start = alternate({"bare_import": [sys.executable, "-c", "import pandas, scipy.special, typer"],
                           "sagfit_one_dut": sagfit_cmd(files[1], out)}, max(args.repeat, 10), tmp)
        res["startup"] = start
        res["startup_ratio_min"] = start["sagfit_one_dut"]["min"] / start["bare_import"]["min"]
        res["startup_ratio_median"] = (start["sagfit_one_dut"]["median"]
                                       / start["bare_import"]["median"])

        # One round runs sagfit and the floor on both sizes, one after the other, so that
        # the two sizes of a difference are timed minutes apart at most; the slow
        # statsmodels loop runs its rounds between these (spread over the session), so
        # that a quiet or a busy spell of the machine does not fall on one peer only.
        cmds = {(tool, n): make_cmd(files[n], out) for n in (small, large)
                for tool, make_cmd in (("sagfit", sagfit_cmd), ("floor", floor_cmd))}
        times = {k: [] for k in cmds}
        sm_times = {small: [], large: []}
        sm_after = collections.Counter(
            min(args.repeat, max(1, round((j + 1) * args.repeat / (args.sm_repeat + 1))))
            for j in range(0 if args.skip_statsmodels else args.sm_repeat))
        for rnd in range(1, args.repeat + 1):
            for k, c in cmds.items():
                times[k].append(timed(c, tmp)[0])
            for _ in range(sm_after[rnd]):
                for n in (small, large):
                    sm_times[n].append(timed(sm_cmd(files[n], out), tmp)[0])

        def summary(v):
            return {"min": min(v), "median": statistics.median(v), "runs": v}

        for n in (small, large):
            res[f"fit_{n}"] = {tool: summary(times[(tool, n)]) for tool in ("sagfit", "floor")}
        big = res[f"fit_{large}"]
        res["vs_floor_ratio_min"] = big["sagfit"]["min"] / big["floor"]["min"]
        res["vs_floor_ratio_median"] = big["sagfit"]["median"] / big["floor"]["median"]

        def per_dut(t_small, t_large):
            return {stat: (t_large[stat] - t_small[stat]) / (large - small)
                    for stat in ("min", "median")}

        per = {"sagfit": per_dut(res[f"fit_{small}"]["sagfit"], big["sagfit"])}
        if not args.skip_statsmodels:
            sm = {n: summary(sm_times[n]) for n in (small, large)}
            res["statsmodels"] = {str(small): sm[small]["min"], str(large): sm[large]["min"],
                                  "runs": {str(n): sm_times[n] for n in (small, large)}}
            per["statsmodels"] = per_dut(sm[small], sm[large])
            res["per_dut_ratio"] = per["statsmodels"]["min"] / per["sagfit"]["min"]
            res["per_dut_ratio_median"] = (per["statsmodels"]["median"]
                                           / per["sagfit"]["median"])
        res["per_dut_seconds"] = {k: v["min"] for k, v in per.items()}
        res["per_dut_seconds_median"] = {k: v["median"] for k, v in per.items()}

        if not args.quick:
            rows = tmp / "sim_1m.csv"
            make(rows, 125_000, seed=2)  # 1,000,000 readings
            t, rss = timed(sagfit_cmd(rows, out), tmp)
            res["one_million_rows"] = {"seconds": t, "peak_rss_MB": rss / 1024}
    print(json.dumps(res, indent=2))
    (HERE / "results-latest.json").write_text(json.dumps(res, indent=2) + "\n")


if __name__ == "__main__":
    main()
