"""Planning a load test before touching the bench: which loads, and what they will tell.

Why this module stays whole at about 560 lines (over the ~500 of the house rule):
candidate loads, their safety screening and the predicted uncertainties of a plan are
one computation over the same candidate arrays (E-series values live in
:mod:`sagfit.core.eseries`).

Pure core: numbers in, a frozen :class:`Plan` out; no file access.

Method
------
1. The source is assumed to follow its rough equivalent V = Vth − Rth·I, so a load R
   draws I = Vth/(R + Rth), the resistor dissipates I²·R and the source I²·Rth.
2. Candidate loads are the values of an IEC 60063 series (:mod:`sagfit.eseries`) over the
   decades that matter, or the user's own resistors. A candidate is kept only if its
   current is within the safe limit and its dissipation within the resistor's rating
   reduced by the derating margin (50 % by default, common practice); no load below Rth
   (beyond the matched-load point, where the source dissipates more than the load) is
   proposed from a series. A short is never planned on a battery.
3. The loads are chosen so that the currents are spread evenly from open circuit to the
   heaviest safe load: targets I_k = k/(p − 1)·I_top, k = 1 … p − 1, each met by the
   nearest unused candidate. For a straight line the slope's variance is smallest with
   the readings split between the two ends, but such a plan cannot show curvature or a
   current-limit knee; evenly spread interior points keep the fit's non-linearity checks
   sensitive at a modest cost, which the plan reports (the "ends-only" comparison).
4. The predicted standard uncertainties are the fit's own a-priori covariance evaluated
   at the planned points: noise-free readings at the planned loads, with the planned
   instrument model, go through :func:`sagfit.fit.fit_lines` (York et al. 2004, or
   weighted least squares when the current is computed from the load). With χ² = 0 the
   scale factor is 1, so var(Vth) and var(Rth) are exactly the a-priori formula.

References
----------
- D. York et al., "Unified equations for the slope, intercept, and standard errors of
  the best straight line", Am. J. Phys. 72(3), 367–375 (2004).
- Evenly spread design points versus end points for a straight line and the detection
  of curvature: N. R. Draper, H. Smith, *Applied Regression Analysis*, 3rd ed. (1998),
  ch. 2 and 6 (from memory; the trade-off itself is common practice).
- 60 V DC hazard limit and the 50 % resistor derating: common practice (no source).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from . import eseries
from .errors import InputError
from .fit import fit_lines
from .formatting import format_value
from .readings import Readings
from .safety import DEFERRAL, HAZARDOUS_V, HOT_RESISTOR_W, cautions as usual_cautions
from .units import Accuracy

__all__ = ["Plan", "plan", "DEFAULT_SAG", "MIN_POINTS", "MAX_POINTS"]

DEFAULT_SAG = 0.10  # without a current limit: at most a 10 % sag (sagfit's own choice)
MIN_POINTS = 3
MAX_POINTS = 30
_RTOL = 1e-9


def _ro(a) -> np.ndarray:
    a = np.ascontiguousarray(np.asarray(a, dtype=np.float64))
    a.setflags(write=False)
    return a


def _fmt_load(r: float) -> str:
    if math.isinf(r):
        return "open"
    if r == 0:
        return "short"
    return format_value(r, "Ω", 3)


@dataclass(frozen=True, slots=True)
class Plan:
    """A proposed set of loads and what the fit of their readings is expected to give.

    Attributes
    ----------
    vth, rth : float
        The rough equivalent the plan was made for (V, Ω).
    load : ndarray
        Planned loads in reading order (Ω; ``inf`` = open circuit, first).
    current, voltage, power, source_power : ndarray
        Expected current (A), terminal voltage (V), dissipation in the resistor (W) and
        inside the source, I²·Rth (W), at each load.
    u_vth, u_rth : float
        Predicted standard uncertainties of Vth (V) and Rth (Ω) for the whole plan;
        NaN when the instrument model is not stated well enough to predict them.
    u_rth_ends : float
        u(Rth) of an ends-only plan with the same number of readings (half at open
        circuit, half at the heaviest load), for the trade-off.
    u_rth_meters : float
        u(Rth) if the resistors were exact (meters only); NaN when not applicable.
    current_limit, power_limit : float
        The current (A) and per-resistor dissipation (W) the plan keeps within.
    warnings : tuple of str
        Limits that bite, loads left out and why, missing specifications.
    notes : tuple of str
        The trade-off explained in plain words.
    cautions : tuple of str
        Plan-specific and usual cautions; the deferral to codes and manuals last.
    settings : mapping
        The inputs, as plain values.
    """

    vth: float
    rth: float
    load: np.ndarray
    current: np.ndarray
    voltage: np.ndarray
    power: np.ndarray
    source_power: np.ndarray
    u_vth: float
    u_rth: float
    u_rth_ends: float
    u_rth_meters: float
    current_limit: float
    power_limit: float
    warnings: tuple[str, ...]
    notes: tuple[str, ...]
    cautions: tuple[str, ...]
    settings: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self):
        for name in ("load", "current", "voltage", "power", "source_power"):
            object.__setattr__(self, name, _ro(getattr(self, name)))

    def __len__(self) -> int:
        return int(self.load.size)

    @property
    def labels(self) -> tuple[str, ...]:
        """Each load as written on a bench sheet (``open``, ``4.70 Ω``)."""
        return tuple(_fmt_load(r) for r in self.load.tolist())

    def to_dict(self) -> dict:
        """The plan as JSON values (SI units; ``null`` load = open circuit)."""
        def f(x):
            x = float(x)
            return x if math.isfinite(x) else None

        loads = [{"load_ohm": f(r), "current_A": f(i), "voltage_V": f(v), "power_W": f(p),
                  "source_power_W": f(ps), "label": lab}
                 for r, i, v, p, ps, lab in zip(self.load.tolist(), self.current.tolist(),
                                                self.voltage.tolist(), self.power.tolist(),
                                                self.source_power.tolist(), self.labels)]
        return {
            "assumed": {"vth_V": self.vth, "rth_ohm": self.rth},
            "limits": {"current_A": f(self.current_limit), "power_W": f(self.power_limit)},
            "loads": loads,
            "predicted": {"u_vth": f(self.u_vth), "u_rth": f(self.u_rth),
                          "u_rth_ends_only": f(self.u_rth_ends),
                          "u_rth_meters_only": f(self.u_rth_meters)},
            "warnings": list(self.warnings),
            "notes": list(self.notes),
            "cautions": list(self.cautions),
            "settings": dict(self.settings),
        }


def _num(x, name, *, positive=True):
    try:
        x = float(x)
    except (TypeError, ValueError):
        raise InputError(f"{name}: {x!r} is not a number") from None
    if not math.isfinite(x) or (positive and x <= 0):
        raise InputError(f"{name}: must be a finite number greater than 0 (got {x!r})")
    return x


def _upper_power_root(vth, rth, p_allow):
    """Smallest R ≥ Rth with Vth²·R/(R + Rth)² ≤ p_allow (0 if the limit never bites)."""
    b = vth * vth - 2.0 * p_allow * rth
    disc = b * b - 4.0 * p_allow * p_allow * rth * rth
    if disc <= 0 or b <= 0:
        return 0.0
    return (b + math.sqrt(disc)) / (2.0 * p_allow)


def _choose(cand_i: np.ndarray, n_loaded: int) -> np.ndarray:
    """Indices of candidates whose currents best meet evenly spaced targets up to the top."""
    top = cand_i.max()
    chosen: list[int] = []
    free = np.ones(cand_i.size, dtype=bool)
    for k in range(n_loaded, 0, -1):
        target = top * k / n_loaded
        dist = np.where(free, np.abs(cand_i - target), np.inf)
        j = int(np.argmin(dist))
        chosen.append(j)
        free[j] = False
    return np.array(chosen, dtype=np.int64)


def plan(
    voltage: float,
    resistance: float,
    *,
    max_current: float | None = None,
    max_power: float | None = None,
    series: str = "E12",
    points: int = 6,
    voltage_accuracy: Accuracy | None = None,
    current_accuracy: Accuracy | None = None,
    load_tolerance: float | None = None,
    have: Sequence[float] | None = None,
    derating: float = 50.0,
    battery: bool = True,
    measure_current: bool | None = None,
) -> Plan:
    """Propose loads for a load test of a source with rough equivalent (Vth, Rth).

    Parameters
    ----------
    voltage : float
        Expected open-circuit voltage Vth (V), from a datasheet or a first reading.
    resistance : float
        Expected internal resistance Rth (Ω).
    max_current : float, optional
        The source's safe current (A). Without it the plan stops at a 10 % sag
        (I ≤ 0.1·Vth/Rth, sagfit's own default) and says so.
    max_power : float, optional
        Power rating of each load resistor (W); the plan keeps within
        ``max_power·(1 − derating/100)``.
    series : str
        IEC 60063 series of the available resistors (``"E6"`` … ``"E192"``).
    points : int
        Number of readings including the open circuit (3 … 30).
    voltage_accuracy, current_accuracy : Accuracy, optional
        Meter specifications. A current accuracy means the current will be measured.
    load_tolerance : float, optional
        Resistor tolerance (%).
    have : sequence of float, optional
        The user's own resistors (Ω; ``inf`` = open, ``0`` = short) instead of a series.
    derating : float
        Margin below the resistor rating in % (default 50 %, common practice).
    battery : bool
        The source is a battery (cannot be switched off or current-limited): no short.
    measure_current : bool, optional
        Override whether the current is measured (default: when ``current_accuracy``).

    Returns
    -------
    Plan

    Raises
    ------
    InputError
        Unusable settings, or no load that meets the limits.
    """
    vth = _num(voltage, "voltage")
    rth = _num(resistance, "resistance")
    if max_current is not None:
        max_current = _num(max_current, "max_current")
    if max_power is not None:
        max_power = _num(max_power, "max_power")
    derating = float(derating)
    if not (0.0 <= derating < 100.0):
        raise InputError(f"derating: must be from 0 % up to (not including) 100 % "
                         f"(got {derating:g} %)")
    if load_tolerance is not None:
        load_tolerance = float(load_tolerance)
        if not (0.0 <= load_tolerance < 100.0):
            raise InputError(f"load_tolerance: must be between 0 % and 100 % "
                             f"(got {load_tolerance:g} %)")
    if isinstance(points, bool) or int(points) != points or not (MIN_POINTS <= points
                                                                  <= MAX_POINTS):
        raise InputError(f"points: must be a whole number from {MIN_POINTS} to {MAX_POINTS} "
                         f"(got {points!r}); the open circuit counts as one")
    points = int(points)
    series = eseries.series_name(series)
    if measure_current is None:
        measure_current = current_accuracy is not None

    warnings: list[str] = []
    isc = vth / rth
    if max_current is None:
        i_cap = DEFAULT_SAG * isc
        warnings.append(
            f"no safe current limit given (--max-current): the plan stops at "
            f"{format_value(i_cap, 'A', 3)}, a {DEFAULT_SAG:.0%} sag (sagfit's own default); "
            "give the source's rated current from its datasheet")
    else:
        i_cap = max_current
    if max_power is None:
        p_allow = math.inf
        warnings.append("no resistor power rating given (--max-power): the plan does not "
                        "limit the dissipation; check every resistor's rating against the "
                        "power column")
    else:
        p_allow = max_power * (1.0 - derating / 100.0)
    if vth > HAZARDOUS_V:
        warnings.append(f"expected voltage {format_value(vth, 'V', 3)} is above 60 V DC, "
                        "treated as hazardous (common practice): plan the test with someone "
                        "qualified for it")

    def expect(r):
        r = np.asarray(r, dtype=np.float64)
        finite = np.isfinite(r)
        i = np.where(finite, vth / (np.where(finite, r, 0.0) + rth), 0.0)
        v = vth - rth * i
        p = np.where(finite, i * i * np.where(finite, r, 0.0), 0.0)
        return i, v, p

    # ---- candidates
    if have is not None:
        cand = np.asarray(list(have), dtype=np.float64).ravel()
        if cand.size == 0:
            raise InputError("have: the list of resistors is empty")
        if np.isnan(cand).any() or (cand < 0).any():
            raise InputError("have: every resistor must be ≥ 0 Ω, or open")
        cand = np.unique(cand[np.isfinite(cand)])
        i, _, p = expect(cand)
        ok = np.ones(cand.size, dtype=bool)
        for j, r in enumerate(cand.tolist()):
            label = _fmt_load(r)
            if r == 0 and battery:
                ok[j] = False
                warnings.append(f"{label} left out: a short-circuit step on a battery is "
                                "refused (a battery cannot be current-limited or switched off; "
                                "compute Isc from the fit instead). Use --no-battery only for "
                                "a current-limited supply")
            elif r == 0 and not measure_current:
                ok[j] = False
                warnings.append(f"{label} left out: a short needs a measured current "
                                "(--current-accuracy); the voltage alone gives nothing")
            elif i[j] > i_cap * (1 + _RTOL):
                ok[j] = False
                warnings.append(f"{label} left out: it would draw {format_value(i[j], 'A', 3)}, "
                                f"above the current limit {format_value(i_cap, 'A', 3)}")
            elif p[j] > p_allow * (1 + _RTOL):
                ok[j] = False
                warnings.append(f"{label} left out: it would dissipate "
                                f"{format_value(p[j], 'W', 3)}, above {100 - derating:g} % of "
                                f"its {format_value(max_power, 'W', 3)} rating (derating margin "
                                f"{derating:g} %)")
        cand = cand[ok]
        source_text = "your resistors (--have)"
    else:
        lo = max(vth / i_cap - rth, rth, _upper_power_root(vth, rth, p_allow)
                 if math.isfinite(p_allow) else 0.0)
        hi = max(lo, rth) * 10.0 ** 4
        cand = eseries.values(series, lo, hi)
        i, _, p = expect(cand)
        cand = cand[(i <= i_cap * (1 + _RTOL)) & (p <= p_allow * (1 + _RTOL))]
        source_text = f"the {series} series"
    if cand.size == 0:
        power_text = (f"dissipation ≤ {format_value(p_allow, 'W', 3)}"
                      if math.isfinite(p_allow) else "no power limit")
        raise InputError(
            f"no load from {source_text} meets the limits (current ≤ "
            f"{format_value(i_cap, 'A', 3)}, {power_text}): "
            "raise --max-current or --max-power if the source and resistors allow it, or "
            "offer other resistors with --have")

    n_loaded = points - 1
    cand_i, _, _ = expect(cand)
    if cand.size <= n_loaded:
        pick = np.arange(cand.size)
        if cand.size < n_loaded:
            warnings.append(f"only {cand.size} load(s) from {source_text} meet the limits: "
                            f"the plan has {cand.size + 1} points instead of {points}")
    else:
        pick = _choose(cand_i, n_loaded)
    loads_r = np.sort(cand[pick])[::-1]  # lightest load (highest R) first
    loads_r = np.concatenate(([math.inf], loads_r))
    cur, volt, pwr = expect(loads_r)
    src_pwr = cur * cur * rth
    top = float(cur.max())

    # ---- predicted uncertainties from the fit's covariance at the planned points
    u_vth = u_rth = u_ends = u_meters = math.nan
    floor_note = None
    if voltage_accuracy is None:
        warnings.append("no voltmeter accuracy given (--voltage-accuracy): the uncertainties "
                        "cannot be predicted")
    elif measure_current and current_accuracy is None:
        warnings.append("the current is to be measured but no ammeter accuracy is given "
                        "(--current-accuracy): the uncertainties cannot be predicted")
    else:
        u_vth, u_rth, u_ends, u_meters = _predict(
            loads_r, cur, volt, n_loaded, voltage_accuracy, current_accuracy,
            load_tolerance, measure_current)
        if not measure_current and load_tolerance is None:
            warnings.append("no resistor tolerance given (--load-tolerance): the prediction "
                            "treats the resistors as exact, which understates u(Rth) when the "
                            "current is computed from the load")
        floor = vth_floor(voltage_accuracy, vth)
        if floor > 0 and math.isfinite(u_vth) and floor >= 0.5 * u_vth:
            floor_note = (f"u(Vth) cannot go below about {format_value(floor, 'V', 2)} with this "
                         "voltmeter, however many readings: it is its calibration (gain and "
                         "offset shared by the sweep). A better meter, not more readings, "
                         "reduces it; u(Rth) is not limited the same way (an offset shared by "
                          "every reading does not change a slope)")
        if math.isfinite(u_rth) and u_rth > 0.1 * rth:
            warnings.append(f"Rth will be poorly resolved: predicted u(Rth) = "
                            f"{format_value(u_rth, 'Ω', 2)}, {u_rth / rth:.0%} of the expected "
                            f"Rth; the safe limits give a sag of only "
                            f"{format_value(rth * top, 'V', 2)}. A more accurate voltmeter, "
                            "tighter resistors or a measured current would help")

    notes = _notes(vth, rth, top, i_cap, u_rth, u_ends, u_meters, n_loaded, measure_current,
                   load_tolerance, _binding(vth, rth, top, i_cap, p_allow, have is None),
                   current_accuracy)
    if floor_note:
        notes = type(notes)(list(notes) + [floor_note])
    cautions = _cautions(vth, isc, cur, volt, pwr, src_pwr, top, battery, max_power,
                         derating, (loads_r == 0).any())
    settings = {
        "voltage_V": vth, "resistance_ohm": rth, "max_current_A": max_current,
        "max_power_W": max_power, "derating_pct": derating, "series": series,
        "points": points, "have": None if have is None else [
            None if math.isinf(x) else float(x) for x in np.asarray(list(have), float)],
        "voltage_accuracy": voltage_accuracy.text if voltage_accuracy else None,
        "current_accuracy": current_accuracy.text if current_accuracy else None,
        "load_tolerance_pct": load_tolerance, "battery": bool(battery),
        "measure_current": bool(measure_current),
    }
    return Plan(vth=vth, rth=rth, load=loads_r, current=cur, voltage=volt, power=pwr,
                source_power=src_pwr, u_vth=u_vth, u_rth=u_rth, u_rth_ends=u_ends,
                u_rth_meters=u_meters, current_limit=i_cap, power_limit=p_allow,
                warnings=tuple(warnings), notes=tuple(notes), cautions=tuple(cautions),
                settings=settings)


def _predict(loads_r, cur, volt, n_loaded, va, ia, tol, measure_current):
    """(u_vth, u_rth, u_rth ends-only, u_rth meters-only) from one vectorised fit.

    Three noise-free "DUTs" go through the fit together: the plan; an ends-only plan
    (the open circuit and the heaviest load, each taken about half of the times); the
    plan with exact resistors.
    """
    n = loads_r.size
    n_open = (n + 1) // 2
    heavy = int(np.argmax(cur))
    ends_r = np.concatenate((np.full(n_open, math.inf), np.full(n - n_open, loads_r[heavy])))
    ends_i = np.concatenate((np.zeros(n_open), np.full(n - n_open, cur[heavy])))
    ends_v = np.concatenate((np.full(n_open, volt[0]), np.full(n - n_open, volt[heavy])))
    r = np.concatenate((loads_r, ends_r, loads_r))
    i = np.concatenate((cur, ends_i, cur))
    v = np.concatenate((volt, ends_v, volt))
    tol_pct = np.concatenate((np.full(2 * n, np.nan), np.zeros(n)))
    group = np.repeat(np.arange(3), n)
    kw = dict(voltage=v, load=r, group=group, duts=("plan", "ends", "meters"),
              voltage_accuracy=va, current_accuracy=ia if measure_current else None,
              load_tolerance=tol, load_tolerance_pct=tol_pct, source="<plan>")
    if measure_current:
        kw["current"] = i
    try:
        fits = fit_lines(Readings.from_arrays(**kw))
        urth, uvth = np.array(fits.u_rth, float), np.array(fits.u_vth, float)
        # A meter whose noise is not stated: its spec also bounds the per-reading error,
        # which noise-free planned readings cannot show; take the larger prediction of the
        # shared model (calibration parts, the floor of u(Vth)) and the independent one.
        quiet = [a for a in (kw["voltage_accuracy"], kw["current_accuracy"])
                 if a is not None and a.shared and not a.has_noise]
        if quiet:
            kw2 = dict(kw, voltage_accuracy=_independent(kw["voltage_accuracy"]),
                       current_accuracy=_independent(kw["current_accuracy"]))
            alt = fit_lines(Readings.from_arrays(**kw2))
            urth = np.fmax(urth, alt.u_rth)
            uvth = np.fmax(uvth, alt.u_vth)
    except InputError:
        return (math.nan,) * 4
    u = [math.nan if fits.error[k] is not None else float(urth[k]) for k in range(3)]
    u_vth = math.nan if fits.error[0] is not None else float(uvth[0])
    meters = u[2] if (tol or 0) > 0 and not measure_current else math.nan
    return u_vth, u[0], u[1], meters


def _independent(acc):
    return None if acc is None or acc.has_noise else acc.with_shared(False)


def vth_floor(voltage_accuracy: Accuracy | None, vth: float) -> float:
    """The part of u(Vth) no number of readings removes: the voltmeter's shared gain and
    offset errors (GUM 5.2; see sagfit.core.systematic)."""
    if voltage_accuracy is None or not voltage_accuracy.shared:
        return 0.0
    return math.hypot(voltage_accuracy.gain_u * abs(vth), voltage_accuracy.offset_u)


def _binding(vth, rth, top, i_cap, p_allow, from_series):
    """What set the heaviest load, in words."""
    if top >= 0.9 * i_cap:
        return "the current limit"
    r_top = vth / top - rth
    if math.isfinite(p_allow) and top * top * r_top >= 0.8 * p_allow:
        return f"the resistor rating ({format_value(p_allow, 'W', 3)} after derating)"
    if from_series and r_top <= 1.6 * rth:
        return ("the matched-load point: no load below Rth is proposed, since the source "
                "would then dissipate more than the load")
    return "the values available"


def _notes(vth, rth, top, i_cap, u_rth, u_ends, u_meters, n_loaded, measure_current, tol,
           binding, current_accuracy):
    notes = [
        f"Currents are spread evenly from open circuit to {format_value(top, 'A', 3)} "
        f"({top / i_cap:.0%} of the {format_value(i_cap, 'A', 3)} limit; the heaviest load "
        f"is set by {binding}). u(Rth) falls roughly as 1/(current span), so the heaviest "
        "load is as heavy as the limits allow.",
        ("The current is assumed read with the ammeter "
         f"({current_accuracy.text or 'as specified'}) at every load." if measure_current
         and current_accuracy is not None else
         "The current is assumed computed from the load, I = V/R (no ammeter); the "
         "resistor tolerance then enters the uncertainty of every current."),
        "Interior loads are kept on purpose: readings only at the two ends would give the "
        "smallest u(Rth) for a straight line, but could not show curvature or a "
        "current-limit knee; evenly spread points let the fit's checks see them.",
    ]
    if math.isfinite(u_rth) and math.isfinite(u_ends) and u_ends > 0:
        notes.append(f"An ends-only plan with the same {n_loaded + 1} readings would give "
                     f"u(Rth) = {format_value(u_ends, 'Ω', 2)} instead of "
                     f"{format_value(u_rth, 'Ω', 2)} (×{u_rth / u_ends:.2f}): the price of "
                     "being able to detect non-linearity.")
    if math.isfinite(u_meters) and math.isfinite(u_rth) and u_rth > 0:
        share = max(0.0, 1.0 - (u_meters / u_rth) ** 2)
        notes.append(f"The resistor tolerance ({tol:g} %) accounts for {share:.0%} of the "
                     "predicted variance of Rth"
                     + ("; measuring the current with an ammeter, or tighter resistors, "
                        "would reduce it." if share > 0.5 else "."))
    if n_loaded + 1 < 5:
        notes.append("With fewer than 5 readings the fit has little left to judge curvature "
                     "or a knee; 6 or more are usual.")
    return notes


def _cautions(vth, isc, cur, volt, pwr, src_pwr, top, battery, max_power, derating, short):
    usual = usual_cautions(vth=vth, isc=isc, reading_power=pwr, voltages=volt, always=True)
    own = [
        "Take the open-circuit reading first, then go from the lightest load to the heaviest; "
        "stop and re-plan if a reading is far from the expected value.",
        f"Leads, switches and fuses must be rated for the highest planned current, "
        f"{format_value(top, 'A', 3)}.",
        "Keep each loaded reading short and let the resistors and the source cool between "
        "readings: heating changes both and shows up as curvature.",
    ]
    if battery:
        own.append("A battery cannot be switched off: fuse the leads close to its terminals, "
                   "switch loads with an insulated, rated switch, and never short it to "
                   "check Isc.")
    elif short:
        own.append("A short-circuit step is planned: use it only on a source with a working "
                   "current limit, and confirm the limit before connecting the short.")
    if max_power is not None:
        own.append(f"Each resistor needs its {format_value(max_power, 'W', 3)} rating at the "
                   f"actual ambient and mounting; the plan keeps within {100 - derating:g} % "
                   "of it.")
    if float(np.max(src_pwr)) > HOT_RESISTOR_W:
        own.append(f"The source itself dissipates up to "
                   f"{format_value(float(np.max(src_pwr)), 'W', 2)} internally at the "
                   "heaviest load: watch its temperature.")
    if usual and usual[-1] == DEFERRAL:
        usual = usual[:-1]
    return own + usual + [DEFERRAL]
