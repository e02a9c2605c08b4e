"""Synthetic traces with analytic truth, shared by the trace tests (invented data).

The terminal voltage of a source R0 + Σ R_k‖C_k driven by a piecewise-constant current
is the closed-form superposition of step responses (/work/shared/reference METHODS §9,
copied into docs/traces.md): for a current change ΔI_e at t_e,

    v(t) = OCV − R0·i(t) − Σ_k [ I_0·R_k + Σ_e ΔI_e·R_k·(1 − exp(−(t − t_e)/τ_k))·H(t − t_e) ]

with the branches at rest at the initial current I_0.
"""

import numpy as np


def rc_voltage(t, edges, levels, ocv, r0, branches):
    """Voltage and current at times ``t`` (any shape, last axis samples) for a current that
    is ``levels[0]`` before ``edges[0]`` and ``levels[j]`` from ``edges[j-1]`` on.

    ``edges``: shape (E,) for all traces, or t.shape[:-1] + (E,) per trace. ``branches``:
    list of (R_k, τ_k), scalars or arrays broadcastable against ``t[..., :1]``.
    """
    t = np.asarray(t, float)
    edges = np.broadcast_to(np.asarray(edges, float), t.shape[:-1] + (np.size(levels) - 1,))
    levels = np.asarray(levels, float)
    idx = (t[..., :, None] >= edges[..., None, :]).sum(-1)
    i_t = levels[idx]
    v = ocv - r0 * i_t
    d_i = np.diff(levels)
    for r_k, tau_k in branches:
        acc = levels[0] * r_k * np.ones_like(t)
        for e in range(d_i.size):  # a few edges per trace
            since = t - edges[..., e:e + 1]
            acc = acc + np.where(since > 0,
                                 d_i[e] * r_k * -np.expm1(-np.maximum(since, 0) / tau_k), 0.0)
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
