"""SPICE level-1 (Shichman-Hodges) drain current, exactly as ngspice evaluates it: cut-off
below threshold, gamma/phi body effect, channel-length modulation in both regions, LD = 0,
so a stage solved here can be compared with ngspice running the same equations. Voltages
are in the bulk-referenced device frame (see `mos`).

References
----------
H. Shichman, D. A. Hodges, "Modeling and simulation of insulated-gate field-effect
transistor switching circuits", IEEE J. Solid-State Circuits 3(3):285-289, 1968.
"""
from __future__ import annotations

import numpy as np

from .conditions import Mos, early_voltage
from .tech import MosTech


def threshold(m, vsb, dvt):
    """Level-1 threshold with body effect and its slope d vth / d vsb."""
    sphi = np.sqrt(m.phi)
    rev = vsb >= 0.0
    sarg_rev = np.sqrt(m.phi + np.where(rev, vsb, 0.0))
    sarg_fwd = np.maximum(sphi + vsb / (2.0 * sphi), 0.0)
    sarg = np.where(rev, sarg_rev, sarg_fwd)
    dsarg = np.where(rev, 0.5 / sarg_rev, np.where(sarg_fwd > 0.0, 0.5 / sphi, 0.0))
    return m.vt0 + dvt + m.gamma * (sarg - sphi), m.gamma * dsarg


def partials(m, w, l, vgb, vdb, vsb, dvt, dbeta):
    """Frame current and its partials d/dVG, d/dVD, d/dVS (bulk-referenced frame)."""
    swap = vdb < vsb
    vs_ = np.where(swap, vdb, vsb)
    vd_ = np.where(swap, vsb, vdb)
    vth, dvth = threshold(m, vs_, dvt)
    vgst = vgb - vs_ - vth
    vds = vd_ - vs_
    beta = m.kp * (1.0 + dbeta) * np.asarray(w) / np.asarray(l)
    lam = 1.0 / early_voltage(m, l)
    c = 1.0 + lam * vds
    on = vgst > 0.0
    sat = vds >= vgst
    vgst_on = np.where(on, vgst, 0.0)
    i_sat = 0.5 * beta * vgst_on**2 * c
    i_lin = beta * vds * (vgst_on - 0.5 * vds) * c
    i = np.where(on, np.where(sat, i_sat, i_lin), 0.0)
    gg = np.where(on, np.where(sat, beta * vgst_on * c, beta * vds * c), 0.0)
    gd = np.where(
        on,
        np.where(sat, 0.5 * beta * vgst_on**2 * lam, beta * (vgst_on - vds) * c + beta * vds * (vgst_on - 0.5 * vds) * lam),
        0.0,
    )
    gs = -gg * (1.0 + dvth) - gd
    # A reversed device is the same device with drain and source exchanged.
    return (
        np.where(swap, -i, i),
        np.where(swap, -gg, gg),
        np.where(swap, -gs, gd),
        np.where(swap, -gd, gs),
    )




def gate_voltage_sat(m: Mos, w, l, i, vsb, vds, dvt, dbeta):
    """Frame gate voltage VGB for frame current i in saturation (exact); vsb is the frame
    source voltage."""
    c = 1.0 + np.abs(vds) / early_voltage(m, l)
    vth, _ = threshold(m, vsb, dvt)
    beta = m.kp * (1.0 + dbeta) * np.asarray(w) / np.asarray(l)
    return vsb + vth + np.sqrt(2.0 * i / (beta * c))


def source_voltage_sat(m: Mos, w, l, i, vg, vb, c, dvt, dbeta, tied):
    """Physical source voltage for frame current i in saturation with the gate at vg, by
    solving the body-effect quadratic in sqrt(phi + VSB); c = 1 + |VDS|/VA."""
    p = m.polarity
    beta = m.kp * (1.0 + dbeta) * np.asarray(w) / np.asarray(l)
    vov = np.sqrt(2.0 * i / (beta * c))
    if tied:
        return np.asarray(vg) - p * (m.vt0 + dvt + vov)
    sphi = np.sqrt(m.phi)
    const = p * (np.asarray(vg) - vb) + m.phi - m.vt0 - dvt + m.gamma * sphi - vov
    u = 0.5 * (-m.gamma + np.sqrt(m.gamma**2 + 4.0 * np.maximum(const, 0.0)))
    return vb + p * (u * u - m.phi)


def saturation_voltage(m: Mos, w, l, i_abs, slope):
    """VDSsat = VGS - VT = sqrt(2 |i| / beta); with `slope`, also d VDSsat / d|i| [V/A]."""
    beta = m.kp * np.asarray(w) / np.asarray(l)
    v = np.sqrt(2.0 * i_abs / beta)
    return (v, 1.0 / np.sqrt(2.0 * np.maximum(i_abs, 1e-18) * beta)) if slope else v


def capacitances(m: Mos, mt: MosTech, w, l, vgb, vdb, vsb):
    """Small-signal capacitances of one device at a bias point (frame voltages) [F]:
    Meyer's gate capacitances as SPICE level 1 evaluates them, plus overlap.

    With VGST = VGS - VT (VT with body effect), VDSAT = max(VGST, 0.025 V) and
    C0 = Cox W L: VGST <= -phi: cgb = C0; -phi < VGST <= -phi/2: cgb = -VGST C0 / phi;
    -phi/2 < VGST <= 0: cgb as before and cgs = 2/3 C0 + 4/3 C0 VGST / phi (split with
    cgd as below when VDS < VDSAT); VGST > 0: saturation (VDS >= VDSAT) cgs = 2/3 C0,
    cgd = 0; triode cgs = 2/3 C0 (1 - (VDSAT - VDS)^2 / (2 VDSAT - VDS)^2),
    cgd = 2/3 C0 (1 - VDSAT^2 / (2 VDSAT - VDS)^2). Overlap W Cov on the source and
    drain sides (CGSO = CGDO = Cov), none to the bulk. A reversed device (VDS < 0) is the
    same device with drain and source exchanged. cdb = csb = 0 here: the junctions of the
    technology (CJ, CJSW) are added by `mos.capacitances`.

    Returns (cgs, cgd, cgb, cdb, csb), broadcast shape of the inputs.

    References: J. E. Meyer, "MOS models and circuit simulation", RCA Review 32, 1971;
    the level-1 evaluation as in SPICE2/ngspice (from memory).
    """
    vgb, vdb, vsb = (np.asarray(v, dtype=float) for v in (vgb, vdb, vsb))
    swap = vdb < vsb
    vs_ = np.where(swap, vdb, vsb)
    vd_ = np.where(swap, vsb, vdb)
    vth, _ = threshold(m, vs_, 0.0)
    vgst = vgb - vs_ - vth
    vds = vd_ - vs_
    vdsat = np.maximum(vgst, 0.025)
    c0 = mt.cox * np.asarray(w, dtype=float) * np.asarray(l, dtype=float)
    phi = m.phi
    cgb = np.where(vgst <= -phi, c0, np.where(vgst <= 0.0, -vgst * c0 / phi, 0.0))
    depleted = np.where(vgst > -0.5 * phi, 2.0 / 3.0 * c0 + 4.0 / 3.0 * c0 * vgst / phi, 0.0)
    cgs_on = np.where(vgst > 0.0, 2.0 / 3.0 * c0, depleted)
    dif2 = (2.0 * vdsat - vds) ** 2
    tri = vds < vdsat
    cgs = np.where(tri, cgs_on * (1.0 - (vdsat - vds) ** 2 / dif2), cgs_on)
    cgd = np.where(tri, cgs_on * (1.0 - vdsat**2 / dif2), 0.0)
    cov = mt.cov * np.asarray(w, dtype=float)
    cgs, cgd = np.where(swap, cgd, cgs) + cov, np.where(swap, cgs, cgd) + cov
    zero = np.zeros(np.shape(cgs))
    return cgs, cgd, cgb, zero, zero
