"""EKV all-region drain current: the interpolation function F, its inverse, the current with
its partial derivatives from per-instance constants, the saturation closed forms.

Validity: long-channel charge-sheet interpolation, weak through strong inversion, forward
and reverse terms (so triode and saturation alike); constant slope factor n, so a source
lifted above the bulk needs n times its lift more gate voltage. No velocity saturation, no
mobility degradation. Voltages are in the bulk-referenced device frame (see `mos`).

References
----------
C. C. Enz, F. Krummenacher, E. A. Vittoz, "An analytical MOS transistor model valid in all
regions of operation and dedicated to low-voltage and low-current applications", Analog
Integrated Circuits and Signal Processing 8(1):83-114, 1995.
"""
from __future__ import annotations

import numpy as np
from scipy.special import expit

from .conditions import Mos, early_voltage, specific_current
from .tech import MosTech


def ekv_f(x):
    """EKV interpolation F(x) = ln^2(1 + exp(x/2)); x normalised to UT, any shape."""
    return np.logaddexp(0.0, 0.5 * np.asarray(x, dtype=float)) ** 2


def ekv_f_prime(x):
    """Derivative dF/dx = ln(1 + exp(x/2)) / (1 + exp(-x/2)), any shape."""
    x = np.asarray(x, dtype=float)
    return np.logaddexp(0.0, 0.5 * x) * expit(0.5 * x)


def ekv_f_inverse(ic):
    """Inverse of F: x = 2 ln(exp(sqrt(ic)) - 1), stable from ic = 1e-12 to 1e12.

    Written as 2 (s + ln(1 - exp(-s))), s = sqrt(ic): expm1 keeps 1 - exp(-s) exact for
    small s, and for large s the logarithm tends to 0 without overflow.
    """
    s = np.sqrt(np.asarray(ic, dtype=float))
    return 2.0 * (s + np.log(-np.expm1(-s)))


def ekv_constants(m: Mos, w, l, dvt=0.0, dbeta=0.0):
    """Per-instance constants of the EKV current, for repeated evaluation.

    Returns (vt, 1/n, 1/(2 UT), Ispec, 1/VA): threshold magnitude with the instance's
    deviation [V], inverse slope factor, half the inverse thermal voltage [1/V], specific
    current with the instance's current-factor deviation [A], inverse Early voltage [1/V].
    """
    return (m.vt0 + dvt, 1.0 / m.n, 0.5 / m.ut, specific_current(m, w, l, dbeta), 1.0 / early_voltage(m, l))


def ekv_terms(vgb, vdb, vsb, vt, inv_n, half_inv_ut, ispec, inv_va):
    """EKV frame current and its partials from the constants of `ekv_constants`.

    Forward and reverse terms F((VP - VS)/UT) and F((VP - VD)/UT), with
    ln(1 + e^h) and its derivative 1/(1 + e^-h) taken from one exponential each; h is
    capped at 700 (VP 700 x 2 UT above the source, beyond any supply), where ln(1 + e^h)
    equals h to rounding. Returns (i, d/dVG, d/dVD, d/dVS) in the bulk-referenced frame.
    """
    vp = (vgb - vt) * inv_n
    ef = np.exp(np.minimum((vp - vsb) * half_inv_ut, 700.0))
    er = np.exp(np.minimum((vp - vdb) * half_inv_ut, 700.0))
    lf = np.log1p(ef)
    lr = np.log1p(er)
    vds = vdb - vsb
    clm = 1.0 + np.abs(vds) * inv_va
    k = ispec * clm  # Ispec times length modulation
    i0 = k * (lf * lf - lr * lr)  # current with length modulation
    kd = k * (2.0 * half_inv_ut)
    dff = kd * lf * (ef / (1.0 + ef))  # k dF/dx / UT, forward
    dfr = kd * lr * (er / (1.0 + er))
    s = i0 * (np.copysign(inv_va, vds) / clm)  # d(length modulation)/dVDS share
    return i0, (dff - dfr) * inv_n, dfr + s, -(dff + s)


def partials(m, w, l, vgb, vdb, vsb, dvt, dbeta):
    """Frame current and its partials (as `ekv_terms`) from the device parameters."""
    return ekv_terms(vgb, vdb, vsb, *ekv_constants(m, w, l, dvt, dbeta))


def ekv_gate_sat(m: Mos, vsb, i, vds, vt, inv_n, half_inv_ut, ispec, inv_va):
    """Bulk-referenced frame gate voltage VGB for frame current i in saturation (EKV,
    reverse term neglected), from the constants of `ekv_constants` (the slope factor and UT
    themselves come from m); vsb is the frame source voltage and vds the drain-source
    magnitude of the length-modulation factor."""
    ic = i / (ispec * (1.0 + np.abs(vds) * inv_va))
    return vt + m.n * (vsb + m.ut * ekv_f_inverse(ic))



def gate_voltage_sat(m: Mos, w, l, i, vsb, vds, dvt, dbeta):
    """Frame gate voltage VGB for frame current i in saturation, reverse term neglected
    (exact in deep saturation); vsb is the frame source voltage."""
    return ekv_gate_sat(m, vsb, i, vds, *ekv_constants(m, w, l, dvt, dbeta))


def source_voltage_sat(m: Mos, w, l, i, vg, vb, c, dvt, dbeta, tied):
    """Physical source voltage for frame current i in saturation with the gate at vg; c is
    the length-modulation factor 1 + |VDS|/VA."""
    p = m.polarity
    drop = m.ut * ekv_f_inverse(i / (specific_current(m, w, l, dbeta) * c))  # VP - VS
    if tied:
        return np.asarray(vg) - p * (m.vt0 + dvt + m.n * drop)
    vsb = (p * (np.asarray(vg) - vb) - m.vt0 - dvt) / m.n - drop
    return vb + p * vsb


def saturation_voltage(m: Mos, w, l, i_abs, slope):
    """VDSsat = UT (2 sqrt(IC) + 4), from weak (4 UT, about 0.1 V) to strong inversion
    (Enz, Krummenacher, Vittoz 1995); with `slope`, also d VDSsat / d|i| [V/A]."""
    ispec = specific_current(m, w, l)
    v = m.ut * (2.0 * np.sqrt(i_abs / ispec) + 4.0)
    return (v, m.ut / np.sqrt(np.maximum(i_abs, 1e-18) * ispec)) if slope else v


def capacitances(m: Mos, mt: MosTech, w, l, vgb, vdb, vsb):
    """Small-signal capacitances of one device at a bias point (frame voltages) [F].

    Intrinsic part from the normalised inversion charges of the charge-based model,
    qs = sqrt(1/4 + if) - 1/2 and qd = sqrt(1/4 + ir) - 1/2 (if, ir the forward and
    reverse inversion coefficients):
    cgs = Cox W L qs (2 qs + 4 qd + 3) / (3 (qs + qd + 1)^2), cgd the same with qs and qd
    exchanged, cgb = Cox W L (n - 1)/n (1 - cgs/(Cox W L) - cgd/(Cox W L)).
    Limits: strong-inversion saturation cgs = 2/3 Cox W L, cgd = 0; triode at VDS = 0
    cgs = cgd = 1/2 Cox W L; weak inversion cgb = Cox W L (n - 1)/n. Overlap W Cov on both
    the source and the drain side. cdb = csb = 0 here: the technology's junctions (CJ, CJSW)
    are added by `mos.capacitances`.

    Returns (cgs, cgd, cgb, cdb, csb), broadcast shape of the inputs.

    References: C. C. Enz, E. A. Vittoz, Charge-Based MOS Transistor Modeling, Wiley 2006,
    ch. 4 (intrinsic capacitances in terms of the normalised charges; from memory).
    """
    vp = (np.asarray(vgb, dtype=float) - m.vt0) / m.n
    i_f = ekv_f((vp - np.asarray(vsb)) / m.ut)
    i_r = ekv_f((vp - np.asarray(vdb)) / m.ut)
    qs = np.sqrt(0.25 + i_f) - 0.5
    qd = np.sqrt(0.25 + i_r) - 0.5
    den = 3.0 * (qs + qd + 1.0) ** 2
    c_s = qs * (2.0 * qs + 4.0 * qd + 3.0) / den
    c_d = qd * (2.0 * qd + 4.0 * qs + 3.0) / den
    w = np.asarray(w, dtype=float)
    cwl = mt.cox * w * np.asarray(l, dtype=float)
    cov = mt.cov * w
    zero = np.zeros(np.broadcast(cwl, c_s).shape)
    return cwl * c_s + cov, cwl * c_d + cov, cwl * (m.n - 1.0) / m.n * (1.0 - c_s - c_d), zero, zero
