"""The RC fit of many pulses at once: the grid start and Levenberg–Marquardt iterations run
on all pulses together, padded to the longest record (:mod:`sagfit.core.rc_model` holds
the model, the per-pulse reference solver and the uncertainties).

The same problem as :func:`sagfit.core.rc_model.fit_rc`, solved for a batch: parameters
(U_b, R0, R_k, log τ_k) per pulse, residuals masked beyond each pulse's samples, one
damping factor per pulse (K. Levenberg, Q. Appl. Math. 2 (1944) 164; D. W. Marquardt,
J. SIAM 11 (1963) 431: a step solves (JᵀJ + λ·diag JᵀJ)δ = −Jᵀr; λ shrinks by 0.3 after a
step that lowers the sum of squares and grows by 10 after one that does not). A pulse
stops when a successful step lowers its sum of squares by less than 1e-12 of it.
``tests/test_trace_rc.py`` checks the batch against the per-pulse solver.
"""

from __future__ import annotations

import numpy as np

__all__ = ["solve_many"]

_GRID = 24
#: Values per padded array of one chunk (bounds the memory of the grid's responses).
_CHUNK_VALUES = 4_000_000


def _pad(problems, rows):
    """Padded arrays (m, N) of one chunk: times, voltages, x_i, mask; edges and ΔI (m, 2)."""
    ns = np.array([problems[j][0].size for j in rows])
    m, n_max = rows.size, int(ns.max())
    col = np.arange(n_max)
    mask = col[None, :] < ns[:, None]
    t = np.zeros((m, n_max))
    v = np.zeros((m, n_max))
    x = np.zeros((m, n_max))
    t[mask] = np.concatenate([problems[j][0] for j in rows])
    v[mask] = np.concatenate([problems[j][1] for j in rows])
    x[mask] = np.concatenate([problems[j][2] for j in rows])
    edges = np.full((m, 2), np.inf)
    d_i = np.zeros((m, 2))
    n_e = np.array([len(problems[j][3]) for j in rows])
    e_mask = np.arange(2)[None, :] < n_e[:, None]
    edges[e_mask] = np.concatenate([np.asarray(problems[j][3], float) for j in rows])
    d_i[e_mask] = np.concatenate([np.asarray(problems[j][4], float) for j in rows])
    dt = np.array([problems[j][5] for j in rows])
    return t, v, x, mask, edges, d_i, dt


def _resp(t, edges, d_i, tau):
    """Σ_e ΔI_e(1 − e^{−(t−t_e)/τ})H(t − t_e) and its τ-derivative; tau (m, K) → (m, K, N)."""
    resp = np.zeros(tau.shape + (t.shape[1],))
    dresp = np.zeros_like(resp)
    for e in range(edges.shape[1]):  # two edges
        s = np.maximum(t - edges[:, e:e + 1], 0.0)[:, None, :]
        on = (t > edges[:, e:e + 1])[:, None, :]
        ex = np.exp(-s / tau[:, :, None])
        di = d_i[:, e][:, None, None]
        resp += np.where(on, di * (1.0 - ex), 0.0)
        dresp += np.where(on, -di * ex * s / tau[:, :, None] ** 2, 0.0)
    return resp, dresp


def _start(t, v, x, mask, edges, d_i, dt, branches):
    """Best grid point per pulse (the model linear in U_b, R0, R_k for fixed τ)."""
    m = t.shape[0]
    span = np.where(mask, t, -np.inf).max(axis=1)
    lo = np.maximum(dt, 1e-6)
    hi = np.maximum(3.0 * span, 10 * dt)
    grid = lo[:, None] * (hi / lo)[:, None] ** (np.arange(_GRID) / (_GRID - 1))[None, :]
    resp, _ = _resp(t, edges, d_i, grid)                        # (m, G, N)
    w = mask.astype(float)
    basis = np.concatenate([w[:, None, :], (-x * w)[:, None, :], -resp * w[:, None, :]],
                           axis=1)
    gram = np.einsum("mpn,mqn->mpq", basis, basis)
    rhs = np.einsum("mpn,mn->mp", basis, v * w)
    if branches == 1:
        sets = np.arange(_GRID)[:, None]
    else:
        a, b = np.triu_indices(_GRID, k=2)
        sets = np.column_stack([a, b])
    idx = np.hstack([np.zeros((len(sets), 1), int), np.ones((len(sets), 1), int), 2 + sets])
    a_m = gram[:, idx[:, :, None], idx[:, None, :]]             # (m, S, p, p)
    b_m = rhs[:, idx]
    ok = np.linalg.cond(a_m) < 1e14
    coef = np.zeros(b_m.shape)
    coef[ok] = np.linalg.solve(a_m[ok], b_m[ok][..., None])[..., 0]
    ssr = np.einsum("mn,mn->m", v * w, v * w)[:, None] - np.einsum("msp,msp->ms", coef, b_m)
    ssr[~ok] = np.inf
    best = np.argmin(ssr, axis=1)
    c = coef[np.arange(m), best]
    taus = np.take_along_axis(grid, sets[best], axis=1)
    theta = np.empty((m, 2 + 2 * branches))
    theta[:, :2] = c[:, :2]
    theta[:, 2::2] = c[:, 2:]
    theta[:, 3::2] = np.log(taus)
    return theta


def _model(theta, t, v, x, mask, edges, d_i):
    """Residuals (m, N) and Jacobian (m, N, p) in (U_b, R0, R_k, log τ_k), masked."""
    tau = np.exp(theta[:, 3::2])
    r = theta[:, 2::2]
    resp, dresp = _resp(t, edges, d_i, tau)
    w = mask.astype(float)
    f = theta[:, :1] - theta[:, 1:2] * x - np.einsum("mk,mkn->mn", r, resp)
    res = (f - v) * w
    jac = np.empty(t.shape + (theta.shape[1],))
    jac[..., 0] = w
    jac[..., 1] = -x * w
    jac[..., 2::2] = np.moveaxis(-resp, 1, 2) * w[..., None]
    jac[..., 3::2] = np.moveaxis(-r[:, :, None] * dresp * tau[:, :, None], 1, 2) * w[..., None]
    return res, jac


def solve_many(problems, branches: int, max_iter: int = 300):
    """Solutions (m, p) in (U_b, R0, R_k, log τ_k) and a converged flag (m,) for many
    pulses. ``problems``: per pulse (t from the edge, v, i − I_b, edges, ΔI, dt)."""
    m = len(problems)
    p = 2 + 2 * branches
    theta_all = np.full((m, p), np.nan)
    done_all = np.zeros(m, bool)
    ns = np.array([pr[0].size for pr in problems])
    order = np.argsort(ns, kind="stable")
    start = 0
    while start < m:  # chunks of similar length: bounded padding and memory
        per = max(1, _CHUNK_VALUES // (_GRID * int(ns[order[start]]) + 1))
        rows = order[start:start + per]
        n_max = int(ns[rows].max())
        while rows.size > 1 and rows.size * n_max * _GRID > _CHUNK_VALUES:
            rows = rows[: rows.size // 2]
            n_max = int(ns[rows].max())
        start += rows.size
        t, v, x, mask, edges, d_i, dt = _pad(problems, rows)
        theta = _start(t, v, x, mask, edges, d_i, dt, branches)
        res, jac = _model(theta, t, v, x, mask, edges, d_i)
        ssr = np.einsum("mn,mn->m", res, res)
        lam = np.full(rows.size, 1e-3)
        active = np.ones(rows.size, bool)
        done = np.zeros(rows.size, bool)
        for _ in range(max_iter):  # iterations, each on every pulse still moving
            k = np.flatnonzero(active)
            if k.size == 0:
                break
            a = np.einsum("mnp,mnq->mpq", jac[k], jac[k])
            g = np.einsum("mnp,mn->mp", jac[k], res[k])
            diag = np.einsum("mpp->mp", a)
            damped = a + lam[k, None, None] * (diag[:, :, None] * np.eye(p)[None])
            try:
                step = np.linalg.solve(damped, -g[..., None])[..., 0]
            except np.linalg.LinAlgError:
                step = np.stack([np.linalg.lstsq(damped[q], -g[q], rcond=None)[0]
                                 for q in range(k.size)])
            trial = theta[k] + step
            r_new, j_new = _model(trial, t[k], v[k], x[k], mask[k], edges[k], d_i[k])
            s_new = np.einsum("mn,mn->m", r_new, r_new)
            better = np.isfinite(s_new) & (s_new < ssr[k])
            kb = k[better]
            small = (ssr[kb] - s_new[better]) <= 1e-12 * ssr[kb]
            theta[kb] = trial[better]
            res[kb] = r_new[better]
            jac[kb] = j_new[better]
            ssr[kb] = s_new[better]
            lam[kb] *= 0.3
            lam[k[~better]] *= 10.0
            done[kb[small]] = True
            stuck = k[~better][lam[k[~better]] > 1e16]
            done[stuck] = True  # no step lowers the sum of squares: at the minimum
            active = ~done
        theta_all[rows] = theta
        done_all[rows] = done
    return theta_all, done_all
