"""Meter errors shared by a sweep, resistor errors shared by repeats, and what they do to
the fitted line.

The model (GUM, JCGM 100:2008, 5.2 "correlated input quantities" and F.1.2.1 "a common
effect"): every reading's error is the sum of

- a **random** part, independent from reading to reading: the stated noise of the meter,
  per-reading ``u_*`` columns, and whatever scatter the residuals show (Type A);
- the **gain** and **offset** errors of each meter (the "% of reading" and the fixed part
  of its accuracy spec, each a rectangular distribution of half-width a, u = a/√3, GUM
  4.3.7): one unknown value each, shared by every reading that meter took in one DUT's
  sweep;
- the **tolerance error of each load resistor**, shared by every reading taken with the
  same resistor (the same load value within one DUT's sweep).

Propagation. The fitted line (a = Vth, b = −Rth) is linearised about York's adjusted
points, as in :mod:`sagfit.core.budget`: per reading the sensitivities ∂a/∂V_i, ∂a/∂I_i,
∂b/∂V_i, ∂b/∂I_i of the estimator sagfit used. A shared component moves every reading
at once by a known pattern (δV_i, δI_i) per unit of the component; its effect on a and b
is the directional derivative Σ_i (∂a/∂V_i δV_i + ∂a/∂I_i δI_i), squared and multiplied
by the component's variance (GUM 5.2.2 with correlation coefficient 1 between the
readings sharing it). Nothing here is a hand formula per case: an offset of the
voltmeter gives Vth one-for-one and leaves Rth alone; a voltmeter gain error g scales
both by 1 + g; an I = V/R current inherits the voltmeter's errors divided by R. Those
follow from the patterns (checked in tests/test_systematic.py against closed forms and
the GUM Tree Calculator).

The random part is the larger of the stated random components (noise, per-reading
columns, resistor tolerances with the repeats' sharing) and the Type A estimate from the
scatter about the line (the a-priori covariance of the fit scaled by χ²/ν, ν = n − 2
degrees of freedom). The Welch–Satterthwaite formula (GUM G.4.1) gives the effective
degrees of freedom, and the coverage factor comes from the distribution of the sum: the
largest rectangular component exactly, convolved with a normal for the rest (a Student-t
random part enters with its own quantile). A budget dominated by one rectangular
component has a 95 % coverage factor near 1.65, not 1.96 (GUM G.2.3 and JCGM 101:2008
for the Monte Carlo view of the same).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from ._frozen import freeze_arrays

__all__ = ["ErrorModel", "COMPONENTS", "COMPONENT_LABELS", "propagate", "coverage_half_width"]

#: The shared meter components, in the order they are stored.
COMPONENTS = ("v_gain", "v_offset", "i_gain", "i_offset")
COMPONENT_LABELS = {
    "v_gain": "voltmeter gain (shared by the sweep)",
    "v_offset": "voltmeter offset (shared by the sweep)",
    "i_gain": "ammeter gain (shared by the sweep)",
    "i_offset": "ammeter offset (shared by the sweep)",
}


@dataclass(frozen=True)
class ErrorModel:
    """Per-reading error model beside the weighting uncertainties of ``Readings``.

    Attributes
    ----------
    u_voltage, u_current, cov_iv : ndarray
        The random part of each reading's error (standard uncertainties and covariance).
    dv, di : ndarray, shape (4, n)
        For each shared meter component (``COMPONENTS``) the change of each reading's
        V and I for one standard uncertainty of the component (0 where the component
        does not apply, e.g. a row with its own ``u_voltage`` value).
    rectangular : ndarray of bool, shape (4,)
        Whether each component is rectangular (a spec without a stated k).
    res_dv, res_di : ndarray
        Change of each reading's V and I for one standard uncertainty of its own load
        resistor (the random part above already holds it as if independent; the sharing
        between repeats at the same load is added by :func:`propagate`).
    """

    u_voltage: np.ndarray
    u_current: np.ndarray
    cov_iv: np.ndarray
    dv: np.ndarray
    di: np.ndarray
    rectangular: np.ndarray
    res_dv: np.ndarray
    res_di: np.ndarray

    def __post_init__(self):
        freeze_arrays(self, ("u_voltage", "u_current", "cov_iv", "dv", "di", "rectangular",
                             "res_dv", "res_di"), copy=False)

    @property
    def has_shared(self) -> bool:
        return bool(np.any(self.dv) or np.any(self.di))

    def take(self, index) -> "ErrorModel":
        """Rows ``index`` (a mask, an index array or a slice)."""
        return ErrorModel(self.u_voltage[index], self.u_current[index], self.cov_iv[index],
                          self.dv[:, index], self.di[:, index], self.rectangular,
                          self.res_dv[index], self.res_di[index])


def _groupsum(g, w, m):
    return np.bincount(g, weights=w, minlength=m)[:m] if g.size else np.zeros(m)


def _pair_codes(g, load):
    """One integer per (DUT, load value): readings at the same load share a resistor."""
    key = np.where(np.isfinite(load), load, -1.0)
    order = np.lexsort((key, g))
    gs, ks = g[order], key[order]
    new = np.ones(g.size, bool)
    new[1:] = (gs[1:] != gs[:-1]) | (ks[1:] != ks[:-1])
    codes = np.empty(g.size, np.int64)
    codes[order] = np.cumsum(new) - 1
    return codes, int(new.sum())


@dataclass(frozen=True)
class Propagation:
    """Per-DUT covariance parts of (a, b) = (Vth, −Rth), each ``(var_a, var_b, cov_ab)``."""

    random_stated: tuple
    type_a: tuple
    resistor_sharing: tuple
    components: dict
    use_type_a: np.ndarray
    total: tuple
    dof_eff: np.ndarray
    k: np.ndarray
    k_reason: tuple


def propagate(g, x, y, load, model: ErrorModel, state: dict, m: int, n: np.ndarray,
              confidence: float) -> Propagation:
    """Covariance of (Vth, Rth) under the error model, per DUT (see the module notes).

    ``g, x, y, load`` are the fitted rows (DUT code, I, V, R), ``model`` their error
    model, ``state`` York's quantities of the fit at its final slope
    (:func:`sagfit.core.fit.york_state`), ``n`` the readings per DUT.
    """
    b = state["b"]
    bb = b[g]
    with np.errstate(divide="ignore", invalid="ignore"):
        cb_y = state["weights"] * state["ua"] / state["q"][g]
        ca_y = state["weights"] / state["sw"][g] - state["xbar_adj"][g] * cb_y
    ca_x, cb_x = -bb * ca_y, -bb * cb_y
    ca_y, cb_y, ca_x, cb_x = (np.nan_to_num(c) for c in (ca_y, cb_y, ca_x, cb_x))

    def quad(uy2, ux2, cxy):
        va = _groupsum(g, ca_y * ca_y * uy2 + ca_x * ca_x * ux2 + 2 * ca_y * ca_x * cxy, m)
        vb = _groupsum(g, cb_y * cb_y * uy2 + cb_x * cb_x * ux2 + 2 * cb_y * cb_x * cxy, m)
        cab = _groupsum(g, ca_y * cb_y * uy2 + ca_x * cb_x * ux2
                        + (ca_y * cb_x + ca_x * cb_y) * cxy, m)
        return va, vb, cab

    stated = quad(model.u_voltage ** 2, model.u_current ** 2, model.cov_iv)

    # resistor sharing: the random part holds Σ t_i² per resistor; the truth is (Σ t_i)²
    ta = ca_y * model.res_dv + ca_x * model.res_di
    tb = cb_y * model.res_dv + cb_x * model.res_di
    if np.any(ta) or np.any(tb):
        codes, nc = _pair_codes(g, load)
        code_dut = np.zeros(nc, np.int64)
        code_dut[codes] = g
        sa, sb = np.bincount(codes, ta, nc), np.bincount(codes, tb, nc)
        share = (_groupsum(code_dut, sa * sa, m) - _groupsum(g, ta * ta, m),
                 _groupsum(code_dut, sb * sb, m) - _groupsum(g, tb * tb, m),
                 _groupsum(code_dut, sa * sb, m) - _groupsum(g, ta * tb, m))
        # the largest resistor's effect per DUT: a tolerance band is rectangular, and one
        # resistor can dominate a result (the coverage factor needs to know)
        res_big = (np.zeros(m), np.zeros(m))
        np.maximum.at(res_big[0], code_dut, np.abs(sa))
        np.maximum.at(res_big[1], code_dut, np.abs(sb))
    else:
        share = (np.zeros(m), np.zeros(m), np.zeros(m))
        res_big = (np.zeros(m), np.zeros(m))

    comps = {}
    for c, name in enumerate(COMPONENTS):
        if not (np.any(model.dv[c]) or np.any(model.di[c])):
            continue
        ja = _groupsum(g, ca_y * model.dv[c] + ca_x * model.di[c], m)
        jb = _groupsum(g, cb_y * model.dv[c] + cb_x * model.di[c], m)
        comps[name] = (ja, jb, bool(model.rectangular[c]))

    dof = np.maximum(n - 2, 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        red = np.where(dof > 0, state["chi2"] / np.maximum(dof, 1), np.nan)
    typea = (state["var_a"] * red, state["var_b"] * red, state["cov_ab"] * red)
    rs = tuple(stated[j] + share[j] for j in range(3))
    with np.errstate(invalid="ignore"):
        use_a = (dof > 0) & ((typea[0] > rs[0]) | (typea[1] > rs[1]))
    rand = tuple(np.where(use_a, typea[j], rs[j]) for j in range(3))
    tot = [rand[0].copy(), rand[1].copy(), rand[2].copy()]
    for ja, jb, _ in comps.values():
        tot[0] += ja * ja
        tot[1] += jb * jb
        tot[2] += ja * jb

    # effective degrees of freedom (GUM G.4.1): only a Type A random part has finite ν
    dof_eff = np.full(m, np.inf)
    p = 0.5 * (1.0 + confidence)
    z = float(special.ndtri(p))
    ks = []
    for j in (0, 1):  # a = Vth, b = Rth
        u2 = tot[j]
        ua2 = np.where(use_a, rand[j], 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            nu = np.where(use_a & (ua2 > 0), u2 * u2 / (ua2 * ua2 / np.maximum(dof, 1)), np.inf)
        nu = np.where(np.isfinite(nu), np.maximum(nu, 1.0), np.inf)
        if j == 0:
            dof_eff = nu
        # the half-width with each candidate random part (the stated one with its normal
        # quantile; the Type A one with Student t, ν = n − 2), and the larger of the two:
        # a scatter that happens to fall low must not lose the t protection
        with np.errstate(invalid="ignore"):
            tq = np.where(dof > 0, special.stdtrit(np.maximum(dof, 1).astype(float), p) / z,
                          np.inf)
        rect_m = np.zeros(m)    # the largest rectangular meter component (half-width)
        other_m2 = np.zeros(m)  # the variance of the other meter components
        for name, (ja, jb, rect) in comps.items():
            c2 = (ja if j == 0 else jb) ** 2
            if rect:
                half = np.sqrt(3.0 * c2)
                bigger = half > rect_m
                other_m2 = other_m2 + np.where(bigger, rect_m ** 2 / 3.0, c2)
                rect_m = np.where(bigger, half, rect_m)
            else:
                other_m2 = other_m2 + c2
        # stated random part: the largest resistor's band is rectangular too
        rect_r = np.sqrt(3.0) * res_big[j]
        rect_st = np.fmax(rect_m, rect_r)
        rest_st = (other_m2 + np.fmin(rect_m, rect_r) ** 2 / 3.0
                   + np.maximum(rs[j] - res_big[j] ** 2, 0.0))
        half_st = coverage_half_width(rect_st, np.sqrt(rest_st), confidence)
        # Type A random part (it holds every random effect, resistors included), Student t
        with np.errstate(invalid="ignore"):
            rest_a = other_m2 + np.nan_to_num(typea[j]) * np.where(dof > 0, tq, 0.0) ** 2
        half_a = np.where(dof > 0, coverage_half_width(rect_m, np.sqrt(rest_a), confidence),
                          0.0)
        half = np.fmax(half_st, half_a)
        with np.errstate(divide="ignore", invalid="ignore"):
            ks.append(np.where(u2 > 0, half / np.sqrt(u2), z))
    k = tuple(np.where(np.isfinite(kq), kq, z) for kq in ks)  # (Vth, Rth)
    why_a = "Type A scatter with few degrees of freedom (Welch–Satterthwaite, GUM G.4)"
    why_r = "a rectangular meter component dominates (its distribution, not the normal)"
    reasons = np.where(use_a & np.isfinite(dof_eff), why_a,
                       np.where(np.fmin(*k) < z * 0.98, why_r, "normal (large effective ν)"))
    return Propagation(stated, typea, share, comps, use_a, tuple(tot), dof_eff, k,
                       tuple(reasons.tolist()))


def coverage_half_width(rect_half, sigma, p: float, iterations: int = 8) -> np.ndarray:
    """Half-width x with P(|R + N| ≤ x) = ``p``, R uniform on ±``rect_half``, N normal
    with standard deviation ``sigma`` (elementwise, vectorised).

    The distribution function of the sum is closed-form,
    P(R + N ≤ x) = σ/(2a)·[G((x + a)/σ) − G((x − a)/σ)], G(t) = tΦ(t) + φ(t), and its
    density [Φ((x + a)/σ) − Φ((x − a)/σ)]/(2a); Newton's method from the larger of the
    two pure cases converges in a few steps (the function is smooth and increasing).
    """
    a = np.asarray(rect_half, float)
    s = np.asarray(sigma, float)
    a, s = np.broadcast_arrays(a, s)
    z = float(special.ndtri(0.5 * (1.0 + p)))
    out = np.empty(a.shape)
    pure_n = a <= 1e-9 * np.maximum(s, 1e-300)
    pure_r = ~pure_n & (s <= 1e-9 * np.maximum(a, 1e-300))
    out[pure_n] = z * s[pure_n]
    out[pure_r] = p * a[pure_r]
    mix = ~(pure_n | pure_r)
    if mix.any():
        am, sm = a[mix], s[mix]
        target = 0.5 * (1.0 + p)
        x = np.fmax(p * am, z * sm)
        inv_sqrt2pi = 1.0 / math.sqrt(2.0 * math.pi)
        for _ in range(iterations):
            hi, lo = (x + am) / sm, (x - am) / sm
            f_hi, f_lo = special.ndtr(hi), special.ndtr(lo)
            big = (hi * f_hi + np.exp(-0.5 * hi * hi) * inv_sqrt2pi
                   - lo * f_lo - np.exp(-0.5 * lo * lo) * inv_sqrt2pi)
            cdf = sm / (2.0 * am) * big
            pdf = (f_hi - f_lo) / (2.0 * am)
            x = np.maximum(x - (cdf - target) / np.maximum(pdf, 1e-300), 0.5 * x)
        out[mix] = x
    return out
