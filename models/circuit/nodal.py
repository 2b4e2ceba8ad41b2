"""The full Kirchhoff system of a stage at rest, assembled from its topology: residuals and
Jacobian over the structural non-zeros, the fallback solve, and the adjoint mismatch
sensitivities of Iq.

All arrays are flat, shape (m,), one element per (design, PVT point) pair.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..devices.device import Device, restricted
from ..numerics.linear import _solve_each, dense, solve_structured
from ..numerics.roots import newton
from .topology import Topology


@dataclass
class NodalSystem:
    """The stage's full Kirchhoff system at rest, assembled from its topology.

    Unknowns: every internal node voltage and the drive current (injected into the drive
    node); equations: KCL at every internal node and zero net current at the output.
    Used for mismatch sensitivities (adjoint of the exact Jacobian) and as the fallback
    solver for elements the fast path could not solve.
    """

    topo: Topology
    devices: dict[str, Device]
    bias: dict[str, np.ndarray]
    vdd: np.ndarray
    index: dict[str, int] = field(init=False)
    # Mirror sources (see `mirrors.SourceStates.norton`): source name -> (j, g), the source
    # delivering j + g (V(a) - V(b)); sources not named here are ideal, of their bias value.
    sources: dict | None = None

    def __post_init__(self) -> None:
        self.index = {node: k for k, node in enumerate(self.topo.nodes)}
        self.index["__drive__"] = len(self.topo.nodes)

    @property
    def size(self) -> int:
        return len(self.index)

    def voltages(self, x, idx):
        v = {"vdd": self.vdd[idx], "0": np.zeros(x.shape[1]), "out": 0.5 * self.vdd[idx]}
        for node, k in self.index.items():
            if node != "__drive__":
                v[node] = x[k]
        return v

    def _row(self, node):
        """The equation of a node: its KCL for an internal node, the zero-output-current
        equation (which takes the drive's row) for the output, None for a rail."""
        return self.index["__drive__"] if node == "out" else self.index.get(node)

    def _rows(self, spec):
        """(row, sign) of the equations a device's drain current enters: it leaves the
        drain node (-1) and enters the source node (+1)."""
        return [(self._row(node), sign) for node, sign in ((spec.d, -1.0), (spec.s, 1.0))
                if self._row(node) is not None]

    def assemble(self, x, idx):
        """Residuals r (k, n); the scale of each equation (k, n), the sum of the
        magnitudes of the currents it balances, to judge r against; the Jacobian as its
        structurally non-zero entries (dict (row, col) -> (n,)); and every device's
        evaluation at x (dict role -> (i, gg, gd, gs) as `Device.eval` gives them), with
        every bias source's current and output conductance (source name -> (i, g): i from
        node a to node b [A], g = d i / d (V(a) - V(b)) [S], zero for an ideal source)."""
        k, n = self.size, x.shape[1]
        v = self.voltages(x, idx)
        r = np.zeros((k, n))
        scale = np.zeros((k, n))
        jac: dict[tuple[int, int], np.ndarray] = {}

        def add(row, col, val):
            jac[row, col] = jac[row, col] + val if (row, col) in jac else val

        evals = {}
        for spec in self.topo.devices:
            dev = restricted(self.devices[spec.role], idx)
            i, gg, gd, gs = evals[spec.role] = dev.eval(v[spec.g], v[spec.d], v[spec.s], v[spec.rail])
            p = dev.p
            current_in = p * i  # physical current entering the drain terminal
            terms = ((spec.g, p * gg), (spec.d, p * gd), (spec.s, p * gs))
            for row, sign in self._rows(spec):
                r[row] += sign * current_in
                scale[row] += np.abs(current_in)
                for col_node, g in terms:
                    col = self.index.get(col_node)
                    if col is not None:
                        add(row, col, sign * g)
        for src in self.topo.sources:
            if self.sources is None or src.name not in self.sources:
                val = self.bias[src.bias][idx]
                g_src = None
            else:
                j, g_src = (np.asarray(a)[idx] for a in self.sources[src.name])
                val = j + g_src * (v[src.a] - v[src.b])
            evals[src.name] = (val, np.zeros_like(val) if g_src is None else g_src)
            for node, sign in ((src.a, -1.0), (src.b, 1.0)):
                row = self._row(node)
                if row is not None:
                    r[row] += sign * val
                    scale[row] += np.abs(val)
                    if g_src is not None and np.any(g_src != 0):
                        for col_node, g in ((src.a, g_src), (src.b, -g_src)):
                            col = self.index.get(col_node)
                            if col is not None:
                                add(row, col, sign * g)
        for res in self.topo.resistors:
            gval = 1.0 / self.bias[res.bias][idx]
            cur = (v[res.a] - v[res.b]) * gval
            for node, sign in ((res.a, -1.0), (res.b, 1.0)):
                row = self._row(node)
                if row is None:
                    continue
                r[row] += sign * cur
                scale[row] += np.abs(cur)
                for col_node, g in ((res.a, gval), (res.b, -gval)):
                    col = self.index.get(col_node)
                    if col is not None:
                        add(row, col, sign * g)
        drive_col = self.index["__drive__"]
        drive_row = self.index[self.topo.drive]
        r[drive_row] += x[drive_col]
        add(drive_row, drive_col, np.ones(n))
        return r, scale, jac, evals

    def solve(self, x0):
        """Damped Newton on the full system from x0 (k, m)."""
        def fun(x, idx):
            r, _, jac, _ = self.assemble(x, idx)
            return r, dense(jac, self.size, x.shape[1])
        return newton(fun, x0)

    def iq_sensitivity(self, x, out_role):
        """d Iq / d dvt and d Iq / d dbeta for every device, by the adjoint of the exact
        Jacobian at the solved point x (k, m). Iq is the frame current of `out_role`.

        Returns dict role -> (dIq/d dvt [A/V], dIq/d dbeta [A]), each shape (m,), and
        source name -> (dIq/d delta [A], zeros) for every bias source, delta being the
        source's relative deviation from its nominal current (I = I0 (1 + delta)); the
        residuals (k, m) at x and their scales, so the caller can check the point it passed,
        and the device evaluations at x (as `assemble` gives them).
        """
        m = x.shape[1]
        k = self.size
        r, scale, jac, evals = self.assemble(x, slice(None))
        spec = self.topo.spec(out_role)
        dev = self.devices[out_role]
        i, gg, gd, gs = evals[out_role]
        grad: dict[int, np.ndarray] = {}
        for node, g in ((spec.g, gg), (spec.d, gd), (spec.s, gs)):
            col = self.index.get(node)
            if col is not None:
                grad[col] = grad[col] + g if col in grad else g  # frame current derivative
        # Adjoint: J^T lam = d Iq / dx.
        lam, solved = solve_structured({(c, rw): a for (rw, c), a in jac.items()}, grad, k, m)
        singular = np.zeros(m, dtype=bool)
        if not solved.all():
            # The stragglers go to LAPACK. A stage cut off entirely (every device off,
            # Iq = 0) has a singular Jacobian and no sensitivity (zero).
            bad = np.flatnonzero(~solved)
            jt = np.swapaxes(dense({key: a[bad] for key, a in jac.items()}, k, bad.size), 1, 2)
            g_bad = np.zeros((k, bad.size))
            for col, g in grad.items():
                g_bad[col] = g[bad]
            lam_bad = _solve_each(jt, -g_bad)  # jt^-1 g, NaN where jt is singular
            singular[bad] = ~np.all(np.isfinite(lam_bad), axis=0)
            lam[:, bad] = np.where(singular[bad], 0.0, lam_bad)
        out = {}
        for spec_d in self.topo.devices:
            role = spec_d.role
            d = self.devices[role]
            i_d, gg_d = evals[role][0], evals[role][1]
            # The device's current enters its rows with these signs; with
            # d(current_in)/d dvt = -gg and d(current_in)/d dbeta = current_in / (1 + dbeta),
            # dIq/dtheta = -lam . dr/dtheta.
            w = np.zeros(m)
            for row, sign in self._rows(spec_d):
                w = w + sign * lam[row]
            s_vt = gg_d * w
            s_beta = -(d.p * i_d / (1.0 + d.dbeta)) * w
            if role == out_role:
                s_vt = s_vt - dev.p * gg
                s_beta = s_beta + i / (1.0 + dev.dbeta)
            out[role] = (np.where(singular, 0.0, s_vt), np.where(singular, 0.0, s_beta))
        for src in self.topo.sources:
            # A source's relative deviation delta scales its nominal current I0: its
            # current enters row(a) with -1 and row(b) with +1, d(current)/d delta = I0.
            w = np.zeros(m)
            for node, sign in ((src.a, -1.0), (src.b, 1.0)):
                row = self._row(node)
                if row is not None:
                    w = w + sign * lam[row]
            s_rel = -w * self.bias[src.bias]
            out[src.name] = (np.where(singular, 0.0, s_rel), np.zeros(m))
        return out, (r, scale), evals
