"""The records `evaluate` takes and returns: a population of designs, the PVT grid, the
targets, and the result with every metric at every PVT point and its summary.

Arrays are per design (n,) or per design and PVT point (n, k); all SI.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .circuit.mirrors import source_keys
from .amplifier.inside import METRICS as AMPLIFIER_METRICS
from .amplifier.spec import Amplifier
from .devices.tech import Corner, check_range
from .stages import get_stage

__all__ = ["AMPLIFIER_METRICS", "Amplifier", "Conditions", "Design", "LIMIT_NAMES", "PVT_METRICS", "Result",
           "Targets"]

PVT_METRICS = (
    "iq_a", "headroom_high_v", "headroom_low_v", "swing_v", "iout_source_a", "iout_sink_a",
    "ab_ratio", "iq_sigma_pct", "supply_sens_pct_per_v", "vdd_min_v", "fp2_hz",
    "power_w",
)
LIMIT_NAMES = ("compliance", "control-saturation")


@dataclass(frozen=True, slots=True)
class Design:
    """A population of n designs of one architecture. Arrays have shape (n,), SI units.

    w, l: role -> width and length [m]; bias: bias name -> value [A or ohm];
    tied: roles whose bulk sits on their source (own well); cc: the amplifier's
    compensation capacitance per design [F] when the search sizes it (None: the amplifier's
    own value).
    """

    architecture: str
    w: dict
    l: dict
    bias: dict
    tied: frozenset = frozenset()
    cc: np.ndarray | None = None

    def __post_init__(self) -> None:
        stage = get_stage(self.architecture)
        for table, names in (("devices", stage.ROLES), ("bias", tuple(stage.BIAS))):
            have = set(self.w) if table == "devices" else set(self.bias)
            missing = [r for r in names if r not in have]
            unknown = sorted(have - set(names))
            if missing:
                raise ValueError(f"[{table}] is missing {', '.join(missing)} for {self.architecture}")
            if unknown:
                raise ValueError(f"[{table}] has unknown {', '.join(unknown)} for {self.architecture}; "
                                 f"allowed: {', '.join(names)}")
        for role in stage.ROLES:
            if role not in self.l:
                raise ValueError(f"[devices.{role}] has no length l")
            for name, arr in ((f"[devices.{role}] w", self.w[role]), (f"[devices.{role}] l", self.l[role])):
                if np.any(~(np.asarray(arr) > 0)):
                    raise ValueError(f"{name} = {np.min(arr)!r} m must be positive")
        for name, arr in self.bias.items():
            if np.any(~(np.asarray(arr) > 0)):
                raise ValueError(f"[bias] {name} = {np.min(arr)!r} {stage.BIAS[name]} must be positive")
        if self.cc is not None and np.any(~(np.asarray(self.cc) > 0)):
            raise ValueError(f"compensation cc = {np.min(self.cc)!r} F must be positive")
        bad = sorted(set(self.tied) - set(stage.ROLES))
        if bad:
            raise ValueError(f"bulk ties name unknown roles {', '.join(bad)}")

    @property
    def size(self) -> int:
        return int(np.size(next(iter(self.w.values()))))

    def take(self, idx) -> "Design":
        """The designs at the integer positions idx, as a population of their own."""
        return Design(self.architecture, {k: np.asarray(v)[idx] for k, v in self.w.items()},
                      {k: np.asarray(v)[idx] for k, v in self.l.items()},
                      {k: np.asarray(v)[idx] for k, v in self.bias.items()}, self.tied,
                      None if self.cc is None else np.asarray(self.cc)[idx])


@dataclass(frozen=True, slots=True)
class Conditions:
    """The PVT grid: every corner x temperature x supply, plus what the metrics need.

    temps [K] and corners in the order given; vdd = (nominal, min, max) [V]; the nominal
    temperature is the first one.
    """

    corners: tuple
    temps: tuple
    vdd_nom: float
    vdd_min: float
    vdd_max: float

    def __post_init__(self) -> None:
        if not self.vdd_min <= self.vdd_nom <= self.vdd_max:
            raise ValueError(f"supply range is inverted or excludes the nominal: min {self.vdd_min} V, "
                             f"nominal {self.vdd_nom} V, max {self.vdd_max} V; need min <= nominal <= max")
        check_range("vdd_nom", self.vdd_nom, 0.3, 20.0, "V")
        for t in self.temps:
            check_range("temperature", t, 200.0, 450.0, "K")
        if not self.corners or not self.temps:
            raise ValueError("at least one corner and one temperature are needed")

    @property
    def supplies(self) -> tuple:
        vs = [self.vdd_nom, self.vdd_min, self.vdd_max]
        return tuple(dict.fromkeys(vs))  # nominal first, duplicates dropped

    @property
    def typical(self) -> Corner:
        """The corner that stands for 'typical': tt when the study has it, else its first."""
        return Corner.TT if Corner.TT in self.corners else self.corners[0]

    def nominal_index(self) -> int:
        """Index into `grid()` of (typical corner, first temperature, nominal supply)."""
        return self.corners.index(self.typical) * len(self.temps) * len(self.supplies)

    def grid(self):
        """Flat PVT arrays (corner, temp, vdd), shape (k,), corner-major, supply fastest."""
        corner, temp, vdd = [], [], []
        for c in self.corners:
            for t in self.temps:
                for v in self.supplies:
                    corner.append(c)
                    temp.append(t)
                    vdd.append(v)
        return corner, np.array(temp), np.array(vdd)


@dataclass(frozen=True, slots=True)
class Targets:
    """Load, driver, bias sources and the limits a design must meet at every PVT point (SI).

    Zero or infinite limits switch a check off.
    """

    i_load: float  # A     peak load current the output must deliver both ways
    c_load: float  # F     load capacitance (output pole)
    vcomp: float = 0.2  # V  driver compliance from either rail
    drive: str = "both"  # which gates the driving stage moves: both, p or n
    iq_min: float = 0.0  # A
    iq_max: float = np.inf  # A
    iq_sigmas: float = 0.0  # 1   apply the Iq window at this many sigma of mismatch
    headroom_max: float = np.inf  # V  largest allowed headroom to either rail
    ab_min: float = 0.0  # 1
    area_max: float = np.inf  # m^2
    fp2_min: float = 0.0  # Hz
    layout_factor: float = 1.0  # 1  area multiplier for routing and spacing
    power_max: float = np.inf  # W    largest supply power at any PVT point (VDD x (Iq + bias))
    iout_peak_max: float = np.inf  # A  cap on the peak output current at full drive (short circuit)
    # Bias sources as mirrors: architecture -> study key (`circuit.mirrors.source_keys`) ->
    # `circuit.mirrors.Mirror`; a source not named is ideal (the default for every source).
    mirrors: dict = field(default_factory=dict)
    amplifier: Amplifier | None = None  # the amplifier the stage sits in; None: none described
    phase_margin_min: float = 0.0  # deg  lowest phase margin of the loop gain (needs the amplifier)
    slew_min: float = 0.0  # V/s   lowest output slew rate (needs the amplifier)
    gate_time_max: float = np.inf  # s  longest time to move the gates to the drive limit (needs the amplifier)

    def __post_init__(self) -> None:
        check_range("i_load", self.i_load, 1e-9, 10.0, "A")
        check_range("c_load", self.c_load, 1e-15, 1e-3, "F")
        check_range("vcomp", self.vcomp, 0.0, 2.0, "V")
        if self.drive not in ("both", "p", "n"):
            raise ValueError(f"drive = {self.drive!r} is not one of both, p, n")
        check_range("layout_factor", self.layout_factor, 1.0, 10.0, "")
        if not self.power_max > 0 or not self.iout_peak_max > 0:
            raise ValueError(f"power_max = {self.power_max} W and iout_peak_max = {self.iout_peak_max} A must be "
                             f"positive (inf switches them off)")
        if self.amplifier is None:
            for name, off in (("phase_margin_min", 0.0), ("slew_min", 0.0), ("gate_time_max", np.inf)):
                if getattr(self, name) != off:
                    raise ValueError(f"{name} needs an amplifier description (the stage's surrounding amplifier)")
        check_range("phase_margin_min", self.phase_margin_min, 0.0, 180.0, "deg")
        check_range("slew_min", self.slew_min, 0.0, 1e12, "V/s")
        check_range("gate_time_max", self.gate_time_max, 0.0, np.inf, "s")
        if self.iq_min > self.iq_max:
            raise ValueError(f"iq window is inverted: min {self.iq_min} A > max {self.iq_max} A")
        for arch, table in self.mirrors.items():
            allowed = tuple(source_keys(get_stage(arch).TOPOLOGY).values())
            bad = sorted(set(table) - set(allowed))
            if bad:
                raise ValueError(f"mirrors of {arch} name unknown sources {', '.join(bad)}; allowed: "
                                 f"{', '.join(allowed)}")


@dataclass
class Result:
    """Metrics of n designs at k PVT points.

    pvt: name -> (n, k) arrays (names of PVT_METRICS plus delivers_source and delivers_sink,
    bool: the stage delivers the peak load that way, else that side's headroom and the
    swing are nan, "cannot deliver"; limit_source, limit_sink, and
    vdd_min_what, an index into `requirement_names`); summary: name -> (n,);
    converged: (n, k) bool; violations: per design, a list of readable strings (a sequence
    that words a design's entry when it is first read).
    """

    architecture: str
    corners: list
    temps: np.ndarray
    vdd: np.ndarray
    pvt: dict
    summary: dict
    converged: np.ndarray
    requirement_names: tuple
    violations: Sequence = field(default_factory=list)
    margins: dict = field(default_factory=dict)

    def take(self, idx) -> "Result":
        """The results of the designs at the integer positions idx, in that order."""
        idx = np.asarray(idx, dtype=int)
        return Result(self.architecture, self.corners, self.temps, self.vdd,
                      {k: v[idx] for k, v in self.pvt.items()}, {k: v[idx] for k, v in self.summary.items()},
                      self.converged[idx], self.requirement_names,
                      [self.violations[i] for i in idx] if self.violations else [],
                      {k: np.asarray(v)[idx] for k, v in self.margins.items()})

    @property
    def feasible(self) -> np.ndarray:
        """(n,) True where every PVT point converged and every margin is met."""
        ok = self.converged.all(axis=1)
        for arr in self.margins.values():
            ok = ok & (np.asarray(arr) >= 0)
        return ok


