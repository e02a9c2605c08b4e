"""The port equivalent by eliminating every unknown but the port's, vectorised over draws.

Only the port's voltage is needed from each modified-nodal-analysis system, so every
other unknown (internal node voltages, branch currents) is eliminated by Gaussian
elimination and the small system left on the port nodes (one or two unknowns) is solved
in closed form; no back substitution (Kron reduction, common practice in network
analysis). The order of elimination is chosen once, on the nominal values, by
Markowitz's rule with threshold pivoting (H. M. Markowitz, "The elimination form of the
inverse and its application to linear programming", Management Science 3, 255–269,
1957; threshold u = 0.1 as in I. S. Duff, A. M. Erisman, J. K. Reid, *Direct Methods for
Sparse Matrices*, 1986, ch. 7), which keeps the fill of a sparse network small. Every
draw then runs the same recorded program: per pivot one gather, one outer product and
one scatter over all draws at once, so the cost grows with the fill, not with n³.

The pivots are fixed for all draws (static pivoting). A tolerance draw moves values by
at most their tolerance, and nodal matrices of resistor networks are diagonally
dominant, so the nominal pivots stay sound; a draw whose result is not finite is handed
back for the dense reference (:meth:`sagfit.core.mna.Circuit.solve_dense`).
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

#: threshold of the pivot choice: a pivot is at least this fraction of its column's largest
THRESHOLD = 0.1
#: columns examined per pivot, the sparsest first
SEARCH = 4


@dataclass(frozen=True, slots=True)
class Program:
    """A recorded elimination: entry ``k`` of the working array holds one matrix (or
    right-hand-side) entry for every draw."""

    entries: int
    #: (entries × quantities) stamps: entry values = stamp @ quantities
    stamp: sp.csr_matrix
    #: per pivot: (pivot entry, column entries of the rows below, row entries to the right,
    #: target entries (rows × columns))
    steps: tuple[tuple[int, np.ndarray, np.ndarray, np.ndarray], ...]
    #: the reduced system: matrix entries (m, m) and right-hand sides (m, 2), m = 1 or 2
    final_a: np.ndarray
    final_b: np.ndarray
    #: signs of the port unknowns in the port voltage (+1 for node+, −1 for node−)
    port_sign: np.ndarray


def build(size: int, stamps: list[tuple[int, int, int, float]], quantities: np.ndarray,
          keep: list[int], signs: list[float]) -> Program | None:
    """Record the elimination of every unknown but ``keep`` (the port node columns).

    ``stamps`` are (row, column, quantity, coefficient): the matrix entry (row, column)
    is the sum of coefficient × quantity over its stamps; columns ``size`` and
    ``size + 1`` are the two right-hand sides. ``quantities`` are their nominal values;
    ``signs`` the sign of each kept unknown in the port voltage.
    Returns None when no sound pivot is found on the nominal values (the caller then
    uses the dense reference, which reports a singular network).
    """
    index: dict[tuple[int, int], int] = {}
    rows_s, cols_s, vals_s = [], [], []
    for r, c, q, coef in stamps:
        k = index.setdefault((r, c), len(index))
        rows_s.append(k), cols_s.append(q), vals_s.append(coef)
    nominal: dict[tuple[int, int], float] = {}
    for r, c, q, coef in stamps:
        nominal[(r, c)] = nominal.get((r, c), 0.0) + coef * quantities[q]
    rows: dict[int, dict[int, float]] = {i: {} for i in range(size)}
    cols: dict[int, set[int]] = {j: set() for j in range(size + 2)}
    for (r, c), v in nominal.items():
        rows[r][c] = v
        cols[c].add(r)
    todo = set(range(size)) - set(keep)
    steps = []
    while todo:
        best = None
        # Markowitz's search limited to the sparsest columns (Duff, Erisman and Reid,
        # ch. 7): the full search costs O(n) columns per pivot for the same fill in
        # practice
        for c in heapq.nsmallest(SEARCH, todo, key=lambda j: len(cols[j])):
            members = cols[c]
            if not members:
                return None
            big = max(abs(rows[i][c]) for i in members)
            if big == 0:
                return None
            for i in members:
                v = abs(rows[i][c])
                if v >= THRESHOLD * big:
                    cost = ((len(rows[i]) - 1) * (len(members) - 1), -v / big)
                    if best is None or cost < best[0]:
                        best = (cost, i, c)
        _, r, c = best
        piv = rows[r][c]
        below = sorted(cols[c] - {r})
        right = sorted(j for j in rows[r] if j != c)
        targets = np.empty((len(below), len(right)), dtype=np.intp)
        for a, i in enumerate(below):
            f = rows[i].pop(c) / piv
            for b, j in enumerate(right):
                if j not in rows[i]:
                    rows[i][j] = 0.0
                    cols[j].add(i)
                    index[(i, j)] = len(index)
                rows[i][j] -= f * rows[r][j]
                targets[a, b] = index[(i, j)]
        steps.append((index[(r, c)], np.array([index[(i, c)] for i in below], dtype=np.intp),
                      np.array([index[(r, j)] for j in right], dtype=np.intp), targets))
        for j in rows.pop(r):
            cols[j].discard(r)
        del cols[c]
        todo.discard(c)
    left = sorted(rows)
    zero = len(index)  # one entry that stays 0: a structurally absent coupling
    fa = np.array([[index.get((i, j), zero) for j in keep] for i in left], dtype=np.intp)
    fb = np.array([[index.get((i, size + s), zero) for s in (0, 1)] for i in left],
                  dtype=np.intp)
    stamp = sp.csr_matrix((vals_s, (rows_s, cols_s)), shape=(zero + 1, quantities.size))
    return Program(zero + 1, stamp, tuple(steps), fa, fb, np.array(signs, dtype=float))


def run(program: Program, quantities: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Vth and Rth for ``quantities`` of shape (quantities, draws), by the recorded
    program (not finite where a draw's pivot vanished)."""
    e = np.asarray(program.stamp @ quantities)
    port_sign = program.port_sign
    # a draw whose pivot vanishes gives inf/NaN, handed back to the dense reference
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for piv, below, right, targets in program.steps:
            if below.size == 0 or right.size == 0:
                continue
            f = e[below] / e[piv]
            e[targets.ravel()] -= (f[:, None, :] * e[right][None, :, :]).reshape(
                -1, e.shape[1])
        a = e[program.final_a]  # (m, m, draws)
        b = e[program.final_b]  # (m, 2, draws)
        if a.shape[0] == 1:
            x = b[0] / a[0, 0]
            out = port_sign[0] * x
        else:
            det = a[0, 0] * a[1, 1] - a[0, 1] * a[1, 0]
            x0 = (b[0] * a[1, 1] - a[0, 1] * b[1]) / det
            x1 = (a[0, 0] * b[1] - a[1, 0] * b[0]) / det
            out = port_sign[0] * x0 + port_sign[1] * x1
    return out[0], out[1]
