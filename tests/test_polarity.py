"""Every check gives the same flags whichever way the leads are connected (plumbing test
with physical symmetry as the reference: negating every voltage, every current or both
describes the same source; Vth changes sign and Rth does not).

Regression: readings were ordered by atan2(I, V), so with V < 0 the open-circuit reading
got +π and sorted last: knees vanished from current-limited supplies and spurious ones
appeared on linear sources.
"""

import numpy as np
import pytest

import sagfit
from sagfit.core.readings import Readings
from sagfit.core.simulate import simulate
from sagfit.core.units import parse_accuracy

VA = parse_accuracy("0.05%+2mV", "V")
IA = parse_accuracy("0.2%+1mA", "A")


def _runs():
    loads = [np.inf, 20, 10, 6.8, 4.7, 3.3, 2.2, 1.5, 1.0, 0.68]
    limited = simulate(12.0, 0.2, loads, duts=24, seed=5, voltage_accuracy=VA,
                       current_accuracy=IA, measure_current=True, knee_current=4.0,
                       vth_spread=0.01, rth_spread=0.1, dut_prefix="LIM-")
    sagging = simulate(12.0, 0.2, loads, duts=24, seed=6, voltage_accuracy=VA,
                       current_accuracy=IA, measure_current=True, curvature=0.05,
                       dut_prefix="SAG-")
    linear = simulate(5.0, 0.05, loads, duts=24, seed=7, voltage_accuracy=VA,
                      current_accuracy=IA, measure_current=True, dut_prefix="LIN-")
    return limited, sagging, linear


def _flags(run, sv, si):
    rd = Readings.from_arrays(voltage=sv * run.voltage_V, current=si * run.current_A,
                              dut=np.asarray(run.duts)[run.group], voltage_accuracy=VA,
                              current_accuracy=IA)
    fits = sagfit.fit(rd)
    return [sorted(f.code for f in fl) for fl in fits.flags], fits


@pytest.mark.parametrize("sv, si", [(-1, 1), (1, -1), (-1, -1)],
                         ids=["negated-V", "negated-I", "both"])
def test_flags_do_not_depend_on_polarity(sv, si):
    for run in _runs():
        ref, f0 = _flags(run, 1, 1)
        got, f1 = _flags(run, sv, si)
        assert got == ref
        np.testing.assert_allclose(f1.vth, sv * f0.vth, rtol=1e-9)
        np.testing.assert_allclose(f1.rth, sv * si * f0.rth, rtol=1e-9)


def test_knees_are_found_on_current_limited_supplies():
    limited, _, _ = _runs()
    for sv in (1, -1):
        flags, _ = _flags(limited, sv, 1)
        assert np.mean(["knee" in f for f in flags]) >= 0.9
