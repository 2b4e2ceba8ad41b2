"""One device polarity at its operating conditions (corner and temperature applied), and the
quantities every model kind derives from it: specific current, inversion coefficient,
Early voltage, and the bulk-referenced frame of the shared sign convention (see `mos`).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

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
    table: object = None  # table kind: `table_data.TableSelect` (corner slot, temperature)


def at_conditions(
    mt: MosTech,
    polarity: Polarity | int,
    kind: ModelKind,
    temp,
    tnom: float,
    dvt=0.0,
    kp_scale=1.0,
    table=None,
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
    table : TableSelect, optional
        Table kind: the tabulated device with each element's corner slot and temperature.

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
        table=table,
    )



def specific_current(m: Mos, w, l, dbeta=0.0):
    """EKV specific current Ispec = 2 n KP UT^2 W/L [A], broadcast shape of w, l."""
    return 2.0 * m.n * m.kp * (1.0 + dbeta) * m.ut**2 * np.asarray(w) / np.asarray(l)


def inversion_coefficient(m: Mos, w, l, i):
    """IC = Id / Ispec [1]: << 1 weak, about 1 moderate, >> 1 strong inversion."""
    return np.abs(i) / specific_current(m, w, l)


def early_voltage(m: Mos, l):
    """Early voltage VA = va_per_l * L [V]; infinite when length modulation is off."""
    return m.va_per_l * np.asarray(l, dtype=float)


def frame(m: Mos, vg, vd, vs, vb):
    """Physical gate, drain and source voltages in the device's bulk-referenced frame
    (multiplied by the polarity), so that PMOS and NMOS share one code path."""
    p = m.polarity
    return p * (np.asarray(vg) - vb), p * (np.asarray(vd) - vb), p * (np.asarray(vs) - vb)

