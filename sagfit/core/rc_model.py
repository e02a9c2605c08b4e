"""The dynamic equivalent of a cell: R0 plus one or two RC branches, fitted to each pulse.

Model (textbook first-order circuits; /work/shared/reference METHODS §9): with the branches
at rest at the base current I_b before the pulse, and the current changing by ΔI₁ at t₁
(the pulse's edge) and ΔI₂ at t₂ (its end, into the relaxation),

    v(t) = U_b − R0·(i(t) − I_b) − Σ_k R_k·Σ_e ΔI_e·(1 − exp(−(t − t_e)/τ_k))·H(t − t_e),

U_b the settled voltage at I_b. The data are the base step's settling window (it fixes
U_b), the pulse and its relaxation (the next step, up to ``relax`` seconds); samples in
a transition between two levels are left out.

Fit: nonlinear least squares (scipy.optimize.least_squares, Levenberg–Marquardt, analytic
Jacobian, τ as log τ) started from the best point of a grid over the time constants, where
the model is linear in (U_b, R0, R_k) and solved for every grid point at once. Standard
uncertainties and correlations from s²(JᵀJ)⁻¹ at the optimum, s² = SSR/(n − p) (the
usual linearised covariance of nonlinear least squares; e.g. Seber & Wild, *Nonlinear
Regression*, 1989, §2.1, from memory), intervals with Student's t on n − p degrees of
freedom. Samples are taken as independent with equal scatter: autocorrelated noise makes
the intervals too narrow.

Branches: one or two by the Bayesian information criterion, BIC = n·ln(SSR/n) + p·ln n
(G. Schwarz, "Estimating the dimension of a model", Ann. Stat. 6 (1978) 461); the second
branch is kept when it lowers BIC by more than 6 ("strong" evidence on the scale of
R. E. Kass and A. E. Raftery, JASA 90 (1995) 773, from memory) and both branches are
physical (R_k > 0, τ₁ < τ₂ by at least a factor 2).

The grid start and the iterations run on all pulses at once (:mod:`sagfit.core.rc_batch`);
:func:`fit_rc` solves one pulse with MINPACK's Levenberg–Marquardt and is the reference
the batch is tested against.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .pulse import Pulses
from .trace import Steps, Trace

__all__ = ["RCFit", "fit_rc", "fit_pulses", "predict_voltage", "model_columns", "BIC_MARGIN"]

BIC_MARGIN = 6.0
_GRID = 24


@dataclass(frozen=True, slots=True)
class RCFit:
    """R0 + n RC branches fitted to one pulse.

    Attributes
    ----------
    branches : int
        1 or 2 (0 when the fit failed; ``error`` says why).
    names : tuple of str
        Parameter names: ``u_base``, ``r0``, ``r1``, ``tau1`` (, ``r2``, ``tau2``).
    value, u : ndarray
        Estimates (V, Ω, s) and standard uncertainties.
    corr : ndarray (p, p)
        Correlation matrix.
    ci_low, ci_high : ndarray
        Confidence interval bounds at ``level``.
    level : float
    n, dof : int
    rms : float
        RMS residual (V).
    bic : dict
        BIC of the one- and two-branch fits (``nan`` if one was not tried).
    i_base : float
        Base current I_b (A), for the open-circuit voltage U_b + (R0 + ΣR)·I_b.
    t : ndarray, v : ndarray, fitted : ndarray
        Times (s from the edge), measured and fitted voltages of the samples used.
    warnings : tuple of str
    error : str or None
    """

    branches: int
    names: tuple
    value: np.ndarray
    u: np.ndarray
    corr: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    level: float
    n: int
    dof: int
    rms: float
    bic: dict
    i_base: float
    t: np.ndarray = field(repr=False, default=None)
    v: np.ndarray = field(repr=False, default=None)
    fitted: np.ndarray = field(repr=False, default=None)
    warnings: tuple = ()
    error: str | None = None

    def __getitem__(self, name: str) -> float:
        return float(self.value[self.names.index(name)])

    def u_of(self, name: str) -> float:
        return float(self.u[self.names.index(name)])

    @property
    def ocv(self) -> float:
        """Open-circuit voltage implied at the pulse's state: U_b + (R0 + ΣR_k)·I_b (V)."""
        r = sum(self[f"r{k}"] for k in range(self.branches + 1))
        return self["u_base"] + r * self.i_base

    @classmethod
    def from_record(cls, rec: dict) -> "RCFit":
        """A model back from :meth:`as_record` (JSON), enough to predict with."""
        b = int(rec["branches"])
        names = ("u_base", "r0") + sum(((f"r{k}", f"tau{k}") for k in range(1, b + 1)), ())
        value = np.array([float(rec[x]["value"]) for x in names])
        u = np.array([float(rec[x]["u"]) for x in names])
        p = len(names)
        return cls(branches=b, names=names, value=value, u=u, corr=np.full((p, p), np.nan),
                   ci_low=np.full(p, np.nan), ci_high=np.full(p, np.nan),
                   level=float(rec.get("level", 0.95)), n=int(rec.get("n", 0)),
                   dof=int(rec.get("dof", 0)), rms=float(rec.get("rms_V") or math.nan),
                   bic={}, i_base=float(rec["i_base_A"]))

    def as_record(self) -> dict:
        """Plain values for JSON (non-finite numbers as None): estimates, u, intervals,
        correlations."""
        def num(x):
            x = None if x is None else float(x)
            return x if x is not None and math.isfinite(x) else None

        rec = {"branches": self.branches, "error": self.error,
               "warnings": list(self.warnings), "n": self.n, "dof": self.dof,
               "rms_V": num(self.rms), "level": self.level, "i_base_A": self.i_base,
               "bic_1": num(self.bic.get(1)), "bic_2": num(self.bic.get(2))}
        for j, name in enumerate(self.names):
            rec[name] = {"value": num(self.value[j]), "u": num(self.u[j]),
                         "ci": [num(self.ci_low[j]), num(self.ci_high[j])]}
        rec["corr"] = {f"{a},{b}": num(self.corr[i, j]) for i, a in enumerate(self.names)
                       for j, b in enumerate(self.names) if j > i}
        rec["ocv_V"] = num(self.ocv) if self.branches else None
        return rec


def _responses(t, edges, d_i, taus):
    """Σ_e ΔI_e·(1 − e^{−(t−t_e)/τ})·H(t − t_e) and its derivative in τ, for each τ
    (shape (len(taus), n))."""
    taus = np.asarray(taus, float)[:, None]
    resp = np.zeros((taus.shape[0], t.size))
    dresp = np.zeros_like(resp)
    for te, di in zip(edges, d_i):  # two edges per pulse
        s = np.maximum(t - te, 0.0)[None, :]
        e = np.exp(-s / taus)
        on = (t > te)[None, :]
        resp += np.where(on, di * (1.0 - e), 0.0)
        dresp += np.where(on, -di * e * s / taus ** 2, 0.0)
    return resp, dresp


def _grid_start(t, v, x_i, edges, d_i, grid, branches):
    """Best grid point for the time constants, the model being linear in (U_b, R0, R_k)
    for fixed τ: the normal equations of every grid point (or pair of points) are built
    from one set of inner products of the grid's responses, then solved all at once.
    Returns (coefficients, τ) of the grid point with the least SSR."""
    resp, _ = _responses(t, edges, d_i, grid)               # (G, n)
    basis = np.vstack([np.ones(t.size), -x_i, -resp])       # (2 + G, n)
    gram = basis @ basis.T
    rhs = basis @ v
    if branches == 1:
        sets = np.arange(grid.size)[:, None]
    else:
        a, b = np.triu_indices(grid.size, k=2)
        sets = np.column_stack([a, b])
    idx = np.hstack([np.zeros((sets.shape[0], 1), int), np.ones((sets.shape[0], 1), int),
                     2 + sets])                              # (m, p)
    a_m = gram[idx[:, :, None], idx[:, None, :]]
    b_m = rhs[idx]
    ok = np.linalg.cond(a_m) < 1e14
    coef = np.full(b_m.shape, np.nan)
    coef[ok] = np.linalg.solve(a_m[ok], b_m[ok][..., None])[..., 0]
    ssr = float(v @ v) - np.einsum("mp,mp->m", coef, b_m)
    ssr[~ok] = np.inf
    best = int(np.argmin(ssr))
    return coef[best], grid[sets[best]]


def fit_rc(t, v, i_model, edges, d_i, i_base, *, branches: int, level: float = 0.95,
           duration: float, dt: float, edge_dt=None) -> RCFit:
    """Fit R0 + ``branches`` RC branches to one pulse's samples (times from the edge).

    ``i_model`` is the model's current at each sample, ``edges``/``d_i`` its changes,
    ``duration`` the pulse length and ``dt`` the sampling interval at the edge (s).
    ``edge_dt``: the interval between the two samples around each edge (s); each edge
    lies anywhere in it (uniform, half-width ``edge_dt/2``), independently, which moves the
    exponentials in time. That Type B part is propagated through the fit (sensitivities
    (JᵀJ)⁻¹Jᵀ·∂f/∂t_e) and the interval uses the distribution of a rectangle plus a normal
    (:func:`sagfit.core.systematic.coverage_half_width`).
    """
    from scipy import optimize

    x_i = i_model - i_base
    n = t.size
    p = 2 + 2 * branches
    names = ("u_base", "r0") + sum(((f"r{k}", f"tau{k}") for k in range(1, branches + 1)), ())
    if n <= p + 2:
        return _failed(names, branches, level, i_base, f"too few samples ({n}) for "
                                                       f"{branches} branch(es)")
    span = float(t.max())
    lo_tau, hi_tau = max(dt, 1e-6), max(3.0 * span, 10 * dt)
    grid = np.geomspace(lo_tau, hi_tau, _GRID)
    coef, taus = _grid_start(t, v, x_i, edges, d_i, grid, branches)
    x0 = np.r_[coef[:2], np.column_stack([coef[2:], np.log(taus)]).ravel()]

    def split(x):
        r = x[2::2]
        tau = np.exp(x[3::2])
        return x[0], x[1], r, tau

    def resid(x):
        ub, r0, r, tau = split(x)
        resp, _ = _responses(t, edges, d_i, tau)
        return ub - r0 * x_i - r @ resp - v

    def jac(x):
        ub, r0, r, tau = split(x)
        resp, dresp = _responses(t, edges, d_i, tau)
        j = np.empty((n, p))
        j[:, 0] = 1.0
        j[:, 1] = -x_i
        j[:, 2::2] = -resp.T
        j[:, 3::2] = -(r[:, None] * dresp * tau[:, None]).T  # d/d log τ
        return j

    sol = optimize.least_squares(resid, x0, jac=jac, method="lm", xtol=1e-12, ftol=1e-12,
                                 max_nfev=200 * p)
    return finish_rc(t, v, i_model, edges, d_i, i_base, sol.x, branches=branches,
                     level=level, duration=duration, dt=dt, edge_dt=edge_dt,
                     error=None if sol.success or sol.status > 0 else sol.message)


def finish_rc(t, v, i_model, edges, d_i, i_base, x, *, branches: int, level: float,
              duration: float, dt: float, edge_dt=None, error=None) -> RCFit:
    """The fitted pulse from its solution ``x`` = (U_b, R0, R_k, log τ_k): estimates in
    order of τ, uncertainties (the edges' place included), intervals, BIC, warnings."""
    from .systematic import coverage_half_width

    x_i = i_model - i_base
    n = t.size
    p = 2 + 2 * branches
    names = ("u_base", "r0") + sum(((f"r{k}", f"tau{k}") for k in range(1, branches + 1)), ())
    ub, r0 = float(x[0]), float(x[1])
    r, tau = np.asarray(x[2::2], float), np.exp(np.asarray(x[3::2], float))
    order = np.argsort(tau)
    r, tau = r[order], tau[order]
    value = np.r_[ub, r0, np.column_stack([r, tau]).ravel()]
    resp, dresp = _responses(t, edges, d_i, tau)
    res = ub - r0 * x_i - r @ resp - v
    ssr_v = float(res @ res)
    dof = n - p
    j = np.empty((n, p))
    j[:, 0] = 1.0
    j[:, 1] = -x_i
    j[:, 2::2] = -resp.T
    j[:, 3::2] = -(r[:, None] * dresp).T  # d/dτ
    try:
        jtj_inv = np.linalg.inv(j.T @ j)
    except np.linalg.LinAlgError:
        return _failed(names, branches, level, i_base, "singular fit: the pulse cannot "
                                                       "separate the branches")
    cov_a = jtj_inv * ssr_v / dof
    # edges anywhere between their two samples: sensitivities of the estimates to a shift
    half = 0.5 * np.asarray(edge_dt if edge_dt is not None else [dt] * len(edges), float)
    sens = []
    for te, di, a in zip(edges, d_i, half):  # two edges
        s_t = np.maximum(t - te, 0.0)[None, :]
        on = (t > te)[None, :]
        dfdte = np.sum(np.where(on, r[:, None] * di * np.exp(-s_t / tau[:, None])
                                / tau[:, None], 0.0), axis=0)
        sens.append(jtj_inv @ (j.T @ dfdte) * a)  # signed: one shift moves all estimates
    rect = np.abs(np.array(sens))                            # half-widths (edges, p)
    cov = cov_a + sum(np.outer(x, x) / 3.0 for x in sens)    # signs kept in the covariance
    u = np.sqrt(np.maximum(np.diag(cov), 0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(u, u)
    big = rect.max(axis=0)
    rest = np.sqrt(np.maximum(u ** 2 - big ** 2 / 3.0, 0.0))
    k_half = coverage_half_width(big, rest, level)
    bic = n * math.log(max(ssr_v, 1e-300) / n) + p * math.log(n)
    warn = []
    if dt > tau[0] / 5:
        warn.append(f"sampling interval {dt:.3g} s is coarse against τ1 = {tau[0]:.3g} s: R0 "
                    "and R1 are hard to separate (sample at τ1/10 or faster)")
    for kk in range(branches):
        if tau[kk] > duration or (u[3 + 2 * kk] > 0.5 * tau[kk]):
            warn.append(f"pulse of {duration:.3g} s is short against τ{kk + 1} = "
                        f"{tau[kk]:.3g} s: the time constant is poorly determined")
    if np.any(r <= 0) or r0 <= 0:
        warn.append("a fitted resistance is not positive: the model does not describe this "
                    "pulse")
    return RCFit(branches=branches, names=names, value=value, u=u, corr=corr,
                 ci_low=value - k_half, ci_high=value + k_half, level=level, n=n, dof=dof,
                 rms=math.sqrt(ssr_v / n), bic={branches: bic}, i_base=float(i_base),
                 t=t, v=v, fitted=v + res, warnings=tuple(warn),
                 error=error)


def _failed(names, branches, level, i_base, why) -> RCFit:
    p = len(names)
    nan = np.full(p, np.nan)
    return RCFit(branches=0, names=names, value=nan, u=nan, corr=np.full((p, p), np.nan),
                 ci_low=nan, ci_high=nan, level=level, n=0, dof=0, rms=math.nan, bic={},
                 i_base=float(i_base), error=why)


def pulse_samples(trace: Trace, steps: Steps, pulses: Pulses, j: int, relax: float):
    """Samples of pulse ``j``: the base step's settling window, the pulse and up to
    ``relax`` s of the next step (same channel, no gap); transitions left out.

    Returns (t from the edge, v, model current, edges, ΔI, I_b, duration, dt, the
    interval around each edge).
    """
    k = int(pulses.step[j])
    t, v = trace.time, trace.voltage
    base = np.arange(steps.w_start[k - 1], steps.stop[k - 1])
    pulse = np.arange(steps.start[k], steps.stop[k])
    t_edge = steps.t_edge[k]
    levels = [steps.current[k - 1], steps.current[k]]
    edges = [0.0]
    edge_dt = [t[steps.start[k]] - t[steps.stop[k - 1] - 1]]
    parts = [base, pulse]
    cur = [np.full(base.size, levels[0]), np.full(pulse.size, levels[1])]
    nxt = k + 1
    if (nxt < len(steps) and steps.channel[nxt] == steps.channel[k]
            and not steps.after_gap[nxt]):
        t_end = steps.t_edge[nxt]
        rows = np.arange(steps.start[nxt], steps.stop[nxt])
        rows = rows[t[rows] <= t_end + relax]
        parts.append(rows)
        cur.append(np.full(rows.size, steps.current[nxt]))
        edges.append(t_end - t_edge)
        edge_dt.append(t[steps.start[nxt]] - t[steps.stop[k] - 1])
        levels.append(steps.current[nxt])
    rows = np.concatenate(parts)
    d_i = np.diff(levels)
    return (t[rows] - t_edge, v[rows], np.concatenate(cur), edges, d_i, levels[0],
            float(pulses.duration[j]), float(pulses.dt[j]), edge_dt)


def fit_pulses(trace: Trace, steps: Steps, pulses: Pulses, *, branches: str | int = "auto",
               level: float = 0.95, relax: float = 120.0) -> list[RCFit]:
    """Fit every pulse: one branch, two, or ``"auto"`` (the BIC choice, module notes).

    The least-squares iterations run on all pulses at once
    (:func:`sagfit.core.rc_batch.solve_many`); the uncertainties are then taken per pulse
    (:func:`finish_rc`).
    """
    from .rc_batch import solve_many

    data = [pulse_samples(trace, steps, pulses, j, relax) for j in range(len(pulses))]
    counts = [1, 2] if branches == "auto" else [int(branches)]
    fits: dict = {}
    for b in counts:
        p = 2 + 2 * b
        ok = [j for j, d in enumerate(data) if d[0].size > p + 2]
        theta, done = solve_many([(d[0], d[1], d[2] - d[5], d[3], d[4], d[7])
                                  for d in (data[j] for j in ok)], b) if ok else (None, None)
        names = ("u_base", "r0") + sum(((f"r{k}", f"tau{k}") for k in range(1, b + 1)), ())
        row = {j: q for q, j in enumerate(ok)}
        for j, (t, v, i_m, edges, d_i, i_b, dur, dt, e_dt) in enumerate(data):
            # the uncertainties of each pulse: a few small matrix products apiece
            fits[j, b] = (finish_rc(t, v, i_m, edges, d_i, i_b, theta[row[j]], branches=b,
                                    level=level, duration=dur, dt=dt, edge_dt=e_dt,
                                    error=None if done[row[j]] else
                                    "the model fit did not converge")
                          if j in row else
                          _failed(names, b, level, i_b, f"too few samples ({t.size}) for "
                                                        f"{b} branch(es)"))
    out = [fits[j, counts[0]] if len(counts) == 1 else choose(fits[j, 1], fits[j, 2])
           for j in range(len(data))]
    unsettled = ~steps.settled[pulses.step - 1]
    for j in np.flatnonzero(unsettled):
        f = out[j]
        out[j] = RCFit(**{**{x: getattr(f, x) for x in f.__slots__},
                          "warnings": f.warnings + (
                              "the step before the pulse had not settled: the branches were "
                              "not at rest, as the model assumes",)})
    return out


def choose(one: RCFit, two: RCFit) -> RCFit:
    """The two-branch fit where BIC prefers it by more than :data:`BIC_MARGIN` and it is
    physical (positive resistances, τ₂ ≥ 2τ₁); else the one-branch fit."""
    bic = {1: one.bic.get(1, math.nan), 2: two.bic.get(2, math.nan)}
    pick = one
    if two.branches == 2 and one.branches == 1:
        physical = (two["r1"] > 0 and two["r2"] > 0 and two["r0"] > 0
                    and two["tau2"] >= 2 * two["tau1"])
        if physical and bic[2] < bic[1] - BIC_MARGIN:
            pick = two
    elif two.branches == 2 and one.branches == 0:
        pick = two
    return RCFit(**{**{f: getattr(pick, f) for f in pick.__slots__}, "bic": bic})


def predict_voltage(fit: RCFit, t, i) -> np.ndarray:
    """Terminal voltage for a current profile from a fitted model.

    The current ``i[n]`` holds from ``t[n]`` to ``t[n+1]`` (a step profile); the branches
    start at rest at ``i[0]``; the open-circuit voltage is the model's (``fit.ocv``),
    constant. Exact zero-order-hold update of each branch, x[n] = a·x[n−1] + R(1 − a)·i[n−1]
    with a = exp(−Δt/τ), solved without a loop per sample: x[n]·e^{t_n/τ} is a cumulative
    sum, taken in blocks of 300 τ so the exponentials stay finite.
    """
    t = np.asarray(t, float)
    i = np.asarray(i, float)
    v = fit.ocv - fit["r0"] * i
    for k in range(1, fit.branches + 1):
        r, tau = fit[f"r{k}"], fit[f"tau{k}"]
        v = v - _branch(t, i, r, tau)
    return v


def _branch(t, i, r, tau):
    """Branch voltage x[n] (module notes of :func:`predict_voltage`)."""
    x = np.empty(t.size)
    x[0] = r * i[0]
    ref = 0
    while ref < t.size - 1:  # one pass per block of 300 τ, not per sample
        end = int(np.searchsorted(t, t[ref] + 300.0 * tau, side="right"))
        end = min(max(end, ref + 2), t.size)
        tb = t[ref:end] - t[ref]          # tb[0] = 0 at the reference sample
        grow = np.exp(tb / tau)
        inc = r * i[ref:end - 1] * np.diff(grow)
        x[ref + 1:end] = (x[ref] + np.cumsum(inc)) / grow[1:]
        ref = end - 1
    return x


def model_columns(fits: list[RCFit]) -> dict:
    """The fitted models as named columns (units in the names; NaN where a parameter does
    not apply), for CSV next to the pulse table."""
    n = len(fits)
    cols: dict = {"branches": np.array([f.branches for f in fits], dtype=np.int64)}
    for name, unit in (("r0", "ohm"), ("r1", "ohm"), ("tau1", "s"), ("r2", "ohm"),
                       ("tau2", "s")):
        val, u = np.full(n, np.nan), np.full(n, np.nan)
        for j, f in enumerate(fits):  # one value per pulse
            if f.branches and name in f.names:
                val[j], u[j] = f[name], f.u_of(name)
        cols[f"{name}_{unit}"] = val
        cols[f"u_{name}_{unit}"] = u
    cols["rms_V"] = np.array([f.rms for f in fits])
    cols["ocv_V"] = np.array([f.ocv if f.branches else np.nan for f in fits])
    return cols
