"""Monte Carlo coverage intervals of Vth and Rth (JCGM 101:2008, GUM Supplement 1).

The GUM's law of propagation (and sagfit's coverage factors, :mod:`sagfit.core.systematic`)
linearise the fit and approximate the distribution of the result. Supplement 1 instead
propagates the *distributions* of the inputs through the model itself: draw every input
from its distribution, evaluate the model, and read the coverage interval off the
distribution of the outputs (JCGM 101:2008, 5.9 and 7). Here the inputs are the readings
and their errors, the model is the very fit sagfit made (the same York/WLS/OLS estimator
with the same weights), and everything is vectorised over DUTs × draws: each draw of each
DUT is one more group of the fit kernel, so there is no Python loop per draw or per DUT.

What is drawn, per DUT and draw (the measurement model of docs/method.md §2):

- each meter's **gain** and **offset** error, one value shared by the whole sweep,
  rectangular (or normal where the spec states a k);
- each **load resistor's** tolerance error, one value shared by the readings repeated at
  that load, rectangular;
- the **random** error of each reading, normal, with the stated noise (or per-reading
  ``u_*`` columns). Where the random part comes from the scatter (Type A: no stated
  uncertainty, or a scatter larger than the stated one), its scale is itself uncertain:
  each draw takes σ² from its posterior given the residuals, s²·ν/χ²_ν with ν = n − 2
  (JCGM 101:2008, 6.4.9: the scaled and shifted t distribution that results).

The coverage interval is the probabilistically symmetric one (the 2.5 % and 97.5 %
quantiles at 95 %, JCGM 101:2008, 7.7). The GUM interval is *validated* when both of its
ends agree with the Monte Carlo ends within δ, half a unit of the last digit of u written
to two significant digits (JCGM 101:2008, 8.1–8.2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from ._frozen import freeze_arrays
from .errors import InputError
from .fit import _line, _spread
from .systematic import _pair_codes

__all__ = ["MonteCarlo", "monte_carlo", "DEFAULT_DRAWS", "MAX_VALUES_PER_PASS"]

#: Draws per DUT when the user asks for a Monte Carlo without a number: JCGM 101:2008,
#: 7.2.2 suggests 10⁶ for a 95 % interval correct to one or two significant digits in
#: general; 10⁵ gives the ends to about ±1 % of u for the distributions met here.
DEFAULT_DRAWS = 100_000
#: Readings × draws evaluated in one pass of the fit kernel (bounded memory: about
#: 150 bytes each, so about 300 MB).
MAX_VALUES_PER_PASS = 2_000_000


@dataclass(frozen=True)
class MonteCarlo:
    """Monte Carlo results per DUT (NaN where a DUT was not fitted).

    Attributes
    ----------
    draws : int
    confidence : float
    vth_low, vth_high, rth_low, rth_high : ndarray
        Probabilistically symmetric coverage interval ends (V, Ω).
    u_vth, u_rth : ndarray
        Standard deviations of the drawn results (V, Ω).
    gum_valid_vth, gum_valid_rth : ndarray of bool
        Whether the GUM interval of the fit agrees with the Monte Carlo one within δ.
    delta_vth, delta_rth : ndarray
        The numerical tolerance δ used (V, Ω).
    diff_vth, diff_rth : ndarray
        The larger of the two end differences between the GUM and Monte Carlo intervals.
    """

    draws: int
    confidence: float
    vth_low: np.ndarray
    vth_high: np.ndarray
    rth_low: np.ndarray
    rth_high: np.ndarray
    u_vth: np.ndarray
    u_rth: np.ndarray
    gum_valid_vth: np.ndarray
    gum_valid_rth: np.ndarray
    delta_vth: np.ndarray
    delta_rth: np.ndarray
    diff_vth: np.ndarray
    diff_rth: np.ndarray

    def __post_init__(self):
        freeze_arrays(self, ("vth_low", "vth_high", "rth_low", "rth_high", "u_vth", "u_rth",
                             "gum_valid_vth", "gum_valid_rth", "delta_vth", "delta_rth",
                             "diff_vth", "diff_rth"))

    def row(self, i: int) -> dict | None:
        """DUT ``i`` as a JSON-ready dict (``None`` when it was not fitted)."""
        if not math.isfinite(float(self.vth_low[i])):
            return None
        return {"method": "JCGM 101:2008 Monte Carlo of the measurement model",
                "draws": self.draws, "confidence": self.confidence,
                "vth": {"ci": [float(self.vth_low[i]), float(self.vth_high[i])],
                        "u": float(self.u_vth[i]), "gum_interval_valid":
                        bool(self.gum_valid_vth[i]), "tolerance": float(self.delta_vth[i]),
                        "gum_end_difference": float(self.diff_vth[i])},
                "rth": {"ci": [float(self.rth_low[i]), float(self.rth_high[i])],
                        "u": float(self.u_rth[i]), "gum_interval_valid":
                        bool(self.gum_valid_rth[i]), "tolerance": float(self.delta_rth[i]),
                        "gum_end_difference": float(self.diff_rth[i])}}


def _two_digit_delta(u):
    """δ of JCGM 101:2008, 8.2: half a unit of the last digit of u written with two
    significant digits (u = 0.0023 → δ = 0.00005)."""
    u = np.asarray(u, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        e = np.floor(np.log10(np.where(u > 0, u, np.nan))) - 1
    return 0.5 * 10.0 ** e


def monte_carlo(readings, fits, *, draws: int = DEFAULT_DRAWS, seed: int | None = 0,
                confidence: float | None = None) -> MonteCarlo:
    """Monte Carlo coverage intervals of Vth and Rth for every fitted DUT.

    Parameters
    ----------
    readings : Readings
        The readings the fit used (``readings.select(fits.used_rows)`` when an option
        left some out).
    fits : Fits
        The fit of those readings (not a robust one: its weights are not the stated ones).
    draws : int
        Draws per DUT (at least 1,000).
    seed : int, optional
        Seed of the generator (results are repeatable with the same seed).
    confidence : float, optional
        Coverage probability; default the fit's.
    """
    draws = int(draws)
    if draws < 1000:
        raise InputError(f"the Monte Carlo needs at least 1,000 draws (got {draws})")
    if fits.settings.get("robust"):
        raise InputError("a Monte Carlo of a robust (Huber) fit is not offered: its weights "
                         "depend on the residuals; fit without --robust")
    if len(readings.duts) != len(fits) or tuple(readings.duts) != tuple(fits.duts):
        raise InputError("the readings and the fits do not hold the same DUTs")
    p = float(fits.confidence if confidence is None else confidence)
    if not 0.0 < p < 1.0:
        raise InputError(f"confidence must be between 0 and 1 (got {p!r})")
    m = len(fits)
    ok = fits.ok & np.isfinite(fits.vth)
    g_all = readings.group
    keep = ok[g_all]
    g = g_all[keep]
    x, y = readings.current[keep], readings.voltage[keep]
    n = np.bincount(g, minlength=m)
    method = np.asarray(fits.method, dtype=object)
    stated_dut = method != "ols"
    st = _spread(g, stated_dut)
    sxx = np.where(st, readings.u_current[keep] ** 2, 0.0)
    syy = np.where(st, readings.u_voltage[keep] ** 2, 1.0)
    sxy = np.where(st, readings.cov_iv[keep], 0.0)

    # the random part per reading, and whether it is Type A (scatter, uncertain scale)
    dof = np.maximum(n - 2, 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        red = np.where(dof > 0, fits.chi2 / np.maximum(dof, 1), 0.0)
    red = np.nan_to_num(red)
    err = readings.errors.take(keep) if readings.errors is not None else None
    if err is not None:
        ux2 = np.maximum(err.u_current ** 2 - err.res_di ** 2, 0.0)
        uy2 = np.maximum(err.u_voltage ** 2 - err.res_dv ** 2, 0.0)
        cxy = err.cov_iv - err.res_dv * err.res_di
        rand_a = _type_a_dominates(fits, m)
    else:  # the fit's own weights: stated (scaled when the scatter exceeds them) or OLS
        ux2, uy2, cxy = sxx.copy(), syy.copy(), sxy.copy()
        rand_a = (~stated_dut) | (red > 1.0)
    # Type A: the weights times the residual variance factor, each draw with its own σ²
    scale_a = _spread(g, np.where(rand_a, red, 1.0))
    typea_row = _spread(g, rand_a)
    ux2 = np.where(typea_row, sxx * scale_a, ux2)
    uy2 = np.where(typea_row, syy * scale_a, uy2)
    cxy = np.where(typea_row, sxy * scale_a, cxy)
    # correlated (V, I) random pairs: I = V/R makes them so
    ui = np.sqrt(ux2)
    uv = np.sqrt(uy2)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = np.where((ui > 0) & (uv > 0), np.clip(cxy / (ui * uv), -1.0, 1.0), 0.0)
    resistor = _pair_codes(g, readings.load[keep])[0] if err is not None else None

    rng = np.random.default_rng(seed)
    lo_q, hi_q = 0.5 * (1.0 - p), 0.5 * (1.0 + p)
    qv, qr = np.full((2, m), np.nan), np.full((2, m), np.nan)
    u_v, u_r = np.full(m, np.nan), np.full(m, np.nan)
    # passes over blocks of DUTs and of draws, so that readings × draws stays bounded; the
    # draws of one block are summed up (quantiles, standard deviation) before the next, so
    # memory does not grow with DUTs × draws
    dut_ids = np.flatnonzero(ok)
    n_max = int(n.max()) if n.size else 1
    d_step = int(min(draws, max(1, MAX_VALUES_PER_PASS // max(n_max, 1))))
    cap = max(MAX_VALUES_PER_PASS // d_step, n_max)  # readings per pass
    cs = np.cumsum(n[dut_ids])
    block_of = (cs - 1) // cap                        # each block holds ≤ cap + n_max
    cuts = np.flatnonzero(np.diff(block_of)) + 1
    for block in np.split(dut_ids, cuts) if dut_ids.size else []:
        inblock = np.zeros(m, bool)
        inblock[block] = True
        rows = np.flatnonzero(inblock[g])
        res_v = np.full((block.size, draws), np.nan)
        res_r = np.full((block.size, draws), np.nan)
        for d0 in range(0, draws, d_step):
            dn = min(d_step, draws - d0)
            a, b = _one_pass(rng, rows, g, block, x, y, sxx, syy, sxy, uv, ui, rho,
                             typea_row, dof, err, resistor, dn, m)
            res_v[:, d0:d0 + dn] = a
            res_r[:, d0:d0 + dn] = -b
        with np.errstate(all="ignore"):
            qv[:, block] = np.nanquantile(res_v, [lo_q, hi_q], axis=1)
            qr[:, block] = np.nanquantile(res_r, [lo_q, hi_q], axis=1)
            u_v[block] = np.nanstd(res_v, axis=1, ddof=1)
            u_r[block] = np.nanstd(res_r, axis=1, ddof=1)

    nan = np.where(ok, 1.0, np.nan)
    dv, dr = _two_digit_delta(fits.u_vth), _two_digit_delta(fits.u_rth)
    gv_lo, gv_hi = fits.vth - fits.k * fits.u_vth, fits.vth + fits.k * fits.u_vth
    gr_lo, gr_hi = fits.rth - fits.k_rth * fits.u_rth, fits.rth + fits.k_rth * fits.u_rth
    with np.errstate(invalid="ignore"):
        diff_v = np.fmax(np.abs(gv_lo - qv[0]), np.abs(gv_hi - qv[1]))
        diff_r = np.fmax(np.abs(gr_lo - qr[0]), np.abs(gr_hi - qr[1]))
        valid_v = ok & (diff_v <= dv)
        valid_r = ok & (diff_r <= dr)
    return MonteCarlo(draws=draws, confidence=p, vth_low=qv[0] * nan, vth_high=qv[1] * nan,
                      rth_low=qr[0] * nan, rth_high=qr[1] * nan, u_vth=u_v * nan,
                      u_rth=u_r * nan, gum_valid_vth=valid_v, gum_valid_rth=valid_r,
                      delta_vth=dv * nan, delta_rth=dr * nan, diff_vth=diff_v * nan,
                      diff_rth=diff_r * nan)


def _type_a_dominates(fits, m):
    """Per DUT: did the fit take its random part from the scatter (JSON ``uncertainty``)?"""
    col = fits.extra.get("uncertainty")
    if col is not None and hasattr(col, "columns"):
        return np.asarray(col.columns["use_a"], bool) & np.asarray(col.columns["sel"], bool)
    return np.zeros(m, bool)


def _one_pass(rng, rows, g, block, x, y, sxx, syy, sxy, uv, ui, rho, typea_row, dof, err,
              resistor, dn, m):
    """Fit ``dn`` draws of the readings ``rows`` (DUTs ``block``): returns (a, b) of shape
    (len(block), dn)."""
    nr = rows.size
    # draw d of DUT j is group d·len(block) + position of j
    pos = np.full(m, -1, np.int64)
    pos[block] = np.arange(block.size)
    gb = pos[g[rows]]
    nb = block.size
    groups = (np.arange(dn)[:, None] * nb + gb[None, :]).ravel()
    e1 = rng.standard_normal((dn, nr))
    e2 = rng.standard_normal((dn, nr))
    ev = e1
    ei = rho[rows] * e1 + np.sqrt(1.0 - rho[rows] ** 2) * e2
    # Type A: each draw's σ² from its posterior, s²·ν/χ²_ν (per DUT and draw)
    nu = dof[block].astype(float)
    chi = rng.chisquare(np.maximum(nu, 1.0), size=(dn, nb))
    fac = np.sqrt(np.where(nu[None, :] > 0, nu[None, :] / chi, 1.0))
    f_row = np.where(typea_row[rows][None, :], fac[:, gb], 1.0)
    yy = y[rows][None, :] + ev * uv[rows][None, :] * f_row
    xx = x[rows][None, :] + ei * ui[rows][None, :] * f_row
    if err is not None:
        for c in range(err.dv.shape[0]):
            dvc, dic = err.dv[c][rows], err.di[c][rows]
            if not (np.any(dvc) or np.any(dic)):
                continue
            z = (rng.uniform(-math.sqrt(3.0), math.sqrt(3.0), (dn, nb)) if err.rectangular[c]
                 else rng.standard_normal((dn, nb)))
            yy += z[:, gb] * dvc[None, :]
            xx += z[:, gb] * dic[None, :]
        # a Type A random part already holds the resistors' scatter
        own = ~typea_row[rows]
        rdv, rdi = err.res_dv[rows] * own, err.res_di[rows] * own
        if np.any(rdv) or np.any(rdi):
            code = resistor[rows]
            _, local = np.unique(code, return_inverse=True)
            local = local.ravel()
            z = rng.uniform(-math.sqrt(3.0), math.sqrt(3.0), (dn, int(local.max()) + 1))
            yy += z[:, local] * rdv[None, :]
            xx += z[:, local] * rdi[None, :]
    mm = dn * nb
    with np.errstate(all="ignore"):
        res = _line(groups, xx.ravel(), yy.ravel(), np.tile(sxx[rows], dn),
                    np.tile(syy[rows], dn), np.tile(sxy[rows], dn), mm)
    a = res["a"][:mm].reshape(dn, nb).T
    b = res["b"][:mm].reshape(dn, nb).T
    return a, b


def coverage_probability_note(fits, mc: MonteCarlo) -> str:
    """One line comparing the GUM and Monte Carlo intervals of a batch, for the terminal."""
    ok = np.isfinite(mc.vth_low)
    if not ok.any():
        return "Monte Carlo: no DUT was fitted"
    nv = int(mc.gum_valid_vth[ok].sum())
    nr = int(mc.gum_valid_rth[ok].sum())
    return (f"Monte Carlo (JCGM 101:2008, {mc.draws:,} draws per DUT): the GUM interval of "
            f"Vth agrees within δ for {nv} of {int(ok.sum())} DUT(s), that of Rth for {nr}.")
