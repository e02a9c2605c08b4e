"""In-process benchmark of the diagnostics pass against the fit it checks (its peer).

Both run on the same simulated readings in the same session, alternating, repeated.
Target (issue 3): diagnostics on 100,000 DUTs × 8 readings cost no more than the fit
itself and stay under about 0.6 s on the project's 2-core machine.

Usage: python benchmarks/bench_diagnostics.py [--duts N] [--repeat N]
The data are invented (fixed seed): a 12.7 V pack with 22 mΩ, loads open…0.47 Ω, voltmeter
±(0.05 % + 2 mV), 1 % load resistors.
"""

from __future__ import annotations

import argparse
import json
import statistics
import time

import numpy as np


def make(duts: int, seed: int = 3):
    """Invented readings drawn with sagfit.simulate: 12.7 V packs, 22 mΩ, eight loads."""
    from sagfit.core.simulate import simulate
    from sagfit.core.units import parse_accuracy

    va = parse_accuracy("0.05%+2mV", "V")
    run = simulate(12.7, 0.022, [np.inf, 47, 22, 10, 4.7, 2.2, 1.0, 0.47], duts=duts, seed=seed,
                   voltage_accuracy=va, load_tolerance=1.0, error_distribution="normal",
                   dut_prefix="D")
    return run.to_readings(voltage_accuracy=va, load_tolerance=1.0, with_time=False)


def main() -> None:
    from sagfit.core.checks import diagnose
    from sagfit.core.fit import fit_lines

    ap = argparse.ArgumentParser()
    ap.add_argument("--duts", type=int, default=100_000)
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    readings = make(a.duts)
    t_fit, t_diag = [], []
    for _ in range(a.repeat):
        t0 = time.perf_counter()
        fits = fit_lines(readings)
        t1 = time.perf_counter()
        diagnose(readings, fits)
        t2 = time.perf_counter()
        t_fit.append(t1 - t0)
        t_diag.append(t2 - t1)
    out = {"duts": a.duts, "readings_per_dut": 8,
           "fit_s": {"min": min(t_fit), "median": statistics.median(t_fit)},
           "diagnostics_s": {"min": min(t_diag), "median": statistics.median(t_diag)},
           "ratio_diagnostics_to_fit": min(t_diag) / min(t_fit)}
    print(json.dumps(out, indent=2))


if __name__ == "__main__":
    main()
