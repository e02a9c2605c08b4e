"""Simulated bench runs: readings of many DUTs drawn from a stated source and bench model.

Pure core (numpy only, no file access). Everything is vectorised over DUTs × loads, so
100 000 DUTs × 8 loads cost a handful of array operations. The same seed always gives
the same run (``np.random.default_rng(seed)``, draws in a fixed order).

Model of the simulated bench (SI units throughout)
--------------------------------------------------
Source of DUT *d* at time *t* (seconds since the DUT's first reading)::

    V = Vth_d + drift·t − Rth_d·I − curvature·I²        (a quadratic sag when curvature > 0)

loaded by a resistor of true value R (``inf`` = open circuit, ``0`` = short), so that
V = I·R. The current solves curvature·I² + (R + Rth_d)·I − Vth_d(t) = 0, taken in the
cancellation-free form I = 2·Vth / ((R + Rth) + √((R + Rth)² + 4·curvature·Vth)).
With a current-limit ``knee_current`` the source holds I = I_knee whenever the line
would deliver more, and the voltage then falls with the load: V = I_knee·R.

Per-DUT parameters: Vth_d = Vth·(1 + vth_spread·z₁) (normal), Rth_d =
Rth·exp(rth_spread·z₂ − rth_spread²/2) (log-normal, so it stays positive and has mean
Rth); the spreads are relative standard deviations (0.01 = 1 %).

Resistors: each distinct nominal value in ``loads`` is one physical resistor whose true
value R = R_nom·(1 + t/100·w), w uniform on [−1, 1] (a tolerance band read as a
rectangular half-width, as in :mod:`sagfit.readings`). By default it is drawn once and
used for every DUT, as on a real bench; ``per_dut_loads=True`` draws one per DUT and
reading position (independent runs, used to check an uncertainty prediction).

Meters: an accuracy ±(p % of reading + offset) has two parts, a gain error (the % of
reading) and an offset error. By default (``meter_errors="per_sweep"``) each is drawn
once per DUT's sweep, uniform within its half-width, as a real meter's calibration
deviation is one value for a whole sweep; with ``meter_errors="per_reading"`` the error
of each reading is drawn on its own, uniform on [−a, a] (``error_distribution="rectangular"``, the default:
the literal reading of the spec, and the same standard uncertainty a/√3 that
:mod:`sagfit.readings` assigns, GUM JCGM 100:2008 4.3.7), or normal with standard
deviation a/√3 (``"normal"``). a is evaluated at the true value. Without
``measure_current`` the current is not read: the file gives the nominal load and the
fit computes I = V/R_nom, so the resistor's tolerance enters as on a real bench.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from ._frozen import freeze_arrays
from .errors import InputError
from .readings import Readings
from .units import Accuracy

__all__ = ["SimulatedRun", "simulate", "run_csv_text"]

_DISTRIBUTIONS = ("rectangular", "normal")


@dataclass(frozen=True, slots=True)
class SimulatedRun:
    """Invented bench readings of one or many DUTs, with the truth they were drawn from.

    Attributes
    ----------
    duts : tuple of str
        DUT names; ``group`` indexes into it.
    group : ndarray of int64, shape (n,)
        DUT of each reading (rows of one DUT contiguous, in load order).
    load_ohm : ndarray of float64
        Nominal load of each reading in Ω (``inf`` = open circuit), as written on the bench.
    load_true_ohm : ndarray of float64
        The resistor's true value (nominal × drawn tolerance error).
    voltage_V : ndarray of float64
        Voltmeter reading (true terminal voltage + meter error).
    current_A : ndarray of float64 or None
        Ammeter reading when ``measure_current``; ``None`` otherwise.
    true_voltage_V, true_current_A : ndarray of float64
        Noise-free terminal voltage and current.
    time_s : ndarray of float64
        Bench clock of each reading (s since the first reading of the run).
    limited : ndarray of bool
        The source was in current limit at that reading.
    vth, rth : ndarray of float64, shape (m,)
        True Vth (V, at the DUT's first reading) and Rth (Ω) of each DUT.
    settings : mapping
        The arguments of :func:`simulate` (for labelling the output).
    """

    duts: tuple[str, ...]
    group: np.ndarray
    load_ohm: np.ndarray
    load_true_ohm: np.ndarray
    voltage_V: np.ndarray
    current_A: np.ndarray | None
    true_voltage_V: np.ndarray
    true_current_A: np.ndarray
    time_s: np.ndarray
    limited: np.ndarray
    vth: np.ndarray
    rth: np.ndarray
    settings: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self):
        freeze_arrays(self, ("group", "load_ohm", "load_true_ohm", "voltage_V", "current_A",
                             "true_voltage_V", "true_current_A", "time_s", "limited", "vth",
                             "rth"), copy=False)

    def __len__(self) -> int:
        return int(self.group.size)

    def __repr__(self) -> str:
        return f"<SimulatedRun {len(self)} readings, {len(self.duts)} DUT(s) (invented)>"

    @property
    def dut(self) -> np.ndarray:
        """DUT name of each reading (builds a string array; avoid in hot paths)."""
        return np.asarray(self.duts, dtype=object)[self.group]

    def to_readings(self, *, voltage_accuracy: Accuracy | None = None,
                    current_accuracy: Accuracy | None = None,
                    load_tolerance: float | None = None, with_time: bool = True,
                    source: str = "<simulated>") -> Readings:
        """The run as validated :class:`~sagfit.readings.Readings`, as the fit would read it.

        Without a measured current the readings are (nominal load, voltage), so the fit
        computes I = V/R_nom, exactly as from the CSV that :func:`run_csv_text` writes.
        """
        kw = dict(voltage=self.voltage_V, load=self.load_ohm, group=self.group,
                  duts=self.duts, voltage_accuracy=voltage_accuracy,
                  current_accuracy=current_accuracy, load_tolerance=load_tolerance,
                  source=source, time=self.time_s if with_time else None)
        if self.current_A is not None:
            kw["current"] = self.current_A
        return Readings.from_arrays(**kw)


def _check_accuracy(acc, name):
    if acc is None:
        return None
    if not isinstance(acc, Accuracy):
        raise InputError(f"{name}: expected an Accuracy (sagfit.parse_accuracy), got {acc!r}")
    return acc


def _finite(x, name, *, positive=False, nonneg=False):
    try:
        x = float(x)
    except (TypeError, ValueError):
        raise InputError(f"{name}: {x!r} is not a number") from None
    if not math.isfinite(x):
        raise InputError(f"{name}: must be finite (got {x!r})")
    if positive and x <= 0:
        raise InputError(f"{name}: must be greater than 0 (got {x:g})")
    if nonneg and x < 0:
        raise InputError(f"{name}: must not be negative (got {x:g})")
    return x


_PREFIX_RE = re.compile(r"^(?:[A-Za-z0-9][A-Za-z0-9_.-]*)?$")


def _dut_names(prefix: str, m: int) -> tuple[str, ...]:
    # a safe character set keeps the names valid CSV cells that no spreadsheet reads
    # as a formula
    if not _PREFIX_RE.match(prefix) or len(prefix) > 40:
        raise InputError(f"dut_prefix: {prefix!r} must be letters, digits, '_', '.' or '-' "
                         "(starting with a letter or digit, at most 40 characters)")
    width = max(3, len(str(m)))
    numbers = np.char.zfill(np.arange(1, m + 1).astype(str), width)
    return tuple(np.char.add(prefix, numbers).tolist())


def _meter_error(rng, acc: Accuracy | None, true: np.ndarray, distribution: str,
                 group: np.ndarray | None = None, m: int = 0):
    """Meter errors of every reading. With ``group`` (per-sweep errors, the default of
    :func:`simulate`) the gain and the offset error are drawn once per DUT's sweep, each
    within its half of the spec; without, each reading gets its own draw of the whole
    half-width. A stated noise adds a normal error per reading."""
    if acc is None or acc.is_zero:
        return np.zeros_like(true)

    def draw(size):
        if distribution == "rectangular":
            return rng.uniform(-1.0, 1.0, size)
        return rng.standard_normal(size) / math.sqrt(3.0)

    if group is None:
        half = acc.percent / 100.0 * np.abs(true) + acc.offset
        err = half * draw(true.size)
    else:
        w = draw((2, m))
        err = acc.percent / 100.0 * true * w[0][group] + acc.offset * w[1][group]
    if acc.has_noise:
        err = err + acc.noise(true) * rng.standard_normal(true.size)
    return err


def simulate(
    vth: float,
    rth: float,
    loads: Sequence[float],
    *,
    duts: int = 1,
    seed: int | None = 1,
    voltage_accuracy: Accuracy | None = None,
    current_accuracy: Accuracy | None = None,
    load_tolerance: float | None = None,
    measure_current: bool = False,
    vth_spread: float = 0.0,
    rth_spread: float = 0.0,
    knee_current: float | None = None,
    curvature: float = 0.0,
    drift: float = 0.0,
    interval_s: float = 10.0,
    dut_prefix: str = "SIM-",
    per_dut_loads: bool = False,
    error_distribution: str = "rectangular",
    dut_names: Sequence[str] | None = None,
    meter_errors: str = "per_sweep",
) -> SimulatedRun:
    """Draw bench readings of ``duts`` DUTs, each read at every load in ``loads``.

    Parameters
    ----------
    vth : float or array_like
        Nominal open-circuit voltage (V), > 0; or one value per DUT (a scenario's own
        fleet; the spreads then apply on top).
    rth : float or array_like
        Nominal internal resistance (Ω), > 0; or one value per DUT.
    loads : sequence of float
        Nominal load resistances (Ω) in reading order; ``inf`` = open circuit, ``0`` =
        short (only with ``measure_current``: a short gives no voltage to compute I from).
    duts : int
        Number of DUTs (≥ 1).
    seed : int or None
        Seed of ``np.random.default_rng``; the same seed gives the same run.
    voltage_accuracy, current_accuracy : Accuracy, optional
        Meter specifications ±(p % + offset); no error is added when omitted.
    load_tolerance : float, optional
        Resistor tolerance in % (half-width of a rectangular band).
    measure_current : bool
        Also read the current with an ammeter (``current_A`` column).
    vth_spread, rth_spread : float
        Relative standard deviation of Vth and Rth across DUTs (0.01 = 1 %).
    knee_current : float, optional
        Current limit (A): above it the source holds the current and the voltage falls.
    curvature : float
        Quadratic sag coefficient c ≥ 0 in V/A² (V = Vth − Rth·I − c·I²).
    drift : float
        Drift of Vth in V/s over each DUT's test.
    interval_s : float
        Time between readings (s); DUTs are read one after another.
    dut_prefix : str
        DUT names are ``prefix`` + a zero-padded number (``SIM-001``).
    per_dut_loads : bool
        Draw the resistor tolerance error per DUT instead of once per resistor.
    error_distribution : {"rectangular", "normal"}
        Distribution of the meter errors (same standard uncertainty a/√3 either way).
    dut_names : sequence of str, optional
        Names of the DUTs instead of ``dut_prefix`` + number.
    meter_errors : {"per_sweep", "per_reading"}
        ``"per_sweep"`` (default, what a real bench does): each meter's gain and offset
        error is drawn once per DUT's sweep; ``"per_reading"``: each reading's error is
        drawn on its own (different meters, or a range change between readings).

    Returns
    -------
    SimulatedRun
        The readings and the true per-DUT parameters. The data are invented.

    Raises
    ------
    InputError
        A parameter out of range.
    """
    vth_nom, rth_nom = np.asarray(vth, dtype=np.float64), np.asarray(rth, dtype=np.float64)
    per_dut = max(vth_nom.size if vth_nom.ndim else 1, rth_nom.size if rth_nom.ndim else 1)
    if vth_nom.ndim or rth_nom.ndim:  # per-DUT nominal values (a scenario's own fleet)
        for a, name in ((vth_nom, "vth"), (rth_nom, "rth")):
            if a.ndim > 1 or (a.ndim == 1 and a.size != per_dut):
                raise InputError(f"{name}: give one value or one per DUT ({per_dut})")
            if not (np.isfinite(a).all() and (a > 0).all()):
                raise InputError(f"{name}: every value must be finite and > 0")
        if duts not in (1, per_dut):
            raise InputError(f"duts: {duts} does not match the {per_dut} per-DUT values")
        duts = per_dut
        vth, rth = np.broadcast_to(vth_nom, (per_dut,)), np.broadcast_to(rth_nom, (per_dut,))
    else:
        vth = _finite(vth, "vth", positive=True)
        rth = _finite(rth, "rth", positive=True)
    vth_spread = _finite(vth_spread, "vth_spread", nonneg=True)
    rth_spread = _finite(rth_spread, "rth_spread", nonneg=True)
    curvature = _finite(curvature, "curvature", nonneg=True)
    drift = _finite(drift, "drift")
    interval_s = _finite(interval_s, "interval_s", nonneg=True)
    if knee_current is not None:
        knee_current = _finite(knee_current, "knee_current", positive=True)
    if load_tolerance is not None:
        load_tolerance = _finite(load_tolerance, "load_tolerance", nonneg=True)
        if load_tolerance >= 100:
            raise InputError(f"load_tolerance: must be below 100 % (got {load_tolerance:g} %)")
    voltage_accuracy = _check_accuracy(voltage_accuracy, "voltage_accuracy")
    current_accuracy = _check_accuracy(current_accuracy, "current_accuracy")
    if error_distribution not in _DISTRIBUTIONS:
        raise InputError(f"error_distribution: use one of {', '.join(_DISTRIBUTIONS)} "
                         f"(got {error_distribution!r})")
    if isinstance(duts, bool) or int(duts) != duts or duts < 1:
        raise InputError(f"duts: must be a whole number ≥ 1 (got {duts!r})")
    m = int(duts)
    nominal = np.asarray(loads, dtype=np.float64).ravel()
    if nominal.size == 0:
        raise InputError("loads: give at least one load")
    if np.isnan(nominal).any() or (nominal < 0).any():
        raise InputError("loads: every load must be a resistance ≥ 0 Ω or inf (open circuit)")
    if (nominal == 0).any() and not measure_current:
        raise InputError("loads: a short (0 Ω) needs measure_current=True: with the voltage "
                         "alone the current of a short cannot be computed")
    k = nominal.size
    n = m * k
    rng = np.random.default_rng(seed)

    # Draw order is fixed (DUT parameters, resistors, voltmeter, ammeter) so that a seed
    # reproduces a run; each stream is drawn whole even when its spread is zero.
    z = rng.standard_normal((2, m))
    vth_d = vth * (1.0 + vth_spread * z[0])
    rth_d = rth * np.exp(rth_spread * z[1] - 0.5 * rth_spread ** 2)
    if (vth_d <= 0).any():
        raise InputError("vth_spread: so large that some DUTs get Vth ≤ 0; use a smaller spread")

    _, which = np.unique(nominal, return_inverse=True)
    which = which.ravel()
    if per_dut_loads:
        w = rng.uniform(-1.0, 1.0, (m, which.max() + 1))[:, which].ravel()
    else:
        w = np.tile(rng.uniform(-1.0, 1.0, which.max() + 1)[which], m)
    r_nom = np.tile(nominal, m)
    tol = 0.0 if load_tolerance is None else load_tolerance / 100.0
    with np.errstate(invalid="ignore"):
        r_true = np.where(np.isfinite(r_nom), r_nom * (1.0 + tol * w), np.inf)

    group = np.repeat(np.arange(m, dtype=np.int64), k)
    position = np.tile(np.arange(k, dtype=np.float64), m)
    time_s = (group * k + position) * interval_s
    emf = vth_d[group] + drift * position * interval_s
    r_src = rth_d[group]
    total = r_true + r_src
    with np.errstate(invalid="ignore", over="ignore"):
        i_true = np.where(np.isinf(r_true), 0.0,
                          2.0 * emf / (total + np.sqrt(total * total + 4.0 * curvature * emf)))
    v_true = emf - r_src * i_true - curvature * i_true * i_true
    if knee_current is not None:
        limited = i_true > knee_current
        i_true = np.where(limited, knee_current, i_true)
        v_true = np.where(limited, knee_current * r_true, v_true)
    else:
        limited = np.zeros(n, dtype=bool)

    if meter_errors not in ("per_sweep", "per_reading"):
        raise InputError(f"meter_errors: must be 'per_sweep' or 'per_reading' "
                         f"(got {meter_errors!r})")
    sweep = (group, m) if meter_errors == "per_sweep" else (None, 0)
    voltage = v_true + _meter_error(rng, voltage_accuracy, v_true, error_distribution, *sweep)
    current = None
    if measure_current:
        current = i_true + _meter_error(rng, current_accuracy, i_true, error_distribution,
                                        *sweep)

    settings = {
        "vth": vth if np.ndim(vth) == 0 else "per DUT", "rth": rth if np.ndim(rth) == 0
        else "per DUT", "loads": tuple(float(x) for x in nominal), "duts": m,
        "seed": seed, "voltage_accuracy": voltage_accuracy.text if voltage_accuracy else None,
        "current_accuracy": current_accuracy.text if current_accuracy else None,
        "load_tolerance": load_tolerance, "measure_current": bool(measure_current),
        "meter_errors": meter_errors,
        "vth_spread": vth_spread, "rth_spread": rth_spread, "knee_current": knee_current,
        "curvature": curvature, "drift": drift, "interval_s": interval_s,
        "per_dut_loads": bool(per_dut_loads), "error_distribution": error_distribution,
    }
    if dut_names is not None:
        names = tuple(str(d) for d in dut_names)
        if len(names) != m or len(set(names)) != m:
            raise InputError(f"dut_names: give {m} distinct names")
    else:
        names = _dut_names(str(dut_prefix), m)
    return SimulatedRun(
        duts=names, group=group, load_ohm=r_nom, load_true_ohm=r_true,
        voltage_V=voltage, current_A=current, true_voltage_V=v_true, true_current_A=i_true,
        time_s=time_s, limited=limited, vth=vth_d, rth=rth_d, settings=settings)


def _fmt(a: np.ndarray, spec: str) -> list[str]:
    return [spec % x for x in a.tolist()]


def run_csv_text(run: SimulatedRun, comments: Sequence[str] = ()) -> str:
    """The run as a readings CSV in the input format of ``sagfit fit`` (text, not a file).

    Columns ``dut, load_ohm, voltage_V[, current_A], time_s``; an open circuit is written
    ``open``. Each line of ``comments`` becomes a ``#`` comment line at the top (the caller
    labels the data as invented there). Values keep 10 significant digits.
    """
    head = []
    for c in comments:
        for line in str(c).splitlines() or [""]:
            head.append("# " + line if line else "#")
    loads = ["open" if math.isinf(x) else "%.10g" % x for x in run.load_ohm.tolist()]
    names = [run.duts[g] for g in run.group.tolist()]
    cols = [names, loads, _fmt(run.voltage_V, "%.10g")]
    header = "dut,load_ohm,voltage_V"
    if run.current_A is not None:
        cols.append(_fmt(run.current_A, "%.10g"))
        header += ",current_A"
    cols.append(_fmt(run.time_s, "%.10g"))
    header += ",time_s"
    body = [",".join(row) for row in zip(*cols)]
    return "\n".join(head + [header] + body) + "\n"
