"""Regenerate the INVENTED demo readings in this folder with sagfit.simulate (seeded).

Scenario (our own, invented): a field technician's monthly check of the 12 V lead-acid
packs on the depot's standby trolleys, and the 5 V output of our sensor-hub board.
Not measurements of any real product.

    python sample_runs/generate.py        # rewrites pack_a.csv, fleet_packs.csv, reg5v_board.csv,
                                          # traces/cell_c07_trace.csv, traces/drive_profile.csv

Also invented: a logged trace of one lithium-ion cell of our own 3 Ah design (load steps,
an HPPC-style pulse pair, a two-level DC-resistance step) and a current profile for
`sagfit respond`.
"""

from __future__ import annotations

import math
import pathlib

from sagfit.core.simulate import simulate
from sagfit.core.units import parse_accuracy

HERE = pathlib.Path(__file__).resolve().parent
HEAD = ("# INVENTED DATA for sagfit demos: a field technician's monthly check of 12 V\n"
        "# lead-acid packs on the depot's standby trolleys. Not measurements of any real\n"
        "# product. Regenerate with sample_runs/generate.py (sagfit.simulate, seeded).\n"
        "# date: 2026-11-03\n# temperature_C: 21.5\n")
LOADS = [math.inf, 10.0, 4.7, 2.2, 1.0, 0.47]          # E12 values, 1 % wire-wound
RKM = {math.inf: "open", 10.0: "10R", 4.7: "4R7", 2.2: "2R2", 1.0: "1R0", 0.47: "R47"}
DMM = parse_accuracy("0.015%+2mV", "V")               # the depot's bench DMM spec
PACKS = {"PK-07": (12.74, 0.0215), "PK-08": (12.71, 0.0232), "PK-09": (12.76, 0.0208),
         "PK-10": (12.69, 0.0241), "PK-11": (12.73, 0.0219), "PK-12": (12.52, 0.0415)}


def packs() -> None:
    one = simulate(12.74, 0.0215, LOADS, seed=7, voltage_accuracy=DMM, load_tolerance=1.0)
    lines = [f"{'open' if math.isinf(r) else f'{r:g}'},{v:.4f}"
             for r, v in zip(one.load_ohm.tolist(), one.voltage_V.tolist())]
    (HERE / "pack_a.csv").write_text(
        HEAD + "# one pack, PK-07, load resistors from the E12 series, 1 % tolerance\n"
        "load_ohm,voltage_V\n" + "\n".join(lines) + "\n", encoding="utf-8")

    names = list(PACKS)
    run = simulate([PACKS[n][0] for n in names], [PACKS[n][1] for n in names], LOADS,
                   seed=11, voltage_accuracy=DMM, load_tolerance=1.0, dut_names=names)
    lines = [f"{run.duts[g]},{RKM[r]},{v:.4f}" for g, r, v in
             zip(run.group.tolist(), run.load_ohm.tolist(), run.voltage_V.tolist())]
    (HERE / "fleet_packs.csv").write_text(
        HEAD + "# six packs of trolley string B; PK-12 is an older pack\n"
        "dut,load,voltage_V\n" + "\n".join(lines) + "\n", encoding="utf-8")


def regulator() -> None:
    # an electronic load in constant-resistance steps, current and voltage both read back;
    # written as a spreadsheet in a decimal-comma locale would save it
    loads = [math.inf, 50.0, 20.0, 10.0, 6.8, 5.0, 4.0, 3.3]
    run = simulate(5.021, 0.038, loads, seed=13, measure_current=True,
                   voltage_accuracy=parse_accuracy("0.012%+0.5mV", "V"),
                   current_accuracy=parse_accuracy("0.05%+0.3mA", "A"))
    lines = [f"{i * 1e3:.1f};{v:.4f}".replace(".", ",")
             for i, v in zip(run.current_A.tolist(), run.voltage_V.tolist())]
    (HERE / "reg5v_board.csv").write_text(
        "# INVENTED DATA for sagfit demos: 5 V regulator output of our sensor hub board,\n"
        "# rev C, serial RB-0113, swept with an electronic load (both read back).\n"
        "# Regenerate with sample_runs/generate.py (sagfit.simulate, seeded).\n"
        "# date: 2026-11-04\n"
        "Current [mA];Voltage [V]\n" + "\n".join(lines) + "\n", encoding="utf-8")


def cell_trace() -> None:
    """Invented trace: R0 25 mΩ + 12 mΩ‖(τ 2.5 s) + 8 mΩ‖(τ 25 s), OCV 3.65 V, with
    0.3 mV and 3 mA of noise (seeded)."""
    import numpy as np

    from sagfit.core.rc_model import RCFit, predict_voltage

    model = RCFit.from_record({
        "branches": 2, "i_base_A": 0.0, "u_base": {"value": 3.65, "u": 0},
        "r0": {"value": 0.025, "u": 0}, "r1": {"value": 0.012, "u": 0},
        "tau1": {"value": 2.5, "u": 0}, "r2": {"value": 0.008, "u": 0},
        "tau2": {"value": 25.0, "u": 0}})
    # (duration s, current A): load steps with rests, a 2C discharge pulse and a 75 %
    # regeneration pulse, then 0.2 It for 10 s followed by 1 It for 1 s
    plan = [(120, 0.0), (200, 0.5), (200, 0.0), (200, 1.0), (200, 0.0), (200, 2.0),
            (200, 0.0), (200, 3.0), (300, 0.0), (10, 6.0), (40, 0.0), (10, -4.5),
            (200, 0.0), (10, 0.6), (1, 3.0), (120, 0.0)]
    # logged every 1 s through the load steps, every 0.2 s from the pulses on
    t = np.r_[np.arange(0.0, 1520.0, 1.0), np.arange(1520.0, sum(d for d, _ in plan), 0.2)]
    ends = np.cumsum([d for d, _ in plan])
    i = np.array([c for _, c in plan])[np.minimum(np.searchsorted(ends, t, side="right"),
                                                   len(plan) - 1)]
    rng = np.random.default_rng(17)
    v = predict_voltage(model, t, i) + rng.normal(0, 3e-4, t.size)
    i_meas = i + rng.normal(0, 3e-3, t.size)
    head = ("# INVENTED DATA for sagfit demos: a logged trace of one lithium-ion cell of our\n"
            "# own 3 Ah design on the bench cycler. Not measurements of any real product.\n"
            "# Regenerate with sample_runs/generate.py (seeded).\n")
    rows = "\n".join(f"C-07,{a:.1f},{b:.4f},{c:.5f}" for a, b, c in zip(t, i_meas, v))
    (HERE / "traces" / "cell_c07_trace.csv").write_text(
        head + "cell,time_s,current_A,voltage_V\n" + rows + "\n", encoding="utf-8")
    tp = np.arange(0.0, 300.0, 1.0)
    ip = np.select([tp < 30, tp < 90, tp < 120, tp < 200, tp < 230], [0.0, 2.5, -1.5, 4.0,
                                                                       0.0], 1.0)
    (HERE / "traces" / "drive_profile.csv").write_text(
        "# INVENTED current profile for `sagfit respond` (each current holds to the next "
        "row)\ntime_s,current_A\n" + "\n".join(f"{a:g},{b:g}" for a, b in zip(tp, ip))
        + "\n", encoding="utf-8")


if __name__ == "__main__":
    packs()
    regulator()
    cell_trace()
