"""MOS drain current in all regions (EKV) and the SPICE level-1 square law, one interface.

Validity
--------
EKV: long-channel charge-sheet interpolation, weak through strong inversion, forward and
reverse terms (so triode and saturation alike); constant slope factor n, so a source lifted
above the bulk needs n times its lift more gate voltage (the body effect of this model).
No velocity saturation, no mobility degradation. Square law: the Shichman-Hodges equations
exactly as SPICE level 1 evaluates them (cut-off below threshold, gamma/phi body effect,
channel-length modulation in both regions, LD = 0), so a stage solved here can be compared
with ngspice running the same equations.

Sign convention
---------------
Every function takes physical node voltages and a `Mos` of either polarity. Inside, the
voltages are turned into the device's own frame (bulk referenced, multiplied by the
polarity), so PMOS and NMOS share one code path. The returned current `i` is the frame
current: positive when the device conducts in its natural direction (drain to source for
NMOS, source to drain for PMOS). The physical current into the drain terminal is
`polarity * i`; its derivatives with respect to the physical node voltages are exactly the
frame partials returned by `current_partials`.

References
----------
C. C. Enz, F. Krummenacher, E. A. Vittoz, "An analytical MOS transistor model valid in all
regions of operation and dedicated to low-voltage and low-current applications", Analog
Integrated Circuits and Signal Processing 8(1):83-114, 1995.
H. Shichman, D. A. Hodges, "Modeling and simulation of insulated-gate field-effect
transistor switching circuits", IEEE J. Solid-State Circuits 3(3):285-289, 1968.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import expit

from .constants import thermal_voltage
from .tech import ModelKind, MosTech, Polarity


@dataclass(frozen=True, slots=True)
class Mos:
    """One polarity at one set of operating conditions (corner and temperature applied).

    Fields are floats or arrays that broadcast with the batch, usually shape (n,) or
    (n_design, n_pvt). All SI; vt0 and kp are magnitudes.
    """

    polarity: int  # +1 NMOS, -1 PMOS
    kind: ModelKind
    vt0: np.ndarray | float  # V      threshold magnitude at this temperature and corner
    kp: np.ndarray | float  # A/V^2   mu*Cox at this temperature and corner
    n: float  # 1                    slope factor
    gamma: float  # V^0.5            body-effect coefficient (square law)
    phi: float  # V                  surface potential (square law)
    ut: np.ndarray | float  # V      thermal voltage kT/q
    va_per_l: float  # V/m           Early voltage per metre of length


def at_conditions(
    mt: MosTech,
    polarity: Polarity | int,
    kind: ModelKind,
    temp,
    tnom: float,
    dvt=0.0,
    kp_scale=1.0,
) -> Mos:
    """Apply temperature and a corner shift to one polarity's constants.

    Parameters
    ----------
    mt : MosTech
        Constants at `tnom`.
    polarity : Polarity or int
        +1 NMOS, -1 PMOS.
    kind : ModelKind
        EKV or square law.
    temp : float or ndarray
        Temperature [K], any shape.
    tnom : float
        Temperature at which `mt` holds [K].
    dvt : float or ndarray
        Corner shift added to the threshold magnitude [V].
    kp_scale : float or ndarray
        Corner factor on KP [1].

    Returns
    -------
    Mos
        vt0 = vt0 + dvt - tc_vt (T - Tnom); kp = kp kp_scale (T/Tnom)^mu_exp; ut = kT/q.

    Notes
    -----
    Threshold falls linearly and mobility goes as T^mu_exp with mu_exp about -1.5
    (Allen and Holberg, CMOS Analog Circuit Design, 2nd ed., Sec. 2.5, Eqs. (8) and (9)).
    """
    temp = np.asarray(temp, dtype=float)
    return Mos(
        polarity=int(polarity),
        kind=kind,
        vt0=mt.vt0 + dvt - mt.tc_vt * (temp - tnom),
        kp=mt.kp * kp_scale * (temp / tnom) ** mt.mu_exp,
        n=mt.n,
        gamma=mt.gamma,
        phi=mt.phi,
        ut=thermal_voltage(temp),
        va_per_l=mt.va_per_l,
    )


# ---------------------------------------------------------------------------------------
# EKV interpolation function and its inverse
# ---------------------------------------------------------------------------------------
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


def specific_current(m: Mos, w, l, dbeta=0.0):
    """EKV specific current Ispec = 2 n KP UT^2 W/L [A], broadcast shape of w, l."""
    return 2.0 * m.n * m.kp * (1.0 + dbeta) * m.ut**2 * np.asarray(w) / np.asarray(l)


def inversion_coefficient(m: Mos, w, l, i):
    """IC = Id / Ispec [1]: << 1 weak, about 1 moderate, >> 1 strong inversion."""
    return np.abs(i) / specific_current(m, w, l)


def early_voltage(m: Mos, l):
    """Early voltage VA = va_per_l * L [V]; infinite when length modulation is off."""
    return m.va_per_l * np.asarray(l, dtype=float)


# ---------------------------------------------------------------------------------------
# Drain current and partial derivatives
# ---------------------------------------------------------------------------------------
def _frame(m: Mos, vg, vd, vs, vb):
    p = m.polarity
    return p * (np.asarray(vg) - vb), p * (np.asarray(vd) - vb), p * (np.asarray(vs) - vb)


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


def _ekv(m, w, l, vgb, vdb, vsb, dvt, dbeta):
    return ekv_terms(vgb, vdb, vsb, *ekv_constants(m, w, l, dvt, dbeta))


def _threshold(m, vsb, dvt):
    """Level-1 threshold with body effect and its slope d vth / d vsb."""
    sphi = np.sqrt(m.phi)
    rev = vsb >= 0.0
    sarg_rev = np.sqrt(m.phi + np.where(rev, vsb, 0.0))
    sarg_fwd = np.maximum(sphi + vsb / (2.0 * sphi), 0.0)
    sarg = np.where(rev, sarg_rev, sarg_fwd)
    dsarg = np.where(rev, 0.5 / sarg_rev, np.where(sarg_fwd > 0.0, 0.5 / sphi, 0.0))
    return m.vt0 + dvt + m.gamma * (sarg - sphi), m.gamma * dsarg


def _square_law(m, w, l, vgb, vdb, vsb, dvt, dbeta):
    swap = vdb < vsb
    vs_ = np.where(swap, vdb, vsb)
    vd_ = np.where(swap, vsb, vdb)
    vth, dvth = _threshold(m, vs_, dvt)
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


def current_partials(m: Mos, w, l, vg, vd, vs, vb=0.0, dvt=0.0, dbeta=0.0):
    """Frame drain current and its partial derivatives.

    Parameters
    ----------
    m : Mos
        Device polarity and parameters at its operating conditions.
    w, l : float or ndarray
        Drawn width and length [m].
    vg, vd, vs, vb : float or ndarray
        Physical gate, drain, source and bulk voltages [V]; all inputs broadcast.
    dvt : float or ndarray
        Threshold-magnitude deviation of this instance (mismatch) [V].
    dbeta : float or ndarray
        Relative current-factor deviation of this instance (mismatch) [1].

    Returns
    -------
    i, gg, gd, gs : ndarray
        Frame current [A] (see module notes) and the derivatives of the physical drain
        current polarity*i with respect to the physical gate, drain and source voltages
        [A/V]; the bulk derivative is -(gg + gd + gs). Shape: the broadcast shape.
    """
    vgb, vdb, vsb = _frame(m, vg, vd, vs, vb)
    if m.kind is ModelKind.EKV:
        return _ekv(m, w, l, vgb, vdb, vsb, dvt, dbeta)
    return _square_law(m, w, l, vgb, vdb, vsb, dvt, dbeta)


def current(m: Mos, w, l, vg, vd, vs, vb=0.0, dvt=0.0, dbeta=0.0):
    """Frame drain current [A] (arguments as in `current_partials`); broadcast shape."""
    return current_partials(m, w, l, vg, vd, vs, vb, dvt, dbeta)[0]


# ---------------------------------------------------------------------------------------
# Closed-form inverses and small-signal helpers
# ---------------------------------------------------------------------------------------
def gate_voltage_sat(m: Mos, w, l, i, vs, vb=0.0, vds=0.0, dvt=0.0, dbeta=0.0):
    """Gate voltage that carries current `i` in saturation, closed form.

    Parameters
    ----------
    m : Mos
    w, l : float or ndarray
        [m].
    i : float or ndarray
        Frame current magnitude [A], > 0.
    vs, vb : float or ndarray
        Physical source and bulk voltages [V].
    vds : float or ndarray
        Drain-source voltage magnitude used only in the length-modulation factor [V].
    dvt, dbeta : float or ndarray
        Mismatch deviations as in `current_partials`.

    Returns
    -------
    ndarray
        Physical gate voltage [V], broadcast shape. EKV: VP - VS = 2 UT ln(exp(sqrt(IC)) - 1)
        with the reverse term neglected (exact in deep saturation); square law: exact.
    """
    p = m.polarity
    vsb = p * (np.asarray(vs) - vb)
    if m.kind is ModelKind.EKV:
        return vb + p * ekv_gate_sat(m, vsb, i, vds, *ekv_constants(m, w, l, dvt, dbeta))
    c = 1.0 + np.abs(vds) / early_voltage(m, l)
    vth, _ = _threshold(m, vsb, dvt)
    beta = m.kp * (1.0 + dbeta) * np.asarray(w) / np.asarray(l)
    return vb + p * (vsb + vth + np.sqrt(2.0 * i / (beta * c)))


def ekv_gate_sat(m: Mos, vsb, i, vds, vt, inv_n, half_inv_ut, ispec, inv_va):
    """Bulk-referenced frame gate voltage VGB for frame current i in saturation (EKV,
    reverse term neglected), from the constants of `ekv_constants` (the slope factor and UT
    themselves come from m); vsb is the frame source voltage and vds the drain-source
    magnitude of the length-modulation factor."""
    ic = i / (ispec * (1.0 + np.abs(vds) * inv_va))
    return vt + m.n * (vsb + m.ut * ekv_f_inverse(ic))


def source_voltage_sat(m: Mos, w, l, i, vg, vb=0.0, vds=0.0, dvt=0.0, dbeta=0.0, tied=False):
    """Source voltage at which the device carries `i` in saturation with its gate at vg.

    The inverse of `gate_voltage_sat` for the source (a source follower, or a control
    device whose source is the unknown). `tied` puts the bulk on the source. Closed form:
    EKV as in `gate_voltage_sat`; square law by solving the body-effect quadratic in
    sqrt(phi + VSB). Arguments as in `gate_voltage_sat`; returns the physical voltage.
    """
    p = m.polarity
    c = 1.0 + np.abs(vds) / early_voltage(m, l)
    if m.kind is ModelKind.EKV:
        drop = m.ut * ekv_f_inverse(i / (specific_current(m, w, l, dbeta) * c))  # VP - VS
        if tied:
            return np.asarray(vg) - p * (m.vt0 + dvt + m.n * drop)
        vsb = (p * (np.asarray(vg) - vb) - m.vt0 - dvt) / m.n - drop
        return vb + p * vsb
    beta = m.kp * (1.0 + dbeta) * np.asarray(w) / np.asarray(l)
    vov = np.sqrt(2.0 * i / (beta * c))
    if tied:
        return np.asarray(vg) - p * (m.vt0 + dvt + vov)
    sphi = np.sqrt(m.phi)
    const = p * (np.asarray(vg) - vb) + m.phi - m.vt0 - dvt + m.gamma * sphi - vov
    u = 0.5 * (-m.gamma + np.sqrt(m.gamma**2 + 4.0 * np.maximum(const, 0.0)))
    return vb + p * (u * u - m.phi)


def diode_voltage(m: Mos, w, l, i, vs, vb=0.0, dvt=0.0, dbeta=0.0, iterations=6):
    """Gate (= drain) voltage of a diode-connected device carrying `i`, full model.

    The saturation closed form is the start; a few Newton steps on the complete model
    (reverse term and length modulation with VDS = VGS included) make it exact to
    rounding. Arguments and shapes as in `gate_voltage_sat`; returns the physical voltage.
    """
    p = m.polarity
    vg = gate_voltage_sat(m, w, l, i, vs, vb, 0.0, dvt, dbeta)
    vg = gate_voltage_sat(m, w, l, i, vs, vb, np.asarray(vg) - vs, dvt, dbeta)  # with VDS = VGS in the CLM factor

    def partials(v):
        i_now, gg, gd, _ = current_partials(m, w, l, v, v, vs, vb, dvt, dbeta)
        return i_now, p * gg, p * gd

    return refine_diode(vg, i, partials, iterations)


def refine_diode(vg, i, partials, iterations=6):
    """Newton steps on a diode-connected device's gate (= drain) voltage vg until its
    frame current is i. partials(vg) -> (frame current, its derivatives with respect to
    the physical gate and drain voltages) with the drain on the gate."""
    done = np.zeros(np.shape(vg), dtype=bool)
    for _ in range(iterations):
        i_now, gg, gd = partials(vg)
        # Along vd = vg the frame current changes by gg + gd per volt.
        step = (i_now - i) / (gg + gd)
        # Each element stops on its own (so a result never depends on its batch
        # neighbours); Newton is quadratic here, so after a step below 1e-8 V the error
        # is far below 1e-12 V.
        vg = np.where(done, vg, vg - step)
        done = done | (np.abs(step) < 1e-8)
        if done.all():
            break
    return vg


def saturation_voltage(m: Mos, w, l, i, slope=False):
    """Drain-source voltage magnitude at which the device leaves saturation [V].

    EKV: VDSsat = UT (2 sqrt(IC) + 4), from weak (4 UT, about 0.1 V) to strong inversion
    (Enz, Krummenacher, Vittoz 1995). Square law: VGS - VT = sqrt(2 I / beta). With
    `slope`, also its derivative with respect to the current magnitude [V/A] (the current
    floored at 1e-18 A there, so the slope stays finite).
    """
    i_abs = np.abs(i)
    if m.kind is ModelKind.EKV:
        ispec = specific_current(m, w, l)
        v = m.ut * (2.0 * np.sqrt(i_abs / ispec) + 4.0)
        return (v, m.ut / np.sqrt(np.maximum(i_abs, 1e-18) * ispec)) if slope else v
    beta = m.kp * np.asarray(w) / np.asarray(l)
    v = np.sqrt(2.0 * i_abs / beta)
    return (v, 1.0 / np.sqrt(2.0 * np.maximum(i_abs, 1e-18) * beta)) if slope else v


def gate_capacitance(mt: MosTech, w, l, ic):
    """Gate capacitance a driver sees at this device's gate [F] (early-design estimate).

    Intrinsic part interpolated in IC between the weak-inversion depletion value
    Cox W L (n-1)/n and the strong-inversion saturation value 2/3 Cox W L, plus the
    overlap capacitance on both sides, 2 W Cov. Broadcast shape of w, l, ic.
    """
    w = np.asarray(w, dtype=float)
    frac = ((mt.n - 1.0) / mt.n + (2.0 / 3.0) * ic) / (1.0 + ic)
    return mt.cox * w * np.asarray(l) * frac + 2.0 * mt.cov * w
