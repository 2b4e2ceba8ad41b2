"""Bias sources as current mirrors: what the study says of each source, and what follows
from it at every (design, PVT point) element: the source's Norton form, its mismatch
sigma and its compliance voltage.

Each bias current source of a topology is either ideal (the default: today's model) or the
output device of a mirror, in one of two forms:

* sized (`w`, `l` of the output device; polarity from the rail the source hangs from: a
  source from the supply is a PMOS mirror, one to ground an NMOS mirror). The mirror is
  1:1: an input diode of the same W and L carries the reference current I0 (ideal) and
  sets the gate; the output device copies it. At the reference point, the output device
  at the input diode's drain voltage V_ref = |VGS| (where input and output match), the
  mirror delivers exactly I0. Away from it the source is linear,

      I = I0 (1 + delta) + (V_across - V_ref) / r_out,

  with r_out = 1 / gds of the output device at the reference point (the technology's
  Early voltage per length: with the models' (1 + VDS/VA) factor this is
  (VA + V_ref) / I0, exact in saturation). delta is the mismatch of the pair: its linear
  sigma is sqrt((gm/I)^2 (s_vt,in^2 + s_vt,out^2) + s_beta,in^2 + s_beta,out^2) with
  each device's Pelgrom deviations (`mismatch.sigma_device_*`) and gm/I at the
  reference point. The compliance voltage is the output device's VDSsat at I0. Area:
  the output device plus its own input diode, 2 W L.
* unsized (`sigma_pct`, `r_out`, optional `v_ref` and `v_min`): the same linear law with
  the given sigma of delta, output resistance and reference voltage (default 0 V: the
  ideal source I0 with r_out in parallel, the Norton form a netlist writes), and a
  compliance voltage `v_min` checked only when given (> 0). No area.

V_across is the voltage across the source in the direction that keeps it working:
V(a) - V(b) for a source pushing current from node a to node b.

References
----------
M. J. M. Pelgrom, A. C. J. Duinmaijer, A. P. G. Welbers, "Matching properties of MOS
transistors", IEEE J. Solid-State Circuits 24(5):1433-1440, 1989 (the area law).
P. R. Gray, P. J. Hurst, S. H. Lewis, R. G. Meyer, *Analysis and Design of Analog Integrated
Circuits*, 5th ed., Wiley 2009, Sec. 4.2 (simple current mirror: output resistance r_o,
gain error from mismatch and from V_DS difference).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..devices import mismatch as _mm
from ..devices.device import Device
from ..devices.tech import Polarity, check_range
from .topology import Topology


@dataclass(frozen=True, slots=True)
class Mirror:
    """What the study says of one bias source (SI). `w` > 0 makes it sized; otherwise the
    unsized form with `sigma_pct`, `r_out`, `v_ref` and `v_min` applies."""

    w: float = 0.0  # m      output device width (sized form)
    l: float = 0.0  # m      output device length (sized form)
    sigma_pct: float = 0.0  # %  1-sigma of the mirrored current (unsized form)
    r_out: float = math.inf  # ohm  output resistance (unsized form)
    v_ref: float = 0.0  # V  voltage across at which the source gives I0 (unsized form)
    v_min: float = 0.0  # V  compliance voltage checked at rest (unsized form; 0: no check)

    def __post_init__(self) -> None:
        if self.sized:
            check_range("w", self.w, 1e-8, 1e-2, "m")
            check_range("l", self.l, 1e-8, 1e-3, "m")
        else:
            check_range("sigma_pct", self.sigma_pct, 0.0, 50.0, "%")
            check_range("r_out", self.r_out, 1.0, math.inf, "ohm")
            check_range("v_ref", self.v_ref, 0.0, 60.0, "V")
            check_range("v_min", self.v_min, 0.0, 60.0, "V")

    @property
    def sized(self) -> bool:
        return self.w > 0


def checked(mirrors: dict) -> bool:
    """Whether any mirror of a study (architecture -> key -> Mirror) has a compliance voltage
    to check (every sized one; an unsized one with v_min): then every architecture's results
    carry the "mirror_compliance" margin (infinite where nothing is checked)."""
    return any(m.sized or m.v_min > 0 for table in mirrors.values() for m in table.values())


def source_keys(topo: Topology) -> dict[str, str]:
    """Study key of every source of a topology: source name -> key. A bias that feeds one
    source is named by its bias (ib_n); one that feeds several adds the source's end
    (ib_ctl_top, ib_ctl_bot; ib_top, ib_bot)."""
    count: dict[str, int] = {}
    for src in topo.sources:
        count[src.bias] = count.get(src.bias, 0) + 1
    return {src.name: src.bias if count[src.bias] == 1 else f"{src.bias}_{src.name.rsplit('_', 1)[-1]}"
            for src in topo.sources}


def source_polarity(src) -> Polarity:
    """Polarity of a mirror output device for a source: PMOS from the supply, NMOS to ground."""
    if src.a == "vdd":
        return Polarity.P
    if src.b == "0":
        return Polarity.N
    raise ValueError(f"source {src.name} touches no rail ({src.a} -> {src.b}); it cannot be a mirror")


def v_across(src, v):
    """Voltage across a source, V(a) - V(b), from node voltages v (dict, rails included)."""
    return np.asarray(v[src.a]) - np.asarray(v[src.b])


def mirror_area(topo: Topology, mirrors: dict) -> float:
    """Drawn area of the sized mirrors of a topology [m^2]: output device plus its own
    1:1 input diode, 2 W L each; unsized and ideal sources add nothing."""
    keys = source_keys(topo)
    return float(sum(2.0 * m.w * m.l for name, key in keys.items()
                     if (m := mirrors.get(key)) is not None and m.sized))


@dataclass
class SourceStates:
    """Every mirror source of a stage at its elements (arrays (m,)).

    norton: source name -> (j, g): the source delivers j + g V_across [A];
    i0: nominal currents; rel_sigma: 1-sigma of delta [1]; v_min: compliance voltage [V]
    (0: not checked); the names are the topology's source names.
    """

    topo: Topology
    norton: dict
    i0: dict
    rel_sigma: dict
    v_min: dict
    v_ref: dict = field(default_factory=dict)

    def current(self, name, v):
        """Current of the mirror source `name` at node voltages v [A]."""
        j, g = self.norton[name]
        src = next(s for s in self.topo.sources if s.name == name)
        return j + g * v_across(src, v)

    def stage_bias(self, bias, drive, v=None):
        """The bias dict a stage's fast solve takes: each bias name gets the current of the
        first of its sources that does not touch the drive node (the one whose KCL closes
        the rest point), at node voltages v (None: at its reference point, I0 (1 + delta)).
        The nodal system then balances every source exactly."""
        out = dict(bias)
        done = set()
        for src in sorted(self.topo.sources, key=lambda s: drive in (s.a, s.b)):
            if src.bias in done:
                continue
            done.add(src.bias)
            if src.name in self.norton:
                j, g = self.norton[src.name]
                out[src.bias] = j + g * self.v_ref[src.name] if v is None else self.current(src.name, v)
        return out


    def rest_bias(self, bias, nodes, vdd):
        """`stage_bias` at the rest point: nodes (dict of (m,)) with the rails and the output
        at VDD/2 (what the driven points and the supply requirements take)."""
        return self.stage_bias(bias, self.topo.drive, {**nodes, "vdd": vdd, "0": 0.0 * vdd, "out": 0.5 * vdd})


def source_states(topo: Topology, mirrors: dict, tech, devs, bias, vdd, deviations=None) -> SourceStates | None:
    """The mirror sources of a stage at its elements, or None when every source is ideal.

    Parameters
    ----------
    topo : Topology
    mirrors : dict
        Study key (see `source_keys`) -> Mirror; missing keys are ideal sources.
    tech : Tech
        For the Pelgrom coefficients of sized mirrors.
    devs : dict
        The stage's devices at the elements (their `Mos` gives each polarity's constants
        at the elements' corner and temperature).
    bias : dict
        Bias name -> (m,) nominal currents.
    vdd : ndarray (m,)
        Supply [V] (the rail of PMOS mirrors).
    deviations : dict, optional
        Monte Carlo draws, source name -> (dvt_in, dbeta_in, dvt_out, dbeta_out) of a sized
        mirror's pair, or -> delta for an unsized one; arrays (m,).
    """
    keys = source_keys(topo)
    used = {src.name: mirrors[keys[src.name]] for src in topo.sources if keys[src.name] in mirrors}
    if not used:
        return None
    mos = {}
    for dev in devs.values():
        mos.setdefault(dev.p, dev.mos)
    norton, i0s, rel, vmin, vref = {}, {}, {}, {}, {}
    for src in topo.sources:
        if src.name not in used:
            continue
        mir, i0 = used[src.name], np.asarray(bias[src.bias], dtype=float)
        dev_draw = None if deviations is None else deviations.get(src.name)
        if mir.sized:
            pol = source_polarity(src)
            mt = tech.mos(pol)
            rail = np.asarray(vdd, dtype=float) if pol == Polarity.P else np.zeros_like(i0)
            dev = Device(mos[int(pol)], np.full_like(i0, mir.w), np.full_like(i0, mir.l), True)
            vg = dev.diode(i0, rail, rail)
            ref = pol * (vg - rail)  # |VGS| = |VDS| of the input diode
            i_ref, gg, gd, _ = dev.eval(vg, vg, rail, rail)
            g = np.abs(gd)
            gm_i = np.abs(gg) / np.maximum(i_ref, 1e-300)
            s_vt = _mm.sigma_device_vt(mt.a_vt, mir.w, mir.l)
            s_beta = _mm.sigma_device_beta(mt.a_beta, mir.w, mir.l)
            rel[src.name] = np.sqrt(2.0 * (gm_i * s_vt) ** 2 + 2.0 * s_beta ** 2)
            vmin[src.name] = dev.vdsat(i0)
            if dev_draw is None:
                i_out = i0
            else:  # the exact pair: input diode at I0 sets the gate, output at the same VDS
                dvt_in, db_in, dvt_out, db_out = dev_draw
                d_in = Device(dev.mos, dev.w, dev.l, True, dvt_in, db_in)
                d_out = Device(dev.mos, dev.w, dev.l, True, dvt_out, db_out)
                vg_mc = d_in.diode(i0, rail, rail)
                i_out = d_out.current(vg_mc, vg_mc, rail, rail)
        else:
            ref = np.full_like(i0, mir.v_ref)
            g = np.full_like(i0, 0.0 if math.isinf(mir.r_out) else 1.0 / mir.r_out)
            rel[src.name] = np.full_like(i0, mir.sigma_pct / 100.0)
            vmin[src.name] = np.full_like(i0, mir.v_min)
            i_out = i0 if dev_draw is None else i0 * (1.0 + np.asarray(dev_draw, dtype=float))
        norton[src.name] = (i_out - g * ref, g)
        i0s[src.name], vref[src.name] = i0, ref
    return SourceStates(topo, norton, i0s, rel, vmin, vref)



def mirror_deviations(topo: Topology, mirrors: dict, tech, samples: int, rng: np.random.Generator) -> dict:
    """Monte Carlo draws of every mirror source, in topology order: source name ->
    (dvt_in, dbeta_in, dvt_out, dbeta_out) of a sized mirror's pair (Pelgrom, each device
    its own deviation from the mean) or -> delta of an unsized one (normal, its sigma);
    arrays (samples,)."""
    keys = source_keys(topo)
    out = {}
    for src in topo.sources:
        mir = mirrors.get(keys[src.name])
        if mir is None:
            continue
        if mir.sized:
            mt = tech.mos(source_polarity(src))
            dvt_in, db_in = _mm.sample(rng, mt.a_vt, mt.a_beta, mir.w, mir.l, samples)
            dvt_out, db_out = _mm.sample(rng, mt.a_vt, mt.a_beta, mir.w, mir.l, samples)
            out[src.name] = (dvt_in, db_in, dvt_out, db_out)
        else:
            out[src.name] = rng.standard_normal(samples) * (mir.sigma_pct / 100.0)
    return out
