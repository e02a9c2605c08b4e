"""What a fitted source delivers into other loads: current, terminal voltage and power.

Pure core: it takes the parsed JSON document of ``sagfit fit --json`` (or ``--out x.json``)
and returns frozen predictions; no file access.

For a load R the Thevenin equivalent gives (voltage divider)

    I = Vth/(R + Rth),   V = Vth·R/(R + Rth),   P = Vth²·R/(R + Rth)²,

and for a set current I: V = Vth − Rth·I, P = V·I. Uncertainties follow the law of
propagation with the full covariance of (Vth, Rth) (JCGM 100:2008, 5.2.2; the "delta
method"). The confidence interval (CI) covers the *mean* terminal voltage; the prediction
interval (PI) covers *one new reading*, so it adds the reading's own variance: the
voltmeter's uncertainty model taken from the fitted readings (enlarged by the scale factor
S² when the scatter exceeded the stated uncertainties), or the residual variance s² of an
ordinary least-squares fit (Type A, Student t with n − 2 degrees of freedom), plus the
tolerance of the new load resistor when one was stated.

References
----------
- Thevenin divider and maximum power: C. K. Alexander, M. N. O. Sadiku, *Fundamentals of
  Electric Circuits* (textbook fact).
- Prediction interval for a new observation in regression: N. R. Draper, H. Smith,
  *Applied Regression Analysis*, 3rd ed. (1998), §3.1.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
from scipy import special

from .errors import InputError
from .fit import _groupsum

__all__ = ["SourceModel", "Quantity", "Prediction", "models_from_document", "predict",
           "prediction_fields"]


@dataclass(frozen=True, slots=True)
class Quantity:
    """A predicted value with its standard uncertainty, CI and (for V) PI, in SI units."""

    value: float
    u: float
    ci: tuple[float, float]
    pi: tuple[float, float] | None = None
    u_pi: float | None = None
    pi_same: tuple[float, float] | None = None  # one reading with the sweep's own meter
    u_pi_same: float | None = None

    def to_dict(self) -> dict:
        d = {"value": _f(self.value), "u": _f(self.u), "ci": [_f(c) for c in self.ci]}
        if self.pi is not None:
            d["pi"] = [_f(c) for c in self.pi]
            d["u_reading"] = _f(self.u_pi)
        if self.pi_same is not None:
            d["pi_same_meter"] = [_f(c) for c in self.pi_same]
            d["u_reading_same_meter"] = _f(self.u_pi_same)
        return d


@dataclass(frozen=True, slots=True)
class Prediction:
    """The source's operating point at one load (or one set current)."""

    dut: str
    load_ohm: float
    current: Quantity
    voltage: Quantity
    power: Quantity
    given: str  # "load" or "current"
    level: float
    extrapolated: bool = False  # the current lies outside the tested range

    def to_dict(self) -> dict:
        return {"dut": self.dut, "load_ohm": _f(self.load_ohm) if not math.isinf(self.load_ohm)
                else "open", "given": self.given, "confidence": self.level,
                "current_A": self.current.to_dict(),
                "voltage_V": {"value": None, "ci": None, "pi": None,
                              **self.voltage.to_dict()},
                "power_W": self.power.to_dict(), "extrapolated": self.extrapolated}


@dataclass(frozen=True, slots=True)
class SourceModel:
    """What predict needs from one saved fit."""

    dut: str
    vth: float
    rth: float
    cov: tuple[tuple[float, float], tuple[float, float]]
    k: float
    dof: int
    type_a: bool
    confidence: float
    u_offset: float | None      # new-reading voltage model u(V) = u_offset + u_slope·|V| (V)
    u_slope: float | None
    reading_scale: float        # S² (stated) or s² in V² (OLS) for a new reading
    load_tolerance_pct: float | None
    tested: tuple[float, float] | None = None  # current range of the fitted readings (A)
    knee: bool = False                         # the fit found a knee (see diagnostics)
    # the meters' shared (systematic) part of ``cov`` and the random u of one voltage
    # reading with the same meter; None when the fit modelled no shared meter error
    cov_shared: tuple[tuple[float, float], tuple[float, float]] | None = None
    u_reading_random: float | None = None


def _f(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def prediction_fields(readings, fits) -> "PredictionColumn":
    """Per-DUT fields a later ``sagfit predict`` needs, for ``Fits.extra["prediction"]``.

    The new-reading voltage uncertainty model u(V) = offset + slope·|V| is the
    least-squares line through the readings' own u(V) values, which reproduces a meter
    specification ±(p % + offset) exactly.
    """
    g = readings.group
    m = len(fits)
    n = np.bincount(g, minlength=m).astype(float)
    av = np.abs(readings.voltage)
    uv = readings.u_voltage
    with np.errstate(divide="ignore", invalid="ignore"):
        mx = _groupsum(g, av, m) / n
        my = _groupsum(g, uv, m) / n
        dx = av - mx[g]
        sxx = _groupsum(g, dx * dx, m)
        slope = np.where(sxx > 1e-30 * np.maximum(mx * mx, 1e-300),
                         _groupsum(g, dx * (uv - my[g]), m) / sxx, 0.0)
        slope = np.where(np.isfinite(slope), np.maximum(slope, 0.0), 0.0)
        offset = np.maximum(my - slope * mx, 0.0)
    u_same = None
    if readings.errors is not None:
        # one more reading with the sweep's own voltmeter: its random part only, the larger
        # of the stated noise (mean square over the sweep) and the scatter about the line
        noise2 = _groupsum(g, readings.errors.u_voltage ** 2, m) / np.maximum(n, 1)
        resid = readings.voltage - (fits.vth[g] - fits.rth[g] * readings.current)
        dof = np.maximum(n - 2, 1)
        with np.errstate(invalid="ignore"):
            s2 = np.where(n > 2, _groupsum(g, np.nan_to_num(resid) ** 2, m) / dof, 0.0)
        u_same = np.sqrt(np.fmax(noise2, s2))
        # a shared ammeter error (rows 2, 3 of the error model) moved the fitted line
        # but not a new voltmeter reading: nothing of it cancels, so such a sweep gets
        # no same-meter interval (its share is not kept apart from the voltmeter's)
        e = readings.errors
        ammeter = _groupsum(g, np.abs(e.dv[2]) + np.abs(e.dv[3]) + np.abs(e.di[2])
                            + np.abs(e.di[3]), m) > 0
        u_same = np.where(ammeter, np.nan, u_same)
    starts = np.concatenate(([0], np.cumsum(n.astype(np.int64))[:-1]))
    lo = np.full(m, np.nan)
    hi = np.full(m, np.nan)
    ne = n > 0
    if ne.any():
        lo[ne] = np.minimum.reduceat(readings.current, starts[ne])
        hi[ne] = np.maximum.reduceat(readings.current, starts[ne])
    return PredictionColumn(fits, offset, slope, lo, hi, u_same)


class PredictionColumn(Sequence):
    """A lazy per-DUT column for ``Fits.extra``: builds each DUT's dict on demand."""

    def __init__(self, fits, offset, slope, lo, hi, u_same=None):
        self._fits = fits
        self._offset = offset
        self._slope = slope
        self._lo = lo
        self._hi = hi
        self._u_same = u_same

    def __len__(self):
        return len(self._fits)

    def __getitem__(self, i):
        f = self._fits
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(len(self)))]
        if f.error[i] is not None:
            return None
        ols = str(f.method[i]) == "ols"
        vv, rr, vr = float(f.u_vth[i]) ** 2, float(f.u_rth[i]) ** 2, float(f.cov_vr[i])
        d = {"cov_vth_rth": [[vv, vr], [vr, rr]], "coverage_factor": float(f.k[i]),
             "dof": int(f.dof[i]), "type_a": ols, "confidence": f.confidence,
             "tested_current_A": [float(self._lo[i]), float(self._hi[i])],
             "knee": any(fl.code == "knee" for fl in f.flags[i])}
        if ols:
            d["reading_variance_V2"] = float(f.scale[i])
        else:
            d["u_voltage_model"] = {"offset_V": float(self._offset[i]),
                                    "per_volt": float(self._slope[i])}
            d["reading_scale"] = float(max(1.0, f.scale[i]))
            sv, sr = float(f.var_vth_shared[i]), float(f.var_rth_shared[i])
            if (self._u_same is not None and np.isfinite(self._u_same[i])
                    and (sv > 0 or sr > 0)):
                svr = float(f.cov_vr_shared[i])
                d["shared_cov_vth_rth"] = [[sv, svr], [svr, sr]]
                d["u_reading_same_meter_V"] = float(self._u_same[i])
        return d


def _get(d, key, where, kind=(int, float)):
    if not isinstance(d, Mapping) or key not in d:
        raise InputError(f"{where}: key '{key}' is missing (is this a `sagfit fit --json` "
                         "document?)")
    v = d[key]
    if kind is not None and (isinstance(v, bool) or not isinstance(v, kind)):
        raise InputError(f"{where}: key '{key}' has an unexpected value {v!r}")
    return v


def models_from_document(doc, source: str = "<results>", duts: Sequence[str] | None = None
                         ) -> list[SourceModel]:
    """Read the fitted sources out of a ``sagfit fit`` JSON document.

    Raises
    ------
    InputError
        Not such a document, a key missing or malformed (named), or an unknown DUT.
    """
    if not isinstance(doc, Mapping):
        raise InputError(f"{source}: not a sagfit results document (expected a JSON object)")
    results = _get(doc, "results", source, list)
    settings = doc.get("settings") if isinstance(doc.get("settings"), Mapping) else {}
    tol = settings.get("load_tolerance_pct")
    tol = float(tol) if isinstance(tol, (int, float)) and not isinstance(tol, bool) else None
    conf = doc.get("confidence", 0.95)
    models = {}
    for j, r in enumerate(results):
        where = f"{source}, results[{j}]"
        if not isinstance(r, Mapping):
            raise InputError(f"{where}: expected an object")
        dut = str(_get(r, "dut", where, (str, int, float)))
        if r.get("error"):
            models[dut] = str(r["error"])
            continue
        vth = float(_get(_get(r, "vth", where, Mapping), "value", where + ".vth"))
        rth = float(_get(_get(r, "rth", where, Mapping), "value", where + ".rth"))
        p = r.get("prediction")
        if isinstance(p, Mapping):
            cov = _get(p, "cov_vth_rth", where + ".prediction", list)
            try:
                c = np.asarray(cov, float)
                assert c.shape == (2, 2) and np.isfinite(c).all()
            except (ValueError, TypeError, AssertionError):
                raise InputError(f"{where}.prediction: key 'cov_vth_rth' must be a 2×2 "
                                 "matrix of numbers") from None
            k = float(_get(p, "coverage_factor", where + ".prediction"))
            dof = int(_get(p, "dof", where + ".prediction"))
            type_a = bool(p.get("type_a", False))
            level = float(p.get("confidence", conf))
            if type_a:
                off = slope = None
                scale = float(_get(p, "reading_variance_V2", where + ".prediction"))
            else:
                um = _get(p, "u_voltage_model", where + ".prediction", Mapping)
                off = float(_get(um, "offset_V", where + ".prediction.u_voltage_model"))
                slope = float(_get(um, "per_volt", where + ".prediction.u_voltage_model"))
                scale = float(p.get("reading_scale", 1.0))
            tr = p.get("tested_current_A")
            tested = (float(tr[0]), float(tr[1])) if (
                isinstance(tr, list) and len(tr) == 2
                and all(isinstance(t, (int, float)) and not isinstance(t, bool) for t in tr)
            ) else None
            knee = bool(p.get("knee", False))
            c_sh, u_same = None, None
            if "shared_cov_vth_rth" in p:
                try:
                    cs = np.asarray(p["shared_cov_vth_rth"], float)
                    assert cs.shape == (2, 2) and np.isfinite(cs).all()
                except (ValueError, TypeError, AssertionError):
                    raise InputError(f"{where}.prediction: key 'shared_cov_vth_rth' must be a "
                                     "2×2 matrix of numbers") from None
                c_sh = ((cs[0, 0], cs[0, 1]), (cs[1, 0], cs[1, 1]))
                u_same = float(_get(p, "u_reading_same_meter_V", where + ".prediction"))
        else:  # an older document: covariance from u and the correlation, no reading model
            uv = float(_get(r["vth"], "u", where + ".vth"))
            ur = float(_get(r["rth"], "u", where + ".rth"))
            corr = r.get("corr_vth_rth") or 0.0
            c = np.array([[uv * uv, corr * uv * ur], [corr * uv * ur, ur * ur]])
            k = float(_get(r, "coverage_factor", where))
            dof = int(_get(r, "dof", where))
            type_a = r.get("method") == "ols"
            level = float(conf)
            off = slope = None
            scale = math.nan
            tested, knee = None, False
            c_sh, u_same = None, None
        if not (math.isfinite(vth) and math.isfinite(rth)):
            raise InputError(f"{where}: Vth or Rth is not a finite number")
        models[dut] = SourceModel(dut, vth, rth, ((c[0, 0], c[0, 1]), (c[1, 0], c[1, 1])), k,
                                  dof, type_a, level, off, slope, scale, tol, tested, knee,
                                  c_sh, u_same)
    if not models:
        raise InputError(f"{source}: the document holds no results")
    names = list(models) if not duts else list(duts)
    out = []
    for name in names:
        if name not in models:
            raise InputError(f"{source}: no DUT named {name!r} (the file has {len(models)}: "
                             f"{', '.join(list(models)[:5])}{' …' if len(models) > 5 else ''})")
        mdl = models[name]
        if isinstance(mdl, str):
            if duts:
                raise InputError(f"{source}: DUT {name!r} was not fitted ({mdl})")
            continue
        out.append(mdl)
    if not out:
        raise InputError(f"{source}: none of the DUTs was fitted")
    return out


def _k(model: SourceModel, confidence: float | None) -> float:
    if confidence is None or abs(confidence - model.confidence) < 1e-12:
        return model.k
    p = 0.5 * (1.0 + confidence)
    if model.type_a:
        return float(special.stdtrit(max(model.dof, 1), p))
    return float(special.ndtri(p))


def predict(models: Sequence[SourceModel], *, loads: Sequence[float] = (),
            currents: Sequence[float] = (), confidence: float | None = None
            ) -> list[Prediction]:
    """Operating points of each source at each load (Ω; ``inf`` = open) and current (A).

    Parameters
    ----------
    models : sequence of SourceModel
        From :func:`models_from_document`.
    loads : sequence of float
        Load resistances in Ω (``math.inf`` for an open circuit, 0 for a short).
    currents : sequence of float
        Set load currents in A (an electronic load in constant-current mode).
    confidence : float, optional
        Level of the intervals; default the level of the saved fit.

    Returns
    -------
    list of Prediction
        DUT by DUT, loads first then currents, in the order given.
    """
    if confidence is not None and not 0 < confidence < 1:
        raise InputError(f"confidence must be between 0 and 1 (got {confidence})")
    R = np.asarray(list(loads), float)
    Iset = np.asarray(list(currents), float)
    if np.any(np.isnan(R)) or np.any(R < 0):
        raise InputError("a load resistance must be ≥ 0 Ω (or 'open')")
    if not np.all(np.isfinite(Iset)):
        raise InputError("a set current must be a finite number")
    out: list[Prediction] = []
    for mdl in models:  # one iteration per DUT asked for; the loads are vectorised
        k = _k(mdl, confidence)
        level = mdl.confidence if confidence is None else float(confidence)
        vth, rth = mdl.vth, mdl.rth
        C = np.asarray(mdl.cov, float)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            openc = np.isinf(R)
            Rf = np.where(openc, 1.0, R)
            den = Rf + rth
            i = np.where(openc, 0.0, vth / den)
            v = np.where(openc, vth, vth * Rf / den)
            p = np.where(openc, 0.0, vth * vth * Rf / den ** 2)
            gi = np.stack([np.where(openc, 0.0, 1.0 / den),
                           np.where(openc, 0.0, -vth / den ** 2)])
            gv = np.stack([np.where(openc, 1.0, Rf / den),
                           np.where(openc, 0.0, -vth * Rf / den ** 2)])
            gp = np.stack([np.where(openc, 0.0, 2 * vth * Rf / den ** 2),
                           np.where(openc, 0.0, -2 * vth * vth * Rf / den ** 3)])
            dv_dR = np.where(openc, 0.0, vth * rth / den ** 2)
        var = {name: np.einsum("in,ij,jn->n", gr, C, gr) for name, gr in
               (("i", gi), ("v", gv), ("p", gp))}
        u_load = (np.where(openc, 0.0, mdl.load_tolerance_pct / 100.0 * Rf / math.sqrt(3.0))
                  if mdl.load_tolerance_pct else np.zeros_like(R))
        var_new = _reading_variance(mdl, v) + (dv_dR * u_load) ** 2
        same = _same_meter(mdl, C)
        var_same = (np.einsum("in,ij,jn->n", gv, same[0], gv) + same[1] + (dv_dR * u_load) ** 2
                    if same else np.full(R.shape, np.nan))
        for j in range(R.size):
            if not (den[j] > 0 or openc[j]):
                raise InputError(f"{mdl.dut}: load {R[j]:g} Ω is at or beyond −Rth "
                                 f"({-rth:g} Ω); the divider formula does not apply")
            out.append(_point(mdl.dut, float(R[j]), "load", level, k,
                              (i[j], var["i"][j]), (v[j], var["v"][j]), (p[j], var["p"][j]),
                              var_new[j], _outside(mdl, float(i[j])), var_same[j]))
        if Iset.size:
            vI = vth - rth * Iset
            var_v = C[0, 0] + Iset ** 2 * C[1, 1] - 2 * Iset * C[0, 1]
            pI = vI * Iset
            var_p = Iset ** 2 * var_v
            with np.errstate(divide="ignore", invalid="ignore"):
                rl = np.where(Iset != 0, vI / Iset, np.inf)
            var_new_i = _reading_variance(mdl, vI)
            if same:
                cr = same[0]
                var_same_i = cr[0, 0] + Iset ** 2 * cr[1, 1] - 2 * Iset * cr[0, 1] + same[1]
            else:
                var_same_i = np.full(Iset.shape, np.nan)
            for j in range(Iset.size):
                out.append(_point(mdl.dut, float(rl[j]), "current", level, k,
                                  (Iset[j], 0.0), (vI[j], var_v[j]), (pI[j], var_p[j]),
                                  var_new_i[j], _outside(mdl, float(Iset[j])),
                                  var_same_i[j]))
    return out


def _same_meter(mdl: SourceModel, C: np.ndarray):
    """(covariance of (Vth, Rth) without the meters' shared part, variance of one more
    reading's random part), or ``None`` when the fit modelled no shared meter error.

    A reading taken with the very meter of the sweep, before its calibration changes,
    carries the same gain and offset error as the readings the line was fitted to; those
    errors moved the fitted line and the new reading alike, so they cancel in the
    comparison (the GUM's correlated inputs, JCGM 100:2008 5.2, with correlation 1).
    """
    if mdl.cov_shared is None or mdl.u_reading_random is None:
        return None
    cr = C - np.asarray(mdl.cov_shared, float)
    # keep a valid covariance if rounding left a hair below zero
    cr[0, 0], cr[1, 1] = max(cr[0, 0], 0.0), max(cr[1, 1], 0.0)
    return cr, mdl.u_reading_random ** 2


def _reading_variance(mdl: SourceModel, v):
    v = np.asarray(v, float)
    if mdl.type_a:
        return np.full(v.shape, mdl.reading_scale)
    if mdl.u_offset is None:
        return np.full(v.shape, np.nan)
    u = mdl.u_offset + mdl.u_slope * np.abs(v)
    return mdl.reading_scale * u * u


def _outside(mdl: SourceModel, current: float) -> bool:
    """True when ``current`` lies beyond the tested range by more than 5 % of its span."""
    if mdl.tested is None:
        return False
    lo, hi = mdl.tested
    slack = 0.05 * (hi - lo)
    return not (lo - slack <= current <= hi + slack)


def _point(dut, load, given, level, k, ci_i, ci_v, ci_p, var_new, outside=False,
           var_same=math.nan):
    def q(pair, pi=None, same=None):
        val, var = float(pair[0]), max(float(pair[1]), 0.0)
        u = math.sqrt(var)
        extra = {}
        if pi is not None and math.isfinite(pi):
            up = math.sqrt(var + max(pi, 0.0))
            extra = {"pi": (val - k * up, val + k * up), "u_pi": up}
        if same is not None and math.isfinite(same):
            us = math.sqrt(max(float(same), 0.0))
            extra.update(pi_same=(val - k * us, val + k * us), u_pi_same=us)
        return Quantity(val, u, (val - k * u, val + k * u), **extra)

    return Prediction(dut=dut, load_ohm=load, current=q(ci_i),
                      voltage=q(ci_v, var_new, var_same),
                      power=q(ci_p), given=given, level=level, extrapolated=outside)
