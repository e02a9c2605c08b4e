"""Modified nodal analysis of a DC netlist, batched over parameter draws.

Unknowns: the voltages of the non-ground nodes, then the currents of the branches of
V, L (a 0 V source at DC), E and H elements (SPICE sign: current into the ``n+`` pin).
For each draw one matrix is factorised and solved for two right-hand sides: the
sources as given (open-circuit voltage) and the sources zeroed with 1 A driven into
the port (the output resistance). Draws are stacked and solved by one batched
``numpy.linalg.solve`` per chunk.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError
from .netlist import Netlist

#: Draws per batched solve; bounds memory at about CHUNK·N²·8 bytes.
CHUNK = 512


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

    def solve(self, values: np.ndarray) -> Equivalent:
        """Equivalent for ``values`` of shape (draws, parameters) or (parameters,)."""
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
