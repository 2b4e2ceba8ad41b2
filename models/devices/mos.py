"""The device interface every stage uses, whatever the model kind: drain current with partial
derivatives, closed-form inverses (gate and source voltage in saturation, diode voltage),
saturation voltage, gate capacitance and the small-signal capacitances. Each kind's
equations live in its own module (`ekv`, `square_law`, `table`); this one dispatches on `Mos.kind`.

Every kind module implements `partials(m, w, l, vgb, vdb, vsb, dvt, dbeta)` and
`capacitances(m, mt, w, l, vgb, vdb, vsb)`: m the `Mos` at its conditions, mt the
`MosTech` of the polarity (cox, cov and whatever else the kind needs), w, l [m], frame
voltages [V] (bulk referenced, times the polarity); it returns (cgs, cgd, cgb, cdb, csb)
[F], each the broadcast shape: gate-source and gate-drain (intrinsic plus overlap),
gate-bulk, and the drain-bulk and source-bulk capacitances the kind models itself (none of
the three has any: 0), all >= 0. `capacitances` here adds the source and drain junctions of
the technology (`junction_capacitance`).

Validity
--------
Table: the user's card tabulated by ngspice at every length, corner and temperature
(`table_data`), interpolated with its derivatives; what the card models, the table holds.
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

import numpy as np

from . import ekv, square_law, table
from .conditions import (
    Mos,
    at_conditions,
    early_voltage,
    frame,
    inversion_coefficient,
    specific_current,
)
from .ekv import (
    ekv_constants,
    ekv_f,
    ekv_f_inverse,
    ekv_f_prime,
    ekv_gate_sat,
    ekv_terms,
)
from .tech import ModelKind, MosTech

__all__ = [
    "Mos", "at_conditions", "early_voltage", "inversion_coefficient", "specific_current",
    "ekv_constants", "ekv_f", "ekv_f_inverse", "ekv_f_prime", "ekv_gate_sat", "ekv_terms",
    "current_partials", "current", "gate_voltage_sat", "source_voltage_sat", "diode_voltage",
    "refine_diode", "saturation_voltage", "gate_capacitance", "capacitances",
]

_KINDS = {ModelKind.EKV: ekv, ModelKind.SQUARE_LAW: square_law, ModelKind.TABLE: table}


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
    vgb, vdb, vsb = frame(m, vg, vd, vs, vb)
    return _KINDS[m.kind].partials(m, w, l, vgb, vdb, vsb, dvt, dbeta)


def current(m: Mos, w, l, vg, vd, vs, vb=0.0, dvt=0.0, dbeta=0.0):
    """Frame drain current [A] (arguments as in `current_partials`); broadcast shape."""
    return current_partials(m, w, l, vg, vd, vs, vb, dvt, dbeta)[0]


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
    return vb + p * _KINDS[m.kind].gate_voltage_sat(m, w, l, i, vsb, vds, dvt, dbeta)


def source_voltage_sat(m: Mos, w, l, i, vg, vb=0.0, vds=0.0, dvt=0.0, dbeta=0.0, tied=False):
    """Source voltage at which the device carries `i` in saturation with its gate at vg.

    The inverse of `gate_voltage_sat` for the source (a source follower, or a control
    device whose source is the unknown). `tied` puts the bulk on the source. Closed form:
    EKV as in `gate_voltage_sat`; square law by solving the body-effect quadratic in
    sqrt(phi + VSB). Arguments as in `gate_voltage_sat`; returns the physical voltage.
    """
    if m.kind is ModelKind.TABLE:  # the table knows VDS itself
        return table.source_voltage_sat(m, w, l, i, vg, vb, vds, dvt, dbeta, tied)
    c = 1.0 + np.abs(vds) / early_voltage(m, l)
    return _KINDS[m.kind].source_voltage_sat(m, w, l, i, vg, vb, c, dvt, dbeta, tied)


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
    return _KINDS[m.kind].saturation_voltage(m, w, l, np.abs(i), slope)


def gate_capacitance(mt: MosTech, w, l, ic):
    """Gate capacitance a driver sees at this device's gate [F] (early-design estimate).

    Intrinsic part interpolated in IC between the weak-inversion depletion value
    Cox W L (n-1)/n and the strong-inversion saturation value 2/3 Cox W L, plus the
    overlap capacitance on both sides, 2 W Cov. Broadcast shape of w, l, ic.
    """
    w = np.asarray(w, dtype=float)
    frac = ((mt.n - 1.0) / mt.n + (2.0 / 3.0) * ic) / (1.0 + ic)
    return mt.cox * w * np.asarray(l) * frac + 2.0 * mt.cov * w


# SPICE's forward-bias coefficient FC: beyond FC x PB of forward bias the depletion formula
# is continued by its tangent (SPICE2 and ngspice default 0.5).
FC = 0.5


def junction_capacitance(c0, m, pb, v_reverse):
    """Depletion capacitance of a junction [F] with zero-bias capacitance c0 [F], grading
    exponent m and built-in potential pb [V] at reverse bias v_reverse [V] (negative:
    forward bias). c0 / (1 + v/pb)^m while the forward bias stays below FC pb; beyond it
    the tangent c0 (1 - FC)^-(1 + m) (1 - FC (1 + m) - m v / pb), as SPICE level 1
    evaluates it.

    Reference: P. Antognetti, G. Massobrio, *Semiconductor Device Modeling with SPICE*,
    2nd ed., McGraw-Hill 1993, ch. 1 (the diode's depletion capacitance) and ch. 3 (the
    MOS bulk junctions, area and sidewall terms); from memory. Checked against ngspice's
    level 1 in the tests.
    """
    c0 = np.asarray(c0, dtype=float)
    vf = -np.asarray(v_reverse, dtype=float)  # forward bias
    lim = FC * pb
    depl = np.power(np.maximum(1.0 - np.minimum(vf, lim) / pb, 1e-12), -m)
    lin = (1.0 - FC) ** (-1.0 - m) * (1.0 - FC * (1.0 + m) + m * vf / pb)
    return c0 * np.where(vf < lim, depl, lin)


def junctions(mt: MosTech, area, perimeter, v_reverse):
    """Bottom (area) plus sidewall (perimeter) junction capacitance of one diffusion [F]."""
    return (junction_capacitance(mt.cj * np.asarray(area), mt.mj, mt.pb, v_reverse)
            + junction_capacitance(mt.cjsw * np.asarray(perimeter), mt.mjsw, mt.pbsw, v_reverse))


def capacitances(m: Mos, mt: MosTech, w, l, vg, vd, vs, vb=0.0, diffusion=None):
    """Small-signal capacitances of a device at a bias point [F].

    Parameters
    ----------
    m : Mos
        Device polarity and parameters at its operating conditions.
    mt : MosTech
        The polarity's technology constants (cox, cov).
    w, l : float or ndarray
        Drawn width and length [m].
    vg, vd, vs, vb : float or ndarray
        Physical node voltages [V] (vb = vs for a device in its own well).
    diffusion : (area, perimeter) or None
        Each of the source and drain diffusions [m^2], [m] (`Tech.diffusion`), for the
        junctions of mt (cj, cjsw); None: no junction capacitance.

    Returns
    -------
    cgs, cgd, cgb, cdb, csb : ndarray
        Gate-source and gate-drain (intrinsic plus overlap), gate-bulk, drain-bulk and
        source-bulk capacitances [F], each the broadcast shape; see the kind modules. The
        drain-bulk and source-bulk junctions are reverse biased by the frame VDB and VSB.
    """
    vgb, vdb, vsb = frame(m, vg, vd, vs, vb)
    cgs, cgd, cgb, cdb, csb = _KINDS[m.kind].capacitances(m, mt, w, l, vgb, vdb, vsb)
    if diffusion is None or (mt.cj == 0.0 and mt.cjsw == 0.0):
        return cgs, cgd, cgb, cdb, csb
    area, perimeter = diffusion
    return cgs, cgd, cgb, cdb + junctions(mt, area, perimeter, vdb), csb + junctions(mt, area, perimeter, vsb)
