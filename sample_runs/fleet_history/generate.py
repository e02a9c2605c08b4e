"""Regenerate the INVENTED fleet history of sagfit's demos (seeded; not real measurements).

Sixteen 2 V VRLA cells (C01–C16) of the depot's standby string ST-A, load-tested every
four weeks on eight dates with a DC load bank in four steps up to about 100 A. Fourteen cells age
normally (+0.5 % per 4 weeks, with ±1.5 % test-to-test scatter from temperature and
state of charge); C05 (+9 % per 4 weeks) and C12 (+5 % per 4 weeks) age faster.

    python sample_runs/fleet_history/generate.py      # rewrites the CSV files here
"""

from __future__ import annotations

import datetime as dt
import math
import pathlib

import numpy as np

from sagfit.core.simulate import simulate
from sagfit.core.units import parse_accuracy

HERE = pathlib.Path(__file__).resolve().parent
DATES = [dt.date(2026, 4, 7) + dt.timedelta(days=28 * k) for k in range(8)]
CELLS = [f"C{k:02d}" for k in range(1, 17)]
FAST = {"C05": 0.09, "C12": 0.05}          # fractional rise of Rth per 4 weeks
NORMAL_RATE = 0.005
SCATTER = 0.015                             # test-to-test relative scatter of the true Rth
# load-bank steps of about 25, 50, 75 and 100 A at 2.14 V (Ω), after the open-circuit reading
LOADS = [math.inf, 0.0856, 0.0428, 0.02853, 0.0214]
# the instruments of bench.toml beside this file
VOLTS = parse_accuracy("0.01%+0.1mV", "V")
AMPS = parse_accuracy("0.2%+50mA", "A")


def main(seed: int = 20261101) -> None:
    """The scenario draws each cell's true state on each date; sagfit.simulate draws the
    bench readings (meter errors) from it."""
    rng = np.random.default_rng(seed)
    r0 = rng.normal(0.55e-3, 0.02e-3, len(CELLS))          # Ω, at commissioning
    v0 = rng.normal(2.140, 0.004, len(CELLS))               # V, rested open-circuit
    rates = np.array([FAST.get(c, NORMAL_RATE) for c in CELLS])
    for k, day in enumerate(DATES):
        r = r0 * (1.0 + rates * k) * (1.0 + SCATTER * rng.standard_normal(len(CELLS)))
        v_oc = v0 + 0.002 * rng.standard_normal(len(CELLS))
        run = simulate(v_oc, r, LOADS, seed=seed + k, measure_current=True,
                       voltage_accuracy=VOLTS, current_accuracy=AMPS,
                       error_distribution="normal", dut_names=CELLS)
        rows = [f"{run.duts[g]},ST-A,{max(i, 0.0):.2f},{v:.5f}" for g, i, v in
                zip(run.group.tolist(), run.current_A.tolist(), run.voltage_V.tolist())]
        text = ("# INVENTED DATA for sagfit demos: four-weekly DC load test of the depot's\n"
                "# standby string ST-A (sixteen 2 V VRLA cells). Not measurements of any\n"
                "# real product. Regenerate with generate.py (sagfit.simulate, seeded).\n"
                f"# date: {day.isoformat()}\n"
                f"# temperature_C: {21.0 + 2.0 * np.sin(k / 2):.1f}\n"
                "cell,string,current_A,voltage_V\n" + "\n".join(rows) + "\n")
        (HERE / f"string_A_{day.isoformat()}.csv").write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
