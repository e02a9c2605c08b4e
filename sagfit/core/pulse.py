"""Pulse resistance of a cell from a logged trace, by the published methods.

A *pulse* is a step of the current (:mod:`sagfit.core.trace`) that differs from the step
before it, lasts at most ``max_duration`` and no longer than that step (the step before
is the base: a rest, or the lower current of a two-level test). For each pulse and each
stated time s into it,

    R(s) = (U_before − U(s)) / (I_pulse − I_before),

with U_before the voltage of the last sample before the edge, U(s) the voltage s after
the edge (linear interpolation between samples; s = 0 means the first sample after the
edge, the near-instantaneous "ohmic" value), I the settled currents of the two steps.
Discharge (I up) and charge or regeneration (I down) pulses both give R > 0 for a
resistive cell. Vectorised over pulses × times.

Methods (named presets of the stated times)
-------------------------------------------
- ``iec``: the DC internal resistance of IEC 61960-3 (secondary lithium cells for
  portable applications; from memory: clause 7.7.2, "DC internal resistance"): discharge
  at I1 = 0.2 It for 10 s, then at I2 = 1 It for 1 s; R_dc = (U1 − U2)/(I2 − I1) with U1
  at the end of the 10 s step and U2 at the end of the 1 s step. Here: the base step is
  the I1 step, s = 1 s. The standard's currents and times are from memory.
- ``hppc``: the hybrid pulse power characterisation of the FreedomCAR Battery Test Manual
  for Power-Assist Hybrid Electric Vehicles (US DOE, DOE/ID-11069, 2003, §3.3 and the
  resistance calculation of §4.2.1, from memory; the USABC manuals follow it): a 10 s
  discharge pulse, a 40 s rest, a 10 s regeneration pulse; R = ΔV/ΔI from the sample just
  before the pulse to the stated time into it. Here: s = 0 (ohmic, the first sample),
  1 s and 10 s (1 s is common practice for a short-pulse value; not from the manual).

Uncertainty (GUM, JCGM 100:2008, 5.1.2; meter model of :mod:`sagfit.core.units` and
:mod:`sagfit.core.systematic`)
--------------------------------------------------------------------------------------
- Each meter's **offset** error is the same for both readings of a difference (one meter,
  one range, seconds apart): it cancels in ΔU and in ΔI and contributes nothing.
- Each meter's **gain** error g scales the difference: u(ΔU)/ΔU = u(g_V), and likewise
  for ΔI, so R carries u_rel² = u²(g_V) + u²(g_I) from the meters.
- **Random**: the voltage noise of one sample (the larger of the meter's stated noise and
  the scatter in the base step's settling window) on each of the two voltage readings;
  the Type A u of each settled current.
- **Sampling**: the edge lies somewhere between two samples; its time is taken halfway,
  with a rectangular half-width of half the sampling interval (GUM 4.3.7), which moves
  U(s) by the voltage's slope at s times that.

``u_uncorrelated`` gives, for comparison, the u of R had the offsets been independent
(two meters, or a range change between the readings): the offsets then add
√2·u(offset) to ΔU and ΔI.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ._frozen import freeze_arrays
from .trace import Steps, Trace, search_rows
from .units import Accuracy

__all__ = ["Pulses", "find_pulses", "METHOD_TIMES", "charge_from_start"]

#: Stated times into the pulse (s) of each method; 0 = the first sample after the edge.
METHOD_TIMES = {"hppc": (0.0, 1.0, 10.0), "iec": (1.0,)}
#: Longest step taken as a pulse by default (s): HPPC pulses are 10 s, IEC 1 s.
MAX_PULSE_S = 30.0


@dataclass(frozen=True, slots=True)
class Pulses:
    """Pulse resistances, one row per pulse, one column per stated time.

    Attributes
    ----------
    channel, step : ndarray of int64
        Channel index and index of the pulse in the ``Steps`` it came from.
    kind : ndarray of str
        ``"discharge"`` (current up) or ``"charge"`` (current down: charge or
        regeneration).
    t_edge, duration : ndarray of float64
        Time of the edge (s) and the pulse's length (s).
    i_before, i_pulse : ndarray of float64
        Settled current before and during the pulse (A).
    u_before : ndarray of float64
        Voltage of the last sample before the edge (V).
    times : tuple of float
        The stated times (s); 0 is the first sample after the edge.
    t_at : ndarray (n, k)
        Actual time after the edge of each value (for s = 0, the first sample's).
    voltage_at, resistance, u_resistance, u_uncorrelated : ndarray (n, k)
        U(s) (V), R(s) (Ω), its standard uncertainty (Ω) and the u had the meters'
        offsets not cancelled (Ω). NaN where the pulse is shorter than s.
    u_sampling : ndarray (n, k)
        The part of ``u_resistance`` from the edge's position between samples (Ω).
    charge_ah : ndarray of float64
        Charge delivered since the start of the trace at the edge (Ah, discharge
        positive), counted from the current.
    soc : ndarray of float64
        State of charge (%) or capacity (Ah) at the edge from the file's own column
        (``soc_kind``); NaN without one.
    dt : ndarray of float64
        Sampling interval around the edge (s).
    """

    channel: np.ndarray
    step: np.ndarray
    kind: np.ndarray
    t_edge: np.ndarray
    duration: np.ndarray
    i_before: np.ndarray
    i_pulse: np.ndarray
    u_before: np.ndarray
    t_at: np.ndarray
    voltage_at: np.ndarray
    resistance: np.ndarray
    u_resistance: np.ndarray
    u_uncorrelated: np.ndarray
    u_sampling: np.ndarray
    charge_ah: np.ndarray
    soc: np.ndarray
    dt: np.ndarray
    times: tuple = ()
    soc_kind: str = ""
    channels: tuple = ()

    def __post_init__(self):
        freeze_arrays(self, [f for f in self.__slots__
                             if f not in ("times", "soc_kind", "channels")], copy=False)

    def __len__(self) -> int:
        return int(self.step.size)

    def __repr__(self) -> str:
        return f"<Pulses {len(self)} pulses at {self.times} s>"

    def columns(self) -> dict:
        """The table as named columns (units in the names), for CSV and JSON."""
        names = np.asarray(self.channels, dtype=object)
        cols = {"channel": names[self.channel], "pulse": np.arange(1, len(self) + 1),
                "step": self.step + 1, "kind": self.kind, "t_edge_s": self.t_edge,
                "duration_s": self.duration, "i_before_A": self.i_before,
                "i_pulse_A": self.i_pulse, "u_before_V": self.u_before,
                "charge_from_start_Ah": self.charge_ah}
        if self.soc_kind:
            cols[self.soc_kind] = self.soc
        for j, s in enumerate(self.times):
            tag = "ohmic" if s == 0 else f"{s:g}s"
            cols[f"r_{tag}_ohm"] = self.resistance[:, j]
            cols[f"u_r_{tag}_ohm"] = self.u_resistance[:, j]
            cols[f"u_r_{tag}_uncorrelated_ohm"] = self.u_uncorrelated[:, j]
            cols[f"t_{tag}_s"] = self.t_at[:, j]
        cols["dt_s"] = self.dt
        return cols


def charge_from_start(trace: Trace) -> np.ndarray:
    """Charge delivered since each channel's first row (Ah), by the trapezoid rule on the
    logged current: one cumulative sum over the whole trace, restarted per channel."""
    t, i, g = trace.time, trace.current, trace.channel
    inc = np.r_[0.0, 0.5 * (i[1:] + i[:-1]) * np.diff(t)]
    inc[np.r_[True, g[1:] != g[:-1]]] = 0.0
    q = np.cumsum(inc)
    start = trace.channel_bounds()[:-1]
    return (q - np.repeat(q[start], np.diff(trace.channel_bounds()))) / 3600.0


def find_pulses(trace: Trace, steps: Steps, *, times=METHOD_TIMES["hppc"],
                max_duration: float = MAX_PULSE_S, voltage_accuracy: Accuracy | None = None,
                current_accuracy: Accuracy | None = None) -> Pulses:
    """Find the pulses among ``steps`` and their resistances at the stated ``times``.

    Parameters
    ----------
    trace, steps
        A trace and its steps (:func:`sagfit.core.trace.find_steps`).
    times : sequence of float
        Times into each pulse (s); 0 is the first sample after the edge.
        :data:`METHOD_TIMES` holds the presets of the published methods.
    max_duration : float
        Longest step counted as a pulse (s).
    voltage_accuracy, current_accuracy : Accuracy, optional
        The meters: their gain errors enter R, their offsets cancel (module notes).

    Returns
    -------
    Pulses
        Possibly empty.
    """
    t, v = trace.time, trace.voltage
    times = tuple(float(s) for s in times)
    k = np.arange(1, len(steps))
    same = (steps.channel[k] == steps.channel[k - 1]) & ~steps.after_gap[k]
    dI = steps.current[k] - steps.current[k - 1]
    dur = steps.t_stop - steps.t_edge
    is_pulse = (same & (np.abs(dI) > steps.threshold[steps.channel[k]])
                & (dur[k] <= max_duration) & (dur[k] <= steps.duration[k - 1] + 1e-9))
    k = k[is_pulse]
    p = k - 1
    n = k.size
    b_row = steps.stop[p] - 1
    e_row = steps.start[k]
    t_edge = steps.t_edge[k]
    dt = t[e_row] - t[b_row]
    u_b = v[b_row]
    i_b, i_p = steps.current[p], steps.current[k]
    d_i = i_p - i_b

    # U(s): interpolate within the pulse's rows (vectorised over pulses × times)
    s = np.asarray(times)[None, :]
    target = t_edge[:, None] + s
    lo = np.repeat(e_row[:, None], len(times), 1)
    hi = np.repeat(steps.stop[k][:, None], len(times), 1)
    r = search_rows(t, lo.ravel(), hi.ravel(), target.ravel()).reshape(lo.shape)
    r = np.clip(r, lo, hi - 1)
    r0 = np.maximum(r - 1, lo)
    t1, t0 = t[r], t[r0]
    w = np.where(t1 > t0, (target - t0) / np.where(t1 > t0, t1 - t0, 1.0), 1.0)
    w = np.clip(w, 0.0, 1.0)
    first = s == 0
    w = np.where(first, 1.0, w)
    r = np.where(first, lo, r)
    r0 = np.where(first, lo, r0)
    v_at = v[r0] + w * (v[r] - v[r0])
    t_at = np.where(first, t[lo] - t_edge[:, None], s)
    # the value at the end of a pulse is its last sample (up to one interval early)
    too_short = target > t[hi - 1] + dt[:, None]
    v_at = np.where(too_short & ~first, np.nan, v_at)
    d_u = u_b[:, None] - v_at
    with np.errstate(invalid="ignore", divide="ignore"):
        res = d_u / d_i[:, None]
        # slope of U at s, from the neighbouring samples (for the edge-position term)
        ra, rb = np.maximum(r - 1, lo), np.minimum(r + 1, hi - 1)
        slope = np.where(t[rb] > t[ra], (v[rb] - v[ra]) / (t[rb] - t[ra]), 0.0)
    u_t = dt / math.sqrt(12.0)
    u_samp_v = np.where(first, 0.0, np.abs(slope) * u_t[:, None])
    sd = steps.sd_voltage[p]
    if voltage_accuracy is not None and voltage_accuracy.has_noise:
        sd = np.maximum(sd, voltage_accuracy.noise(u_b))
    u_du_rand2 = 2.0 * sd[:, None] ** 2
    u_di_rand2 = steps.u_current[p] ** 2 + steps.u_current[k] ** 2
    gv = voltage_accuracy.gain_u if voltage_accuracy is not None else 0.0
    gi = current_accuracy.gain_u if current_accuracy is not None else 0.0
    ov = voltage_accuracy.offset_u if voltage_accuracy is not None else 0.0
    oi = current_accuracy.offset_u if current_accuracy is not None else 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        rel2 = ((u_du_rand2 + u_samp_v ** 2) / d_u ** 2 + gv ** 2
                + (u_di_rand2 / d_i ** 2)[:, None] + gi ** 2)
        u_r = np.abs(res) * np.sqrt(rel2)
        rel2_unc = rel2 + 2 * ov ** 2 / d_u ** 2 + (2 * oi ** 2 / d_i ** 2)[:, None]
        u_unc = np.abs(res) * np.sqrt(rel2_unc)
        u_samp = np.abs(res) * np.abs(u_samp_v / d_u)
    q = charge_from_start(trace)[b_row] if n else np.zeros(0)
    soc = trace.soc[b_row] if trace.soc is not None else np.full(n, np.nan)
    return Pulses(channel=steps.channel[k], step=k.astype(np.int64),
                  kind=np.where(d_i > 0, "discharge", "charge"), t_edge=t_edge,
                  duration=dur[k], i_before=i_b, i_pulse=i_p, u_before=u_b, t_at=t_at,
                  voltage_at=v_at, resistance=res, u_resistance=u_r, u_uncorrelated=u_unc,
                  u_sampling=u_samp, charge_ah=q, soc=soc, dt=dt, times=times,
                  soc_kind=trace.soc_kind, channels=trace.channels)

