"""Frozen result types.

``Fits`` is columnar: one array per quantity over all DUTs, so a batch of 100 000 DUTs
costs a few arrays, not 100 000 objects. Indexing it (``fits["U17"]`` or ``fits[0]``)
builds the per-DUT view ``FitResult`` with ``Estimate`` fields on demand.
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import math
import operator
from dataclasses import dataclass, field
from typing import Iterator, Mapping

import numpy as np

from ._frozen import freeze_arrays
from .formatting import format_estimate

__all__ = ["Flag", "Estimate", "FitResult", "Fits", "register_dataframe_builder"]

# The table view of results (pandas) belongs to the edges: ``sagfit.io.tables`` registers
# its builder here when imported, which ``import sagfit`` does. The core imports neither
# pandas nor the io layer, and pandas is loaded only when a table is asked for.
_dataframe_builder = None


def register_dataframe_builder(builder) -> None:
    """Set the function behind :meth:`Fits.to_dataframe` (``builder(fits) → DataFrame``)."""
    global _dataframe_builder
    _dataframe_builder = builder


def _f(x) -> float | None:
    """A float for JSON: ``None`` for NaN or ±inf."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True, slots=True)
class Flag:
    """A finding about one DUT: ``code`` (stable, machine-readable), ``severity``
    (``"info"`` or ``"warning"``) and a plain-words ``message``."""

    code: str
    severity: str
    message: str

    def to_dict(self) -> dict:
        return {"code": self.code, "severity": self.severity, "message": self.message}


@dataclass(frozen=True, slots=True)
class Estimate:
    """A value with its standard uncertainty ``u`` and a confidence interval.

    ``ci_low``/``ci_high`` are ``value ∓ k·u`` with the coverage factor ``k`` of the fit
    (normal quantile for stated uncertainties, Student t for a Type A fit) at ``level``.
    """

    value: float
    u: float
    ci_low: float
    ci_high: float
    level: float
    unit: str = ""

    def __repr__(self) -> str:
        return f"<Estimate {format_estimate(self.value, self.u, self.unit)}>"

    def __str__(self) -> str:
        return format_estimate(self.value, self.u, self.unit)

    def to_dict(self) -> dict:
        return {"value": _f(self.value), "u": _f(self.u),
                "ci": [_f(self.ci_low), _f(self.ci_high)]}


@dataclass(frozen=True, slots=True)
class FitResult:
    """The Thevenin/Norton equivalent of one DUT.

    Attributes
    ----------
    dut : str
    n : int
        Number of readings used.
    method : str
        ``"york"`` (errors in I and V, York et al. 2004), ``"wls"`` (errors in V only),
        ``"ols"`` (no uncertainty stated; Type A from the scatter) or ``""`` on error.
    vth, rth : Estimate
        Open-circuit voltage (V) and internal resistance (Ω).
    isc, pmax : Estimate
        Short-circuit (Norton) current Vth/Rth (A) and maximum power Vth²/(4·Rth) (W),
        with delta-method uncertainties using the full covariance.
    corr_vth_rth : float
        Correlation coefficient of Vth and Rth.
    cov : ndarray, shape (2, 2)
        Covariance of (Vth, Rth), after any scale factor.
    chi2 : float
        Weighted residual sum of squares (for OLS: the plain residual sum of squares).
    dof : int
        n − 2.
    p_value : float or None
        P(χ²_dof ≥ chi2); ``None`` when no uncertainty was stated or dof = 0.
    scale : float
        Factor S² applied to the covariance: max(1, χ²/ν) for stated uncertainties
        (PDG convention, never below 1); s² = χ²/ν for OLS.
    coverage_factor : float
        k used for the intervals.
    flags : tuple of Flag
    diagnostics : dict
        Test statistics and p-values of the diagnostic checks.
    error : str or None
        Why this DUT could not be fitted (then the estimates are NaN).
    """

    dut: str
    n: int
    method: str
    vth: Estimate
    rth: Estimate
    isc: Estimate
    pmax: Estimate
    corr_vth_rth: float
    cov: np.ndarray
    chi2: float
    dof: int
    p_value: float | None
    scale: float
    coverage_factor: float
    converged: bool
    flags: tuple[Flag, ...] = ()
    diagnostics: Mapping[str, object] = field(default_factory=dict)
    extra: Mapping[str, object] = field(default_factory=dict)
    error: str | None = None

    def __repr__(self) -> str:
        if self.error:
            return f"<FitResult {self.dut} error: {self.error}>"
        v = format_estimate(self.vth.value, self.vth.u, "V").replace(" ± ", "±")
        r = format_estimate(self.rth.value, self.rth.u, "Ω").replace(" ± ", "±")
        return f"<FitResult {self.dut} Vth={v} Rth={r} {self.method}>"

    @property
    def ok(self) -> bool:
        return self.error is None

    def to_dict(self) -> dict:
        """Plain JSON-ready dict, SI units (the shape of ``sagfit fit --json``)."""
        d = {
            "dut": self.dut, "n": int(self.n), "method": self.method or None,
            "vth": self.vth.to_dict(), "rth": self.rth.to_dict(),
            "isc": self.isc.to_dict(), "pmax": self.pmax.to_dict(),
            "norton": {"current": self.isc.to_dict(), "resistance": self.rth.to_dict()},
            "corr_vth_rth": _f(self.corr_vth_rth),
            "chi2": _f(self.chi2), "dof": int(self.dof), "p_value": _f(self.p_value),
            "scale_factor": _f(math.sqrt(self.scale)) if self.scale > 0 else None,
            "coverage_factor": _f(self.coverage_factor),
            "converged": bool(self.converged),
            "flags": [f.to_dict() for f in self.flags],
            "diagnostics": _jsonable(self.diagnostics),
        }
        for k, v in self.extra.items():
            d[k] = _jsonable(v)
        if self.error:
            d["error"] = self.error
        return d

    def as_record(self) -> dict:
        """Flat plain-float record (for SQLite and CSV)."""
        return {
            "dut": self.dut, "n": int(self.n), "method": self.method,
            "vth": _f(self.vth.value), "vth_u": _f(self.vth.u),
            "rth": _f(self.rth.value), "rth_u": _f(self.rth.u),
            "cov_vth_rth": _f(self.cov[0, 1]), "chi2": _f(self.chi2), "dof": int(self.dof),
            "p_value": _f(self.p_value),
            "flags": ";".join(f.code for f in self.flags), "error": self.error,
        }


def _jsonable(x):
    if isinstance(x, Mapping):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return [_jsonable(v) for v in x.tolist()]
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        return _f(x)
    if hasattr(x, "to_dict"):
        return x.to_dict()
    return x


class ColumnRows:
    """A per-DUT sequence of JSON dicts kept as columns and built on demand: ``rows[i]``
    gives one DUT's dict (or ``None``), ``rows[lo:hi]`` a slice. A large batch then holds
    a few arrays instead of one dict per DUT until a document asks for them.

    ``build(columns, i)`` makes the dict of row ``i`` from the sliced ``columns``.
    """

    def __init__(self, columns: dict, build):
        self.columns = columns
        self.build = build

    def __len__(self) -> int:
        return len(next(iter(self.columns.values())))

    def __getitem__(self, i):
        if isinstance(i, slice):
            return ColumnRows({k: v[i] for k, v in self.columns.items()}, self.build)
        return self.build(self.columns, i)

    def __iter__(self):
        return (self[i] for i in range(len(self)))

    @classmethod
    def concat(cls, parts: "list[ColumnRows]") -> "ColumnRows":
        keys = parts[0].columns
        return cls({k: np.concatenate([np.asarray(p.columns[k]) for p in parts])
                    for k in keys}, parts[0].build)


_ARRAY_FIELDS = ("n", "vth", "u_vth", "rth", "u_rth", "cov_vr", "chi2", "dof", "p_value",
                 "scale", "k", "isc", "u_isc", "pmax", "u_pmax", "converged", "method",
                 "k_rth", "var_vth_shared", "var_rth_shared", "cov_vr_shared")


@dataclass(frozen=True)
class Fits:
    """Fit results for many DUTs, as arrays (one element per DUT).

    Attributes
    ----------
    duts : tuple of str
    n, dof : ndarray of int
    method : ndarray of str
    vth, u_vth, rth, u_rth, cov_vr : ndarray
        Estimates, standard uncertainties and covariance of (Vth, Rth), scale included.
    chi2, p_value, scale, k : ndarray
        χ², its p-value (NaN when undefined), covariance scale factor, coverage factor.
    isc, u_isc, pmax, u_pmax : ndarray
        Derived Norton current and maximum power with uncertainties.
    converged : ndarray of bool
    error : tuple of (str or None)
    flags : tuple of tuple of Flag
    diagnostics : mapping of name → mapping of field → ndarray
        Columnar diagnostics (statistics and p-values per check).
    extra : mapping of name → sequence
        Per-DUT extra JSON fields (for example the uncertainty budget).
    confidence : float
    settings : mapping
        The settings used (for reports and the history).
    used_rows : ndarray of bool or None
        Over the rows of the readings: which readings the final fit used, when an option
        (``current_range``, ``below_knee``) left some out; ``None`` when all were used.
    k_rth : ndarray
        Coverage factor of Rth (``k`` is that of Vth; equal unless the error model gave
        two).
    var_vth_shared, var_rth_shared, cov_vr_shared : ndarray
        The part of the covariance of (Vth, Rth) that comes from the meters' systematic
        errors shared by the sweep (gain and offset, docs/method.md §2); zero when none was
        modelled. A later reading with the same meter, or a later record of the same DUT on
        the same instrument, shares it: ``predict`` and ``trend`` take it out where it
        cancels.
    """

    duts: tuple[str, ...]
    n: np.ndarray
    method: np.ndarray
    vth: np.ndarray
    u_vth: np.ndarray
    rth: np.ndarray
    u_rth: np.ndarray
    cov_vr: np.ndarray
    chi2: np.ndarray
    dof: np.ndarray
    p_value: np.ndarray
    scale: np.ndarray
    k: np.ndarray
    isc: np.ndarray
    u_isc: np.ndarray
    pmax: np.ndarray
    u_pmax: np.ndarray
    converged: np.ndarray
    error: tuple
    flags: tuple
    confidence: float
    diagnostics: Mapping[str, Mapping[str, np.ndarray]] = field(default_factory=dict)
    extra: Mapping[str, object] = field(default_factory=dict)
    settings: Mapping[str, object] = field(default_factory=dict)
    used_rows: np.ndarray | None = None
    k_rth: np.ndarray | None = None
    var_vth_shared: np.ndarray | None = None
    var_rth_shared: np.ndarray | None = None
    cov_vr_shared: np.ndarray | None = None

    def __post_init__(self):
        if self.k_rth is None:  # one coverage factor for both unless the fit gave two
            object.__setattr__(self, "k_rth", np.asarray(self.k))
        for name in ("var_vth_shared", "var_rth_shared", "cov_vr_shared"):
            if getattr(self, name) is None:  # no shared (systematic) meter errors
                object.__setattr__(self, name, np.zeros(len(self.duts)))
        freeze_arrays(self, _ARRAY_FIELDS)

    def __len__(self) -> int:
        return len(self.duts)

    def __repr__(self) -> str:
        bad = len(self.error) - self.error.count(None)
        return f"<Fits {len(self)} DUT(s), {len(self) - bad} fitted, {bad} error(s)>"

    def to_dataframe(self):
        """The results as a pandas ``DataFrame``: one row per DUT, the columns of
        ``sagfit fit --out results.csv`` (SI units, full precision; ``flags`` as
        ``code;code``, ``error`` empty for a fitted DUT)."""
        if _dataframe_builder is None:  # only if sagfit.core was loaded on its own
            raise RuntimeError("import sagfit first: the table view lives in sagfit.io")
        return _dataframe_builder(self)

    #: DUTs shown by the notebook view; the rest are counted.
    HTML_ROWS = 20

    def _repr_html_(self) -> str:
        """A small HTML table for notebooks: the first ``HTML_ROWS`` DUTs with Vth, Rth,
        Isc and Pmax ± standard uncertainty, method and warning codes."""
        import html

        e = html.escape
        head = ("<tr><th>DUT</th><th>n</th><th>Vth</th><th>Rth</th><th>Isc</th><th>Pmax</th>"
                "<th>method</th><th>warnings</th></tr>")
        rows = []
        for i in range(min(len(self), self.HTML_ROWS)):
            if self.error[i] is not None:
                rows.append(f"<tr><td>{e(self.duts[i])}</td><td>{int(self.n[i])}</td>"
                            f"<td colspan='6'>error: {e(str(self.error[i]))}</td></tr>")
                continue
            cells = [format_estimate(v[i], u[i], unit) for v, u, unit in (
                (self.vth, self.u_vth, "V"), (self.rth, self.u_rth, "Ω"),
                (self.isc, self.u_isc, "A"), (self.pmax, self.u_pmax, "W"))]
            warn = ", ".join(f.code for f in self.flags[i] if f.severity == "warning")
            rows.append(f"<tr><td>{e(self.duts[i])}</td><td>{int(self.n[i])}</td>"
                        + "".join(f"<td style='text-align:right'>{e(c)}</td>" for c in cells)
                        + f"<td>{e(str(self.method[i]))}</td><td>{e(warn)}</td></tr>")
        more = len(self) - self.HTML_ROWS
        tail = (f"<p>… {more} more DUTs (<code>fits.to_dataframe()</code> has them all)</p>"
                if more > 0 else "")
        return (f"<p>{e(repr(self))}; values ± standard uncertainty</p>"
                f"<table>{head}{''.join(rows)}</table>{tail}")

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of the DUTs that were fitted."""
        return np.fromiter(map(operator.is_, self.error, itertools.repeat(None)), dtype=bool,
                           count=len(self.error))

    @functools.cached_property
    def flag_groups(self) -> tuple[np.ndarray, list]:
        """(codes, distinct): DUT i carries the flag tuple ``distinct[codes[i]]``. DUTs
        share flag tuples (a large batch holds a handful), so per-DUT questions about
        flags are asked once per distinct tuple and gathered with ``codes``."""
        ids = list(map(id, self.flags))
        distinct = dict(zip(ids, self.flags))
        number = {key: k for k, key in enumerate(distinct)}
        codes = np.fromiter(map(number.__getitem__, ids), dtype=np.intp, count=len(ids))
        return codes, list(distinct.values())

    def flag_mask(self, test) -> np.ndarray:
        """``test(flags)`` of each DUT as a boolean mask, ``test`` run once per distinct
        flag tuple (see :attr:`flag_groups`)."""
        codes, distinct = self.flag_groups
        return np.array([bool(test(fl)) for fl in distinct], dtype=bool)[codes]

    def index(self, key) -> int:
        if isinstance(key, (int, np.integer)):
            i = int(key)
            if not -len(self) <= i < len(self):
                raise IndexError(i)
            return i % len(self)
        try:
            return self.duts.index(str(key))
        except ValueError:
            raise KeyError(key) from None

    def __getitem__(self, key) -> FitResult:
        i = self.index(key)
        lvl = self.confidence
        k_v, k_r = float(self.k[i]), float(self.k_rth[i])
        k = max(k_v, k_r)  # derived quantities: the larger of the two

        def est(v, u, unit, k=k):
            v, u = float(v), float(u)
            return Estimate(v, u, v - k * u, v + k * u, lvl, unit)

        cov = np.array([[self.u_vth[i] ** 2, self.cov_vr[i]],
                        [self.cov_vr[i], self.u_rth[i] ** 2]])
        denom = self.u_vth[i] * self.u_rth[i]
        corr = float(self.cov_vr[i] / denom) if denom > 0 else math.nan
        p = float(self.p_value[i])
        diag = {name: {f: (col[i].item() if hasattr(col[i], "item") else col[i])
                       for f, col in cols.items()}
                for name, cols in self.diagnostics.items()}
        extra = {name: col[i] for name, col in self.extra.items() if col[i] is not None}
        return FitResult(
            dut=self.duts[i], n=int(self.n[i]), method=str(self.method[i]),
            vth=est(self.vth[i], self.u_vth[i], "V", k_v),
            rth=est(self.rth[i], self.u_rth[i], "Ω", k_r),
            isc=est(self.isc[i], self.u_isc[i], "A"), pmax=est(self.pmax[i], self.u_pmax[i], "W"),
            corr_vth_rth=corr, cov=cov, chi2=float(self.chi2[i]), dof=int(self.dof[i]),
            p_value=p if math.isfinite(p) else None, scale=float(self.scale[i]),
            coverage_factor=k, converged=bool(self.converged[i]), flags=tuple(self.flags[i]),
            diagnostics=diag, extra=extra, error=self.error[i])

    def __iter__(self) -> Iterator[FitResult]:
        for i in range(len(self)):
            yield self[i]

    def replace(self, **changes) -> "Fits":
        """A new ``Fits`` with some fields replaced (results are never changed in place)."""
        return dataclasses.replace(self, **changes)

    def add_flags(self, new_flags) -> "Fits":
        """A new ``Fits`` with ``new_flags[i]`` (a sequence of Flag) appended to DUT i."""
        # DUTs share flag tuples (one per combination); keep them shared, so that a large
        # batch holds a handful of tuples instead of one per DUT. The loops run in C
        # (map, zip, dict): a Python loop per DUT cost 60 ms on 100,000 DUTs. Where only a
        # few DUTs get new flags (sweeps of ten readings or more), only those are touched.
        m = len(self.flags)
        given = np.flatnonzero(np.fromiter(map(len, new_flags), dtype=np.intp, count=m))
        if given.size * 4 >= m:
            olds, news, sel = self.flags, new_flags, None
        elif given.size:
            sel = given.tolist()
            olds = [self.flags[k] for k in sel]
            news = [new_flags[k] for k in sel]
        else:
            return self.replace()
        keys = list(zip(map(id, olds), map(id, news)))
        pairs = dict(zip(keys, zip(olds, news)))
        table = {key: (a if not b else tuple(a) + tuple(b)) for key, (a, b) in pairs.items()}
        if sel is None:
            return self.replace(flags=tuple(map(table.__getitem__, keys)))
        flags = list(self.flags)
        for k, key in zip(sel, keys):
            flags[k] = table[key]
        return self.replace(flags=tuple(flags))

    def dut_slice(self, lo: int, hi: int) -> "Fits":
        """The DUTs ``lo`` … ``hi − 1`` as a ``Fits`` of their own (for writing a large
        batch in parts). ``used_rows`` refers to the rows of the whole readings and is
        left out."""
        changes: dict = {"duts": self.duts[lo:hi], "error": self.error[lo:hi],
                         "flags": self.flags[lo:hi], "used_rows": None}
        for name in _ARRAY_FIELDS:
            changes[name] = getattr(self, name)[lo:hi]
        changes["diagnostics"] = {name: {f: c[lo:hi] for f, c in cols.items()}
                                  for name, cols in self.diagnostics.items()}
        changes["extra"] = {name: col[lo:hi] for name, col in self.extra.items()}
        return dataclasses.replace(self, **changes)

    @classmethod
    def concat(cls, parts: "list[Fits]") -> "Fits":
        """The DUTs of several ``Fits`` (same settings) one after the other."""
        first = parts[0]
        if len(parts) == 1:
            return first
        chain = itertools.chain.from_iterable
        changes: dict = {"duts": tuple(chain(p.duts for p in parts)),
                         "error": tuple(chain(p.error for p in parts)),
                         "flags": tuple(chain(p.flags for p in parts))}
        for name in _ARRAY_FIELDS:
            changes[name] = np.concatenate([getattr(p, name) for p in parts])
        changes["diagnostics"] = {
            name: {f: np.concatenate([np.asarray(p.diagnostics[name][f]) for p in parts])
                   for f in cols}
            for name, cols in first.diagnostics.items()}
        changes["extra"] = {
            name: (type(first.extra[name]).concat([p.extra[name] for p in parts])
                   if isinstance(first.extra[name], ColumnRows)
                   else [x for p in parts for x in p.extra[name]])
            for name in first.extra}
        return dataclasses.replace(first, **changes)

    def to_dicts(self, indices: range | None = None) -> list[dict]:
        """Per-DUT JSON-ready dicts (the ``results`` of ``sagfit fit --json``), of all DUTs
        or of a ``range`` of them (a piece of a large document).

        Built column-wise: equal to ``[fits[i].to_dict() for i …]`` but several times
        faster on a large batch.
        """
        if indices is not None and indices != range(len(self)):
            if indices.step != 1:
                raise ValueError("to_dicts takes a range of consecutive DUTs")
            return self.dut_slice(indices.start, indices.stop).to_dicts()
        m = len(self)
        if m == 0:
            return []
        k = self.k
        k_r = self.k_rth
        k_d = np.fmax(k, k_r)  # derived quantities: the larger of the two

        def col(a):
            return [_f(x) for x in np.asarray(a, dtype=float).tolist()]

        def est(v, u, k=k_d):
            vv, uu = col(v), col(u)
            lo, hi = col(v - k * u), col(v + k * u)
            return [{"value": a, "u": b, "ci": [c, d]} for a, b, c, d in zip(vv, uu, lo, hi)]

        with np.errstate(invalid="ignore", divide="ignore"):
            vth, rth = est(self.vth, self.u_vth, k), est(self.rth, self.u_rth, k_r)
            isc, pmax = est(self.isc, self.u_isc), est(self.pmax, self.u_pmax)
            corr = col(self.cov_vr / (self.u_vth * self.u_rth))
            sf = col(np.sqrt(self.scale))
        chi2, p, kk = col(self.chi2), col(self.p_value), col(k)
        n, dof = self.n.tolist(), self.dof.tolist()
        method = [str(x) or None for x in self.method.tolist()]
        conv = self.converged.tolist()
        diag_cols = {name: {f: (c.tolist() if isinstance(c, np.ndarray) else list(c))
                            for f, c in cols.items()}
                     for name, cols in self.diagnostics.items()}
        out = []
        for i in range(m):
            d = {"dut": self.duts[i], "n": int(n[i]), "method": method[i],
                 "vth": vth[i], "rth": rth[i], "isc": isc[i], "pmax": pmax[i],
                 "norton": {"current": isc[i], "resistance": rth[i]},
                 "corr_vth_rth": corr[i], "chi2": chi2[i], "dof": int(dof[i]),
                 "p_value": p[i], "scale_factor": sf[i], "coverage_factor": kk[i],
                 "converged": bool(conv[i]),
                 "flags": [f.to_dict() for f in self.flags[i]],
                 "diagnostics": {name: {f: _jsonable(c[i]) for f, c in cols.items()}
                                 for name, cols in diag_cols.items()}}
            for name, c in self.extra.items():
                if c[i] is not None:
                    d[name] = _jsonable(c[i])
            if self.error[i]:
                d["error"] = self.error[i]
            out.append(d)
        return out
