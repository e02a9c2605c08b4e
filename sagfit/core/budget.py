"""Uncertainty budgets of Vth and Rth, in the style of the GUM, for many DUTs at once.

For each DUT the budget splits the combined standard uncertainty of Vth and of Rth into
the contributions of the input groups — the voltage readings, the current readings, the
load resistors and, when the scatter exceeded the stated uncertainties, the scale
factor — each with its sensitivity coefficient, so a lab sees which instrument limits
the result.

Method
------
The fitted line V = a + b·I (a = Vth, b = −Rth) is linearised about the least-squares
adjusted points of York et al. (2004): with the final weights
W_i = 1/(u²(V_i) + b²u²(I_i) − 2b·u(I_i, V_i)) held fixed and the adjusted abscissae
x_i = X̄ + β_i (York's eq. 6, x̄ their weighted mean, Q = Σ W_i (x_i − x̄)²),

    ∂b/∂V_i = W_i (x_i − x̄) / Q,       ∂a/∂V_i = W_i / ΣW − x̄ · ∂b/∂V_i,
    ∂b/∂I_i = −b · ∂b/∂V_i,            ∂a/∂I_i = −b · ∂a/∂V_i.

Propagating u(V_i), u(I_i), u(I_i, V_i) with these coefficients (GUM, JCGM 100:2008,
5.1.2 and 5.2.2) gives exactly York's a-priori σ_a² = 1/ΣW + x̄²σ_b² and σ_b² = 1/Q; for a
weighted least-squares fit (u(I) = 0) the adjusted and measured abscissae coincide and
the coefficients are the exact derivatives of the closed-form estimator (Draper & Smith,
*Applied Regression Analysis*, 3rd ed., 1998, ch. 9). For errors in both coordinates the
exact Jacobian of the iterated estimator also moves the weights and the residuals; it
differs from this linearisation by terms of the order of the relative scatter (1 % on
the Pearson–York benchmark, far less on bench data; see tests/test_budget.py).

When a reading was not measured but computed with the load resistance R_i, the chain
rule carries the sensitivity back to the measured quantities (the uncertainty model of
:mod:`sagfit.readings`):

- I = V/R:  ∂y/∂V_meter = ∂y/∂V + (∂y/∂I)/R,  ∂y/∂R = −(∂y/∂I)·V/R²;
- V = I·R:  ∂y/∂I_meter = ∂y/∂I + (∂y/∂V)·R,  ∂y/∂R = (∂y/∂V)·I.

The groups are then independent and their variances add up to the a-priori variance.
When χ²/ν > 1 the fit enlarged the covariance by S² = χ²/ν (PDG convention, see
:mod:`sagfit.fit`); the budget shows that enlargement as one more contribution,
u_S = √(S² − 1)·u_a-priori, so the contributions add in quadrature to the reported
u(Vth), u(Rth). For an OLS fit (nothing stated) the whole uncertainty is Type A, from the
scatter s with ν = n − 2 (GUM 4.2).

Per group, the budget gives the root-sum-square c = √Σc_i² of the per-reading
sensitivity coefficients and the sensitivity-weighted rms input uncertainty
u = √(Σc_i²u_i² / Σc_i²), so that the contribution is u_i(y) = c·u, as in a GUM table.

With an accuracy spec shared by a sweep (the default), the voltage and current rows hold
the random part only (the stated noise), the load row adds the sharing between repeats
at one resistor, the Type A row is the scatter where it exceeds the stated random part,
and one row per shared meter component (voltmeter gain and offset, ammeter gain and
offset) gives its effect on Vth and Rth (:mod:`sagfit.core.systematic`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .fit import _groupsum, _spread, segment_scope, york_state
from .readings import Readings
from .results import Fits
from .systematic import COMPONENT_LABELS, COMPONENTS

__all__ = ["Budget", "budget_arrays", "budgets", "GROUPS", "GROUP_LABELS"]

GROUPS = ("voltage", "current", "load", "scale") + COMPONENTS
GROUP_LABELS = {
    **COMPONENT_LABELS,
    "voltage": "voltage readings",
    "current": "current readings",
    "load": "load resistors",
    "scale": "excess scatter (scale factor S)",
    "type_a": "scatter of the readings (Type A)",
}
_INPUT_UNIT = {"voltage": "V", "current": "A", "load": "Ω", "scale": "", "type_a": "V",
               "v_gain": "", "v_offset": "V", "i_gain": "", "i_offset": "A"}
_SENS_UNIT = {  # unit of ∂y/∂x for y in (vth, rth)
    ("vth", "voltage"): "V/V", ("vth", "current"): "V/A", ("vth", "load"): "V/Ω",
    ("rth", "voltage"): "Ω/V", ("rth", "current"): "Ω/A", ("rth", "load"): "Ω/Ω",
    ("vth", "type_a"): "V/V", ("rth", "type_a"): "Ω/V",
}


@dataclass(frozen=True)
class Budget:
    """Columnar budgets (one element per DUT) for ``y`` in ``("vth", "rth")``.

    Attributes
    ----------
    valid : ndarray of bool
        A budget exists (the DUT was fitted and the readings reproduce its line).
    type_a : ndarray of bool
        OLS fit: the whole uncertainty is Type A (no instrument groups).
    contribution : dict (y, group) → ndarray
        Standard uncertainty contributed by each group, in the unit of y.
    sensitivity : dict (y, group) → ndarray
        Root-sum-square of the per-reading sensitivity coefficients of the group.
    u_input : dict (y, group) → ndarray
        Sensitivity-weighted rms standard uncertainty of the group's inputs.
    n_input : dict group → ndarray
        Readings (or resistors) with a non-zero uncertainty in the group.
    u_apriori, u_combined : dict y → ndarray
        From the stated uncertainties only; and after the scale factor.
    scale : ndarray
        S² applied to the covariance (1 when not applied).
    """

    duts: tuple
    valid: np.ndarray
    type_a: np.ndarray
    method: np.ndarray
    contribution: dict
    sensitivity: dict
    u_input: dict
    n_input: dict
    u_apriori: dict
    u_combined: dict
    scale: np.ndarray
    reason: tuple

    def dominant(self, y: str) -> np.ndarray:
        """Name of the group with the largest contribution to ``y`` per DUT ('' if none)."""
        names = ("type_a",) + GROUPS
        stack = np.vstack([np.nan_to_num(self.contribution.get((y, g), np.zeros(len(self.duts))))
                           for g in names])
        best = np.argmax(stack, axis=0)
        out = np.asarray(names, dtype=object)[best]
        out[~self.valid | (stack.max(axis=0) <= 0)] = ""
        return out


@segment_scope
def budget_arrays(readings: Readings, fits: Fits, *, used=None) -> Budget:
    """Budgets of Vth and Rth for every DUT, as arrays (see the module notes).

    Parameters
    ----------
    readings : Readings
        The readings that were fitted.
    fits : Fits
        Their fit (``sagfit.fit``).
    used : array_like of bool, optional
        Rows the fit used (default: every row of a fitted DUT). A DUT whose line the
        rows do not reproduce (for example after a robust refit) gets no budget.

    Returns
    -------
    Budget
    """
    m = len(fits)
    g_all = readings.group
    ok_dut = fits.ok & np.isfinite(fits.vth) & np.isfinite(fits.rth)
    keep = ok_dut[g_all]
    if used is not None:
        keep &= np.asarray(used, bool)
    g = g_all[keep]
    x = readings.current[keep]
    y = readings.voltage[keep]
    ui, uv, cv = readings.u_current[keep], readings.u_voltage[keep], readings.cov_iv[keep]
    load = readings.load[keep]
    method = np.asarray(fits.method).astype(str)
    type_a = method == "ols"
    ta = _spread(g, type_a)
    sxx = np.where(ta, 0.0, ui ** 2)
    syy = np.where(ta, 1.0, uv ** 2)
    sxy = np.where(ta, 0.0, cv)
    b = -np.asarray(fits.rth, float)
    bb = _spread(g, b)
    st = york_state(g, x, y, sxx, syy, sxy, m, b)
    prop = None
    if readings.errors is not None:  # shared meter and resistor errors (systematic.py)
        from .systematic import propagate

        er = readings.errors.take(keep)
        with np.errstate(all="ignore"):
            prop = propagate(g, x, y, load, er, st, m, fits.n, fits.confidence)
        ui, uv, cv = er.u_current, er.u_voltage, er.cov_iv  # the random part, per group
    w, sw, ua, q, xbar_adj = st["weights"], st["sw"], st["ua"], st["q"], st["xbar_adj"]
    a_chk, var_a, var_b = st["a"], st["var_a"], st["var_b"]
    with np.errstate(divide="ignore", invalid="ignore"):
        cb_y = w * ua / _spread(g, q)
        ca_y = w / _spread(g, sw) - _spread(g, xbar_adj) * cb_y
    # the rows must reproduce the reported line, or the budget would describe another fit
    with np.errstate(invalid="ignore"):
        tol = 1e-6 * np.sqrt(var_a * np.where(type_a, fits.scale, 1.0)) + 1e-12 * np.abs(fits.vth)
        same = np.abs(a_chk - fits.vth) <= tol
    valid = ok_dut & np.isfinite(var_a) & np.isfinite(var_b) & same
    reason = tuple(None if valid[k] else
                   (fits.error[k] or ("not fitted" if not ok_dut[k] else
                                      "the fit did not use these readings as given "
                                      "(a refit on a subset, or robust weights)"))
                   for k in range(m)) if not valid.all() else (None,) * m

    coef = {("vth", "V"): ca_y, ("vth", "I"): -bb * ca_y,
            ("rth", "V"): -cb_y, ("rth", "I"): bb * cb_y}
    contribution: dict = {}
    sensitivity: dict = {}
    u_input: dict = {}
    n_input: dict = {}
    frm_i, frm_v = readings.current_from, readings.voltage_from
    finite_r = np.isfinite(load) & (load > 0)
    r = np.where(finite_r, load, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        if frm_i == "load":  # I = V/R: voltage meter and resistor
            u_rpart2 = np.where(finite_r, np.maximum(ui ** 2 - uv ** 2 / r ** 2, 0.0), 0.0)
            u_r = np.where(finite_r & (y != 0), np.sqrt(u_rpart2) * r ** 2 / np.abs(y), 0.0)
            d_r = np.where(finite_r & (y != 0), -y / r ** 2, 0.0)  # ∂I/∂R
            d_v = np.where(finite_r, 1.0 / r, 0.0)                 # ∂I/∂V
            groups = {"voltage": (lambda c: c["V"] + c["I"] * d_v, uv),
                      "load": (lambda c: c["I"] * d_r, u_r)}
        elif frm_v == "load":  # V = I·R: current meter and resistor
            u_rpart2 = np.where(finite_r, np.maximum(uv ** 2 - r ** 2 * ui ** 2, 0.0), 0.0)
            u_r = np.where(finite_r & (x != 0), np.sqrt(u_rpart2) / np.abs(x), 0.0)
            rr = np.where(finite_r, r, 0.0)
            groups = {"current": (lambda c: c["I"] + c["V"] * rr, ui),
                      "load": (lambda c: c["V"] * x, u_r)}
        else:
            groups = {"voltage": (lambda c: c["V"], uv), "current": (lambda c: c["I"], ui)}
    zeros = np.zeros(m)
    for yname in ("vth", "rth"):
        c = {"V": coef[(yname, "V")], "I": coef[(yname, "I")]}
        for gname in ("voltage", "current", "load"):
            if gname in groups:
                fn, u_in = groups[gname]
                ci = np.where(ta, 0.0, fn(c))
                u_in = np.where(ta, 0.0, u_in)
                s_c2 = _groupsum(g, ci * ci, m)
                var = _groupsum(g, (ci * u_in) ** 2, m)
                with np.errstate(divide="ignore", invalid="ignore"):
                    contribution[(yname, gname)] = np.where(valid & ~type_a, np.sqrt(var), 0.0)
                    sensitivity[(yname, gname)] = np.where(valid & ~type_a, np.sqrt(s_c2), np.nan)
                    u_input[(yname, gname)] = np.where(valid & ~type_a & (s_c2 > 0),
                                                       np.sqrt(var / s_c2), np.nan)
                if yname == "vth":
                    n_input[gname] = np.bincount(g, weights=(u_in > 0) & ~ta,
                                                 minlength=m).astype(np.int64)
            else:
                contribution[(yname, gname)] = zeros
                sensitivity[(yname, gname)] = np.full(m, np.nan)
                u_input[(yname, gname)] = np.full(m, np.nan)
                if yname == "vth":
                    n_input[gname] = np.zeros(m, np.int64)
    u_ap = {"vth": np.where(valid, np.sqrt(var_a), np.nan),
            "rth": np.where(valid, np.sqrt(var_b), np.nan)}
    if prop is not None:
        return _shared_budget(fits, prop, valid, type_a, method, contribution, sensitivity,
                              u_input, n_input, u_ap, reason)
    scale = np.where(np.isfinite(fits.scale), fits.scale, 1.0)
    s2 = np.where(type_a, 1.0, np.maximum(scale, 1.0))
    u_comb = {}
    for yname in ("vth", "rth"):
        contribution[(yname, "scale")] = np.where(valid & ~type_a,
                                                  np.sqrt(np.maximum(s2 - 1.0, 0.0)) * u_ap[yname],
                                                  0.0)
        sensitivity[(yname, "scale")] = np.full(m, np.nan)
        u_input[(yname, "scale")] = np.where(valid & ~type_a, np.sqrt(s2), np.nan)
        # Type A: u = s·√(Σc²) with unit weights; the sensitivity is √(Σc²) = u_a-priori
        s = np.sqrt(np.where(type_a, scale, np.nan))
        contribution[(yname, "type_a")] = np.where(valid & type_a, s * u_ap[yname], 0.0)
        sensitivity[(yname, "type_a")] = np.where(valid & type_a, u_ap[yname], np.nan)
        u_input[(yname, "type_a")] = np.where(valid & type_a, s, np.nan)
        u_comb[yname] = np.where(type_a, s * u_ap[yname], np.sqrt(s2) * u_ap[yname])
    n_input["scale"] = np.zeros(m, np.int64)
    n_input["type_a"] = np.where(type_a, fits.n, 0)
    for name in COMPONENTS:  # no shared meter errors in this model
        n_input[name] = np.zeros(m, np.int64)
        for yname in ("vth", "rth"):
            contribution[(yname, name)] = zeros
            sensitivity[(yname, name)] = np.full(m, np.nan)
            u_input[(yname, name)] = np.full(m, np.nan)
    return Budget(duts=fits.duts, valid=valid, type_a=type_a, method=method,
                  contribution=contribution, sensitivity=sensitivity, u_input=u_input,
                  n_input=n_input, u_apriori=u_ap, u_combined=u_comb, scale=s2, reason=reason)


def _shared_budget(fits, prop, valid, type_a, method, contribution, sensitivity, u_input,
                   n_input, u_ap, reason) -> Budget:
    """The budget under shared meter errors: random rows (or the Type A scatter where it
    exceeds them), the resistors with their repeats' sharing, and one row per shared
    meter component; the rows add in quadrature to the reported u."""
    m = len(fits)
    st = valid & ~type_a
    use_a = prop.use_type_a
    u_comb = {}
    for j, yname in enumerate(("vth", "rth")):
        for gname in ("voltage", "current"):
            contribution[(yname, gname)] = np.where(st & ~use_a,
                                                    contribution[(yname, gname)], 0.0)
        load2 = contribution[(yname, "load")] ** 2 + prop.resistor_sharing[j]
        contribution[(yname, "load")] = np.where(st & ~use_a,
                                                 np.sqrt(np.maximum(load2, 0.0)), 0.0)
        contribution[(yname, "scale")] = np.zeros(m)
        ua = np.sqrt(np.maximum(np.nan_to_num(prop.type_a[j]), 0.0))
        contribution[(yname, "type_a")] = np.where(valid & (use_a | type_a), ua, 0.0)
        sensitivity[(yname, "type_a")] = np.full(m, np.nan)
        u_input[(yname, "type_a")] = np.full(m, np.nan)
        for name in COMPONENTS:
            if name in prop.components:
                c = np.abs(prop.components[name][j])
                contribution[(yname, name)] = np.where(st, c, 0.0)
            else:
                contribution[(yname, name)] = np.zeros(m)
            sensitivity[(yname, name)] = np.full(m, np.nan)
            u_input[(yname, name)] = np.full(m, np.nan)
        u_comb[yname] = np.where(valid, np.sqrt(np.maximum(prop.total[j], 0.0)), np.nan)
        u_comb[yname] = np.where(type_a, np.asarray(fits.u_vth if j == 0 else fits.u_rth),
                                 u_comb[yname])
    for name in COMPONENTS:
        n_input[name] = np.where(st & (name in prop.components), fits.n, 0)
    n_input["type_a"] = np.where(use_a | type_a, fits.n, 0)
    n_input["scale"] = np.zeros(m, np.int64)
    return Budget(duts=fits.duts, valid=valid, type_a=type_a, method=method,
                  contribution=contribution, sensitivity=sensitivity, u_input=u_input,
                  n_input=n_input, u_apriori=u_ap, u_combined=u_comb, scale=np.ones(m),
                  reason=reason)


def _num(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def budgets(readings: Readings, fits: Fits, *, used=None) -> list[dict | None]:
    """JSON-ready budget per DUT (``None`` where there is none), SI units.

    Each dict: ``{"method", "vth": {...}, "rth": {...}}`` where each of ``vth``/``rth`` is
    ``{"unit", "u_apriori", "u_combined", "dominant", "components": [...]}`` and each
    component is ``{"input", "label", "n", "u", "u_unit", "sensitivity",
    "sensitivity_unit", "contribution", "share"}`` (``share``: fraction of the variance).
    Groups that contribute nothing are left out.
    """
    bud = budget_arrays(readings, fits, used=used)
    out: list[dict | None] = [None] * len(fits)
    names_stated = GROUPS
    # plain Python lists: indexing them in the per-DUT loop is ~10x cheaper than numpy
    dom = {y: bud.dominant(y).tolist() for y in ("vth", "rth")}
    contrib = {key: col.tolist() for key, col in bud.contribution.items()}
    u_in = {key: col.tolist() for key, col in bud.u_input.items()}
    sens = {key: col.tolist() for key, col in bud.sensitivity.items()}
    n_in = {key: col.tolist() for key, col in bud.n_input.items()}
    u_ap = {y: col.tolist() for y, col in bud.u_apriori.items()}
    u_cb = {y: col.tolist() for y, col in bud.u_combined.items()}
    methods = bud.method.tolist()
    type_a = bud.type_a.tolist()
    for k in np.flatnonzero(bud.valid).tolist():
        doc: dict = {"method": methods[k]}
        for y, unit in (("vth", "V"), ("rth", "Ω")):
            total = u_cb[y][k]
            comps = []
            for gname in (("type_a",) if type_a[k] else ("type_a",) + names_stated):
                c = contrib[(y, gname)][k]
                if not c > 0:
                    continue
                comps.append({
                    "input": gname, "label": GROUP_LABELS[gname],
                    "n": int(n_in[gname][k]),
                    "u": _num(u_in[(y, gname)][k]), "u_unit": _INPUT_UNIT[gname],
                    "sensitivity": _num(sens[(y, gname)][k]),
                    "sensitivity_unit": _SENS_UNIT.get((y, gname), ""),
                    "contribution": c,
                    "share": c * c / (total * total) if total > 0 else None,
                })
            doc[y] = {"unit": unit, "u_apriori": _num(u_ap[y][k]),
                      "u_combined": _num(total), "dominant": dom[y][k] or None,
                      "components": comps}
        out[k] = doc
    return out
