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

import numpy as np

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


def make_file(path: Path, duts: int, per: int = 8, seed: int = 20261201) -> None:
    """Write an invented readings file: ``duts`` boards × ``per`` current steps."""
    rng = np.random.default_rng(seed)
    vth = rng.normal(5.02, 0.02, duts)
    rth = rng.lognormal(np.log(0.02), 0.25, duts)
    current = np.tile(np.linspace(0.0, 1.5, per), duts) + rng.normal(0, 2e-4, duts * per)
    v = np.repeat(vth, per) - np.repeat(rth, per) * current + rng.normal(0, 4e-4, duts * per)
    names = np.repeat(np.char.add("RB-", np.char.zfill(np.arange(duts).astype(str), 6)), per)
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("# INVENTED DATA: sagfit benchmark, regulator boards\n")
        fh.write("dut,current_A,voltage_V\n")
        body = np.char.add(np.char.add(np.char.add(names, ","),
                                       np.char.mod("%.5f", current)),
                           np.char.add(",", np.char.mod("%.5f", v)))
        fh.write("\n".join(body.tolist()))
        fh.write("\n")


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
