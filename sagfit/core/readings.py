"""Bench readings of one or many DUTs, as validated float arrays, and their uncertainties.

Why this module stays whole at about 620 lines (over the ~500 of the house rule):
``Readings`` and ``from_arrays`` are the single place where raw numbers become trusted
data; splitting the validation from the uncertainty model would put the two halves of
one check in two files.

``Readings.from_arrays`` is the one place where raw numbers become trusted data: it
converts the given pair of (load, voltage, current) into current and voltage, applies
the instrument model and propagates it (GUM law of propagation, JCGM 100:2008 5.1.2 and
5.2.2), and checks every value. The fitting kernels never check again.

Uncertainty model (all standard uncertainties, SI units):

- a meter spec ±(p % of reading + offset) is a rectangular half-width a, u = a/√3
  (GUM 4.3.7); a resistor tolerance t % is a rectangular half-width t/100·R;
- per-reading columns (``u_voltage``, ``u_current``, ``u_load``, ``load_tolerance_pct``)
  override the instrument options where they are given;
- current computed as I = V/R:  u²(I) = u²(V)/R² + V²u²(R)/R⁴ and u(V, I) = u²(V)/R;
- voltage computed as V = I·R:  u²(V) = R²u²(I) + I²u²(R) and u(V, I) = R·u²(I).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from ._frozen import freeze_arrays
from .errors import InputError, ReadingsFileError
from .systematic import ErrorModel
from .units import Accuracy, parse_resistance

__all__ = ["Readings", "Note"]


# SCPI instruments return 9.9E+37 for an overload and 9.91E+37 for "not a number"
# (SCPI-99, vol. 1, 7.2.1.5); anything at or above it is a code, never a reading.
_OVERLOAD = 9.0e37
# Plausibility limits of a reading: orders of magnitude beyond any DC bench source or load
# (common practice), so a value above them is an instrument code or a gross unit slip, not a
# measurement. Wide on purpose: a model study may scale a source far past a real bench.
_MAX_VOLTAGE = 1.0e9  # 1 GV
_MAX_CURRENT = 1.0e9  # 1 GA
_MAX_LOAD = 1.0e15  # 1 PΩ (open circuits are written 'open' or inf)


def _as_array(values, dtype, copy: bool) -> np.ndarray:
    """A private copy when ``copy``, else a view where the dtype allows (numpy 1.26 and 2.x)."""
    return np.array(values, dtype=dtype) if copy else np.asarray(values, dtype=dtype)


@dataclass(frozen=True, slots=True)
class Note:
    """Something about the readings of one DUT worth a flag (not an error)."""

    group: int
    code: str
    message: str
    severity: str = "warning"


@dataclass(frozen=True, slots=True)
class Readings:
    """Readings of one or many DUTs, stacked, rows of one DUT contiguous.

    Attributes
    ----------
    duts : tuple of str
        DUT names; ``group`` indexes into it.
    group : ndarray of int64, shape (n,)
        Which DUT each reading belongs to (non-decreasing).
    current, voltage : ndarray of float64
        Load current I (A, delivered into the load) and terminal voltage V (V).
    u_current, u_voltage : ndarray of float64
        Standard uncertainties of I and V (0 where none was stated).
    cov_iv : ndarray of float64
        Covariance u(I, V) of the errors of I and V (A·V); non-zero when one was
        computed from the other and the load.
    load : ndarray of float64
        Load resistance in Ω (``inf`` open circuit, ``nan`` not given).
    time : ndarray of float64
        Time of each reading in seconds (Unix epoch for dates, or as given); ``nan`` if absent.
    line : ndarray of int64
        1-based source line of each reading (0 when built from arrays).
    source : str
        Where the readings came from (file name), used in messages.
    current_from, voltage_from : str
        ``"measured"`` or ``"load"`` (computed with the load resistance).
    notes : tuple of Note
        Cross-check findings (for example V/I disagreeing with the stated load).
    meta : mapping
        Free-form metadata from the file (``date``, ``temperature_C``, columns ignored).
    errors : ErrorModel or None
        The split of each reading's error into a random part and the components shared
        by a sweep (meter gain and offset) or by repeats (a load resistor); ``None`` when
        every error is independent (then ``u_voltage``, ``u_current``, ``cov_iv`` are the
        random part). ``u_voltage``, ``u_current`` and ``cov_iv`` always hold the whole
        spec as if independent: they weight the fit.
    """

    duts: tuple[str, ...]
    group: np.ndarray
    current: np.ndarray
    voltage: np.ndarray
    u_current: np.ndarray
    u_voltage: np.ndarray
    cov_iv: np.ndarray
    load: np.ndarray
    time: np.ndarray
    line: np.ndarray
    source: str = "<arrays>"
    current_from: str = "measured"
    voltage_from: str = "measured"
    notes: tuple[Note, ...] = ()
    meta: Mapping[str, object] = field(default_factory=dict)
    errors: ErrorModel | None = None

    def __post_init__(self):
        # from_arrays copies what the caller passed in, so freezing in place is safe
        freeze_arrays(self, ("group", "current", "voltage", "u_current", "u_voltage", "cov_iv",
                             "load", "time", "line"), copy=False)

    def __len__(self) -> int:
        return int(self.current.size)

    def __repr__(self) -> str:
        return f"<Readings {len(self)} rows, {len(self.duts)} DUT(s) from {self.source}>"

    @property
    def n_duts(self) -> int:
        return len(self.duts)

    @property
    def has_time(self) -> bool:
        return bool(np.isfinite(self.time).any())

    def counts(self) -> np.ndarray:
        """Number of readings per DUT."""
        return np.bincount(self.group, minlength=self.n_duts)

    def select(self, mask: np.ndarray) -> "Readings":
        """A new ``Readings`` with only the rows where ``mask`` is true (DUT list kept)."""
        mask = np.asarray(mask, bool)
        return Readings(
            duts=self.duts, group=self.group[mask], current=self.current[mask],
            voltage=self.voltage[mask], u_current=self.u_current[mask],
            u_voltage=self.u_voltage[mask], cov_iv=self.cov_iv[mask], load=self.load[mask],
            time=self.time[mask], line=self.line[mask], source=self.source,
            current_from=self.current_from, voltage_from=self.voltage_from,
            notes=self.notes, meta=self.meta,
            errors=None if self.errors is None else self.errors.take(mask))

    def dut_range(self, lo: int, hi: int) -> "Readings":
        """The readings of DUTs ``lo`` … ``hi − 1`` (renumbered from 0), as views: rows of
        one DUT are contiguous, so this costs nothing on a large batch."""
        starts = np.searchsorted(self.group, [lo, hi])
        a, b = int(starts[0]), int(starts[1])
        notes = tuple(Note(n.group - lo, n.code, n.message, n.severity)
                      for n in self.notes if lo <= n.group < hi)
        return Readings(
            duts=self.duts[lo:hi], group=self.group[a:b] - lo, current=self.current[a:b],
            voltage=self.voltage[a:b], u_current=self.u_current[a:b],
            u_voltage=self.u_voltage[a:b], cov_iv=self.cov_iv[a:b], load=self.load[a:b],
            time=self.time[a:b], line=self.line[a:b], source=self.source,
            current_from=self.current_from, voltage_from=self.voltage_from, notes=notes,
            meta=self.meta, errors=None if self.errors is None else self.errors.take(
                slice(a, b)))

    def only_duts(self, names: Sequence[str]) -> "Readings":
        """The readings of the named DUTs, renumbered in the given order."""
        index = {d: i for i, d in enumerate(self.duts)}
        missing = [n for n in names if n not in index]
        if missing:
            raise InputError(f"{self.source}: no DUT named {missing[0]!r} "
                             f"(the file has {len(self.duts)} DUT(s), e.g. {self.duts[0]!r})")
        old = np.array([index[n] for n in names], dtype=np.int64)
        remap = np.full(len(self.duts), -1, dtype=np.int64)
        remap[old] = np.arange(old.size)
        new_group = remap[self.group]
        keep = new_group >= 0
        sub = self.select(keep)
        order = np.argsort(new_group[keep], kind="stable")
        notes = tuple(Note(int(remap[n.group]), n.code, n.message, n.severity)
                      for n in self.notes if remap[n.group] >= 0)
        return Readings(
            duts=tuple(names), group=new_group[keep][order], current=sub.current[order],
            voltage=sub.voltage[order], u_current=sub.u_current[order],
            u_voltage=sub.u_voltage[order], cov_iv=sub.cov_iv[order], load=sub.load[order],
            time=sub.time[order], line=sub.line[order], source=self.source,
            current_from=self.current_from, voltage_from=self.voltage_from, notes=notes,
            meta=self.meta, errors=None if sub.errors is None else sub.errors.take(order))

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_arrays(
        cls,
        *,
        voltage=None,
        current=None,
        load=None,
        dut=None,
        group=None,
        duts: Sequence[str] | None = None,
        u_voltage=None,
        u_current=None,
        u_load=None,
        load_tolerance_pct=None,
        time=None,
        voltage_accuracy: Accuracy | None = None,
        current_accuracy: Accuracy | None = None,
        load_tolerance: float | None = None,
        source: str = "<arrays>",
        line=None,
        columns: Mapping[str, str] | None = None,
        meta: Mapping[str, object] | None = None,
        copy: bool = True,
    ) -> "Readings":
        """Validate raw readings and build their uncertainty model.

        Parameters
        ----------
        voltage, current, load : array_like, optional
            Terminal voltage (V), load current (A), load resistance (Ω; ``inf`` = open
            circuit, ``0`` = short). Any two are enough; with all three, V and I are used
            and R is a cross-check. Loads may be text, read as in a readings file
            (``"open"``, ``"4k7"``, ``"470R"``, ``"4.7k"``).
        dut : array_like of str, optional
            DUT name of each reading. Alternatively ``group`` (int codes) with ``duts``
            (names). Neither: one DUT named ``"DUT"``.
        u_voltage, u_current, u_load : array_like, optional
            Per-reading standard uncertainties (``nan`` where not given).
        load_tolerance_pct : array_like, optional
            Per-reading resistor tolerance in %, a rectangular half-width.
        time : array_like, optional
            Time of each reading in seconds.
        voltage_accuracy, current_accuracy : Accuracy, optional
            Meter specifications applied where no per-reading value is given.
        load_tolerance : float, optional
            Resistor tolerance in % for all loads.
        source : str
            Name used in error messages.
        line : array_like of int, optional
            Source line of each reading (for messages).
        columns : mapping, optional
            Header text of each field (for messages), e.g. ``{"voltage": "Voltage [mV]"}``.
        copy : bool
            Copy the arrays (default). ``False`` hands float64 and int64 arrays over
            without a copy (the reader does this with arrays it made itself); the caller
            must not change them afterwards.

        Raises
        ------
        ReadingsFileError
            A value that cannot be used, located by line and column.
        """
        cols = dict(columns or {})

        def fail(msg, row=None, fld=None):
            ln = None
            if row is not None and line_arr is not None:
                ln = int(line_arr[row]) or None
            if row is not None and ln is None:
                msg = f"reading {row + 1}: {msg}"
            raise ReadingsFileError(source, msg, line=ln,
                                    column=cols.get(fld, fld) if fld else None)

        line_arr = None if line is None else _as_array(line, np.int64, copy)
        if load is not None:
            load = _load_ohms(load, fail)
        given = {k: v for k, v in (("voltage", voltage), ("current", current), ("load", load))
                 if v is not None}
        if len(given) < 2:
            have = ", ".join(given) or "none"
            raise ReadingsFileError(
                source, f"need two of load, voltage and current (found: {have}); "
                        "name the columns e.g. load_ohm, voltage_V, current_A")
        arrays = {}
        n = None
        for k, v in given.items():
            a = _as_array(v, np.float64, copy).ravel()  # private (see
            # __post_init__), unless the caller hands it over
            if n is None:
                n = a.size
            elif a.size != n:
                raise InputError(f"{source}: '{k}' has {a.size} values, expected {n}")
            arrays[k] = a
        if n == 0:
            raise ReadingsFileError(source, "no readings (the table has a header but no rows)")
        if line_arr is not None and line_arr.size != n:
            line_arr = None

        def opt(v, name):
            if v is None:
                return None
            a = np.asarray(v, dtype=np.float64).ravel()
            if a.size != n:
                raise InputError(f"{source}: '{name}' has {a.size} values, expected {n}")
            bad = np.flatnonzero(np.isinf(a) | (a < 0))
            if bad.size:
                fail(f"{a[bad[0]]!r} is not a valid uncertainty (must be finite and ≥ 0)",
                     int(bad[0]), name)
            return a

        uv_col, ui_col, ur_col = opt(u_voltage, "u_voltage"), opt(u_current, "u_current"), opt(
            u_load, "u_load")
        tol_col = opt(load_tolerance_pct, "load_tolerance_pct")

        for k in ("voltage", "current"):
            if k in arrays:
                a = arrays[k]
                bad = np.flatnonzero(~np.isfinite(a))
                if bad.size:
                    what = "empty or not a number" if np.isnan(a[bad[0]]) else "infinite"
                    fail(f"{what} ({k} must be a finite number)", int(bad[0]), k)
        for k, limit, unit in (("voltage", _MAX_VOLTAGE, "V"), ("current", _MAX_CURRENT, "A"),
                               ("load", _MAX_LOAD, "Ω")):
            if k not in arrays:
                continue
            a = arrays[k]
            bad = np.flatnonzero((a > limit) | (a < -limit))  # overload codes among these
            bad = bad[np.isfinite(a[bad])]  # an open circuit is an infinite load
            if bad.size:
                over = bad[np.abs(a[bad]) >= _OVERLOAD]
                if over.size:
                    fail(f"{a[over[0]]:g} is an instrument's overload/not-a-number code "
                         f"(SCPI 9.9E+37), not a reading: remove or re-measure this row",
                         int(over[0]), k)
                fail(f"{arrays[k][bad[0]]:g} {unit} is implausible for a bench {k} "
                     f"(above {limit:g} {unit}): check the column's unit or the reading",
                     int(bad[0]), k)
        if "load" in arrays:
            r = arrays["load"]
            bad = np.flatnonzero(np.isnan(r))
            if bad.size:
                fail("empty or not a number (write a resistance such as 4.7k, or 'open')",
                     int(bad[0]), "load")
            bad = np.flatnonzero(r < 0)
            if bad.size:
                fail(f"negative load resistance {r[bad[0]]:g} Ω", int(bad[0]), "load")

        # ---- DUT grouping
        if group is not None:
            g = _as_array(group, np.int64, copy).ravel()
            names = tuple(duts or ())
            if names and type(names[0]) is not str:
                names = tuple(str(d) for d in names)
            if g.size != n or (g.size and (g.min() < 0 or g.max() >= len(names))):
                raise InputError(f"{source}: group codes do not match the DUT names")
        elif dut is not None:
            d = np.asarray(dut).astype(str).ravel()
            if d.size != n:
                raise InputError(f"{source}: 'dut' has {d.size} values, expected {n}")
            uniq, first, inv = np.unique(d, return_index=True, return_inverse=True)
            order = np.argsort(first, kind="stable")
            rank = np.empty_like(order)
            rank[order] = np.arange(order.size)
            g = rank[inv].astype(np.int64)
            names = tuple(str(u) for u in uniq[order])
        else:
            g = np.zeros(n, dtype=np.int64)
            names = ("DUT",)

        # ---- derive I and V and their uncertainty model
        def acc_u(acc: Accuracy | None, reading: np.ndarray) -> np.ndarray:
            """Weighting uncertainty: the whole spec as one term, plus the noise."""
            if acc is None:
                return np.zeros(n)
            u = np.asarray(acc.standard_uncertainty(reading), dtype=np.float64)
            if acc.has_noise:
                u = np.hypot(u, acc.noise(reading))
            return u

        def rand_u(acc: Accuracy | None, reading: np.ndarray, col) -> np.ndarray:
            """Random part: the noise where the spec is shared, else the whole spec."""
            if acc is None:
                base = np.zeros(n)
            elif acc.shared:
                base = np.asarray(acc.noise(reading), dtype=np.float64) * np.ones(n)
            else:
                base = acc_u(acc, reading)
            return override(base, col)

        def shared_parts(acc: Accuracy | None, reading: np.ndarray, col):
            """(gain, offset) change of each reading for one standard uncertainty."""
            if acc is None or not acc.shared or (acc.percent == 0 and acc.offset == 0):
                return np.zeros(n), np.zeros(n)
            own = np.zeros(n, bool) if col is None else ~np.isnan(col)
            gain = np.where(own, 0.0, acc.gain_u * reading)
            off = np.where(own, 0.0, acc.offset_u)
            return gain, off

        def override(base: np.ndarray, col: np.ndarray | None) -> np.ndarray:
            if col is None:
                return base
            return np.where(np.isnan(col), base, col)

        def load_u(r: np.ndarray) -> np.ndarray:
            if tol_col is None and load_tolerance is None and ur_col is None:
                return np.zeros(n)  # no resistor uncertainty stated
            finite = np.isfinite(r)
            u = np.where(finite, r, 0.0)
            if tol_col is not None:  # per-reading tolerance (%), else the global one
                u *= np.where(np.isnan(tol_col), load_tolerance or 0.0, tol_col)
                u /= 100.0 * math.sqrt(3.0)
            elif load_tolerance is not None:
                u *= load_tolerance / (100.0 * math.sqrt(3.0))
            else:
                u[:] = 0.0
            u = override(u, ur_col)
            u[~finite] = 0.0
            return u

        notes: list[Note] = []
        r = arrays.get("load")
        if r is None:
            r = np.full(n, np.nan)
        zeros = np.zeros(n)
        # The model of shared errors (ErrorModel) is made only where a meter's or a
        # resistor's error is shared by several readings, and its parts are computed for
        # it alone: ``random_parts`` gives the random parts (u(V), u(I), cov), ``dv``/``di``
        # the meters' gain and offset (made here where a meter's spec has a shared part).
        meters_share = _has_shared(voltage_accuracy) or _has_shared(current_accuracy)
        dv = np.zeros((4, n)) if meters_share else None
        di = np.zeros((4, n)) if meters_share else None
        res_dv, res_di = zeros, zeros
        if "voltage" in arrays and "current" in arrays:
            v, i = arrays["voltage"], arrays["current"]
            uv = override(acc_u(voltage_accuracy, v), uv_col)
            ui = override(acc_u(current_accuracy, i), ui_col)
            cov = np.zeros(n)
            current_from = voltage_from = "measured"

            def random_parts():
                return (rand_u(voltage_accuracy, v, uv_col),
                        rand_u(current_accuracy, i, ui_col), zeros)

            if meters_share:
                dv[0], dv[1] = shared_parts(voltage_accuracy, v, uv_col)
                di[2], di[3] = shared_parts(current_accuracy, i, ui_col)
            if "load" in arrays:
                notes += _cross_check(g, v, i, r, uv, ui, load_u(r), load_tolerance, tol_col,
                                      line_arr)
        elif "voltage" in arrays:  # (R, V): I = V / R
            v = arrays["voltage"]
            short = np.flatnonzero(r == 0)
            if short.size:
                bad = short[v[short] != 0]
                if bad.size:
                    fail(f"zero load resistance with a non-zero voltage {v[bad[0]]:g} V: the "
                         "current cannot be computed (add a current column for a "
                         "short-circuit reading)", int(bad[0]), "load")
                fail("a short with no current column carries no information; add a current "
                     "column or drop the reading", int(short[0]), "load")
            uv = override(acc_u(voltage_accuracy, v), uv_col)
            ur = load_u(r)
            with_ur = bool(ur.any())
            # An open circuit (R = ∞; every other R > 0 here) gives I = V/R = 0 exactly,
            # with no uncertainty, covariance or resistor part (u(R) = 0 there). In place
            # where possible: on 800,000 readings every temporary is 6 MB of fresh memory.
            with np.errstate(divide="ignore", invalid="ignore"):
                i = v / r
                i += 0.0  # −0.0 (a negative V over R = ∞) reads 0.0
                if with_ur or uv.any():
                    a = uv / r
                    cov = uv * a  # u(V)²/R: I = V/R shares the voltmeter's error
                    a *= a
                    if with_ur:
                        b = v * ur
                        b /= r
                        b /= r  # V·u(R)/R²
                        b *= b
                        a += b
                    ui = np.sqrt(a, out=a)
                else:  # nothing stated: a Type A fit weighs the readings by their scatter
                    ui, cov = np.zeros(n), np.zeros(n)
                inv_r = 1.0 / r if with_ur or meters_share else None
            if with_ur:
                res_di = i * ur * inv_r  # one u(R) of the resistor: δI = −I·u(R)/R

            def random_parts():
                uv_r = rand_u(voltage_accuracy, v, uv_col)
                return uv_r, np.hypot(uv_r * inv_r, res_di), uv_r * uv_r * inv_r

            if meters_share:
                dv[0], dv[1] = shared_parts(voltage_accuracy, v, uv_col)
                di[0], di[1] = dv[0] * inv_r, dv[1] * inv_r
            current_from, voltage_from = "load", "measured"
        else:  # (R, I): V = I·R
            i = arrays["current"]
            bad = np.flatnonzero(np.isinf(r))
            if bad.size:
                fail("open circuit with only a current reading: the voltage is unknown "
                     "(add a voltage column)", int(bad[0]), "load")
            ui = override(acc_u(current_accuracy, i), ui_col)
            ur = load_u(r)
            v = i * r
            uv = np.sqrt((r * ui) ** 2 + (i * ur) ** 2)
            cov = r * ui ** 2
            current_from, voltage_from = "measured", "load"
            if ur.any():
                res_dv = i * ur

            def random_parts():
                ui_r = rand_u(current_accuracy, i, ui_col)
                return np.hypot(r * ui_r, res_dv), ui_r, r * ui_r ** 2

            if meters_share:
                di[2], di[3] = shared_parts(current_accuracy, i, ui_col)
                dv[2], dv[3] = di[2] * r, di[3] * r
        rect = np.array([_is_rect(voltage_accuracy)] * 2 + [_is_rect(current_accuracy)] * 2)
        shares = (meters_share and bool(dv.any() or di.any())) or (
            bool(np.any(res_dv) or np.any(res_di)) and _repeats_a_load(g, r))
        errors = None
        if shares:
            if dv is None:
                dv, di = np.zeros((4, n)), np.zeros((4, n))
            errors = ErrorModel(*random_parts(), dv, di, rect, res_dv, res_di)

        if not all(np.isfinite(a).all() for a in (i, v, ui, uv, cov)):
            overflow = ~(np.isfinite(i) & np.isfinite(v) & np.isfinite(ui) & np.isfinite(uv)
                         & np.isfinite(cov))
            row = int(np.flatnonzero(overflow)[0])
            fail("value out of range (overflow when computing current or voltage)", row, "load")

        t = np.full(n, np.nan) if time is None else _as_array(time, np.float64, copy).ravel()
        if t.size != n:
            raise InputError(f"{source}: 'time' has {t.size} values, expected {n}")
        ln = line_arr if line_arr is not None else np.zeros(n, dtype=np.int64)

        if g.size > 1 and (g[1:] < g[:-1]).any():
            order = np.argsort(g, kind="stable")
            g, i, v, ui, uv, cov, r, t, ln = (a[order] for a in (g, i, v, ui, uv, cov, r, t, ln))
            if errors is not None:
                errors = errors.take(order)

        return cls(duts=names, group=g, current=i, voltage=v, u_current=ui, u_voltage=uv,
                   cov_iv=cov, load=r, time=t, line=ln, source=source,
                   current_from=current_from, voltage_from=voltage_from,
                   notes=tuple(notes), meta=dict(meta or {}), errors=errors)


def _load_ohms(values, fail):
    """Load resistances given as text (``"open"``, ``"4k7"``, ``"470R"``, ``"10"``) →
    ohms, read as the readings files read them (:func:`parse_resistance`: SI prefixes,
    IEC 60062 RKM codes, open and short); each distinct text once. Numbers pass through;
    ``None`` becomes ``nan`` (reported as an empty load by the caller's checks)."""
    a = np.asarray(values)
    if a.dtype.kind not in "OUS":
        return values
    flat = a.ravel()
    missing = np.zeros(flat.size, bool)
    if a.dtype.kind == "O":
        missing = np.frompyfunc(lambda v: v is None, 1, 1)(flat).astype(bool)
    texts, codes = np.unique(np.where(missing, "nan", flat.astype(str)), return_inverse=True)
    ohms = np.empty(texts.size)
    for j, text in enumerate(texts.tolist()):
        try:
            ohms[j] = parse_resistance(text)
        except ValueError as exc:
            fail(str(exc), int(np.flatnonzero(codes.ravel() == j)[0]), "load")
    return ohms[codes.ravel()]


def _repeats_a_load(g: np.ndarray, r: np.ndarray) -> bool:
    """Whether any DUT reads the same (finite) load value twice: one resistor, used twice."""
    fin = np.isfinite(r)
    if not fin.any():
        return False
    gf, rf = g[fin], r[fin]
    order = np.lexsort((rf, gf))
    gs, rs = gf[order], rf[order]
    return bool(np.any((gs[1:] == gs[:-1]) & (rs[1:] == rs[:-1])))


def _has_shared(acc: Accuracy | None) -> bool:
    """Whether a meter's spec has a part shared by its readings (a gain or offset)."""
    return acc is not None and acc.shared and (acc.percent != 0 or acc.offset != 0)


def _is_rect(acc: Accuracy | None) -> bool:
    return acc is None or abs(acc.divisor - math.sqrt(3.0)) < 1e-12


def _cross_check(g, v, i, r, uv, ui, ur, load_tolerance, tol_col, line_arr) -> list[Note]:
    """With V, I and R all given: note where V/I disagrees with R beyond its tolerance.

    The allowance is the combined expanded uncertainty (k = 2) of V − I·R, with the
    resistor's full tolerance half-width in place of its standard uncertainty; with no
    uncertainty stated at all, a 5 % relative disagreement (common practice).
    """
    ok = np.isfinite(r) & (r > 0)
    if not ok.any():
        return []
    rr = np.where(ok, r, 1.0)
    allowance = 2.0 * np.sqrt(uv ** 2 + (rr * ui) ** 2 + (i * ur * math.sqrt(3.0)) ** 2)
    resid = np.abs(v - i * rr)
    no_u = allowance == 0
    allowance = np.where(no_u, 0.05 * np.abs(v), allowance)
    bad = ok & (resid > allowance) & (np.abs(v) > 0)
    notes = []
    rows_bad = np.flatnonzero(bad)  # g is sorted later, so group these rows explicitly
    if rows_bad.size:
        rows_bad = rows_bad[np.argsort(g[rows_bad], kind="stable")]
        grps, starts = np.unique(g[rows_bad], return_index=True)
        for grp, rows in zip(grps, np.split(rows_bad, starts[1:])):
            where = ", ".join(str(int(line_arr[k])) if line_arr is not None else f"#{k + 1}"
                              for k in rows[:5])
            more = f" and {rows.size - 5} more" if rows.size > 5 else ""
            k = rows[0]
            measured = v[k] / i[k] if i[k] else math.inf
            notes.append(Note(int(grp), "load-mismatch",
                              f"V/I disagrees with the stated load beyond its tolerance at "
                              f"line(s) {where}{more} (e.g. {measured:.4g} Ω measured vs "
                              f"{r[k]:.4g} Ω stated): check the resistor value, lead resistance "
                              "or a mislabelled row; V and I were used as measured"))
    return notes
