"""What each remaining performance trick is worth to a whole user command.

Every trick that is still in the code is switched off, one at a time, by a small runner
(``_trick_runner.py``) that patches it out before the console program starts, and the
whole ``sagfit fit FILE --voltage-accuracy … --load-tolerance 1% --out results.csv`` is
timed as a process, alternated with the unchanged program, on one DUT and on 100,000
DUTs × 8 readings (invented data, sagfit.simulate, fixed seed).

Reported per trick: the median time with the trick switched off divided by the median
time of the unchanged program (> 1: the trick saves time). The rule of the project
(DEVELOPERS.md, "Performance tricks"): a trick stays only where it is worth more than
about 5 % of a user-visible command's time.

Usage: python benchmarks/bench_tricks.py [--repeat N] [--duts N]
"""

from __future__ import annotations

import argparse
import pathlib
import statistics
import sys
import tempfile

HERE = pathlib.Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_fit import make, timed  # noqa: E402

TRICKS = {
    "none": "the program as shipped",
    "mallopt": "glibc keeping freed memory (mallopt)",
    "threads": "two fit threads over slices of the batch (one pass instead)",
    "hash-beside": "the file's SHA-256 on a thread beside the column checks (inline)",
    "whole-file-rows": "rows numbered without a line scan when every line is a row",
}


def cmd(trick, src, dst):
    return [sys.executable, str(HERE / "_trick_runner.py"), trick, "fit", str(src),
            "--voltage-accuracy", "0.015%+2mV", "--load-tolerance", "1%", "--out", str(dst)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--duts", type=int, default=100_000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = pathlib.Path(tmp)
        files = {"1 DUT": tmp / "one.csv", f"{args.duts:,} DUTs": tmp / "many.csv"}
        make(files["1 DUT"], 1)
        make(files[f"{args.duts:,} DUTs"], args.duts)
        print(f"{'trick switched off':<22} " + " ".join(f"{k:>22}" for k in files))
        times = {(t, k): [] for t in TRICKS for k in files}
        for _ in range(args.repeat):  # rounds: every variant once per round, alternated
            for k, src in files.items():
                for t in TRICKS:
                    times[(t, k)].append(timed(cmd(t, src, tmp / "out.csv"), tmp)[0])
        for t, what in TRICKS.items():
            cells = []
            for k in files:
                base = statistics.median(times[("none", k)])
                med = statistics.median(times[(t, k)])
                cells.append(f"{med:8.3f} s ({med / base:5.2f}×)")
            print(f"{t:<22} " + " ".join(f"{c:>22}" for c in cells) + f"   {what}")


if __name__ == "__main__":
    main()
