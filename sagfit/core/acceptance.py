"""Acceptance decisions on fitted DUTs, with the measurement uncertainty taken into account.

Why this module stays whole at about 740 lines (over the ~500 of the house rule): the
decision rules, the frozen ``Spec``/``Acceptance`` types and their JSON form change
together (a rule's limits, its decision and how it is reported are one subject).

Pure core: a :class:`Spec` (tolerance limits and a decision rule) and a
:class:`~sagfit.results.Fits` in, a frozen :class:`Acceptance` out. Everything is
vectorised over the DUTs; the only per-DUT Python work is building JSON dicts on request
(:meth:`Acceptance.to_dicts`) and reading the flags of the DUTs that carry any.

Every rule is expressed as an *acceptance interval* [A_L, A_U] (measured values that
pass) and a *rejection limit* on each side (measured values beyond it fail); measured
values in between are *inconclusive*:

``simple``
    Simple acceptance, shared risk: A = T, no inconclusive zone (ILAC-G8:09/2019 §4.2.1;
    JCGM 106:2012, guard band w = 0).
``guarded``
    Guarded acceptance with w = r·U, U = k·u (r = 1 by default): A_L = T_L + w,
    A_U = T_U − w; a result fails when its whole interval y ± U lies outside the
    tolerance, i.e. beyond T_U + w or below T_L − w (ILAC-G8:09/2019 §4.1, §4.2.2 and the
    non-binary statement of §4.2.3; JCGM 106:2012, guarded acceptance).
``risk``
    Conformance probability for a normal PDF with best estimate y and standard
    uncertainty u (JCGM 106:2012): p_c = Φ((T_U − y)/u) − Φ((T_L − y)/u); pass when
    p_c ≥ p_min, fail when p_c ≤ 1 − p_min, else inconclusive. The acceptance and
    rejection limits reported with it are the measured values where p_c equals p_min and
    1 − p_min (closed form for one-sided limits, bisection for two-sided ones).

Limits are closed: a value exactly on an acceptance limit passes, a guarded interval
that just touches a tolerance limit from inside passes, one that touches it from
outside is inconclusive (the interval is not wholly outside).

Terminal voltage at a stated load or current and load regulation between two stated
operating points are functions of (Vth, Rth); their standard uncertainties come from the
full covariance of the fit by the law of propagation of uncertainty (JCGM 100:2008, GUM
5.2.2, the delta method). The stated load of a check is a defined condition of the
specification, so it carries no uncertainty of its own.

References
----------
- JCGM 106:2012, *Evaluation of measurement data — The role of measurement uncertainty
  in conformity assessment* (ISO/IEC Guide 98-4:2012).
- ILAC-G8:09/2019, *Guidelines on Decision Rules and Statements of Conformity*.
- JCGM 100:2008 (GUM), 5.2.2 (correlated input quantities).
- Load regulation (V_light − V_heavy)/V_heavy × 100 %: common practice.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
from scipy import special

from .errors import InputError
from .readings import Readings
from .results import Fits

__all__ = ["RULES", "DECISIONS", "PASS", "INCONCLUSIVE", "FAIL", "ERROR", "Condition",
           "Check", "DecisionRule", "Spec", "CheckResult", "Acceptance",
           "conformance_probability", "decide", "terminal_voltage", "check_values", "accept"]

RULES = ("simple", "guarded", "risk")
PASS, INCONCLUSIVE, FAIL, ERROR = 0, 1, 2, 3
DECISIONS = ("pass", "inconclusive", "fail", "error")
# ILAC-G8:09/2019 §4.2.3 non-binary statements (by zone of the measured value)
STATEMENTS = ("pass", "conditional pass", "conditional fail", "fail", "")

_UNITS = {"vth": "V", "rth": "Ω", "isc": "A", "pmax": "W", "voltage": "V", "regulation": "%"}
_BISECT_STEPS = 64


@dataclass(frozen=True, slots=True)
class Condition:
    """An operating point of a check: a load resistance (Ω; ``inf`` = open circuit) or a
    load current (A)."""

    kind: str  # "load" or "current"
    value: float
    text: str = ""

    def __post_init__(self):
        if self.kind not in ("load", "current"):
            raise InputError(f"condition kind must be 'load' or 'current' (got {self.kind!r})")
        if self.kind == "load" and not self.value > 0:
            raise InputError("a load of 0 Ω is a short circuit; limit isc instead")
        if self.kind == "current" and not math.isfinite(self.value):
            raise InputError("a load current must be finite")

    @property
    def label(self) -> str:
        if self.text:
            return self.text
        if self.kind == "load":
            return "open" if math.isinf(self.value) else f"{self.value:g} Ω"
        return f"{self.value:g} A"


@dataclass(frozen=True, slots=True)
class Check:
    """One limit of a spec.

    Attributes
    ----------
    name : str
        The check's name in outputs (``vth``, ``v_at_1.5A`` …).
    quantity : str
        ``vth`` (V), ``rth`` (Ω), ``isc`` (A), ``pmax`` (W), ``voltage`` (terminal voltage
        at ``at``, V) or ``regulation`` (between ``light`` and ``heavy``, %).
    lower, upper : float
        Tolerance limits T_L, T_U in SI units (``-inf``/``inf`` for a one-sided limit).
    at, light, heavy : Condition, optional
        Operating points of ``voltage`` and ``regulation`` checks.
    key : str
        Where it came from in the spec file (for messages).
    note : str
        Free text from the spec.
    """

    name: str
    quantity: str
    lower: float = -math.inf
    upper: float = math.inf
    at: Condition | None = None
    light: Condition | None = None
    heavy: Condition | None = None
    key: str = ""
    note: str = ""

    def __post_init__(self):
        if self.quantity not in _UNITS:
            raise InputError(f"unknown quantity {self.quantity!r} (one of {', '.join(_UNITS)})")
        if math.isnan(self.lower) or math.isnan(self.upper):
            raise InputError(f"{self.name}: limits must be numbers")
        if self.lower == -math.inf and self.upper == math.inf:
            raise InputError(f"{self.name}: give a lower and/or an upper limit")
        if self.lower > self.upper:
            raise InputError(f"{self.name}: lower limit {self.lower:g} is above the upper "
                             f"limit {self.upper:g}")
        if self.quantity == "voltage" and self.at is None:
            raise InputError(f"{self.name}: a terminal-voltage check needs an operating point")
        if self.quantity == "regulation" and (self.light is None or self.heavy is None):
            raise InputError(f"{self.name}: a regulation check needs a light and a heavy load")

    @property
    def unit(self) -> str:
        return _UNITS[self.quantity]

    @property
    def two_sided(self) -> bool:
        return math.isfinite(self.lower) and math.isfinite(self.upper)


@dataclass(frozen=True, slots=True)
class DecisionRule:
    """How measured values and their uncertainties become decisions.

    Attributes
    ----------
    rule : str
        ``simple``, ``guarded`` (default) or ``risk``.
    k : float, optional
        Fixed coverage factor for U = k·u. ``None``: the fit's own coverage factor at
        its confidence level (normal quantile; Student t for a Type A fit).
    confidence : float, optional
        Confidence level asked for by the spec (used by the caller to fit).
    min_conformance : float
        Required conformance probability p_min of the ``risk`` rule, 0.5 < p_min < 1.
    guard : float
        Guard band as a multiple r of U (w = r·U) for the ``guarded`` rule; 1 by default.
    cap_flagged : bool
        A DUT with a warning flag (curvature, knee, non-convergence …) is at best
        inconclusive (default). A warning from a significance test counts only when it
        holds over all the tests its DUT ran (:func:`family_p`).
    ignore_flags : tuple of str
        Warning codes that do not cap the decision.
    """

    rule: str = "guarded"
    k: float | None = None
    confidence: float | None = None
    min_conformance: float = 0.95
    guard: float = 1.0
    cap_flagged: bool = True
    ignore_flags: tuple[str, ...] = ()

    def __post_init__(self):
        if self.rule not in RULES:
            raise InputError(f"unknown decision rule {self.rule!r} (one of {', '.join(RULES)})")
        if self.k is not None and not (math.isfinite(self.k) and self.k > 0):
            raise InputError(f"coverage factor k must be positive (got {self.k!r})")
        if not 0.5 < self.min_conformance < 1.0:
            raise InputError("the required conformance probability must be above 0.5 and "
                             f"below 1 (got {self.min_conformance!r})")
        if not (math.isfinite(self.guard) and self.guard >= 0):
            raise InputError(f"guard multiple must be zero or positive (got {self.guard!r})")

    def with_rule(self, rule: str | None) -> "DecisionRule":
        if rule is None or rule == self.rule:
            return self
        return DecisionRule(rule, self.k, self.confidence, self.min_conformance, self.guard,
                            self.cap_flagged, self.ignore_flags)


@dataclass(frozen=True, slots=True)
class Spec:
    """An acceptance specification: checks plus a decision rule."""

    checks: tuple[Check, ...]
    decision: DecisionRule = field(default_factory=DecisionRule)
    name: str = ""
    revision: str = ""
    source: str = ""
    sha256: str = ""
    info: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self):
        if not self.checks:
            raise InputError("the spec has no limits")
        names = [c.name for c in self.checks]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise InputError(f"check names must be unique ({', '.join(dup)} repeated)")


# ------------------------------------------------------------------------ the maths
def _phi(z):
    return special.ndtr(z)


def conformance_probability(value, u, lower=-math.inf, upper=math.inf):
    """Conformance probability p_c of a normal PDF N(value, u²) over [lower, upper].

    p_c = Φ((T_U − y)/u) − Φ((T_L − y)/u) (JCGM 106:2012, normal PDF); with one limit
    infinite this is the one-sided form. With ``u = 0`` the PDF is a point: p_c is 1
    inside the closed interval, 0 outside, and 0.5 exactly on a limit (the limit of
    u → 0). NaN where ``value`` or ``u`` is NaN.

    Parameters
    ----------
    value, u : array_like
        Best estimate y and its standard uncertainty u (same unit).
    lower, upper : float or array_like
        Tolerance limits T_L, T_U (``-inf``/``inf`` for none).

    Returns
    -------
    ndarray
    """
    y = np.asarray(value, dtype=float)
    u = np.asarray(u, dtype=float)
    lo = np.asarray(lower, dtype=float)
    hi = np.asarray(upper, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        dh = hi - y
        dl = lo - y
        zh = np.where(dh == 0, 0.0, dh / u)
        zl = np.where(dl == 0, 0.0, dl / u)
        # for |z| large, Φ(zh) − Φ(zl) loses digits when both are near 1: use the upper
        # tail Φ(−zl) − Φ(−zh) there (same value, exact in floating point)
        upper_tail = zl > 0
        p = np.where(upper_tail, _phi(-zl) - _phi(-zh), _phi(zh) - _phi(zl))
    return np.clip(p, 0.0, 1.0)


def _solve_two_sided(target, lower, upper, u):
    """Measured value y ≥ midpoint with p_c(y) = target for a two-sided tolerance.

    p_c decreases monotonically from the midpoint outwards, so bisection on
    [mid, T_U + 40u] converges; NaN where p_c(mid) < target (no such value).
    """
    mid = 0.5 * (lower + upper)
    u = np.asarray(u, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        # far from the other limit the one-sided closed form is exact in double precision
        # (the other tail is below Φ(−30) ≈ 5e-198)
        out = upper - float(special.ndtri(target)) * u
        near = (u > 0) & ((upper - lower) / u < 40.0)
    if near.any():
        un = u[near]
        lo = np.full(un.shape, mid)
        hi = upper + 40.0 * un
        for _ in range(_BISECT_STEPS):
            y = 0.5 * (lo + hi)
            above = conformance_probability(y, un, lower, upper) >= target
            lo = np.where(above, y, lo)
            hi = np.where(above, hi, y)
        p_mid = conformance_probability(mid, un, lower, upper)
        out[near] = np.where(p_mid >= target, lo, np.nan)
    return np.where(u > 0, out, np.where(np.isnan(u), np.nan, upper))


def decide(value, u, U, lower, upper, decision: DecisionRule):
    """Decide measured values against one tolerance interval (vectorised).

    Parameters
    ----------
    value, u, U : ndarray
        Measured values, standard and expanded uncertainties (U = k·u).
    lower, upper : float
        Tolerance limits T_L, T_U (``-inf``/``inf`` for none).
    decision : DecisionRule

    Returns
    -------
    dict of ndarray
        ``decision`` (int8: PASS, INCONCLUSIVE, FAIL; FAIL never for NaN values, which are
        INCONCLUSIVE), ``p_c``, ``accept_lower``, ``accept_upper``, ``reject_lower``,
        ``reject_upper``, ``statement`` (int8 index into ``STATEMENTS``, ILAC-G8 §4.2.3).
    """
    y = np.asarray(value, dtype=float)
    u = np.asarray(u, dtype=float)
    U = np.asarray(U, dtype=float)
    p_c = conformance_probability(y, u, lower, upper)
    rule = decision.rule
    with np.errstate(invalid="ignore"):
        if rule == "simple":
            a_lo = np.full(y.shape, lower)
            a_hi = np.full(y.shape, upper)
            r_lo, r_hi = a_lo, a_hi
        elif rule == "guarded":
            w = decision.guard * U
            a_lo, a_hi = lower + w, upper - w
            r_lo, r_hi = lower - w, upper + w
        else:
            pmin = decision.min_conformance
            if math.isfinite(lower) and math.isfinite(upper):
                a_hi = _solve_two_sided(pmin, lower, upper, u)
                r_hi = _solve_two_sided(1.0 - pmin, lower, upper, u)
                mid = 0.5 * (lower + upper)
                a_lo, r_lo = 2.0 * mid - a_hi, 2.0 * mid - r_hi
                # p_c ≤ 1 − p_min even at the midpoint: every value fails
                r_hi = np.where(np.isnan(r_hi) & ~np.isnan(u), mid, r_hi)
                r_lo = np.where(np.isnan(r_lo) & ~np.isnan(u), mid, r_lo)
            else:
                z = float(special.ndtri(pmin))
                a_lo, a_hi = lower + z * u, upper - z * u
                r_lo, r_hi = lower - z * u, upper + z * u
        if rule == "risk":
            passed = p_c >= decision.min_conformance
            failed = p_c <= 1.0 - decision.min_conformance
        else:
            passed = (y >= a_lo) & (y <= a_hi)
            failed = (y < r_lo) | (y > r_hi)
    d = np.where(passed, PASS, np.where(failed, FAIL, INCONCLUSIVE)).astype(np.int8)
    inside = (y >= lower) & (y <= upper)
    statement = np.where(d == PASS, 0, np.where(d == FAIL, 3, np.where(inside, 1, 2)))
    statement = np.where(np.isnan(y), 4, statement).astype(np.int8)
    return {"decision": d, "p_c": p_c, "accept_lower": np.broadcast_to(a_lo, y.shape),
            "accept_upper": np.broadcast_to(a_hi, y.shape),
            "reject_lower": np.broadcast_to(r_lo, y.shape),
            "reject_upper": np.broadcast_to(r_hi, y.shape), "statement": statement}


def terminal_voltage(vth, rth, cond: Condition):
    """Terminal voltage at an operating point and its sensitivities to (Vth, Rth).

    At a load current I: V = Vth − Rth·I. At a load R: V = Vth·R/(Rth + R) (open circuit:
    V = Vth). Thevenin's theorem (textbook, e.g. Alexander & Sadiku, *Fundamentals of
    Electric Circuits*).

    Returns
    -------
    (V, ∂V/∂Vth, ∂V/∂Rth) : tuple of ndarray
    """
    vth = np.asarray(vth, dtype=float)
    rth = np.asarray(rth, dtype=float)
    if cond.kind == "current":
        i = cond.value
        return vth - rth * i, np.ones_like(vth), np.full_like(vth, -i)
    r = cond.value
    if math.isinf(r):
        return vth.copy(), np.ones_like(vth), np.zeros_like(vth)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = rth + r
        return vth * r / s, r / s, -vth * r / (s * s)


def _propagate(gv, gr, var_v, var_r, cov):
    """u² = g·Σ·gᵀ for g = (∂f/∂Vth, ∂f/∂Rth) (GUM 5.2.2)."""
    with np.errstate(invalid="ignore", over="ignore"):
        return np.sqrt(np.maximum(gv * gv * var_v + gr * gr * var_r + 2.0 * gv * gr * cov, 0.0))


def check_values(fits: Fits, check: Check):
    """Measured value and standard uncertainty of ``check``'s quantity for every DUT.

    Returns
    -------
    (value, u) : tuple of ndarray
        SI units (% for regulation); NaN for DUTs that were not fitted.
    """
    q = check.quantity
    if q in ("vth", "rth", "isc", "pmax"):
        return np.asarray(getattr(fits, q), float), np.asarray(getattr(fits, "u_" + q), float)
    var_v = fits.u_vth ** 2
    var_r = fits.u_rth ** 2
    cov = fits.cov_vr
    if q == "voltage":
        v, gv, gr = terminal_voltage(fits.vth, fits.rth, check.at)
        return v, _propagate(gv, gr, var_v, var_r, cov)
    vl, gvl, grl = terminal_voltage(fits.vth, fits.rth, check.light)
    vh, gvh, grh = terminal_voltage(fits.vth, fits.rth, check.heavy)
    with np.errstate(divide="ignore", invalid="ignore"):
        reg = (vl - vh) / vh * 100.0
        # ∂/∂θ of 100·(V_l/V_h − 1) = 100·(∂V_l·V_h − V_l·∂V_h)/V_h²
        gv = 100.0 * (gvl * vh - vl * gvh) / (vh * vh)
        gr = 100.0 * (grl * vh - vl * grh) / (vh * vh)
    return reg, _propagate(gv, gr, var_v, var_r, cov)


# ------------------------------------------------------------------------ results
@dataclass(frozen=True)
class CheckResult:
    """The outcome of one check for every DUT (columnar)."""

    check: Check
    value: np.ndarray
    u: np.ndarray
    U: np.ndarray
    p_c: np.ndarray
    accept_lower: np.ndarray
    accept_upper: np.ndarray
    reject_lower: np.ndarray
    reject_upper: np.ndarray
    decision: np.ndarray
    statement: np.ndarray
    extrapolated: np.ndarray | None = None

    def __post_init__(self):
        for name in ("value", "u", "U", "p_c", "accept_lower", "accept_upper", "reject_lower",
                     "reject_upper", "decision", "statement", "extrapolated"):
            if getattr(self, name) is None:
                continue
            a = np.array(getattr(self, name))
            a.setflags(write=False)
            object.__setattr__(self, name, a)

    @property
    def name(self) -> str:
        return self.check.name


def _f(x):
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True)
class Acceptance:
    """Acceptance decisions for many DUTs.

    Attributes
    ----------
    duts : tuple of str
    decision : ndarray of int8
        Per DUT: PASS, INCONCLUSIVE, FAIL or ERROR (index into ``DECISIONS``); the worst
        of its checks, capped at INCONCLUSIVE for a flagged DUT when the rule says so.
    checks : tuple of CheckResult
    flagged : ndarray of bool
        The DUT carries a warning flag that counts (see ``DecisionRule.ignore_flags`` and
        :func:`family_p`).
    capped : ndarray of bool
        The flag turned what would have been a pass into inconclusive.
    warning_codes : mapping of int → tuple of str
        Warning codes of the flagged DUTs (only those).
    error : tuple of (str or None)
        Why a DUT could not be fitted.
    k : ndarray
        Coverage factor used for U per DUT.
    rule : DecisionRule
    spec : Spec
    confidence : float
    """

    duts: tuple
    decision: np.ndarray
    checks: tuple
    flagged: np.ndarray
    capped: np.ndarray
    warning_codes: Mapping[int, tuple]
    error: tuple
    k: np.ndarray
    rule: DecisionRule
    spec: Spec
    confidence: float
    #: The counting flags of each flagged DUT as ``fit --json`` writes them (code, severity,
    #: message), so the JSON of every command gives flags one shape.
    warning_flags: Mapping[int, tuple] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.duts)

    def counts(self) -> dict:
        c = np.bincount(self.decision, minlength=4)
        return {name: int(c[i]) for i, name in enumerate(DECISIONS)}

    def summary(self) -> dict:
        """Counts, yield (passed / units), and the checks ranked by failures."""
        counts = self.counts()
        n = len(self)
        ranked = []
        for cr in self.checks:
            c = np.bincount(cr.decision[self.decision != ERROR], minlength=3)
            ranked.append({"quantity": cr.name, "fail": int(c[FAIL]),
                           "inconclusive": int(c[INCONCLUSIVE])})
        ranked.sort(key=lambda r: (-r["fail"], -r["inconclusive"]))
        extrapolated = {cr.name: int(cr.extrapolated[self.decision != ERROR].sum())
                        for cr in self.checks if cr.extrapolated is not None}
        return {**counts, "total": n,
                "yield": counts["pass"] / n if n else None,
                "capped_by_flags": int(self.capped.sum()),
                "failed_most": [r for r in ranked if r["fail"] or r["inconclusive"]],
                "extrapolated": {k: v for k, v in extrapolated.items() if v}}

    @property
    def exit_code(self) -> int:
        """0 all pass; 1 at least one fail; 3 no fail but some inconclusive or error."""
        c = self.counts()
        if c["fail"]:
            return 1
        if c["inconclusive"] or c["error"]:
            return 3
        return 0

    def decision_names(self) -> np.ndarray:
        return np.array(DECISIONS, dtype=object)[self.decision]

    def _flag_dicts(self, i: int) -> list[dict]:
        full = self.warning_flags.get(i)
        if full is not None:
            return [dict(f) for f in full]
        return [{"code": c, "severity": "warning", "message": ""}
                for c in self.warning_codes.get(i, ())]

    def to_dicts(self, indices=None) -> list[dict]:
        """Per-DUT JSON-ready dicts (the ``results`` of ``sagfit accept --json``)."""
        idx = range(len(self)) if indices is None else indices
        # a range of rows (a piece of a large document) takes only its part of each column
        part = (slice(idx.start, idx.stop) if isinstance(idx, range) and idx.step == 1
                else slice(None))
        base = part.start or 0

        def col(a):
            return a[part].tolist()

        cols = []
        for cr in self.checks:
            c = cr.check
            cols.append((c, col(cr.value), col(cr.u), col(cr.U), col(cr.p_c),
                         col(cr.accept_lower), col(cr.accept_upper),
                         col(cr.decision), col(cr.statement),
                         None if cr.extrapolated is None else col(cr.extrapolated)))
        k = col(self.k)
        out = []
        for i in idx:
            err = self.error[i]
            checks = []
            j = i - base
            if err is None:
                for (c, v, u, U, p, al, au, d, st, ex) in cols:
                    item = {"quantity": c.name, "value": _f(v[j]), "U": _f(U[j]),
                            "lower": _f(c.lower), "upper": _f(c.upper),
                            "decision": DECISIONS[d[j]],
                            "conformance_probability": _f(p[j]),
                            "unit": c.unit, "u": _f(u[j]), "coverage_factor": _f(k[j]),
                            "acceptance_lower": _f(al[j]), "acceptance_upper": _f(au[j]),
                            "statement": STATEMENTS[st[j]]}
                    if c.at is not None:
                        item["at"] = c.at.label
                    if c.light is not None:
                        item["light"], item["heavy"] = c.light.label, c.heavy.label
                    if ex is not None:
                        item["extrapolated"] = bool(ex[j])
                    checks.append(item)
            d = {"dut": self.duts[i], "decision": DECISIONS[self.decision[i]],
                 "checks": checks, "flags": self._flag_dicts(i),
                 "capped_by_flags": bool(self.capped[i])}
            if err is not None:
                d["error"] = err
            out.append(d)
        return out


#: Flag codes that come from a significance test, with the diagnostics column of its
#: p-value and the column whose finite value says the test ran for the DUT.
TESTED_FLAGS = {"curvature": ("curvature", "p_value", "level"),
                "knee": ("knee", "p_value", "level"),
                "pattern": ("pattern", "p_value", "level"),
                "drift": ("drift", "p_value", "level"),
                "lack-of-fit": ("lack_of_fit", "p_value", "p_value"),
                "outlier": ("outlier", "p_value", "p_value"),
                "negative-resistance": ("slope", "p_negative", "p_negative")}


def family_p(fits: Fits) -> dict[str, np.ndarray]:
    """Each tested flag's p-value multiplied by the number of tests its DUT ran
    (Bonferroni over the checks of one DUT, capped at 1; NaN where the test did not run).

    Each check holds its own false-alarm rate at the level, so a linear DUT that runs k
    of them collects some warning by chance with a probability up to k times the level.
    A decision about the unit counts a tested warning only when it holds with all k
    counted: min(1, k·p) below the level. Then a good unit is held inconclusive by
    chance with a probability of at most the level (Bonferroni's inequality; e.g.
    R. G. Miller, *Simultaneous Statistical Inference*, 2nd ed., 1981, ch. 1)."""
    d = fits.diagnostics
    m = len(fits)
    cols = {}
    for code, (name, p_key, ran_key) in TESTED_FLAGS.items():
        block = d.get(name, {})
        if p_key in block and ran_key in block:
            ran = np.isfinite(np.asarray(block[ran_key], float))
            cols[code] = np.where(ran, np.asarray(block[p_key], float), np.nan)
    k = np.zeros(m)
    for p in cols.values():
        k += np.isfinite(p)
    return {code: np.minimum(1.0, p * k) for code, p in cols.items()}


def _warnings(fits: Fits, ignore: tuple[str, ...]):
    """Indices and codes of DUTs with counting warning flags (loops only flagged DUTs):
    every warning, except a tested one that does not hold over all the DUT's tests
    (:func:`family_p`)."""
    m = len(fits)
    has = np.fromiter(map(bool, fits.flags), dtype=bool, count=m)
    codes: dict[int, tuple] = {}
    level = float(fits.settings.get("level", 0.01))
    fam = family_p(fits) if has.any() else {}

    def counts(f, i):
        if f.severity != "warning" or f.code in ignore:
            return False
        p = fam.get(f.code)
        return p is None or not (p[i] >= level)  # untested, or NaN p: the flag counts

    for i in np.flatnonzero(has):
        w = tuple(f.code for f in fits.flags[i] if counts(f, i))
        if w:
            codes[int(i)] = w
    flagged = np.zeros(m, dtype=bool)
    if codes:
        flagged[np.fromiter(codes.keys(), dtype=np.int64, count=len(codes))] = True
    return flagged, codes


def _current_range(readings: Readings, m: int):
    """Lowest and highest measured load current of each DUT (A; NaN without readings)."""
    n = np.bincount(readings.group, minlength=m)
    lo = np.full(m, np.nan)
    hi = np.full(m, np.nan)
    has = n > 0
    if has.any():
        starts = np.concatenate(([0], np.cumsum(n)[:-1]))[has]
        lo[has] = np.minimum.reduceat(readings.current, starts)
        hi[has] = np.maximum.reduceat(readings.current, starts)
    return lo, hi


def _operating_current(fits: Fits, cond: Condition):
    if cond.kind == "current":
        return np.full(len(fits), cond.value)
    if math.isinf(cond.value):
        return np.zeros(len(fits))
    with np.errstate(divide="ignore", invalid="ignore"):
        return fits.vth / (fits.rth + cond.value)


def _extrapolated(fits: Fits, check: Check, lo, hi):
    """True where an operating point of ``check`` lies outside the measured currents
    (beyond 5 % of their span): the straight line is then extrapolated."""
    conds = [c for c in (check.at, check.light, check.heavy) if c is not None]
    if not conds:
        return None
    margin = 0.05 * (hi - lo)
    out = np.zeros(len(fits), dtype=bool)
    with np.errstate(invalid="ignore"):
        for c in conds:
            i = _operating_current(fits, c)
            out |= (i > hi + margin) | (i < lo - margin)
    return out


def accept(fits: Fits, spec: Spec, *, rule: str | None = None,
           readings: Readings | None = None) -> Acceptance:
    """Decide every DUT of ``fits`` against ``spec``.

    Parameters
    ----------
    fits : Fits
        From :func:`sagfit.fit`.
    spec : Spec
        Checks and decision rule (see :func:`sagfit.io_spec.read_spec`).
    rule : str, optional
        Override the spec's rule (``simple``, ``guarded`` or ``risk``).
    readings : Readings, optional
        The readings that were fitted; with them, terminal-voltage and regulation checks
        say whether their operating points lie outside the measured currents
        (``extrapolated``; reported, not used in the decision).

    Returns
    -------
    Acceptance
    """
    decision = spec.decision.with_rule(rule)
    m = len(fits)
    failed_fit = np.fromiter(map(bool, fits.error), dtype=bool, count=m)
    k = (np.full(m, float(decision.k)) if decision.k is not None
         else np.asarray(fits.k, dtype=float))
    unit = np.zeros(m, dtype=np.int8)
    results = []
    lo = hi = None
    if readings is not None and readings.n_duts == m:
        lo, hi = _current_range(readings, m)
    for c in spec.checks:
        value, u = check_values(fits, c)
        kq = k if decision.k is not None else (
            np.asarray(fits.k_rth, float) if c.quantity == "rth" else
            np.fmax(k, np.asarray(fits.k_rth, float)) if c.quantity != "vth" else k)
        U = kq * u
        r = decide(value, u, U, c.lower, c.upper, decision)
        ex = None if lo is None else _extrapolated(fits, c, lo, hi)
        results.append(CheckResult(check=c, value=value, u=u, U=U, extrapolated=ex, **r))
        unit = np.maximum(unit, r["decision"])
    flagged, codes = _warnings(fits, decision.ignore_flags)
    flagged &= ~failed_fit
    capped = np.zeros(m, dtype=bool)
    if decision.cap_flagged:
        capped = flagged & (unit == PASS)
        unit = np.where(flagged, np.maximum(unit, INCONCLUSIVE), unit).astype(np.int8)
    unit = np.where(failed_fit, ERROR, unit).astype(np.int8)
    unit.setflags(write=False)
    return Acceptance(duts=tuple(fits.duts), decision=unit, checks=tuple(results),
                      flagged=flagged, capped=capped, warning_codes=codes,
                      error=tuple(fits.error), k=k, rule=decision, spec=spec,
                      confidence=float(fits.confidence),
                      warning_flags={i: tuple(f.to_dict() for f in fits.flags[i]
                                              if f.code in c) for i, c in codes.items()})
