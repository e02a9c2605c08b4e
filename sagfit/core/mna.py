"""Modified nodal analysis of a DC netlist, batched over parameter draws.

Unknowns: the voltages of the non-ground nodes, then the currents of the branches of
V, L (a 0 V source at DC), E and H elements (SPICE sign: current into the ``n+`` pin).
Each draw's system has two right-hand sides: the sources as given (open-circuit
voltage) and the sources zeroed with 1 A driven into the port (the output resistance).

Two ways, the same numbers: :meth:`Circuit.solve_dense` stacks the draws' full matrices
and solves them by one batched ``numpy.linalg.solve`` per chunk (the reference);
:meth:`Circuit.solve` eliminates every unknown but the port's with an elimination order
recorded once (:mod:`sagfit.core.elimination`), about 60 times faster on a 200-node
network, and falls back to the reference for a network (or a draw) it cannot pivot.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import elimination
from .errors import InputError
from .netlist import Netlist

#: Draws per batched dense solve; bounds memory at about CHUNK·N²·8 bytes.
CHUNK = 512
#: Bytes of the elimination program's working array per pass (draws per pass follow;
#: 1,024–10,000 draws per pass measured alike on the 200-node benchmark, 64 three times slower).
ELIMINATION_BYTES = 32_000_000


@dataclass(frozen=True, slots=True)
class Equivalent:
    """Thevenin/Norton equivalents, one per draw (arrays of shape (draws,))."""

    vth: np.ndarray
    rth: np.ndarray

    @property
    def isc(self) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.rth == 0, np.copysign(np.inf, self.vth), self.vth / self.rth)


class Circuit:
    """A netlist compiled to index tables; ``solve(values)`` for stacked value draws."""

    def __init__(self, net: Netlist):
        self.net = net
        nodes = sorted(({n for e in net.elements for n in e.nodes}
                        | {n for e in net.elements if e.kind in "EG" for n in e.control})
                       - {"0"})
        idx = {n: i for i, n in enumerate(nodes)}
        idx["0"] = -1
        self.node_index = idx
        branch = {}
        k = len(nodes)
        for e in net.elements:
            if e.kind in "VLEH":
                branch[e.name.lower()] = k
                k += 1
        self.size = k
        self.branch = branch
        #: the elements that carry a value (parameters), in netlist order
        self.params = tuple(e for e in net.elements if e.kind not in "LC")
        self.nominal = np.array([e.value for e in self.params], dtype=float)
        self.tol = np.array([e.tol for e in self.params], dtype=float)
        self.port = (idx[net.port[0]], idx[net.port[1]])
        self._program: elimination.Program | None | bool = False  # False: not built yet

    def solve(self, values: np.ndarray) -> Equivalent:
        """Equivalent for ``values`` of shape (draws, parameters) or (parameters,).

        Eliminates every unknown but the port's (see the module notes); draws that
        elimination cannot resolve, and networks it cannot pivot, go to
        :meth:`solve_dense`, which also reports a singular network."""
        v = np.atleast_2d(np.asarray(values, dtype=float))
        if self._program is False:
            self._program = self._build_program()
        prog = self._program
        if prog is None:
            return self.solve_dense(v)
        vth = np.empty(v.shape[0])
        rth = np.empty(v.shape[0])
        step = max(64, ELIMINATION_BYTES // (8 * prog.entries))
        for s in range(0, v.shape[0], step):
            vth[s:s + step], rth[s:s + step] = elimination.run(
                prog, self._quantities(v[s:s + step]))
        bad = ~(np.isfinite(vth) & np.isfinite(rth))
        if bad.any():
            ref = self.solve_dense(v[bad])
            vth[bad], rth[bad] = ref.vth, ref.rth
        return Equivalent(vth, rth)

    def _quantities(self, v):
        """(1 + parameters, draws): a constant 1, then each parameter as stamped
        (a resistor's conductance, any other element's value)."""
        q = np.empty((v.shape[1] + 1, v.shape[0]))
        q[0] = 1.0
        q[1:] = v.T
        with np.errstate(divide="ignore"):  # a zero draw: not finite, then the reference
            q[1:][self._is_r] = 1.0 / q[1:][self._is_r]
        return q

    def _stamps(self):
        """(row, column, quantity, coefficient) of every matrix and right-hand-side entry,
        the same stamps as :meth:`_solve_chunk`; column ``size`` is the sources' side,
        ``size + 1`` the test current's."""
        idx, n = self.node_index, self.size
        col = {e.name: j + 1 for j, e in enumerate(self.params)}
        out = []

        def add(i, j, q, coef):
            if i >= 0 and j >= 0:
                out.append((i, j, q, coef))

        for e in self.net.elements:
            p, q = idx[e.nodes[0]], idx[e.nodes[1]]
            k = col.get(e.name, 0)
            if e.kind == "R":
                add(p, p, k, 1.0), add(q, q, k, 1.0), add(p, q, k, -1.0), add(q, p, k, -1.0)
            elif e.kind == "I":
                add(p, n, k, -1.0), add(q, n, k, 1.0)
            elif e.kind == "G":
                c1, c2 = idx[e.control[0]], idx[e.control[1]]
                add(p, c1, k, 1.0), add(p, c2, k, -1.0), add(q, c1, k, -1.0), add(q, c2, k, 1.0)
            elif e.kind == "F":
                kc = self.branch[e.control[0]]
                add(p, kc, k, 1.0), add(q, kc, k, -1.0)
            elif e.kind in "VLEH":
                b = self.branch[e.name.lower()]
                add(p, b, 0, 1.0), add(q, b, 0, -1.0), add(b, p, 0, 1.0), add(b, q, 0, -1.0)
                if e.kind == "V":
                    add(b, n, k, 1.0)
                elif e.kind == "E":
                    c1, c2 = idx[e.control[0]], idx[e.control[1]]
                    add(b, c1, k, -1.0), add(b, c2, k, 1.0)
                elif e.kind == "H":
                    add(b, self.branch[e.control[0]], k, -1.0)
        pp, pn = self.port
        add(pp, n + 1, 0, 1.0), add(pn, n + 1, 0, -1.0)
        return out

    def _build_program(self):
        self._is_r = np.array([e.kind == "R" for e in self.params], dtype=bool)
        pp, pn = self.port
        if pp == pn:
            return None
        keep = [i for i in (pp, pn) if i >= 0]
        signs = [s for i, s in ((pp, 1.0), (pn, -1.0)) if i >= 0]
        q = self._quantities(self.nominal[None, :])[:, 0]
        return elimination.build(self.size, self._stamps(), q, keep, signs)

    def solve_dense(self, values: np.ndarray) -> Equivalent:
        """The reference: every draw's full matrix, stacked, by ``numpy.linalg.solve``."""
        v = np.atleast_2d(np.asarray(values, dtype=float))
        vth = np.empty(v.shape[0])
        rth = np.empty(v.shape[0])
        for s in range(0, v.shape[0], CHUNK):
            x = self._solve_chunk(v[s:s + CHUNK])
            vth[s:s + CHUNK] = self._port_v(x[:, :, 0])
            rth[s:s + CHUNK] = self._port_v(x[:, :, 1])
        return Equivalent(vth, rth)

    def _port_v(self, x):
        p, n = self.port
        return (x[:, p] if p >= 0 else 0.0) - (x[:, n] if n >= 0 else 0.0)

    def _solve_chunk(self, v):
        d, n = v.shape[0], self.size
        a = np.zeros((d, n, n))
        b = np.zeros((d, n, 2))
        idx = self.node_index

        def add(i, j, val):
            if i >= 0 and j >= 0:
                a[:, i, j] += val

        def rhs(i, val):
            if i >= 0:
                b[:, i, 0] += val

        col = {e.name: j for j, e in enumerate(self.params)}
        for e in self.net.elements:
            p, q = idx[e.nodes[0]], idx[e.nodes[1]]
            val = v[:, col[e.name]] if e.name in col else 0.0
            if e.kind == "R":
                g = 1.0 / val
                add(p, p, g), add(q, q, g), add(p, q, -g), add(q, p, -g)
            elif e.kind == "I":
                rhs(p, -val), rhs(q, val)
            elif e.kind == "G":
                c1, c2 = idx[e.control[0]], idx[e.control[1]]
                add(p, c1, val), add(p, c2, -val), add(q, c1, -val), add(q, c2, val)
            elif e.kind == "F":
                kc = self.branch[e.control[0]]
                add(p, kc, val), add(q, kc, -val)
            elif e.kind in "VLEH":
                k = self.branch[e.name.lower()]
                add(p, k, 1.0), add(q, k, -1.0), add(k, p, 1.0), add(k, q, -1.0)
                if e.kind == "V":
                    b[:, k, 0] += val
                elif e.kind == "E":
                    c1, c2 = idx[e.control[0]], idx[e.control[1]]
                    add(k, c1, -val), add(k, c2, val)
                elif e.kind == "H":
                    add(k, self.branch[e.control[0]], -val)
        pp, pn = self.port
        if pp >= 0:
            b[:, pp, 1] += 1.0
        if pn >= 0:
            b[:, pn, 1] -= 1.0
        try:
            x = np.linalg.solve(a, b)
        except np.linalg.LinAlgError:
            raise InputError(f"{self.net.path}: the network is singular (no unique solution: "
                             "check controlled-source gains and current sources in series)"
                             ) from None
        if not np.all(np.isfinite(x)):
            raise InputError(f"{self.net.path}: the network is singular (solution not finite)")
        return x


def equivalent(net: Netlist) -> tuple[float, float]:
    """Nominal (Vth, Rth) of ``net`` between its port nodes."""
    c = Circuit(net)
    eq = c.solve(c.nominal)
    return float(eq.vth[0]), float(eq.rth[0])
