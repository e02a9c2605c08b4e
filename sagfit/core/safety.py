"""The usual cautions, raised by what the numbers say.

These are reminders drawn from common practice, not a safety assessment. Thresholds:
60 V DC as the limit above which a voltage is treated as hazardous (common practice,
the usual extra-low-voltage boundary for DC); 10 A prospective short-circuit current
as "high current" and 5 W of resistor dissipation as "hot" (sagfit's own choices,
deliberately low).
"""

from __future__ import annotations

import numpy as np

from .formatting import format_value

__all__ = ["cautions", "fit_cautions", "caution_inputs", "merged_cautions", "pulse_cautions",
           "prospective_isc", "DEFERRAL", "HAZARDOUS_V",
           "HIGH_CURRENT_A", "HOT_RESISTOR_W"]

HAZARDOUS_V = 60.0
HIGH_CURRENT_A = 10.0
HOT_RESISTOR_W = 5.0
DEFERRAL = ("These reminders are not a safety assessment: follow local electrical codes, "
            "the manuals of the source and of every instrument, and licensed practice.")


def cautions(*, vth=None, isc=None, reading_power=None, voltages=None,
             isc_extrapolated=None, tested_current=None, always: bool = False) -> list[str]:
    """Cautions for a set of results (arrays; NaN ignored); the deferral line last.

    ``isc`` holds prospective short-circuit currents the readings reached or came near
    (or a knee's limit); ``isc_extrapolated`` those read off the line far beyond the tested
    currents (``tested_current``, the highest current reached): a regulator or a
    current-limited supply is not shown by its readings to deliver them, so the caution
    says the figure is an extrapolation rather than warning of what a short does.

    Returns an empty list when nothing applies, unless ``always``.
    """
    out = []

    def mx(a):
        if a is None:
            return np.nan
        a = np.abs(np.asarray(a, float))
        top = float(np.max(a, where=np.isfinite(a), initial=-np.inf))  # −inf: none finite
        return top if top > -np.inf else np.nan

    v = np.nanmax([mx(vth), mx(voltages)]) if (vth is not None or voltages is not None) else np.nan
    if v > HAZARDOUS_V:
        out.append(f"Hazardous voltage: up to {format_value(v, 'V', 3)} DC (above 60 V DC is "
                   "treated as hazardous, common practice). Work dead where you can, use rated "
                   "leads and probes, and keep one hand away from the circuit.")
    i = mx(isc)
    if i > HIGH_CURRENT_A:
        out.append(f"High prospective short-circuit current: about {format_value(i, 'A', 2)}. "
                   "Compute Isc, never measure it by shorting the terminals; a short can "
                   "melt tools and start fires. Fuse the test leads.")
    ix = mx(isc_extrapolated)
    if ix > HIGH_CURRENT_A and not i > HIGH_CURRENT_A:
        top = mx(tested_current)
        reached = (f" (tested up to {format_value(top, 'A', 2)})"
                   if np.isfinite(top) else "")
        out.append(f"High prospective short-circuit current (extrapolated): the fitted "
                   f"line gives about {format_value(ix, 'A', 2)} at a short, far beyond the "
                   f"tested currents{reached}. A source that limits its current delivers "
                   "less; one that does not (a cell, a pack, a capacitor bank) may deliver "
                   "it. Compute Isc, never measure it by shorting the terminals; fuse the "
                   "test leads.")
    p = mx(reading_power)
    if p > HOT_RESISTOR_W:
        out.append(f"Hot load resistors: up to {format_value(p, 'W', 2)} dissipated in a load. "
                   "Use resistors rated (and derated) for it, keep readings short, let them "
                   "cool, and keep them off the bench top and away from cables.")
    if out or always:
        out.append(DEFERRAL)
    return out


def prospective_isc(fits) -> np.ndarray:
    """Short-circuit current each source could deliver, for the cautions.

    The fitted Isc = Vth/Rth, except where a knee showed the source limiting its current
    (a supply in current limit, foldback): there the knee current, not the line's
    extrapolation.
    """
    knee_i = np.asarray(fits.diagnostics.get("knee", {}).get("current",
                                                            np.full(len(fits), np.nan)),
                        dtype=float)
    limited = fits.flag_mask(lambda fl: any(f.code in ("knee", "below-knee") for f in fl))
    return np.where(limited & np.isfinite(knee_i), np.abs(knee_i), fits.isc)


def caution_inputs(fits, readings) -> dict:
    """The arrays :func:`cautions` takes for fitted readings (keyword arguments).

    A DUT whose Isc lies far beyond its tested currents (``extrapolated_isc_pmax``) and
    showed no knee goes to ``isc_extrapolated`` (the "extrapolated" wording); only readings
    taken with a load resistor count towards hot resistors.
    """
    from .extrapolation import extrapolated_isc_pmax, max_tested_current

    v = np.asarray(readings.voltage)
    # Only readings taken with a load resistor heat one: electronic-load (I, V) readings
    # have no resistor (their load is NaN), so no hot-resistor caution comes from them.
    r = np.asarray(readings.load, dtype=float)
    in_resistor = np.isfinite(r) & (r > 0)
    power = np.where(in_resistor, v * np.asarray(readings.current), np.nan)
    isc = prospective_isc(fits)
    far = np.zeros(len(fits), bool)
    tested = np.array([])
    if readings.n_duts == len(fits):
        far = extrapolated_isc_pmax(fits, readings)[0] & (isc == np.abs(fits.isc))
        tested = max_tested_current(readings, len(fits))[far]
    return {"vth": np.asarray(fits.vth, float), "isc": np.where(far, np.nan, isc),
            "isc_extrapolated": np.where(far, isc, np.nan), "tested_current": tested,
            "reading_power": power, "voltages": v}


def fit_cautions(fits, readings, *, always: bool = False) -> list[str]:
    """The cautions for fitted readings: voltages, prospective Isc, load dissipation."""
    return cautions(**caution_inputs(fits, readings), always=always)


def merged_cautions(inputs: list[dict], *, always: bool = False) -> list[str]:
    """One set of cautions for several runs (a list of :func:`caution_inputs` results),
    as if their DUTs had been in one file: each caution once, with the worst figure."""
    if not inputs:
        return cautions(always=always)
    keys = inputs[0].keys()
    return cautions(**{k: np.concatenate([np.ravel(d[k]) for d in inputs]) for k in keys},
                    always=always)


def pulse_cautions(*, peak_current=None, voltages=None) -> list[str]:
    """The cautions for current pulses on cells and packs (always given when pulses were
    found), with the voltage and high-current ones the numbers call for; deferral last."""
    out = ["Pulse testing of cells: stay within the cell maker's data sheet for pulse "
           "current, voltage limits and temperature; fuse the test leads close to the cell; "
           "watch the cell's temperature and stop if it rises; never pulse a damaged, "
           "swollen, leaking, hot or deeply discharged cell; test packs only with their "
           "protection in place and on a non-flammable surface."]
    i = np.nanmax(np.abs(np.asarray(peak_current, float))) if peak_current is not None and \
        np.size(peak_current) else np.nan
    if i > HIGH_CURRENT_A:
        out.append(f"High pulse current: up to {format_value(i, 'A', 2)}. Use leads, "
                   "connectors and a load rated for it, with a fuse or breaker sized for the "
                   "cell's short-circuit current, not the test current.")
    out.extend(c for c in cautions(voltages=voltages) if c != DEFERRAL)
    out.append(DEFERRAL)
    return out
