"""Regenerate the INVENTED fleet history of sagfit's demos (seeded; not real measurements).

Sixteen 2 V VRLA cells (C01–C16) of the depot's standby string ST-A, load-tested every
four weeks on eight dates with a DC electronic load at 0–100 A. Fourteen cells age
normally (+0.5 % per 4 weeks, with ±1.5 % test-to-test scatter from temperature and
state of charge); C05 (+9 % per 4 weeks) and C12 (+5 % per 4 weeks) age faster.

    python sample_runs/fleet_history/generate.py      # rewrites the CSV files here
"""

from __future__ import annotations

import datetime as dt
import pathlib

import numpy as np

HERE = pathlib.Path(__file__).resolve().parent
DATES = [dt.date(2026, 4, 7) + dt.timedelta(days=28 * k) for k in range(8)]
CELLS = [f"C{k:02d}" for k in range(1, 17)]
FAST = {"C05": 0.09, "C12": 0.05}          # fractional rise of Rth per 4 weeks
NORMAL_RATE = 0.005
SCATTER = 0.015                             # test-to-test relative scatter of the true Rth
CURRENTS = np.array([0.0, 25.0, 50.0, 75.0, 100.0])


def main(seed: int = 20261101) -> None:
    rng = np.random.default_rng(seed)
    r0 = rng.normal(0.55e-3, 0.02e-3, len(CELLS))          # Ω, at commissioning
    v0 = rng.normal(2.140, 0.004, len(CELLS))               # V, rested open-circuit
    for k, day in enumerate(DATES):
        rows = []
        for c, cell in enumerate(CELLS):
            rate = FAST.get(cell, NORMAL_RATE)
            r = r0[c] * (1.0 + rate * k) * (1.0 + SCATTER * rng.standard_normal())
            v_oc = v0[c] + 0.002 * rng.standard_normal()
            i_true = CURRENTS + rng.normal(0.0, 0.2, CURRENTS.size) * (CURRENTS > 0)
            v = v_oc - r * i_true + rng.normal(0.0, 0.08e-3, CURRENTS.size)
            i_read = i_true + rng.normal(0.0, 0.05, CURRENTS.size) * (CURRENTS > 0)
            for ii, vv in zip(i_read, v):
                rows.append(f"{cell},ST-A,{max(ii, 0.0):.2f},{vv:.5f}")
        text = ("# INVENTED DATA for sagfit demos: four-weekly DC load test of the depot's\n"
                "# standby string ST-A (sixteen 2 V VRLA cells). Not measurements of any\n"
                "# real product. Regenerate with generate.py (seeded).\n"
                f"# date: {day.isoformat()}\n"
                f"# temperature_C: {21.0 + 2.0 * np.sin(k / 2):.1f}\n"
                "cell,string,current_A,voltage_V\n" + "\n".join(rows) + "\n")
        (HERE / f"string_A_{day.isoformat()}.csv").write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
