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
            seed: int = 1) -> Tolerances:
    """Run every method on ``circuit``; ``draws=0`` skips Monte Carlo."""
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
        if distribution == "uniform":
            z = rng.uniform(-1.0, 1.0, (draws, p))
        elif distribution == "normal":
            z = rng.standard_normal((draws, p)) / 3.0
        else:
            raise ValueError(f"distribution must be 'uniform' or 'normal', not {distribution!r}")
        e = circuit.solve(x0 + z * span)
        mv, mr = e.vth, e.rth
    return Tolerances(tuple(e.name for e in circuit.params), x0, tol, vth, rth, dvth, drth,
                      svth, srth, float(np.sqrt(np.sum(dvth ** 2))),
                      float(np.sqrt(np.sum(drth ** 2))), wc_vth, wc_rth, vv, vr, mv, mr,
                      distribution, seed)


def normalised_error(measured: float, u_meas: float, expected: float, u_design: float
                     ) -> float:
    """E_n = (measured − expected) / √(U_meas² + U_design²), expanded uncertainties
    (ISO 13528:2022, clause 9.7; ISO/IEC 17043:2023). |E_n| ≤ 1 is consistent."""
    return float((measured - expected) / np.hypot(u_meas, u_design))


def explain(t: Tolerances, dv: float, dr: float) -> list[tuple[str, float, float]]:
    """Single parts that, moved alone, would explain a measured-minus-expected difference
    (dv in Vth, dr in Rth): for each part the first-order value change that best fits both
    differences (least squares over the two outputs, each scaled by its RSS band), and the
    residual misfit. Returns (name, relative change of the part, misfit), best first."""
    sv = t.rss_vth or 1.0
    sr = t.rss_rth or 1.0
    a = np.stack([t.svth / sv, t.srth / sr], axis=1)  # (P, 2)
    y = np.array([dv / sv, dr / sr])
    nrm = np.sum(a * a, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.where(nrm > 0, a @ y / nrm, np.nan)
    resid = np.sqrt(np.sum((y[None, :] - a * step[:, None]) ** 2, axis=1))
    rel = np.where(t.nominal_values != 0, step / t.nominal_values, np.nan)
    order = np.argsort(np.where(np.isfinite(step), resid, np.inf), kind="stable")
    return [(t.names[i], float(rel[i]), float(resid[i])) for i in order if np.isfinite(step[i])]
