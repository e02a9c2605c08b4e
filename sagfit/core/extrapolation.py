"""How far Isc and Pmax lie beyond the tested currents.

Isc = Vth/Rth is the current at R = 0 and Pmax = Vth²/(4·Rth) the power at I = Isc/2: both
are read off the fitted line, often far outside the currents a sweep reached (a regulator
or a current-limited supply is never driven there, and its line does not hold there). A
figure read off a line beyond the data is an extrapolation (common practice in regression:
N. R. Draper, H. Smith, *Applied Regression Analysis*, 3rd ed., 1998, ch. 1), and sagfit
labels it so wherever it shows it.
"""

from __future__ import annotations

import numpy as np

__all__ = ["max_tested_current", "extrapolated_isc_pmax", "REACHED"]

#: A figure counts as measured when the sweep reached this share of its current.
REACHED = 0.9


def max_tested_current(readings, m: int) -> np.ndarray:
    """Highest |I| measured per DUT (A; NaN for a DUT without readings)."""
    hi = np.full(m, -np.inf)
    np.maximum.at(hi, readings.group, np.abs(readings.current))
    hi[~np.isfinite(hi)] = np.nan
    return hi


def extrapolated_isc_pmax(fits, readings) -> tuple[np.ndarray, np.ndarray]:
    """Per DUT: (Isc extrapolated, Pmax extrapolated) as boolean arrays.

    Isc is extrapolated when the highest tested current is below ``REACHED``·Isc, Pmax
    when it is below ``REACHED``·Isc/2 (where the power peaks). A DUT without a fit or
    without readings counts as extrapolated (nothing shows otherwise).
    """
    m = len(fits)
    hi = max_tested_current(readings, m) if readings.n_duts == m else np.full(m, np.nan)
    isc = np.abs(np.asarray(fits.isc, dtype=float))
    with np.errstate(invalid="ignore"):
        ex_isc = ~(hi >= REACHED * isc)
        ex_pmax = ~(hi >= REACHED * isc / 2)
    return ex_isc, ex_pmax
