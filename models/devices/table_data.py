"""Device tables of the `table` model kind: the arrays, their checks, the Hermite cells and
the interpolation of the current with its partial derivatives (the kind's interface is
`table`).

The user's SPICE model card, tabulated by ngspice, used inside the exact Kirchhoff solves in
place of closed-form equations.

This is the lookup-table method of gm/ID design (F. Silveira, D. Flandre, P. G. A. Jespers,
"A gm/ID based methodology for the design of CMOS analog circuits and its application to the
synthesis of a silicon-on-insulator micropower OTA", IEEE J. Solid-State Circuits
31(9):1314-1319, 1996; P. G. A. Jespers, B. Murmann, *Systematic Design of Analog CMOS
Circuits*, Cambridge University Press, 2017), evaluated by interpolation so that Newton
solves can run on it.

What is tabulated
-----------------
Per polarity, at one reference width `w_ref`, for every corner section, temperature and
drawn length: drain current and ngspice's gm, gds, gmbs, cgg, cgs, cgd and cdd over a grid
of the bulk-referenced frame voltages VGS (uniform), VDS (quadratic spacing, dense near 0,
VDS >= 0; a reversed device is the same device with drain and source exchanged) and VSB
(uniform). Identical corner sections of one polarity share their arrays.

How it is interpolated
----------------------
The interpolated quantity is y = ln(I L / g(VDS)), g = 1 - exp(-VDS/UT): dividing by g
removes the zero of the current at VDS = 0 (y stays finite there, ln(UT gds(0) L)), and
multiplying by L removes the 1/L trend so that lengths between the tabulated ones
interpolate a slowly varying function. Then:
- VGS and VDS: bicubic Hermite per cell, with dy/dVGS = gm/I from ngspice and the VDS and
  cross derivatives from finite differences of the tabulated values (C1 in both);
- VSB: cubic Hermite between nodes with dy/dVSB = -gmbs/I from ngspice;
- length: linear in ln L between tabulated lengths; temperature: linear between tabulated
  temperatures (exact at them).
The current scales as W / w_ref, corrected for narrow width: a second width w_narrow is
tabulated too (drain current), and its threshold shift and current factor against w_ref at
each VSB node enter linearly in 1/W (exact at both widths, towards 1/W = 0 for wider
devices). A mismatch threshold deviation shifts VGS, a current-factor deviation scales the
current.

Outside the table: lengths and temperatures outside the tabulated range are refused by the
callers before any solve (`check_lengths`, `check_temperatures`). During a Newton iteration
voltages may leave the grid; there y continues linearly from the edge cell, and
a study's supply may not exceed the tabulated span, and `evaluate` flags any rest point with
a node beyond the rails, so no reported number is an extrapolation (a device below the
lowest tabulated VGS is in cut-off; its subthreshold current continues the edge slope).
"""
from __future__ import annotations

import threading
from dataclasses import dataclass, field

import numpy as np

from .conditions import Mos
from .constants import thermal_voltage

QUANTITIES = ("id", "gm", "gds", "gmbs", "cgg", "cgs", "cgd", "cdd")
_H = np.array([[1.0, 0.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0], [-3.0, 3.0, -2.0, -1.0], [2.0, -2.0, 1.0, 1.0]])
_FLOOR = 1e-30  # A: current floor before the logarithm (a device far in cut-off)


@dataclass(eq=False)
class PolarityTable:
    """Tabulated frame magnitudes of one polarity (see the module notes).

    Arrays in `data` have shape (n_slots, n_temps, n_lengths, n_vsb, n_vds, n_vgs); `slots`
    maps a corner name ("tt", "ff", ...) to its index along the first axis.
    """

    vgs: np.ndarray  # V  uniform
    vds: np.ndarray  # V  vds_k = span (k / (n - 1))^2
    vsb: np.ndarray  # V  uniform, from 0
    lengths: np.ndarray  # m  sorted
    temps: np.ndarray  # K  sorted
    w_ref: float  # m
    slots: dict[str, int]
    data: dict[str, np.ndarray]
    w_narrow: float  # m  the narrow width of data["id_narrow"]
    _cells: tuple | None = field(default=None, repr=False)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def __post_init__(self) -> None:
        check_table(self)

    @property
    def span(self) -> float:
        return float(self.vds[-1])

    def cells(self):
        """Built at first use: the bicubic coefficients of y of every cell, shape (n_slots *
        n_temps * n_lengths * n_vsb * (n_vds - 1) * (n_vgs - 1), 16) float32 (per cell the
        4 x 4 coefficients in the normalised cell coordinates), and the threshold of every
        (slice, VSB node) with its VSB slope (see `_forward`)."""
        with self._lock:
            if self._cells is None:
                self._cells = _build_cells(self)
            return self._cells


def check_table(t: PolarityTable) -> None:
    """Raise ValueError naming the array and what is wrong (missing, shape, not finite,
    grid not as described)."""
    shape = (len(set(t.slots.values())), len(t.temps), len(t.lengths), len(t.vsb), len(t.vds), len(t.vgs))
    for name in QUANTITIES:
        a = t.data.get(name)
        if a is None:
            raise ValueError(f"array {name!r} is missing")
        if a.shape != shape:
            raise ValueError(f"array {name!r} has shape {a.shape}; the axes give {shape}")
        if not np.all(np.isfinite(a)):
            raise ValueError(f"array {name!r} holds {int(np.sum(~np.isfinite(a)))} values that are not finite")
    if len(t.vgs) < 4 or np.ptp(np.diff(t.vgs)) > 1e-9 * np.ptp(t.vgs) or t.vgs[1] <= t.vgs[0]:
        raise ValueError("vgs must hold at least 4 uniformly rising values")
    k = np.arange(len(t.vds)) / (len(t.vds) - 1)
    if len(t.vds) < 4 or t.vds[-1] <= 0 or not np.allclose(t.vds, t.vds[-1] * k**2, rtol=1e-9, atol=1e-12):
        raise ValueError("vds must hold at least 4 values span * (k / (n - 1))^2, k = 0 .. n - 1")
    k = np.arange(len(t.vsb)) / max(len(t.vsb) - 1, 1)
    if len(t.vsb) < 3 or t.vsb[-1] <= 0 or not np.allclose(t.vsb, t.vsb[-1] * k**2, rtol=1e-9, atol=1e-12):
        raise ValueError("vsb must hold at least 3 values top * (k / (n - 1))^2, k = 0 .. n - 1")
    a = t.data.get("id_narrow")
    if a is None or a.shape != shape or not np.all(np.isfinite(a)):
        raise ValueError(f"array 'id_narrow' must be finite with shape {shape}")
    if not 0 < t.w_narrow < t.w_ref:
        raise ValueError(f"w_narrow = {t.w_narrow!r} m must lie between 0 and w_ref = {t.w_ref!r} m")
    for name, axis in (("lengths", t.lengths), ("temps", t.temps)):
        if len(axis) < 1 or np.any(np.diff(axis) <= 0) or not np.all(np.isfinite(axis)) or axis[0] <= 0:
            raise ValueError(f"{name} must be positive and strictly rising")
    if len(t.lengths) < 2:
        raise ValueError("lengths must hold at least 2 values")
    if not t.slots or set(t.slots.values()) != set(range(shape[0])):
        raise ValueError("corner slots must number the first axis of the arrays from 0")


def _log_current(t: PolarityTable):
    """y = ln(I L / g(VDS)), dy/dVGS and dy/dVSB on the grid (float64)."""
    ut = thermal_voltage(t.temps)[None, :, None, None, None, None]
    lengths = t.lengths[None, None, :, None, None, None]
    vds = t.vds[None, None, None, None, :, None]
    i = np.maximum(np.abs(t.data["id"].astype(float)), _FLOOR)
    g = -np.expm1(-vds / ut)
    with np.errstate(divide="ignore", invalid="ignore"):
        y = np.log(i * lengths / np.where(g > 0, g, 1.0))
    # At VDS = 0 the ratio tends to UT gds(0).
    y0 = np.log(np.maximum(np.abs(t.data["gds"][..., 0, :].astype(float)), _FLOOR) * ut[..., 0, :] * lengths[..., 0, :])
    y[..., 0, :] = y0
    yg = np.abs(t.data["gm"].astype(float)) / i
    ysb = -np.abs(t.data["gmbs"].astype(float)) / i
    # On the VDS = 0 row the current is zero and its ratios are not defined: take the
    # derivatives of y there from the neighbouring values.
    yg[..., 0, :] = np.gradient(y[..., 0, :], t.vgs, axis=-1)
    ysb[..., 0, :] = np.gradient(y[..., 0, :], t.vsb, axis=-2)
    return y, yg, ysb


def _bicubic(f, fx, fy, fxy, hx, hy):
    """Coefficients a[..., i, j] of sum a_ij tx^i ty^j on every cell of the last two axes
    (x = VDS along axis -2, y = VGS along axis -1 here: see `_build_cells`)."""
    def corners(a):
        return a[..., :-1, :-1], a[..., :-1, 1:], a[..., 1:, :-1], a[..., 1:, 1:]

    f00, f01, f10, f11 = corners(f)
    x00, x01, x10, x11 = (c * hx for c in corners(fx))
    y00, y01, y10, y11 = (c * hy for c in corners(fy))
    c00, c01, c10, c11 = (c * hx * hy for c in corners(fxy))
    F = np.stack([
        np.stack([f00, f01, y00, y01], -1),
        np.stack([f10, f11, y10, y11], -1),
        np.stack([x00, x01, c00, c01], -1),
        np.stack([x10, x11, c10, c11], -1),
    ], -2)
    return np.einsum("ik,...kl,jl->...ij", _H, F, _H)


def _mid_vds(t: PolarityTable) -> int:
    return int(np.argmin(np.abs(t.vds - 0.5 * t.span)))


def _crossing(t: PolarityTable, yy, crit):
    """VGS at which each row of yy (rows over VGS) first reaches crit, linear between nodes."""
    yy = np.maximum.accumulate(yy, axis=-1)  # monotone for the search
    k = np.clip(np.sum(yy < crit, axis=-1) - 1, 0, len(t.vgs) - 2)
    rows = np.arange(len(yy))
    y0, y1 = yy[rows, k], yy[rows, k + 1]
    f = np.clip((crit - y0) / np.where(y1 > y0, y1 - y0, 1.0), 0.0, 1.0)
    return t.vgs[k] + f * (t.vgs[1] - t.vgs[0])


def _threshold(t: PolarityTable, y) -> np.ndarray:
    """Constant-current threshold per (slot, temperature, length, VSB): the VGS at which
    I L / W = 100 nA at the VDS node nearest half the span (the usual constant-current
    criterion, 100 nA x W / L; common practice, no source). Shape (n_slices, n_vsb)."""
    yy = y[..., _mid_vds(t), :].reshape(-1, len(t.vgs))  # (n_slices * n_vsb, n_vgs), rising in VGS
    return _crossing(t, yy, np.log(1e-7 * t.w_ref)).reshape(-1, len(t.vsb))


def _narrow(t: PolarityTable, y, vt):
    """Narrow-width correction per (slice, VSB node): the threshold shift of w_narrow
    against w_ref and the log ratio of their currents per width at the same overdrive
    (0.5 V above threshold). Both enter linearly in 1/W (`_forward`). Shapes (n_slices,
    n_vsb)."""
    kd = _mid_vds(t)
    lengths = t.lengths[None, None, :, None, None]
    g = -np.expm1(-t.vds[kd] / thermal_voltage(t.temps))[None, :, None, None, None]
    i_n = np.maximum(np.abs(t.data["id_narrow"][..., kd, :].astype(float)), _FLOOR)
    yn = np.log(i_n * lengths * (t.w_ref / t.w_narrow) / g).reshape(-1, len(t.vgs))
    yr = y[..., kd, :].reshape(-1, len(t.vgs))
    vt_r = vt.reshape(-1)
    dvt = _crossing(t, yn, np.log(1e-7 * t.w_ref)) - vt_r
    v_on = np.minimum(vt_r + 0.5, t.vgs[-1] - 0.5)
    ratio = np.array([np.interp(v_on[r] + dvt[r], t.vgs, yn[r]) - np.interp(v_on[r], t.vgs, yr[r])
                      for r in range(len(yr))])
    return dvt.reshape(vt.shape), ratio.reshape(vt.shape)


def _build_cells(t: PolarityTable):
    """Bicubic Hermite coefficients of y in (VDS, VGS) per cell, (n_cells, 16) float32, and
    the threshold per (slice, VSB node) with its VSB slope, (n_slices, n_vsb) each."""
    y, yg, _ = _log_current(t)
    hd = np.diff(t.vds)[:, None]  # cell widths along VDS (rows)
    hg = float(t.vgs[1] - t.vgs[0])
    fd = np.gradient(y, t.vds, axis=-2)
    fgd = np.gradient(yg, t.vds, axis=-2)
    a = _bicubic(y, fd, yg, fgd, hd, hg)
    vt = _threshold(t, y)
    dvt = np.gradient(vt, t.vsb, axis=-1)
    wvt, wlog = _narrow(t, y, vt)
    return (np.ascontiguousarray(a.reshape(-1, 16), dtype=np.float32), vt, dvt,
            (wvt, wlog, np.gradient(wvt, t.vsb, axis=-1)))


@dataclass(frozen=True, slots=True)
class TableSelect:
    """Which part of a polarity's table each batch element uses: its corner slot and
    temperature [K] (arrays that broadcast with the batch)."""

    table: PolarityTable
    slot: np.ndarray | int
    temp: np.ndarray | float


def check_lengths(t: PolarityTable, l, what: str = "L") -> None:
    """Raise ValueError when a length lies outside the tabulated range."""
    l = np.asarray(l, dtype=float)
    lo, hi = t.lengths[0] * (1 - 1e-9), t.lengths[-1] * (1 + 1e-9)
    bad = (l < lo) | (l > hi)
    if np.any(bad):
        worst = float(l[bad].flat[0]) if l.ndim else float(l)
        raise ValueError(f"{what} = {worst * 1e6:.4g} um is outside the tabulated lengths "
                         f"[{t.lengths[0] * 1e6:.4g}, {t.lengths[-1] * 1e6:.4g}] um")


def check_widths(t: PolarityTable, w, what: str = "W") -> None:
    """Raise ValueError when a width lies below the narrow tabulated width (the narrow-width
    correction is measured between it and w_ref, and only extended towards wider devices)."""
    w = np.atleast_1d(np.asarray(w, dtype=float))
    bad = w < t.w_narrow * (1 - 1e-9)
    if np.any(bad):
        raise ValueError(f"{what} = {float(w[bad][0]) * 1e6:.4g} um is below the narrowest tabulated width "
                         f"{t.w_narrow * 1e6:.4g} um")


def check_temperatures(t: PolarityTable, temp) -> None:
    """Raise ValueError when a temperature [K] lies outside the tabulated range."""
    temp = np.atleast_1d(np.asarray(temp, dtype=float))
    bad = (temp < t.temps[0] - 1e-6) | (temp > t.temps[-1] + 1e-6)
    if np.any(bad):
        raise ValueError(f"temperature {float(temp[bad][0]) - 273.15:.4g} degC is outside the tabulated "
                         f"temperatures [{t.temps[0] - 273.15:.4g}, {t.temps[-1] - 273.15:.4g}] degC")


@dataclass(frozen=True, slots=True)
class TableConstants:
    """Per-instance constants: the rows of the (slot, temperature, length) slices each
    element blends, with their weights, and the current scale W / (w_ref L) (1 + dbeta)."""

    table: PolarityTable
    base: np.ndarray  # (m, k) int64: slice index of each blended slice
    weight: np.ndarray  # (m, k)
    scale: np.ndarray  # (m,)
    dvt: np.ndarray  # (m,) V
    ut: np.ndarray  # (m,) V
    width_scale: np.ndarray  # (m,) W / w_ref, for quantities that scale with W alone
    narrow: np.ndarray  # (m,) (1/W - 1/w_ref) / (1/w_narrow - 1/w_ref): weight of the narrow-width correction

    def take(self, idx) -> "TableConstants":
        """The constants of elements idx (an index array) alone."""
        return TableConstants(self.table, self.base[idx], self.weight[idx], self.scale[idx], self.dvt[idx],
                              self.ut[idx], self.width_scale[idx], self.narrow[idx])


def constants(m: Mos, w, l, dvt=0.0, dbeta=0.0) -> TableConstants:
    """Work out the blending of the table slices for each element, once per device."""
    sel: TableSelect = m.table
    t = sel.table
    w, l, slot, temp, dvt, dbeta, ut = np.broadcast_arrays(
        np.asarray(w, float), np.asarray(l, float), np.asarray(sel.slot), np.asarray(sel.temp, float),
        np.asarray(dvt, float), np.asarray(dbeta, float), np.asarray(m.ut, float))
    w, l, slot, temp, dvt, dbeta, ut = (np.atleast_1d(a).ravel() for a in (w, l, slot, temp, dvt, dbeta, ut))
    nl, nt = len(t.lengths), len(t.temps)
    ll, nodes = np.log(l), np.log(t.lengths)
    kl = np.clip(np.searchsorted(nodes, ll) - 1, 0, nl - 2)
    wl = np.clip((ll - nodes[kl]) / (nodes[kl + 1] - nodes[kl]), 0.0, 1.0)
    if nt == 1:
        kt, wt = np.zeros_like(kl), np.zeros(len(kl))
    else:
        kt = np.clip(np.searchsorted(t.temps, temp) - 1, 0, nt - 2)
        wt = np.clip((temp - t.temps[kt]) / (t.temps[kt + 1] - t.temps[kt]), 0.0, 1.0)
    exact_t = np.all((wt == 0.0) | (wt == 1.0))
    if exact_t:  # every element sits on a tabulated temperature: blend lengths only
        kt = np.where(wt == 1.0, kt + 1, kt)
        pairs = [((0, 0), 1.0 - wl), ((1, 0), wl)]
    else:
        pairs = [((0, 0), (1 - wl) * (1 - wt)), ((1, 0), wl * (1 - wt)), ((0, 1), (1 - wl) * wt), ((1, 1), wl * wt)]
    slot = slot.astype(np.int64)
    base = np.stack([(slot * nt + kt + dt) * nl + kl + dl for (dl, dt), _ in pairs], -1)
    weight = np.stack([wgt for _, wgt in pairs], -1)
    # Narrow width: its threshold shift and current factor enter linearly in 1/W between
    # w_narrow and w_ref (and on towards 1/W = 0 for wider devices), at each VSB (`_forward`).
    f = (1.0 / w - 1.0 / t.w_ref) / (1.0 / t.w_narrow - 1.0 / t.w_ref)
    return TableConstants(t, base, weight, (1.0 + dbeta) * w / (t.w_ref * l), dvt, ut, w / t.w_ref, f)


def _powers(x):
    return np.stack([np.ones_like(x), x, x * x, x * x * x], -1), \
        np.stack([np.zeros_like(x), np.ones_like(x), 2.0 * x, 3.0 * x * x], -1)


# An optional drop-in for `_forward_numpy` with the same arguments and results (a compiled
# loop, installed by the search layer: `set_kernel`); None: the numpy function runs.
_KERNEL = None


def set_kernel(fn) -> None:
    """Evaluate the tables with fn(c, vgs, vds, vsb) instead of the numpy reference
    `_forward_numpy` (None restores it). fn must return what the reference returns."""
    global _KERNEL
    _KERNEL = fn


def _forward(c: TableConstants, vgs, vds, vsb):
    """Frame current (VDS >= 0) and its derivatives with respect to VGS, VDS, VSB: the
    installed kernel, or `_forward_numpy`."""
    return _forward_numpy(c, vgs, vds, vsb) if _KERNEL is None else _KERNEL(c, vgs, vds, vsb)


def _forward_numpy(c: TableConstants, vgs, vds, vsb):
    """Frame current (VDS >= 0) and its derivatives with respect to VGS, VDS, VSB.

    Between two VSB nodes the two node surfaces are blended linearly after aligning their
    thresholds: node j is read at VGS - vt(VSB) + vt_j, with vt(VSB) the cubic Hermite of
    the nodes' constant-current thresholds. The body effect mostly moves the threshold, so
    the aligned surfaces nearly coincide and the blend is accurate on a coarse VSB grid.
    """
    t = c.table
    cells, vt_nodes, dvt_nodes, (wvt_nodes, wlog_nodes, dwvt_nodes) = t.cells()
    nvgs, nvds, nvsb = len(t.vgs), len(t.vds), len(t.vsb)
    hg = t.vgs[1] - t.vgs[0]
    xd = np.sqrt(np.maximum(vds, 0.0) / t.span) * (nvds - 1)
    idd = np.clip(np.floor(xd), 0, nvds - 2).astype(np.int64)
    d0 = t.vds[idd]
    hd = t.vds[idd + 1] - d0
    sd = np.clip((vds - d0) / hd, 0.0, 1.0)
    top = t.vsb[-1]
    xs = np.sqrt(np.maximum(vsb, 0.0) / top) * (nvsb - 1)
    isb = np.clip(np.floor(xs), 0, nvsb - 2).astype(np.int64)
    s0 = t.vsb[isb]
    hsb = t.vsb[isb + 1] - s0
    rs_raw = (vsb - s0) / hsb
    rs = np.clip(rs_raw, 0.0, 1.0)
    # Flat index of each blended slice at its two VSB nodes, (m, k, 2).
    bj = c.base[:, :, None] * nvsb + np.stack([isb, isb + 1], -1)[:, None, :]
    vt_j = vt_nodes.ravel()[bj]
    hs3 = hsb[:, None, None]
    dv_j = dvt_nodes.ravel()[bj] * hs3
    fw = c.narrow[:, None, None]
    own_j = vt_j + fw * wvt_nodes.ravel()[bj]
    own_dv = dv_j + fw * dwvt_nodes.ravel()[bj] * hs3
    wlog = fw * wlog_nodes.ravel()[bj]
    r = rs[:, None]
    r2 = r * r
    r3 = r2 * r
    h00, h10, h01, h11 = 1 - 3 * r2 + 2 * r3, r - 2 * r2 + r3, 3 * r2 - 2 * r3, r3 - r2
    o0, o1, v0, v1 = own_j[..., 0], own_j[..., 1], own_dv[..., 0], own_dv[..., 1]
    vt_q = h00 * o0 + h10 * v0 + h01 * o1 + h11 * v1
    dvt_q = ((6 * r2 - 6 * r) * (o0 - o1) + (1 - 4 * r + 3 * r2) * v0 + (3 * r2 - 2 * r) * v1) / hsb[:, None]
    xg = (vgs[:, None, None] - vt_q[..., None] + vt_j - t.vgs[0]) / hg
    ig = np.clip(np.floor(xg), 0, nvgs - 2).astype(np.int64)
    tg = xg - ig
    tg_c = np.clip(tg, 0.0, 1.0)
    idx = (bj * (nvds - 1) + idd[:, None, None]) * (nvgs - 1) + ig
    a = cells[idx]  # (m, k, 2, 16) float32: [vds power a][vgs power b] -> 4a + b
    s = sd[:, None, None, None]
    # Horner's rule in the VDS coordinate for each VGS power b, p_b = sum_a a[a, b] sd^a, and
    # its derivative; then in the VGS coordinate.
    a0, a1, a2, a3 = a[..., 0:4], a[..., 4:8], a[..., 8:12], a[..., 12:16]
    p = a0 + s * (a1 + s * (a2 + s * a3))
    dp = a1 + s * (2.0 * a2 + 3.0 * s * a3)
    g = tg_c
    val = p[..., 0] + g * (p[..., 1] + g * (p[..., 2] + g * p[..., 3]))
    d_g = (p[..., 1] + g * (2.0 * p[..., 2] + 3.0 * g * p[..., 3])) / hg
    d_d = (dp[..., 0] + g * (dp[..., 1] + g * (dp[..., 2] + g * dp[..., 3]))) / hd[:, None, None]
    val = val + d_g * (tg - tg_c) * hg + wlog  # beyond the VGS grid: linear (Newton iterates only)
    wj = np.stack([1.0 - rs, rs], -1)[:, None, :] * c.weight[:, :, None]
    y = np.sum(wj * val, axis=(1, 2))
    slope_g = np.sum(wj * d_g, axis=2)
    y_g = np.sum(slope_g, axis=1)
    y_d = np.sum(wj * d_d, axis=(1, 2))
    y_s = np.sum(c.weight * (val[..., 1] - val[..., 0]) / hsb[:, None] - slope_g * dvt_q, axis=1)
    y = y + y_s * (rs_raw - rs) * hsb  # beyond the VSB grid: linear (Newton iterates only)
    ut = c.ut
    vpos = np.maximum(vds, 0.0)
    e = np.exp(-vpos / ut)
    gg = -np.expm1(-vpos / ut)
    base = c.scale * np.exp(y)
    i = base * gg
    return i, i * y_g, i * y_d + base * e / ut, i * y_s


def partials_from(c: TableConstants, vgb, vdb, vsb):
    """Frame current and its partials d/dVG, d/dVD, d/dVS (bulk-referenced frame) from the
    per-instance constants of `constants`."""
    vgb, vdb, vsb = (np.atleast_1d(np.asarray(v, float)) for v in (vgb, vdb, vsb))
    vgb, vdb, vsb = np.broadcast_arrays(vgb - c.dvt, vdb, vsb)
    swap = vdb < vsb
    s_ = np.where(swap, vdb, vsb)
    d_ = np.where(swap, vsb, vdb)
    i, i_gs, i_ds, i_sb = _forward(c, vgb - s_, d_ - s_, s_)
    gg, gd, gs = i_gs, i_ds, i_sb - i_gs - i_ds
    # A reversed device is the same device with drain and source exchanged.
    return np.where(swap, -i, i), np.where(swap, -gg, gg), np.where(swap, -gs, gd), np.where(swap, -gd, gs)
