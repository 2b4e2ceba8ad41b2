"""The `table` model kind's interface, as every kind has it (`mos` dispatches here): current
with partial derivatives, the saturation inverses by vectorised Newton steps, saturation
voltage, tabulated small-signal quantities and the check that a solved operating point lies
inside the table. The arrays and their interpolation are `table_data` (see its notes).
"""
from __future__ import annotations

import numpy as np

from .conditions import Mos
from .table_data import (
    _FLOOR,
    TableConstants,
    TableSelect,
    _forward,
    constants,
    partials_from,
)


def _shape(m, *arrays):
    return np.broadcast(*(np.asarray(a) for a in arrays), np.asarray(m.table.slot), np.asarray(m.table.temp),
                        np.asarray(m.ut), np.asarray(m.vt0), np.asarray(m.kp)).shape


def _flat(shape, *arrays):
    return [np.broadcast_to(np.asarray(a, dtype=float), shape).ravel() for a in arrays]


def partials(m, w, l, vgb, vdb, vsb, dvt, dbeta):
    """Frame current and its partials (the interface of every model kind)."""
    shape = _shape(m, w, l, vgb, vdb, vsb, dvt, dbeta)
    w, l, vgb, vdb, vsb, dvt, dbeta = _flat(shape, w, l, vgb, vdb, vsb, dvt, dbeta)
    c = constants(_flat_mos(m, shape), w, l, dvt, dbeta)
    return tuple(np.reshape(x, shape) for x in partials_from(c, vgb, vdb, vsb))


def _flat_mos(m: Mos, shape):
    sel = m.table
    slot = np.broadcast_to(np.asarray(sel.slot), shape).ravel()
    temp = np.broadcast_to(np.asarray(sel.temp, float), shape).ravel()
    ut, vt0, kp = (np.broadcast_to(np.asarray(a, float), shape).ravel() for a in (m.ut, m.vt0, m.kp))
    return Mos(m.polarity, m.kind, vt0, kp, m.n, m.gamma, m.phi, ut, m.va_per_l,
               TableSelect(sel.table, slot, temp))


# ---------------------------------------------------------------------------------------
# Inverses by vectorised Newton steps on ln I (the start from the technology's summary
# EKV constants; ln I is smooth and nearly linear in VGS, so a few steps suffice)
# ---------------------------------------------------------------------------------------
def _vds_for(vds, span):
    """The VDS a saturation inverse uses: the one given, or half the span where none is."""
    vds = np.abs(np.asarray(vds, dtype=float))
    return np.where(vds > 0.0, vds, 0.5 * span)


def _start_vgs(m: Mos, w, l, i):
    from .conditions import specific_current
    from .ekv import ekv_f_inverse
    return m.vt0 + m.n * m.ut * ekv_f_inverse(np.maximum(i, _FLOOR) / specific_current(m, w, l))


# Consecutive full (clipped) steps after which an element is left where it is: 12 x 0.3 V
# is beyond every tabulated VGS and VSB span, so its root, if any, lies outside the tables
# (the bracket ends of an outer solve put a diode's source volts beyond the rails, say,
# where only the sign of the answer is used).
GIVE_UP = 12


def _newton(fun, x, iterations=40, clip=0.3):
    """Element-wise Newton on fun(x, idx) -> (residual in ln I, its derivative) of the
    elements idx at their values x. Only the elements not yet converged are evaluated;
    each element's iterates depend on it alone, so the answer is what iterating every
    element to the last step would give, and a few slow elements cost only their own work.
    An element that takes `GIVE_UP` full steps in a row is not followed further."""
    shape = np.shape(x)
    x = np.array(x, dtype=float).ravel()
    idx = np.arange(x.size)
    full = np.zeros(x.size, dtype=int)
    for _ in range(iterations):
        r, d = fun(x[idx], idx)
        step = np.clip(r / np.where(np.abs(d) > 1e-30, d, 1e-30), -clip, clip)
        x[idx] = x[idx] - step
        full[idx] = np.where(np.abs(step) >= clip, full[idx] + 1, 0)
        idx = idx[(np.abs(step) >= 1e-10) & (full[idx] < GIVE_UP)]
        if idx.size == 0:
            break
    return x.reshape(shape)


def _part(c: TableConstants, idx, *arrays):
    """The constants and the arrays of elements idx (all of them: as they are)."""
    m = c.scale.shape[0]
    arrays = tuple(np.broadcast_to(np.asarray(a, dtype=float), (m,)) for a in arrays)
    if idx.size == m:
        return (c, *arrays)
    return (c.take(idx), *(a[idx] for a in arrays))


def gate_from(c: TableConstants, m: Mos, w, l, i, vsb, vds):
    """Frame VGB carrying frame current i with the given frame VSB and VDS (element-wise)."""
    target = np.log(np.maximum(i, _FLOOR))

    def fun(vgs, idx):
        cc, vds_, vsb_, target_ = _part(c, idx, vds, vsb, target)
        cur, gg, _, _ = _forward(cc, vgs - cc.dvt, vds_, vsb_)
        return np.log(np.maximum(cur, _FLOOR)) - target_, gg / np.maximum(cur, _FLOOR)

    return vsb + _newton(fun, _start_vgs(m, w, l, i) + c.dvt)


def gate_voltage_sat(m, w, l, i, vsb, vds, dvt, dbeta):
    """Frame gate voltage VGB for frame current i with drain VDS above the source (VDS = 0:
    half the tabulated span, i.e. in saturation); vsb is the frame source voltage."""
    shape = _shape(m, w, l, i, vsb, vds, dvt, dbeta)
    w, l, i, vsb, vds, dvt, dbeta = _flat(shape, w, l, i, vsb, vds, dvt, dbeta)
    mf = _flat_mos(m, shape)
    c = constants(mf, w, l, dvt, dbeta)
    return gate_from(c, mf, w, l, i, vsb, _vds_for(vds, c.table.span)).reshape(shape)


def source_from(c: TableConstants, m: Mos, w, l, i, vg, vb, vds, tied):
    """Physical source voltage for frame current i with the gate at vg, the drain VDS above
    the source (frame) and the bulk at vb or on the source."""
    p = m.polarity
    vgb = p * (vg - vb)
    target = np.log(np.maximum(i, _FLOOR))
    start = vgb - _start_vgs(m, w, l, i) - c.dvt  # frame source voltage, bulk-referenced

    def fun(vsb, idx):
        cc, vgb_, vds_, target_ = _part(c, idx, vgb, vds, target)
        sb = np.zeros_like(vsb) if tied else vsb
        cur, i_gs, _, i_sb = _forward(cc, vgb_ - vsb - cc.dvt, vds_, np.maximum(sb, 0.0))
        d = -i_gs + (0.0 if tied else i_sb)
        return np.log(np.maximum(cur, _FLOOR)) - target_, d / np.maximum(cur, _FLOOR)

    return vb + p * _newton(fun, start)


def source_voltage_sat(m, w, l, i, vg, vb, vds, dvt, dbeta, tied):
    """Physical source voltage for frame current i in saturation with the gate at vg."""
    shape = _shape(m, w, l, i, vg, vb, vds, dvt, dbeta)
    w, l, i, vg, vb, vds, dvt, dbeta = _flat(shape, w, l, i, vg, vb, vds, dvt, dbeta)
    mf = _flat_mos(m, shape)
    c = constants(mf, w, l, dvt, dbeta)
    return source_from(c, mf, w, l, i, vg, vb, _vds_for(vds, c.table.span), tied).reshape(shape)


def diode_from(c: TableConstants, m: Mos, w, l, i, vs, vb, tied):
    """Gate (= drain) voltage of the device diode-connected, carrying frame current i."""
    p = m.polarity
    vsb = np.zeros_like(vs) if tied else p * (vs - vb)
    target = np.log(np.maximum(i, _FLOOR))

    def fun(vgs, idx):
        cc, vsb_, target_ = _part(c, idx, vsb, target)
        cur, i_gs, i_ds, _ = _forward(cc, vgs - cc.dvt, vgs, vsb_)
        return np.log(np.maximum(cur, _FLOOR)) - target_, (i_gs + i_ds) / np.maximum(cur, _FLOOR)

    return vs + p * _newton(fun, _start_vgs(m, w, l, i) + c.dvt)


def saturation_from(c: TableConstants, m: Mos, w, l, i_abs, slope=False):
    """Saturation voltage from the tabulated gm/ID at current i_abs (VSB = 0, half-span VDS).

    The inversion coefficient is read from the measured gm/ID through the EKV relation
    gm n UT / ID = 2 / (1 + sqrt(1 + 4 IC)) (Enz, Krummenacher, Vittoz 1995), with n the
    technology's slope factor; then VDSsat = UT (2 sqrt(IC) + 4) as for the EKV kind, so the
    drive limits keep one meaning across kinds.
    """
    i_abs = np.maximum(np.asarray(i_abs, dtype=float), 1e-18)
    zero = np.zeros_like(i_abs)
    vds = np.full_like(i_abs, 0.5 * c.table.span)
    vgs = gate_from(c, m, w, l, i_abs, zero, vds)
    cur, gm, _, _ = _forward(c, vgs - c.dvt, vds, zero)
    q = np.clip(gm * m.n * c.ut / np.maximum(cur, _FLOOR), 1e-6, 1.0)
    ic = np.maximum(((2.0 / q - 1.0) ** 2 - 1.0) / 4.0, 0.0)
    v = c.ut * (2.0 * np.sqrt(ic) + 4.0)
    return (v, c.ut * np.sqrt(ic) / i_abs) if slope else v


def saturation_voltage(m, w, l, i_abs, slope):
    """VDSsat from the tabulated gm/ID (see `saturation_from`); with `slope`, also its
    derivative with respect to the current magnitude [V/A] (IC taken proportional to it)."""
    shape = _shape(m, w, l, i_abs)
    w, l, i_abs = _flat(shape, w, l, i_abs)
    mf = _flat_mos(m, shape)
    out = saturation_from(constants(mf, w, l), mf, w, l, i_abs, slope)
    return tuple(o.reshape(shape) for o in out) if slope else out.reshape(shape)


# ---------------------------------------------------------------------------------------
# Small-signal quantities as tabulated (capacitances), multilinear in every axis
# ---------------------------------------------------------------------------------------
def quantity(c: TableConstants, name: str, vgb, vdb, vsb):
    """A tabulated quantity (e.g. "cgg") at frame voltages, scaled to the instance's width
    (W / w_ref), multilinear in VGS, VDS, VSB between grid nodes; for a reversed device the
    tabulated value of the exchanged device (names keep their terminals: cgs <-> cgd)."""
    vgb, vdb, vsb = np.broadcast_arrays(*(np.atleast_1d(np.asarray(v, float)) for v in (vgb, vdb, vsb)))
    vgb = vgb - c.dvt
    swap = vdb < vsb
    s_ = np.where(swap, vdb, vsb)
    d_ = np.where(swap, vsb, vdb)
    if name in ("cgs", "cgd"):
        other = {"cgs": "cgd", "cgd": "cgs"}[name]
        a, b = quantity_forward(c, name, vgb - s_, d_ - s_, s_), quantity_forward(c, other, vgb - s_, d_ - s_, s_)
        return np.where(swap, b, a)
    return quantity_forward(c, name, vgb - s_, d_ - s_, s_)


def quantity_forward(c: TableConstants, name: str, vgs, vds, vsb):
    t = c.table
    arr = t.data[name].reshape(-1, len(t.vsb), len(t.vds), len(t.vgs))
    out = np.zeros(len(vgs))
    axes = []
    for x, nodes in ((vsb, t.vsb), (np.clip(vds, 0.0, t.span), t.vds), (vgs, t.vgs)):
        k = np.clip(np.searchsorted(nodes, x) - 1, 0, len(nodes) - 2)
        f = np.clip((x - nodes[k]) / (nodes[k + 1] - nodes[k]), 0.0, 1.0)
        axes.append((k, f))
    (ks, fs), (kd, fd), (kg, fg) = axes
    for j in range(c.base.shape[1]):
        b, wgt = c.base[:, j], c.weight[:, j]
        for a_s in (0, 1):
            for a_d in (0, 1):
                for a_g in (0, 1):
                    f = (fs if a_s else 1 - fs) * (fd if a_d else 1 - fd) * (fg if a_g else 1 - fg)
                    out += wgt * f * arr[b, ks + a_s, kd + a_d, kg + a_g]
    return out * c.width_scale


def capacitances(m: Mos, mt, w, l, vgb, vdb, vsb):
    """Small-signal capacitances of one device at a bias point (frame voltages) [F], from
    the card as tabulated (the interface of every kind; see `mos.capacitances`).

    ngspice reports BSIM's intrinsic transcapacitances: cgg = dQg/dVg and cgs = dQg/dVs,
    cgd = dQg/dVd (both negative), without the overlap charges. So the intrinsic
    gate-source part is -cgs, gate-drain -cgd, gate-bulk cgg + cgs + cgd (the rest of the
    gate charge), each clipped at zero, and the overlap W Cov of the technology's summary
    constants is added on the source and drain sides. The tables hold no junction data
    (the tabulation draws no source or drain area): cdb = csb = 0 here, and the junctions of
    the technology's summary constants (CJ, CJSW, measured from the card by calibrate) are
    added by `mos.capacitances`, as for the analytic kinds.

    Returns (cgs, cgd, cgb, cdb, csb), broadcast shape of the inputs.

    Reference: BSIM3v3.2 manual (UC Berkeley, 1998), ch. 5, for the charge partition and the
    transcapacitance signs (from memory); the signs here were read off ngspice's output.
    """
    shape = _shape(m, w, l, vgb, vdb, vsb)
    w, l, vgb, vdb, vsb = _flat(shape, w, l, vgb, vdb, vsb)
    c = constants(_flat_mos(m, shape), w, l)
    cgg, cgs, cgd = (quantity(c, q, vgb, vdb, vsb) for q in ("cgg", "cgs", "cgd"))
    ov = mt.cov * w
    c_gs, c_gd = np.maximum(-cgs, 0.0), np.maximum(-cgd, 0.0)
    c_gb = np.maximum(cgg - c_gs - c_gd, 0.0)
    zero = np.zeros(shape)
    return (np.reshape(c_gs + ov, shape), np.reshape(c_gd + ov, shape), np.reshape(c_gb, shape), zero, zero)


def gate_capacitance_from(c: TableConstants, m: Mos, w, l, i_abs):
    """Gate capacitance cgg [F] as ngspice reports it (BSIM's intrinsic part, no overlap: the
    caller adds 2 W cov), at the VGS that carries i_abs in saturation, VSB = 0, half-span VDS."""
    i_abs = np.maximum(np.asarray(i_abs, dtype=float), 1e-18)
    zero = np.zeros_like(i_abs)
    vds = np.full_like(i_abs, 0.5 * c.table.span)
    vgs = gate_from(c, m, w, l, i_abs, zero, vds)
    return np.abs(quantity_forward(c, "cgg", vgs - c.dvt, vds, zero))


def outside_table(t, vgb, vdb, vsb, dvt=0.0):
    """Mask of elements whose frame voltages leave the tabulated grid: VGS (after the
    instance's threshold shift) above it, |VDS| beyond the span, or the source (the lower of
    source and drain) below the bulk or above the top VSB. Below the lowest VGS the device
    is in cut-off and not flagged (see `table_data`)."""
    tol = 1e-6
    s_ = np.minimum(vdb, vsb)
    d_ = np.maximum(vdb, vsb)
    return (vgb - dvt - s_ > t.vgs[-1] + tol) | (d_ - s_ > t.span + tol) | (s_ < -tol) | (s_ > t.vsb[-1] + tol)
