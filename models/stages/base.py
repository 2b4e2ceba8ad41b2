"""What every output-stage architecture shares: topology records, device evaluation with
bulk ties and mismatch, vectorised 1-D and nodal solvers, and mismatch sensitivities.

Node names: "vdd" (supply), "0" (ground), "out" (output); every other name is internal.
All arrays are flat, shape (m,), one element per (design, PVT point) pair; the caller
flattens and chunks.
"""
from __future__ import annotations

import threading
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from .. import mos as _mos
from ..tech import ModelKind, Polarity

RAILS = ("vdd", "0")


@dataclass(frozen=True, slots=True)
class DeviceSpec:
    """One transistor of a topology: role name, polarity and terminal nodes."""

    role: str
    polarity: Polarity
    d: str
    g: str
    s: str

    @property
    def rail(self) -> str:
        """Default bulk node: ground for NMOS, supply for PMOS."""
        return "0" if self.polarity == Polarity.N else "vdd"


@dataclass(frozen=True, slots=True)
class SourceSpec:
    """An ideal DC current source of value `bias` pushing current from node a to node b."""

    name: str
    bias: str
    a: str
    b: str


@dataclass(frozen=True, slots=True)
class ResistorSpec:
    """A resistor of value `bias` (ohm) between nodes a and b."""

    name: str
    bias: str
    a: str
    b: str


@dataclass(frozen=True, slots=True)
class Topology:
    """Netlist of a stage at rest.

    `drive` is the node into which the amplifier's feedback injects current (or whose
    voltage it sets, for a follower); at rest that current is zero and the output sits
    at VDD/2 with no net output current.
    """

    devices: tuple[DeviceSpec, ...]
    sources: tuple[SourceSpec, ...]
    resistors: tuple[ResistorSpec, ...] = ()
    drive: str = "gp"

    @property
    def roles(self) -> tuple[str, ...]:
        return tuple(d.role for d in self.devices)

    def spec(self, role: str) -> DeviceSpec:
        """The device record of a role."""
        for d in self.devices:
            if d.role == role:
                return d
        raise KeyError(role)

    @property
    def nodes(self) -> tuple[str, ...]:
        """Internal nodes (unknowns of the nodal system), in first-seen order."""
        seen: list[str] = []
        for dev in self.devices:
            for node in (dev.d, dev.g, dev.s):
                if node not in RAILS and node != "out" and node not in seen:
                    seen.append(node)
        for el in self.sources + self.resistors:
            for node in (el.a, el.b):
                if node not in RAILS and node != "out" and node not in seen:
                    seen.append(node)
        return tuple(seen)


@dataclass(slots=True)
class Device:
    """A sized device at its operating conditions, with optional mismatch deviations.

    Arrays broadcast with the flat batch. `tied` means the bulk sits on the source (own
    well), which removes the body effect. The EKV constants of the instance are worked
    out once, at construction, since a solve evaluates the same device many times.
    """

    mos: _mos.Mos
    w: np.ndarray
    l: np.ndarray
    tied: bool = False
    dvt: np.ndarray | float = 0.0
    dbeta: np.ndarray | float = 0.0
    ekv: tuple | None = field(init=False, repr=False, default=None)

    def __post_init__(self) -> None:
        if self.mos.kind is ModelKind.EKV:
            self.ekv = _mos.ekv_constants(self.mos, self.w, self.l, self.dvt, self.dbeta)

    @property
    def p(self) -> int:
        return self.mos.polarity

    def eval(self, vg, vd, vs, vb):
        """Frame current i and its derivatives with respect to the physical gate, drain and
        source voltages (source derivative includes the bulk when tied). Shape (m,)."""
        vb_eff = vs if self.tied else vb
        p = self.p
        if self.ekv is None:
            i, gg, gd, gs = _mos.current_partials(self.mos, self.w, self.l, vg, vd, vs, vb_eff, self.dvt, self.dbeta)
        elif p == 1:
            i, gg, gd, gs = _mos.ekv_terms(vg - vb_eff, vd - vb_eff, vs - vb_eff, *self.ekv)
        else:
            i, gg, gd, gs = _mos.ekv_terms(vb_eff - vg, vb_eff - vd, vb_eff - vs, *self.ekv)
        if self.tied:
            gs = -(gg + gd)
        if p == 1:
            return i, gg, gd, gs
        return i, -gg, -gd, -gs

    def current(self, vg, vd, vs, vb):
        return self.eval(vg, vd, vs, vb)[0]

    def diode(self, i, vs, vb):
        """Gate = drain voltage of this device diode-connected, carrying frame current i."""
        if self.ekv is None:
            return _mos.diode_voltage(self.mos, self.w, self.l, i, vs, vs if self.tied else vb, self.dvt, self.dbeta)
        vg = self.gate_for(i, vs, vb, 0.0)
        vg = self.gate_for(i, vs, vb, vg - vs)  # with VDS = VGS in the length-modulation factor
        return _mos.refine_diode(vg, i, lambda v: self.eval(v, v, vs, vb)[:3])

    def gate_for(self, i, vs, vb, vds):
        """Gate voltage for frame current i in saturation (closed form)."""
        if self.ekv is not None:
            vb_eff = vs if self.tied else vb
            p = self.p
            return vb_eff + p * _mos.ekv_gate_sat(self.mos, p * (vs - vb_eff), i, vds, *self.ekv)
        return _mos.gate_voltage_sat(self.mos, self.w, self.l, i, vs, vs if self.tied else vb, vds, self.dvt, self.dbeta)

    def source_for(self, i, vg, vb, vds):
        """Source voltage for frame current i in saturation with the gate at vg."""
        return _mos.source_voltage_sat(self.mos, self.w, self.l, i, vg, vb, vds, self.dvt, self.dbeta, self.tied)

    def vdsat(self, i, slope=False):
        """Saturation voltage at frame current i [V] (see `mos.saturation_voltage`), with
        its derivative with respect to |i| when `slope`."""
        return _mos.saturation_voltage(self.mos, self.w, self.l, i, slope)


def _solve_each(jac, r):
    """-jac^-1 r for a batch of dense systems, jac (n, k, k) and r (k, n); NaN columns
    where a matrix is singular (LAPACK refuses the whole batch when one is)."""
    try:
        return -np.linalg.solve(jac, r.T[:, :, None])[:, :, 0].T
    except np.linalg.LinAlgError:
        sign, _ = np.linalg.slogdet(jac)
        dx = np.full(r.shape, np.nan)
        regular = sign != 0
        try:
            dx[:, regular] = -np.linalg.solve(jac[regular], r.T[regular][:, :, None])[:, :, 0].T
        except np.linalg.LinAlgError:
            pass
        return dx


class _WorkingSet:
    """The batch elements an iteration hands to its function: all of them, as a slice
    (so that indexing copies nothing and device subsets are the devices themselves),
    until fewer than half are still iterating; from then on only those, as an index
    array. Finished elements inside the set are evaluated but never updated, so every
    element's iterates are the same whatever its batch neighbours do."""

    def __init__(self, live):
        self.idx = slice(None)
        self.live = live  # per element of idx: still iterating

    def refresh(self) -> int:
        """Drop finished elements once they are the majority; the live count."""
        n = int(np.count_nonzero(self.live))
        if 0 < n < 0.5 * self.live.size:
            self.idx = np.flatnonzero(self.live) if isinstance(self.idx, slice) else self.idx[self.live]
            self.live = np.ones(n, dtype=bool)
        return n

    def mark(self, flags, mask):
        """Set flags (one per batch element) where mask (one per set element) holds."""
        if isinstance(self.idx, slice):
            flags |= mask
        else:
            flags[self.idx[mask]] = True


def solve_bracketed(fun, lo, hi, x0=None, xtol=1e-10, max_iter=100, flo=None, fhi=None):
    """Vectorised safeguarded Newton inside a bracket (Newton steps that leave the bracket
    or shrink it too slowly are replaced by bisection).

    Parameters
    ----------
    fun : callable
        fun(x, idx) -> (f, df) for the elements `idx` (a slice or an integer index array
        into the batch) at points x.
    lo, hi : ndarray, shape (m,)
        Bracket ends; f(lo) and f(hi) must differ in sign (or one be zero).
    x0 : ndarray, shape (m,), optional
        Starting point inside the bracket (default: midpoint).
    flo, fhi : ndarray, shape (m,), optional
        f at the bracket ends, when the caller has them already.

    Returns
    -------
    x : ndarray, shape (m,)
        Root estimates.
    ok : ndarray of bool, shape (m,)
        True where the bracket held a sign change and the iteration met `xtol`.
    """
    lo = np.array(lo, dtype=float)
    hi = np.array(hi, dtype=float)
    m = lo.shape[0]
    with np.errstate(all="ignore"):
        flo = fun(lo, slice(None))[0] if flo is None else np.asarray(flo, dtype=float)
        fhi = fun(hi, slice(None))[0] if fhi is None else np.asarray(fhi, dtype=float)
    ok = (np.sign(flo) * np.sign(fhi)) <= 0
    # Orient so that f(lo) <= 0 <= f(hi).
    swap = flo > 0
    lo, hi = np.where(swap, hi, lo), np.where(swap, lo, hi)
    x = 0.5 * (lo + hi) if x0 is None else np.clip(np.array(x0, dtype=float), np.minimum(lo, hi), np.maximum(lo, hi))
    done = ~ok | (flo == 0) | (fhi == 0)
    x = np.where(flo == 0, np.where(swap, hi, lo), x)
    x = np.where(fhi == 0, np.where(swap, lo, hi), x)
    ws = _WorkingSet(~done)
    for _ in range(max_iter):
        if ws.refresh() == 0:
            break
        live, idx = ws.live, ws.idx
        xa, la, ha = x[idx], lo[idx], hi[idx]
        with np.errstate(all="ignore"):
            f, df = fun(xa, idx)
            neg = f < 0
            la = np.where(neg & live, xa, la)
            ha = np.where(neg | ~live, ha, xa)
            xn = xa - f / df
        bad = ~np.isfinite(xn) | ((xn - la) * (xn - ha) > 0)
        xn = np.where(bad, 0.5 * (la + ha), xn)
        xn = np.where((f == 0) | ~live, xa, xn)  # an exact root stays where it is (flat stretches included)
        conv = (np.abs(xn - xa) < xtol) | (f == 0) | (np.abs(ha - la) < xtol)
        x[idx], lo[idx], hi[idx] = xn, la, ha
        ws.live = live & ~conv
    unfinished = np.zeros(m, dtype=bool)
    ws.mark(unfinished, ws.live)
    return x, ok & ~unfinished


def newton(fun, x0, step_max=0.25, xtol=1e-8, max_iter=60):
    """Vectorised damped Newton for small square systems.

    Parameters
    ----------
    fun : callable
        fun(x, idx) -> (r, jac): residuals (k, n) and Jacobian (n, k, k) for the n
        elements `idx` (a slice or an integer index array into the batch) at points x of
        shape (k, n).
    x0 : ndarray, shape (k, m)
        Starting point.
    step_max : float
        Largest change of any unknown per step (volts), the damping.
    xtol : float
        An element has converged once a full (undamped) step smaller than this has been
        applied: Newton converges quadratically here, so the error left is about xtol^2
        times the curvature of the residuals (1 to 10 per volt in these stages); the
        default leaves far below 1e-12 V.

    Returns
    -------
    x : ndarray, shape (k, m)
    ok : ndarray of bool, shape (m,)
        Converged elements; the others are left at their last iterate.
    """
    x = np.array(x0, dtype=float)
    m = x.shape[1]
    ok = np.zeros(m, dtype=bool)
    ws = _WorkingSet(np.ones(m, dtype=bool))
    for _ in range(max_iter):
        if ws.refresh() == 0:
            break
        live, idx = ws.live, ws.idx
        xa = x[:, idx]
        with np.errstate(all="ignore"):
            r, jac = fun(xa, idx)
            if x.shape[0] == 2:  # Cramer's rule: far cheaper than a batched LAPACK call
                det = jac[:, 0, 0] * jac[:, 1, 1] - jac[:, 0, 1] * jac[:, 1, 0]
                dx = -np.stack([(jac[:, 1, 1] * r[0] - jac[:, 0, 1] * r[1]) / det,
                                (jac[:, 0, 0] * r[1] - jac[:, 1, 0] * r[0]) / det])
            else:
                dx = _solve_each(jac, r)
        finite = np.all(np.isfinite(dx), axis=0)
        dx = np.where(finite & live, dx, 0.0)
        big = np.max(np.abs(dx), axis=0)
        scale = np.where(big > step_max, step_max / np.maximum(big, 1e-300), 1.0)
        x[:, idx] = xa + dx * scale
        conv = live & finite & (big < xtol)
        ws.mark(ok, conv)
        ws.live = live & finite & ~conv
    return x, ok


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
        evaluation at x (dict role -> (i, gg, gd, gs) as `Device.eval` gives them)."""
        k, n = self.size, x.shape[1]
        v = self.voltages(x, idx)
        r = np.zeros((k, n))
        scale = np.zeros((k, n))
        jac: dict[tuple[int, int], np.ndarray] = {}

        def add(row, col, val):
            jac[row, col] = jac[row, col] + val if (row, col) in jac else val

        evals = {}
        for spec in self.topo.devices:
            dev = _subset(self.devices[spec.role], idx)
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
            val = self.bias[src.bias][idx]
            for node, sign in ((src.a, -1.0), (src.b, 1.0)):
                row = self._row(node)
                if row is not None:
                    r[row] += sign * val
                    scale[row] += np.abs(val)
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

        Returns dict role -> (dIq/d dvt [A/V], dIq/d dbeta [A]), each shape (m,), the
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
        return out, (r, scale), evals


def dense(entries, k, n):
    """The (n, k, k) batch of matrices whose non-zero entries are `entries`."""
    a = np.zeros((n, k, k))
    for (row, col), val in entries.items():
        a[:, row, col] = val
    return a


def solve_structured(entries, rhs, k, m, rtol=1e-9):
    """Solve a batch of small sparse systems that share one structure, A x = b.

    Gaussian elimination over the structural non-zeros only: each step takes the pivot
    with the fewest fill-ins (Markowitz), among entries that are not small against their
    row on a sample of the batch, so one numpy operation covers a row update of the whole
    batch. Elimination without per-element pivoting can lose accuracy on some element;
    the residual of every element is checked, and those that fail are reported for a
    dense solve with partial pivoting.

    Parameters
    ----------
    entries : dict (row, col) -> ndarray (m,)
        The structurally non-zero entries of A.
    rhs : dict row -> ndarray (m,)
        The non-zero rows of b.
    k, m : int
        System size and batch size.

    Returns
    -------
    x : ndarray (k, m)
    ok : ndarray of bool (m,)
        False where a pivot vanished or the residual exceeds rtol of the row's scale.
    """
    if m == 0:
        return np.zeros((k, 0)), np.zeros(0, dtype=bool)
    a = dict(entries)
    b = {row: np.asarray(v, dtype=float) for row, v in rhs.items()}
    sample = slice(None, None, max(1, m // 256))
    row_cols = {i: {j for (ii, j) in a if ii == i} for i in range(k)}  # remaining rows
    col_rows = {j: {i for (i, jj) in a if jj == j} for j in range(k)}  # remaining columns
    order = []
    with np.errstate(all="ignore"):
        for _ in range(k):
            best, best_key = None, None
            for i, cols in row_cols.items():
                mags = {c: np.abs(a[i, c][sample]) for c in cols}
                row_max = np.maximum(np.max(list(mags.values()), axis=0), 1e-300) if mags else None
                for c in cols:
                    strong = float(np.min(mags[c] / row_max))
                    key = (strong < 0.01, (len(cols) - 1) * (len(col_rows[c]) - 1), -strong)
                    if best_key is None or key < best_key:
                        best, best_key = (i, c), key
            if best is None:
                return np.zeros((k, m)), np.zeros(m, dtype=bool)  # structurally singular
            i, j = best
            order.append(best)
            cols = row_cols.pop(i)
            for c in cols:
                col_rows[c].discard(i)
            for r in col_rows.pop(j):
                f = a.pop((r, j)) / a[i, j]
                row_cols[r].discard(j)
                for c in cols - {j}:
                    upd = f * a[i, c]
                    if (r, c) in a:
                        a[r, c] = a[r, c] - upd
                    else:
                        a[r, c] = -upd
                        row_cols[r].add(c)
                        col_rows[c].add(r)
                if i in b:
                    b[r] = b[r] - f * b[i] if r in b else -f * b[i]
        x = np.zeros((k, m))
        for i, j in reversed(order):
            acc = b[i].copy() if i in b else np.zeros(m)
            for (ii, c), val in a.items():
                if ii == i and c != j:
                    acc -= val * x[c]
            x[j] = acc / a[i, j]
        res = np.zeros((k, m))
        scale = np.zeros((k, m))
        for (i, j), val in entries.items():
            t = val * x[j]
            res[i] += t
            scale[i] += np.abs(t)
        for i, v in rhs.items():
            res[i] -= v
            scale[i] += np.abs(v)
        ok = np.all(np.isfinite(x), axis=0) & np.all(np.abs(res) <= rtol * scale, axis=0)
    return np.where(ok, x, 0.0), ok


def _subset(dev: Device, idx) -> Device:
    """The same device restricted to the batch elements idx (a slice or index array)."""
    if isinstance(idx, slice) and idx == slice(None):
        return dev
    if isinstance(idx, np.ndarray) and idx.size == np.size(dev.w) and idx.size and idx[-1] == idx.size - 1 \
            and idx[0] == 0:
        return dev  # idx is the whole batch (index sets are sorted, so first/last fix it)
    def pick(a):
        a = np.asarray(a)
        return a[idx] if a.ndim else a

    m = dev.mos
    mos_sub = _mos.Mos(m.polarity, m.kind, pick(m.vt0), pick(m.kp), m.n, m.gamma, m.phi, pick(m.ut), m.va_per_l)
    return Device(mos_sub, pick(dev.w), pick(dev.l), dev.tied, pick(dev.dvt), pick(dev.dbeta))


class DeviceSubset(Mapping):
    """Devices restricted to the batch elements idx, each cut out when first used (a
    solver step usually needs only a few of the stage's devices)."""

    def __init__(self, devices, idx):
        self._devices, self._idx, self._cut = devices, idx, {}

    def __getitem__(self, role: str) -> Device:
        dev = self._cut.get(role)
        if dev is None:
            dev = self._cut[role] = _subset(self._devices[role], self._idx)
        return dev

    def __iter__(self):
        return iter(self._devices)

    def __len__(self) -> int:
        return len(self._devices)


_recent = threading.local()


def subset(devices, idx) -> DeviceSubset:
    """All devices restricted to the batch elements idx (cut out on first use).

    An iteration hands the same index array to its function step after step; the last
    subset of each thread is kept, so those steps share one set of cut-out devices.
    """
    last = getattr(_recent, "last", None)
    if last is not None and last[0] is devices and last[1] is idx:
        return last[2]
    sub = DeviceSubset(devices, idx)
    _recent.last = (devices, idx, sub)
    return sub
