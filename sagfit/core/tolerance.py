"""Tolerance analysis of a netlist's equivalent: sensitivities, RSS, worst case, Monte Carlo.

Methods (common practice in circuit design; which gives which number is kept apart):

* sensitivities: central differences of Vth and Rth in each parameter, all evaluated in
  one batched solve; reported as the change for the full tolerance of each part;
* RSS: the root-sum-square of those tolerance changes (every part at its tolerance
  edge, independent signs): a first-order statistical band;
* worst case (extreme-value analysis): each part pushed to the tolerance edge that the
  sign of its sensitivity says raises (or lowers) the output, then evaluated exactly;
  for up to ``VERTEX_LIMIT`` toleranced parts every vertex of the tolerance box is also
  evaluated and the true extremes reported, with a flag when they differ;
* Monte Carlo: seeded draws, uniform over ±tol or normal with σ = tol/3 (tol read as a
  3σ limit, common practice), percentiles of Vth and Rth.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .mna import Circuit

VERTEX_LIMIT = 12
#: Monte Carlo draws generated and solved per pass (bounds memory; the draws do not
#: depend on it: the generator's stream is consumed in the same order)
MC_CHUNK = 20_000
PERCENTILES = (0.135, 2.5, 50.0, 97.5, 99.865)


@dataclass(frozen=True, slots=True)
class Tolerances:
    names: tuple[str, ...]
    nominal_values: np.ndarray
    tol: np.ndarray
    vth: float
    rth: float
    #: change of Vth / Rth for each part moved by +tol (first order), shape (P,)
    dvth: np.ndarray
    drth: np.ndarray
    #: d output / d value (per SI unit of the part), shape (P,)
    svth: np.ndarray
    srth: np.ndarray
    rss_vth: float
    rss_rth: float
    wc_vth: tuple[float, float]
    wc_rth: tuple[float, float]
    vertex_vth: tuple[float, float] | None
    vertex_rth: tuple[float, float] | None
    mc_vth: np.ndarray | None
    mc_rth: np.ndarray | None
    distribution: str
    seed: int

    def ranking(self, which: str = "vth") -> list[int]:
        d = self.dvth if which == "vth" else self.drth
        return [int(i) for i in np.argsort(-np.abs(d), kind="stable")]


def analyse(circuit: Circuit, *, draws: int = 10_000, distribution: str = "uniform",
            seed: int = 1, on_progress=None) -> Tolerances:
    """Run every method on ``circuit``; ``draws=0`` skips Monte Carlo.

    ``on_progress(done, total)``, when given, is called after each pass of Monte Carlo
    draws (``MC_CHUNK`` at a time)."""
    if distribution not in ("uniform", "normal"):
        raise ValueError(f"distribution must be 'uniform' or 'normal', not {distribution!r}")
    x0 = circuit.nominal
    tol = circuit.tol
    p = x0.size
    nom = circuit.solve(x0)
    vth, rth = float(nom.vth[0]), float(nom.rth[0])
    h = np.where(x0 != 0, np.abs(x0) * 1e-6, 1e-9)
    plus = np.tile(x0, (p, 1)) + np.diag(h)
    minus = np.tile(x0, (p, 1)) - np.diag(h)
    eq = circuit.solve(np.vstack([plus, minus]))
    svth = (eq.vth[:p] - eq.vth[p:]) / (2 * h)
    srth = (eq.rth[:p] - eq.rth[p:]) / (2 * h)
    span = np.abs(x0) * tol
    dvth, drth = svth * span, srth * span
    wc = []
    for s in (svth, srth):
        sg = np.sign(s)
        hi = x0 + sg * span
        lo = x0 - sg * span
        wc.append(circuit.solve(np.vstack([lo, hi])))
    wc_vth = (float(wc[0].vth[0]), float(wc[0].vth[1]))
    wc_rth = (float(wc[1].rth[0]), float(wc[1].rth[1]))
    vv = vr = None
    tp = np.flatnonzero(tol > 0)
    if 0 < tp.size <= VERTEX_LIMIT:
        corners = ((np.arange(2 ** tp.size)[:, None] >> np.arange(tp.size)) & 1) * 2 - 1
        x = np.tile(x0, (corners.shape[0], 1))
        x[:, tp] += corners * span[tp]
        ev = circuit.solve(x)
        vv = (float(ev.vth.min()), float(ev.vth.max()))
        vr = (float(ev.rth.min()), float(ev.rth.max()))
    mv = mr = None
    if draws > 0:
        rng = np.random.default_rng(seed)
        mv, mr = np.empty(draws), np.empty(draws)
        for lo in range(0, draws, MC_CHUNK):
            n = min(MC_CHUNK, draws - lo)
            if distribution == "uniform":
                z = rng.uniform(-1.0, 1.0, (n, p))
            else:
                z = rng.standard_normal((n, p)) / 3.0
            e = circuit.solve(x0 + z * span)
            mv[lo:lo + n], mr[lo:lo + n] = e.vth, e.rth
            if on_progress is not None:
                on_progress(lo + n, draws)
    return Tolerances(tuple(e.name for e in circuit.params), x0, tol, vth, rth, dvth, drth,
                      svth, srth, float(np.sqrt(np.sum(dvth ** 2))),
                      float(np.sqrt(np.sum(drth ** 2))), wc_vth, wc_rth, vv, vr, mv, mr,
                      distribution, seed)


def normalised_error(measured, u_meas, expected, u_design):
    """E_n = (measured − expected) / √(U_meas² + U_design²), expanded uncertainties
    (ISO 13528:2022, clause 9.7; ISO/IEC 17043:2023). |E_n| ≤ 1 is consistent.
    Scalars give a float, arrays an array."""
    en = (np.asarray(measured, float) - expected) / np.hypot(u_meas, u_design)
    return float(en) if np.ndim(en) == 0 else en


def design_uncertainty(t: Tolerances) -> tuple[float, float, str]:
    """Expanded uncertainty (k = 2) of the expected Vth and Rth from the parts' spread,
    and where it comes from: the standard deviation of the Monte Carlo draws when they
    were run (non-linearity included), else the first-order RSS read with the parts'
    distribution (uniform: u = RSS/√3; normal with tol = 3σ: u = RSS/3; GUM JCGM
    100:2008, 4.3.7 and 5.1.2)."""
    if t.mc_vth is not None and t.mc_vth.size >= 100:
        return (2 * float(np.std(t.mc_vth, ddof=1)), 2 * float(np.std(t.mc_rth, ddof=1)),
                "monte-carlo")
    div = np.sqrt(3.0) if t.distribution == "uniform" else 3.0
    return 2 * t.rss_vth / div, 2 * t.rss_rth / div, "rss"


@dataclass(frozen=True, slots=True)
class Explanation:
    """One part that, changed alone, would explain a unit's difference (first order)."""

    part: str
    #: the change of the part's value it needs, as a fraction of its nominal value
    relative_change: float
    #: the part's value after that change (SI)
    value: float
    #: whether the change lies within the part's tolerance
    within_tolerance: bool
    #: what is left unexplained, in units of the combined expanded uncertainties
    #: (≤ 1: the changed part accounts for the difference)
    misfit: float
    #: other parts whose change would have the same effect (equal cells of a pack)
    alike: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class Comparison:
    """Measured units against the design's expected equivalent, one entry per DUT (NaN
    where a quantity was not measured)."""

    duts: tuple[str, ...]
    vth: np.ndarray
    U_vth: np.ndarray
    rth: np.ndarray
    U_rth: np.ndarray
    expected_vth: float
    expected_rth: float
    U_design_vth: float
    U_design_rth: float
    U_design_from: str
    en_vth: np.ndarray
    en_rth: np.ndarray
    #: |E_n| ≤ 1 for every quantity measured
    consistent: np.ndarray
    #: per DUT, the best single-part explanations (empty where consistent)
    explanations: tuple[tuple[Explanation, ...], ...]


def compare(t: Tolerances, duts, vth, U_vth, rth, U_rth, *, keep: int = 3,
            circuit: Circuit | None = None) -> Comparison:
    """E_n of every DUT's measured Vth and Rth against the design, and for each DUT with
    |E_n| > 1 the ``keep`` single parts that best explain the difference.

    ``vth``, ``U_vth``, ``rth``, ``U_rth``: arrays over DUTs, expanded uncertainties;
    NaN where not measured. With ``circuit`` (the one ``t`` was computed on) each named
    change is refined on the exact network (:func:`refine`), not only to first order.
    """
    arr = [np.asarray(a, float).reshape(-1) for a in (vth, U_vth, rth, U_rth)]
    vth, U_vth, rth, U_rth = arr
    uv, ur, source = design_uncertainty(t)
    en_v = normalised_error(vth, U_vth, t.vth, uv)
    en_r = normalised_error(rth, U_rth, t.rth, ur)
    with np.errstate(invalid="ignore"):
        bad = (np.abs(en_v) > 1) | (np.abs(en_r) > 1)
    ex: list[tuple[Explanation, ...]] = [()] * vth.size
    idx = np.flatnonzero(bad)
    for lo in range(0, idx.size, 1000):  # bounds the (DUTs × parts × 2) work array
        i = idx[lo:lo + 1000]
        diff = np.stack([vth[i] - t.vth, rth[i] - t.rth], axis=1)
        scale = np.stack([np.hypot(U_vth[i], uv), np.hypot(U_rth[i], ur)], axis=1)
        rows = explain(t, diff, scale, keep=keep)
        if circuit is not None:
            rows = refine(circuit, t, diff, scale, rows)
        for k, row in zip(i, rows):
            ex[k] = row
    return Comparison(tuple(str(d) for d in duts), vth, U_vth, rth, U_rth, t.vth, t.rth, uv,
                      ur, source, en_v, en_r, ~bad, tuple(ex))


def explain(t: Tolerances, diff, scale, *, keep: int = 3) -> list[tuple[Explanation, ...]]:
    """Single parts that, moved alone, would explain measured-minus-expected differences.

    ``diff`` and ``scale``: arrays (DUTs, 2) of the differences in (Vth, Rth) and the
    combined expanded uncertainty of each; NaN marks a quantity not measured. For each
    part the first-order change that best fits the measured differences (least squares,
    each difference in units of its scale) and the misfit left. Best first: the parts
    that explain the difference (misfit ≤ 1) needing the smallest change relative to
    their tolerance, then the rest by misfit.
    """
    diff = np.atleast_2d(np.asarray(diff, float))
    scale = np.atleast_2d(np.asarray(scale, float))
    seen = np.isfinite(diff) & np.isfinite(scale) & (scale > 0)
    w = np.where(seen, 1.0 / np.where(seen, scale, 1.0), 0.0)  # (D, 2)
    y = np.where(seen, diff, 0.0) * w  # (D, 2)
    s = np.stack([t.svth, t.srth], axis=1)  # (P, 2): d output / d value
    a = s[None, :, :] * w[:, None, :]  # (D, P, 2)
    nrm = np.sum(a * a, axis=2)
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.where(nrm > 0, np.einsum("dpo,do->dp", a, y) / nrm, np.nan)
        resid = np.sqrt(np.sum((y[:, None, :] - a * step[:, :, None]) ** 2, axis=2))
        x0 = t.nominal_values
        rel = np.where(x0 != 0, step / x0, np.nan)
        need = np.abs(rel) / np.where(t.tol > 0, t.tol, np.inf)
    # a part without a stated tolerance is not expected to move: after every part that has one
    need = np.where(t.tol > 0, need, 1e300 * np.minimum(np.abs(rel), 1e8) + 1e290)
    usable = np.isfinite(step) & np.isfinite(rel)
    fits = resid <= 1
    key1 = np.where(usable & fits, need, np.inf)
    key2 = np.where(usable, np.where(fits, 0.0, resid), np.inf)
    out = []
    for d in range(diff.shape[0]):
        order = np.lexsort((key1[d], key2[d]))
        row: list[Explanation] = []
        alike: list[list[int]] = []
        for p in order:
            if not usable[d, p]:
                break
            r = float(rel[d, p])
            twin = next((k for k, e in enumerate(row) if _same(e, r, resid[d, p])), None)
            if twin is not None:
                alike[twin].append(int(p))
                continue
            if len(row) == keep:
                break
            row.append(Explanation(t.names[p], r, float(x0[p] * (1 + r)),
                                   bool(abs(r) <= t.tol[p] * (1 + 1e-9)),
                                   float(resid[d, p])))
            alike.append([])
        out.append(tuple(Explanation(e.part, e.relative_change, e.value, e.within_tolerance,
                                     e.misfit, tuple(t.names[i] for i in sorted(a)))
                         for e, a in zip(row, alike)))
    return out


def refine(circuit: Circuit, t: Tolerances, diff, scale, rows, *, iterations: int = 12
           ) -> list[tuple[Explanation, ...]]:
    """Each explanation's change solved on the exact network (Gauss–Newton on the one
    part's value, all DUTs and candidates in one batched solve per step), with the exact
    misfit; a resistor is moved in log(value), so it stays positive. Candidates are then
    ordered by the same rule as :func:`explain`.

    The first-order change is exact for a part whose effect is linear (a series
    resistor on Rth, a source on Vth) and only a guide for a wrong or damaged part
    far from its value (a 2 kΩ resistor fitted where 20 kΩ belongs)."""
    diff = np.atleast_2d(np.asarray(diff, float))
    scale = np.atleast_2d(np.asarray(scale, float))
    seen = np.isfinite(diff) & np.isfinite(scale) & (scale > 0)
    w = np.where(seen, 1.0 / np.where(seen, scale, 1.0), 0.0)
    target = np.where(seen, diff, 0.0) + np.array([t.vth, t.rth])
    index = {n: j for j, n in enumerate(t.names)}
    is_r = np.array([e.kind == "R" for e in circuit.params])
    cand = [(d, index[e.part], e.relative_change) for d, row in enumerate(rows) for e in row]
    if not cand:
        return rows
    d_of = np.array([c[0] for c in cand])
    p_of = np.array([c[1] for c in cand])
    x0 = t.nominal_values[p_of]
    log = is_r[p_of]
    rel0 = np.array([c[2] for c in cand])
    u = np.where(log, np.log(np.maximum(1 + rel0, 1e-6)), rel0)

    def outputs(u_):
        """Exact (Vth, Rth) with each candidate's part at its value (u_: n or 2n long)."""
        rep = u_.size // p_of.size
        pp, xx, lg = np.tile(p_of, rep), np.tile(x0, rep), np.tile(log, rep)
        x = np.tile(t.nominal_values, (u_.size, 1))
        with np.errstate(over="ignore"):
            x[np.arange(u_.size), pp] = np.where(lg, xx * np.exp(u_), xx * (1 + u_))
        eq = circuit.solve(x)
        return np.stack([eq.vth, eq.rth], axis=1)

    for _ in range(iterations):
        h = 1e-6 * np.maximum(1.0, np.abs(u))
        both = outputs(np.concatenate([u, u + h]))
        y, yh = both[:u.size], both[u.size:]
        jw = (yh - y) / h[:, None] * w[d_of]
        r = (target[d_of] - y) * w[d_of]
        nrm = np.sum(jw * jw, axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            du = np.where(nrm > 0, np.sum(jw * r, axis=1) / nrm, 0.0)
        du = np.clip(np.where(np.isfinite(du), du, 0.0), -3.0, 3.0)  # at most e³ per step
        u = u + du
    with np.errstate(over="ignore", invalid="ignore"):
        misfit = np.sqrt(np.sum(((target[d_of] - outputs(u)) * w[d_of]) ** 2, axis=1))
        rel = np.where(log, np.expm1(u), u)
    out, k = [], 0
    for d, row in enumerate(rows):
        new = []
        for e in row:
            p = index[e.part]
            r_, m_ = float(rel[k]), float(misfit[k])
            if not (np.isfinite(m_) and np.isfinite(r_)):  # ran off: keep the first order
                r_, m_ = e.relative_change, e.misfit
            new.append(Explanation(e.part, r_, float(t.nominal_values[p] * (1 + r_)),
                                   bool(abs(r_) <= t.tol[p] * (1 + 1e-9)), m_, e.alike))
            k += 1
        tol = np.array([t.tol[index[e.part]] for e in new])
        need = np.array([abs(e.relative_change) for e in new]) / np.where(tol > 0, tol, 1e-300)
        fit = np.array([e.misfit <= 1 for e in new])
        # misfits equal to two decimals (no single part explains it) rank by the change
        order = np.lexsort((need, np.where(fit, 0.0, np.round([e.misfit for e in new], 2))))
        out.append(tuple(new[j] for j in order))
    return out


def _same(e: Explanation, rel: float, resid: float) -> bool:
    """Another part with the same effect (say, one of six equal cells): the same relative
    change and misfit to 0.1 %."""
    return (abs(rel - e.relative_change) <= 1e-3 * abs(e.relative_change)
            and abs(resid - e.misfit) <= 1e-3 * max(e.misfit, 1e-3))
