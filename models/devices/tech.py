"""Technology parameters: per-polarity device constants, process corners, drawing rules.

All fields are SI. The checks here know the field name and its allowed range; the file
loader in `optimise` adds the file name and table path to the message.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import Enum, IntEnum

import numpy as np


class ModelKind(Enum):
    """Which drain-current equations a technology uses."""

    EKV = "ekv"
    SQUARE_LAW = "square-law"
    TABLE = "table"  # the user's card tabulated by ngspice (`table_data`)


class Polarity(IntEnum):
    """Sign convention: +1 for NMOS, -1 for PMOS (voltages and currents flip sign)."""

    N = 1
    P = -1


class Corner(Enum):
    """Process corners; the first letter is the NMOS, the second the PMOS."""

    TT = "tt"
    FF = "ff"
    SS = "ss"
    FS = "fs"
    SF = "sf"


def check_range(name: str, value: float, lo: float, hi: float, unit: str) -> None:
    """Raise ValueError quoting the name, value, unit and allowed closed range."""
    try:
        ok = lo <= value <= hi
    except TypeError:
        ok = False
    if not ok or (isinstance(value, float) and math.isnan(value)):
        raise ValueError(f"{name} = {value!r} {unit} is outside the allowed range [{lo:g}, {hi:g}] {unit}")


# Default diffusion extension in minimum lengths. From memory: lambda design rules of the
# MOSIS SCMOS kind put a contacted source/drain 5 lambda beyond the gate (poly-to-contact
# spacing 2, contact 2, active overlap of contact 1) with L_min = 2 lambda: 2.5 L_min.
DIFFUSION_PER_LMIN = 2.5


@dataclass(frozen=True, slots=True)
class MosTech:
    """Constants of one device polarity at the nominal temperature. Magnitudes, SI."""

    vt0: float  # V      threshold-voltage magnitude at VSB = 0
    kp: float  # A/V^2   transconductance parameter mu*Cox
    n: float  # 1        subthreshold slope factor (EKV)
    gamma: float  # V^0.5  body-effect coefficient (square law)
    phi: float  # V      surface potential 2*phi_F (square law)
    va_per_l: float  # V/m  Early voltage per metre of channel length (inf: no length modulation)
    tc_vt: float  # V/K    threshold magnitude falls by this much per kelvin
    mu_exp: float  # 1     mobility temperature exponent, KP ~ (T/Tnom)^mu_exp
    a_vt: float  # V*m     Pelgrom threshold coefficient (pair difference)
    a_beta: float  # m     Pelgrom current-factor coefficient (pair difference, fraction*m)
    cox: float  # F/m^2    gate-oxide capacitance per area
    cov: float  # F/m      gate overlap capacitance per width, each side
    w_min: float  # m      minimum drawn width
    l_min: float  # m      minimum drawn length
    # Source/drain junctions (SPICE's CJ, MJ, PB, CJSW, MJSW, PBSW): zero-bias capacitance per
    # diffusion area and perimeter, grading exponents, built-in potentials; cj = cjsw = 0: none
    # (`mos.junction_capacitance`). Defaults: ngspice level 1's (its PB serves the sidewall too).
    cj: float = 0.0  # F/m^2
    mj: float = 0.5  # 1
    pb: float = 0.8  # V
    cjsw: float = 0.0  # F/m
    mjsw: float = 0.5  # 1
    pbsw: float = 0.8  # V

    def __post_init__(self) -> None:
        check_range("vt0", self.vt0, 0.05, 3.0, "V")
        check_range("kp", self.kp, 1e-6, 1e-2, "A/V^2")
        check_range("n", self.n, 1.0, 3.0, "")
        check_range("gamma", self.gamma, 0.0, 3.0, "V^0.5")
        check_range("phi", self.phi, 0.1, 1.5, "V")
        check_range("va_per_l", self.va_per_l, 1e5, math.inf, "V/m")
        check_range("tc_vt", self.tc_vt, -5e-3, 1e-2, "V/K")
        check_range("mu_exp", self.mu_exp, -3.0, 0.0, "")
        check_range("a_vt", self.a_vt, 0.0, 1e-7, "V*m")
        check_range("a_beta", self.a_beta, 0.0, 1e-7, "m")
        check_range("cox", self.cox, 1e-4, 0.1, "F/m^2")
        check_range("cov", self.cov, 0.0, 1e-8, "F/m")
        check_range("w_min", self.w_min, 1e-8, 1e-4, "m")
        check_range("l_min", self.l_min, 1e-8, 1e-4, "m")
        check_range("cj", self.cj, 0.0, 0.1, "F/m^2")
        check_range("cjsw", self.cjsw, 0.0, 1e-8, "F/m")
        check_range("mj", self.mj, 0.01, 0.9, "")
        check_range("mjsw", self.mjsw, 0.01, 0.9, "")
        check_range("pb", self.pb, 0.1, 2.0, "V")
        check_range("pbsw", self.pbsw, 0.1, 2.0, "V")


@dataclass(frozen=True, slots=True)
class CornerShift:
    """A process corner as shifts of both polarities.

    `dvt` adds to the threshold magnitude (positive: slower device); `kp` multiplies KP.
    """

    dvt_n: float = 0.0  # V
    kp_n: float = 1.0  # 1
    dvt_p: float = 0.0  # V
    kp_p: float = 1.0  # 1

    def __post_init__(self) -> None:
        for name in ("dvt_n", "dvt_p"):
            check_range(name, getattr(self, name), -0.5, 0.5, "V")
        for name in ("kp_n", "kp_p"):
            check_range(name, getattr(self, name), 0.2, 5.0, "")


@dataclass(frozen=True, slots=True)
class Tech:
    """A whole technology: both polarities, model kind, drawing grid and corners."""

    name: str
    model: ModelKind
    nmos: MosTech
    pmos: MosTech
    grid: float  # m  drawing grid for W and L
    tnom: float  # K  temperature at which the device constants hold
    corners: dict[Corner, CornerShift] = field(default_factory=lambda: {Corner.TT: CornerShift()})
    # Table kind only: per polarity the tabulated device (`table_data.PolarityTable`); the
    # MosTech constants then summarise the card (start values, mismatch, drawing rules).
    tables: dict | None = None
    card: tuple | None = None  # table kind: (card path, NMOS model, PMOS model) tabulated
    # m  lengths an analytic technology was calibrated at (empty: not a calibration, or unknown)
    fitted_lengths: tuple = ()
    # m  source/drain diffusion length beyond the gate edge (netlists' AD, AS, PD, PS);
    # 0 stands for the default DIFFUSION_PER_LMIN x l_min of each polarity.
    diffusion_extension: float = 0.0

    def __post_init__(self) -> None:
        check_range("grid", self.grid, 1e-10, 1e-6, "m")
        check_range("diffusion_extension", self.diffusion_extension, 0.0, 1e-4, "m")
        for x in self.fitted_lengths:
            check_range("fitted length", x, 1e-8, 1e-3, "m")
        check_range("tnom", self.tnom, 200.0, 450.0, "K")
        if Corner.TT not in self.corners:
            raise ValueError("corners must include tt (the typical corner)")
        if (self.model is ModelKind.TABLE) != (self.tables is not None):
            raise ValueError("a table technology needs its device tables, and only it has them")
        if self.tables is not None:
            for pol in (Polarity.N, Polarity.P):
                missing = [c.value for c in self.corners if c.value not in self.tables[pol].slots]
                if missing:
                    raise ValueError(f"the {'NMOS' if pol == Polarity.N else 'PMOS'} tables have no corner "
                                     f"{', '.join(missing)}")

    def mos(self, polarity: Polarity) -> MosTech:
        """The constants of one polarity."""
        return self.nmos if polarity == Polarity.N else self.pmos

    def extension(self, polarity: Polarity) -> float:
        """Source/drain diffusion extension [m] of one polarity: the file's value, or
        DIFFUSION_PER_LMIN x its minimum length."""
        return self.diffusion_extension or DIFFUSION_PER_LMIN * self.mos(polarity).l_min

    def diffusion(self, polarity: Polarity, w):
        """Area [m^2] and perimeter [m] of each source or drain diffusion of a device of
        width w: a rectangle W wide reaching the extension E beyond the gate, area W E,
        perimeter 2 (W + E), the gate-side edge included as SPICE's PD and PS count it by
        default. The netlists write these as AD/AS/PD/PS, the junction capacitances use them."""
        e = self.extension(polarity)
        w = np.asarray(w, dtype=float)
        return w * e, 2.0 * (w + e)

    def snap(self, x):
        """Round lengths [m] to the drawing grid (never below one grid step)."""
        return np.maximum(np.round(np.asarray(x, dtype=float) / self.grid), 1.0) * self.grid
