"""Every metric of an output stage at every PVT point, for a whole population at once.

The population (n designs) and the PVT grid (k points: corner x temperature x supply) are
flattened to n*k elements and processed in chunks, so memory stays bounded whatever n is.
Per element: the rest point (exact), Iq and its mismatch sigma (adjoint sensitivities of
the full Kirchhoff system, Pelgrom sigmas), the output pole, the lowest supply that keeps
every device in its region, and both driven points (drive limit, headroom at the peak
load current, peak current, current left in the idle device).

Numerical failure is reported per element (`converged` False, with a reason); the metric
values of such elements are not to be used.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from . import mismatch as _mm
from .mos import at_conditions, gate_capacitance, inversion_coefficient
from .stages import get_stage
from .summary import check, summarise, supply_sensitivity
from .stages.base import Device, NodalSystem, solve_bracketed, subset
from .tech import Corner, CornerShift, Polarity, Tech, check_range

PVT_METRICS = (
    "iq_a", "headroom_high_v", "headroom_low_v", "swing_v", "iout_source_a", "iout_sink_a",
    "ab_ratio", "iq_sigma_pct", "supply_sens_pct_per_v", "vdd_min_v", "fp2_hz",
)
LIMIT_NAMES = ("compliance", "control-saturation")


@dataclass(frozen=True, slots=True)
class Design:
    """A population of n designs of one architecture. Arrays have shape (n,), SI units.

    w, l: role -> width and length [m]; bias: bias name -> value [A or ohm];
    tied: roles whose bulk sits on their source (own well).
    """

    architecture: str
    w: dict
    l: dict
    bias: dict
    tied: frozenset = frozenset()

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
                      {k: np.asarray(v)[idx] for k, v in self.bias.items()}, self.tied)


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
    """Load, driver and the limits a design must meet at every PVT point (SI).

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

    def __post_init__(self) -> None:
        check_range("i_load", self.i_load, 1e-9, 10.0, "A")
        check_range("c_load", self.c_load, 1e-15, 1e-3, "F")
        check_range("vcomp", self.vcomp, 0.0, 2.0, "V")
        if self.drive not in ("both", "p", "n"):
            raise ValueError(f"drive = {self.drive!r} is not one of both, p, n")
        check_range("layout_factor", self.layout_factor, 1.0, 10.0, "")
        if self.iq_min > self.iq_max:
            raise ValueError(f"iq window is inverted: min {self.iq_min} A > max {self.iq_max} A")


@dataclass
class Result:
    """Metrics of n designs at k PVT points.

    pvt: name -> (n, k) arrays (names of PVT_METRICS plus limit_source, limit_sink, and
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


def corner_shifts(tech: Tech, corner):
    """Corner shifts per element: dict (polarity -> (dvt, kp factor)) of arrays (len(corner),)."""
    table = {c: tech.corners.get(c, CornerShift()) for c in set(corner)}
    return {
        Polarity.N: (np.array([table[c].dvt_n for c in corner]), np.array([table[c].kp_n for c in corner])),
        Polarity.P: (np.array([table[c].dvt_p for c in corner]), np.array([table[c].kp_p for c in corner])),
    }


def devices_at(stage, design: Design, tech: Tech, shifts, temp, idx_design, dvt=None, dbeta=None):
    """The Device dict for flat elements: design index idx_design, per-element corner
    shifts (see `corner_shifts`) and temperature [K]."""
    devs, mos = {}, {}
    for spec in stage.TOPOLOGY.devices:
        if spec.polarity not in mos:  # one set of constants per polarity, shared by its devices
            dv, kp = shifts[spec.polarity]
            mos[spec.polarity] = at_conditions(tech.mos(spec.polarity), spec.polarity, tech.model, temp, tech.tnom,
                                               dv, kp)
        devs[spec.role] = Device(
            mos[spec.polarity],
            np.asarray(design.w[spec.role], dtype=float)[idx_design],
            np.asarray(design.l[spec.role], dtype=float)[idx_design],
            spec.role in design.tied,
            0.0 if dvt is None else dvt[spec.role],
            0.0 if dbeta is None else dbeta[spec.role],
        )
    return devs


def _output_device(stage, devs, role, gate, vdd, v):
    """Frame current of one output device (role) with its gate at `gate` and the output at
    v, and the current's derivative with respect to v. Shapes (m,)."""
    spec = stage.TOPOLOGY.spec(role)
    volts = {"vdd": vdd, "0": 0.0, "out": v, spec.g: gate}
    i, _, gd, gs = devs[role].eval(volts[spec.g], volts[spec.d], volts[spec.s], volts[spec.rail])
    return i, gd if spec.d == "out" else gs


def _driven_point(stage, devs, bias, vdd, nodes, direction, targets, iq):
    """Headroom, peak current and idle-device ratio on one side. Shapes (m,)."""
    gn, gp, limit, ok = stage.driven(devs, bias, vdd, nodes, direction, targets.drive, targets.vcomp)
    out = 0.5 * vdd
    i_up, i_dn, _ = stage.output(devs, gn, gp, vdd, out)
    peak = (i_up - i_dn) * direction
    i_load = targets.i_load

    def fun(v, idx):
        d = subset(devs, idx)
        u, dn, dd = stage.output(d, gn[idx], gp[idx], vdd[idx], v)
        return (u - dn) * direction - i_load, dd * direction

    can = peak >= i_load
    active, idle_role = (stage.PULL_UP, stage.PULL_DOWN) if direction > 0 else (stage.PULL_DOWN, stage.PULL_UP)
    gate_active, gate_idle = (gp, gn) if direction > 0 else (gn, gp)
    rail = vdd if direction > 0 else np.zeros_like(vdd)
    # At the rail the active device has no drain-source voltage and carries nothing, so
    # the function is -(i_load + idle current) < 0 there: only its sign is needed for the
    # bracket. Start from the rail side: the active device's triode conductance at the
    # rail gives the output voltage drop for the load plus the idle current.
    _, d_rail = _output_device(stage, devs, active, gate_active, vdd, rail)
    idle_mid = i_dn if direction > 0 else i_up
    x0 = rail - direction * np.clip((i_load + idle_mid) / np.maximum(np.abs(d_rail), 1e-30), 0.0, 0.5 * vdd)
    f_mid = peak - i_load
    f_rail = np.full_like(vdd, -i_load)
    # Output voltage to 0.1 uV: the last safeguarded Newton step leaves far less.
    if direction > 0:
        v_at, ok_v = solve_bracketed(fun, out, vdd.copy(), x0=x0, xtol=1e-7, flo=f_mid, fhi=f_rail)
    else:
        v_at, ok_v = solve_bracketed(fun, np.zeros_like(vdd), out, x0=x0, xtol=1e-7, flo=f_rail, fhi=f_mid)
    v_at = np.where(can, v_at, out)
    headroom = np.where(direction > 0, vdd - v_at, v_at)
    idle, _ = _output_device(stage, devs, idle_role, gate_idle, vdd, v_at)
    with np.errstate(divide="ignore", invalid="ignore"):
        ab = np.where(iq > 0, idle / iq, 0.0)
    return headroom, peak, ab, limit, ok & (ok_v | ~can)


def rest_point(stage, devs, bias, vdd, sensitivity=True):
    """Rest point of every element: the stage's fast solve, checked against the residuals
    of the full Kirchhoff system, with Newton on that system as the second chance.

    Returns (nodes, ok, sens, op): node voltages, convergence flags, the Iq sensitivities
    of `NodalSystem.iq_sensitivity` when asked (else None), and every device evaluated at
    the rest point (role -> (i, gg, gd, gs), as `Device.eval` gives them), for the metrics
    that need currents or conductances at rest.
    """
    nodes, ok = stage.quiescent(devs, bias, vdd)
    system = NodalSystem(stage.TOPOLOGY, devs, bias, vdd)
    x = np.stack([nodes[nname] for nname in stage.TOPOLOGY.nodes] + [np.zeros_like(vdd)])
    if sensitivity:
        sens, (r, scale), op = system.iq_sensitivity(x, stage.PULL_DOWN)
    else:
        sens = None
        r, scale, _, op = system.assemble(x, slice(None))
    # Every Kirchhoff equation must balance to 1e-9 of the currents it sums (1e-18 A
    # absolute, for devices in cut-off); the fast solves leave about 1e-14.
    ok &= np.all(np.abs(r) <= 1e-9 * scale + 1e-18, axis=0) & np.all(np.isfinite(x), axis=0)
    if not ok.all():
        bad = np.flatnonzero(~ok)
        sub = NodalSystem(stage.TOPOLOGY, subset(devs, bad), {k: v[bad] for k, v in bias.items()}, vdd[bad])
        xb, ok[bad] = sub.solve(np.nan_to_num(x[:, bad], nan=0.0))
        for k_node, nname in enumerate(stage.TOPOLOGY.nodes):
            nodes[nname] = nodes[nname].copy()
            nodes[nname][bad] = xb[k_node]
        if sensitivity:
            sens_b, _, op_b = sub.iq_sensitivity(xb, stage.PULL_DOWN)
            for role, (s_vt, s_beta) in sens_b.items():
                sens[role][0][bad], sens[role][1][bad] = s_vt, s_beta
        else:
            op_b = sub.assemble(xb, slice(None))[3]
        for role, vals in op_b.items():
            op[role] = tuple(np.array(whole, dtype=float) for whole in op[role])
            for whole, part in zip(op[role], vals):
                whole[bad] = part
    return nodes, ok, sens, op


def pull_down_current(stage, op):
    """Iq: the current of the pull-down output device at the rest point [A], >= 0, from
    the rest-point evaluations `op` of `rest_point`."""
    return np.maximum(op[stage.PULL_DOWN][0], 0.0)


def _chunk(stage, design, tech, cond_arrays, targets, idx_design, idx_pvt):
    shifts_all, temp_all, vdd_all = cond_arrays
    shifts = {p: (dv[idx_pvt], kp[idx_pvt]) for p, (dv, kp) in shifts_all.items()}
    temp = temp_all[idx_pvt]
    vdd = vdd_all[idx_pvt]
    devs = devices_at(stage, design, tech, shifts, temp, idx_design)
    bias = {k: np.asarray(v, dtype=float)[idx_design] for k, v in design.bias.items()}
    nodes, ok, sens, op = rest_point(stage, devs, bias, vdd)
    iq = pull_down_current(stage, op)

    var = np.zeros_like(vdd)
    for spec in stage.TOPOLOGY.devices:
        dev, mt = devs[spec.role], tech.mos(spec.polarity)
        s_vt, s_beta = sens[spec.role]
        var += (s_vt * _mm.sigma_device_vt(mt.a_vt, dev.w, dev.l)) ** 2
        var += (s_beta * _mm.sigma_device_beta(mt.a_beta, dev.w, dev.l)) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        sigma_pct = np.where(iq > 0, 100.0 * np.sqrt(var) / iq, 0.0)

    gm = stage.gm_output(op)
    fp2 = gm / (2.0 * np.pi * targets.c_load)

    reqs = stage.requirements(devs, bias, vdd, nodes, op, targets.vcomp)
    req = np.stack([rq for _, rq in reqs])
    vdd_min = np.max(req, axis=0)
    vdd_min_what = np.argmax(req, axis=0)

    hh, i_src, ab_src, lim_src, ok_src = _driven_point(stage, devs, bias, vdd, nodes, +1, targets, iq)
    hl, i_snk, ab_snk, lim_snk, ok_snk = _driven_point(stage, devs, bias, vdd, nodes, -1, targets, iq)

    c_drive = np.zeros_like(vdd)
    for role in (stage.PULL_DOWN, stage.PULL_UP):
        dev = devs[role]
        mt = tech.mos(stage.TOPOLOGY.spec(role).polarity)
        c_drive += gate_capacitance(mt, dev.w, dev.l, inversion_coefficient(dev.mos, dev.w, dev.l, iq))

    res = {
        "iq_a": iq, "headroom_high_v": hh, "headroom_low_v": hl, "swing_v": vdd - hh - hl,
        "iout_source_a": i_src, "iout_sink_a": i_snk, "ab_ratio": np.minimum(ab_src, ab_snk),
        "iq_sigma_pct": sigma_pct, "vdd_min_v": vdd_min, "fp2_hz": fp2, "c_drive_f": c_drive,
        "limit_source": lim_src, "limit_sink": lim_snk, "vdd_min_what": vdd_min_what,
    }
    return res, ok & ok_src & ok_snk, tuple(name for name, _ in reqs)


def evaluate(design: Design, tech: Tech, cond: Conditions, targets: Targets, chunk: int = 16384,
             explain: bool = True) -> Result:
    """All metrics of a population at every PVT point, with summary and violations.

    Parameters
    ----------
    design : Design
        n designs of one architecture.
    tech : Tech
    cond : Conditions
        k = corners x temperatures x supplies PVT points.
    targets : Targets
    chunk : int
        Elements (design x PVT pairs) processed at a time; bounds the memory.
    explain : bool
        Keep what is needed to word each design's violations when they are read (the
        search, which needs only the margins, turns this off).

    Returns
    -------
    Result
    """
    stage = get_stage(design.architecture)
    n = design.size
    corner, temp, vdd = cond.grid()
    k = len(vdd)
    m = n * k
    shifts = corner_shifts(tech, corner)
    flat_design = np.repeat(np.arange(n), k)
    flat_pvt = np.tile(np.arange(k), n)
    pvt: dict[str, np.ndarray] = {}
    converged = np.zeros(m, dtype=bool)
    req_names = ()
    for start in range(0, m, chunk):
        sl = slice(start, min(start + chunk, m))
        res, ok, req_names = _chunk(stage, design, tech, (shifts, temp, vdd), targets, flat_design[sl], flat_pvt[sl])
        for name, arr in res.items():
            if name not in pvt:
                pvt[name] = np.zeros(m, dtype=arr.dtype)
            pvt[name][sl] = arr
        converged[sl] = ok
    pvt = {name: arr.reshape(n, k) for name, arr in pvt.items()}
    converged = converged.reshape(n, k)
    supply_sensitivity(pvt, cond, corner, temp, vdd)
    summary = summarise(pvt, design, stage, cond, corner, temp, vdd, targets)
    violations, margins = check(pvt, summary, converged, cond, corner, temp, vdd, targets, req_names, explain)
    return Result(design.architecture, corner, temp, vdd, pvt, summary, converged, req_names, violations, margins)


def monte_carlo_iq(design: Design, tech: Tech, corner: Corner, temp: float, vdd: float, samples: int,
                   rng: np.random.Generator):
    """Iq of one design under random mismatch (Pelgrom), one exact solve per sample.

    Parameters
    ----------
    design : Design
        One design (arrays of shape (1,)).
    corner, temp, vdd : the PVT point ([K], [V]).
    samples : int
        N.
    rng : numpy.random.Generator

    Returns
    -------
    iq : ndarray (N,) [A]
    ok : ndarray of bool (N,)
    """
    stage = get_stage(design.architecture)
    idx = np.zeros(samples, dtype=int)
    dvt, dbeta = {}, {}
    for spec in stage.TOPOLOGY.devices:
        mt = tech.mos(spec.polarity)
        w = float(np.asarray(design.w[spec.role]).ravel()[0])
        l = float(np.asarray(design.l[spec.role]).ravel()[0])
        dvt[spec.role], dbeta[spec.role] = _mm.sample(rng, mt.a_vt, mt.a_beta, w, l, samples)
    devs = devices_at(stage, design, tech, corner_shifts(tech, [corner] * samples), np.full(samples, temp), idx, dvt, dbeta)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    vdd_arr = np.full(samples, float(vdd))
    _, ok, _, op = rest_point(stage, devs, bias, vdd_arr, sensitivity=False)
    return pull_down_current(stage, op), ok
