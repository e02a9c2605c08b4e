"""Benchmark: ``sagfit accept`` against ``sagfit fit`` on the same 100,000-DUT file.

Goal (issue 4): deciding 100,000 DUTs, whole process, takes at most 2× the time of
``sagfit fit FILE --out x.csv`` on the same file. Both commands run as separate
processes, alternating, several times; the script prints the minima and medians and
their ratio. The file is INVENTED (seeded numpy): 5 V regulator boards, 8 readings each.

Run:  python benchmarks/bench_accept.py [--duts 100000] [--repeat 3]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


SPEC = """\
# INVENTED benchmark spec: 5 V rail of our own regulator board
[limits.vth]
min = "4.90V"
max = "5.10V"
[limits.rth]
max = "40mΩ"
[limits.isc]
min = "50A"
[[limits.voltage]]
at = "1.5A"
min = "4.85V"
[[limits.regulation]]
light = "0A"
heavy = "1.5A"
max = "1.5%"
[decision]
rule = "guarded"
"""


def make_file(path: Path, duts: int, seed: int = 20261201) -> None:
    """Write an invented readings file with sagfit.simulate: ``duts`` 5 V regulator boards,
    eight loads from open circuit to 1.5 A, voltage and current both read back."""
    from sagfit.core.simulate import run_csv_text, simulate
    from sagfit.core.units import parse_accuracy

    loads = [float("inf"), 50.0, 20.0, 10.0, 6.8, 4.7, 3.9, 3.3]
    run = simulate(5.02, 0.02, loads, duts=duts, seed=seed, vth_spread=0.004,
                   rth_spread=0.25, measure_current=True, dut_prefix="RB-",
                   voltage_accuracy=parse_accuracy("0.01%+0.5mV", "V"),
                   current_accuracy=parse_accuracy("0.05%+0.5mA", "A"))
    path.write_text(run_csv_text(run, ["INVENTED DATA: sagfit benchmark, regulator boards"]),
                    encoding="utf-8")


def run(cmd: list[str], cwd: Path) -> float:
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)
    dt = time.perf_counter() - t0
    if proc.returncode not in (0, 1, 3):
        sys.exit(f"{' '.join(cmd)} failed ({proc.returncode}): {proc.stderr.strip()}")
    return dt


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--duts", type=int, default=100_000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    exe = [sys.executable, "-m", "sagfit"]
    with tempfile.TemporaryDirectory(prefix="sagfit-bench-") as tmp:
        d = Path(tmp)
        data = d / "boards.csv"
        make_file(data, args.duts)
        (d / "spec.toml").write_text(SPEC, encoding="utf-8")
        opts = ["--voltage-accuracy", "0.01%+0.5mV", "--current-accuracy", "0.05%+0.5mA"]
        fit_cmd = exe + ["fit", str(data), *opts, "--out", str(d / "x.csv")]
        acc_cmd = exe + ["accept", str(data), "--spec", str(d / "spec.toml"), *opts,
                         "--out", str(d / "y.csv")]
        fit_t, acc_t = [], []
        for _ in range(args.repeat):
            fit_t.append(run(fit_cmd, d))
            acc_t.append(run(acc_cmd, d))
        size = os.path.getsize(data) / 1e6
    print(f"{args.duts} DUTs x 8 readings ({size:.1f} MB), {args.repeat} runs each, alternating")
    print(f"sagfit fit    --out: min {min(fit_t):.2f} s, median {statistics.median(fit_t):.2f} s")
    print(f"sagfit accept --out: min {min(acc_t):.2f} s, median {statistics.median(acc_t):.2f} s")
    print(f"ratio accept/fit: min {min(acc_t) / min(fit_t):.2f}, "
          f"median {statistics.median(acc_t) / statistics.median(fit_t):.2f} (goal ≤ 2)")


if __name__ == "__main__":
    main()
