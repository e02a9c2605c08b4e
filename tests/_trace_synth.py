"""Synthetic traces with analytic truth, shared by the trace tests (invented data).

The terminal voltage of a source R0 + Σ R_k‖C_k driven by a piecewise-constant current
is the closed-form superposition of step responses (/work/shared/reference METHODS §9,
copied into docs/traces.md): for a current change ΔI_e at t_e,

    v(t) = OCV − R0·i(t) − Σ_k [ I_0·R_k + Σ_e ΔI_e·R_k·(1 − exp(−(t − t_e)/τ_k))·H(t − t_e) ]

with the branches at rest at the initial current I_0.
"""

import numpy as np


def rc_voltage(t, edges, levels, ocv, r0, branches):
    """Voltage at times ``t`` (any shape, last axis samples) for a current that is
    ``levels[0]`` before ``edges[0]``, ``levels[j]`` from ``edges[j-1]`` on.

    ``branches``: list of (R_k, τ_k), each broadcastable against ``t[..., :1]``.
    """
    t = np.asarray(t, float)
    edges = np.asarray(edges, float)
    levels = np.asarray(levels, float)
    idx = np.searchsorted(edges, t, side="right")
    i_t = levels[idx]
    v = ocv - r0 * i_t
    d_i = np.diff(levels)
    for r_k, tau_k in branches:
        r_k = np.asarray(r_k, float)[..., None] if np.ndim(r_k) else r_k
        tau_k = np.asarray(tau_k, float)[..., None] if np.ndim(tau_k) else tau_k
        acc = levels[0] * r_k * np.ones_like(t)
        for e, di in zip(edges, d_i):  # a few edges per trace
            since = t - e
            acc = acc + np.where(since > 0, di * r_k * -np.expm1(-np.maximum(since, 0) / tau_k),
                                 0.0)
        v = v - acc
    return v, i_t


def sample_times(duration, dt, rng, jitter=0.0, shape=()):
    """Sample times 0, dt, 2dt… with a uniform jitter of ±jitter·dt on each (recorded)."""
    n = int(round(duration / dt)) + 1
    base = np.arange(n) * dt
    if jitter:
        base = base + rng.uniform(-jitter * dt, jitter * dt, size=shape + (n,))
        base[..., 0] = 0.0
        base = np.sort(base, axis=-1)
    return np.broadcast_to(base, shape + (n,)).copy()
