"""SPICE netlists of an output stage, written from its topology, and its rest point in ngspice.

The netlist is generated from the architecture's `TOPOLOGY` (models.stages), never typed by
hand per architecture, so a new topology gets a netlist with no change here. It serves the
cross-check of the square-law solver against ngspice, and the hand-off of chosen sizes to
a circuit simulator.

Subcircuit
----------
One ``.subckt`` per architecture, named after it with ``-`` turned into ``_``
(``floating_loop``, ``fixed_bias``, ``follower``). Ports, in order: ``vdd gnd out`` and then
the drive node(s) (`drive_ports`): both output gates ``gp gn`` of a common-source pair
(the amplifier may drive one gate or both), the input ``nm`` of the followers. The
topology's ground "0" is the port ``gnd``; every other node keeps its topology name.
Transistors are ``M_<ROLE>`` (``M_MN_OUT``), current sources ``I_<NAME>``, resistors
``R_<NAME>``. W and L are in metres, snapped to the technology's drawing grid; the bulk sits
on the device's rail (NMOS ``gnd``, PMOS ``vdd``), or on its source when the role is in
`Design.tied`.

Model cards
-----------
One level-1 ``.model`` per device (`model_cards`), named ``<subckt>_<role>``, because the
level-1 LAMBDA = 1 / (va_per_l L) is per volt and so depends on the device's length. A
corner adds its threshold shift to VTO's magnitude and multiplies KP; the cards' TNOM and
the deck's ``.temp`` are the same temperature, so ngspice applies none of its own
temperature laws and runs exactly the constants of `models.devices.mos.at_conditions`.

Rest test bench
---------------
`rest_testbench` holds the output at VDD/2 the way the amplifier's feedback does at rest
(DESIGN.md sec. 7).

- Common-source pair: a 0 V source ``V_HOLD`` from ``out`` to a VDD/2 reference holds the
  output, and one current-controlled current source per output gate injects
  k I(V_HOLD) into it, k = 1. I(V_HOLD) is the current the stage pushes into the output;
  more current into either gate means more pull-down and less pull-up, so the loop is
  negative. At rest the drive current of the gate pair is zero (the bias element is the
  only DC path between the gates), so the two injections must cancel in the gates' KCL
  sum: I(V_HOLD) settles at zero, apart from half the bulk-junction leakage of the gate
  nodes (a fraction of a picoampere). The output sits at VDD/2 by construction.
  The alternative emulation of DESIGN.md sec. 7, a voltage-controlled current source
  g (V(out) - VDD/2) into each gate with g about 1 S, has the same solution but not in
  ngspice-39: its Newton iteration stops with the gate voltages quantised to about 1e-5 V
  and the pull-up and pull-down currents up to 2 % apart (0.7 % at the AH02 demo design),
  whatever reltol, abstol and vntol are; g of 1e-4 S and below, or this held output, agree
  with the square-law solve to a few parts per million.
- Follower: a voltage-controlled voltage source of gain A = 1e4 (1e5 and above fails to
  converge) sets V(nm) - VDD/2 = A (VDD/2 - V(out)). Referred to VDD/2 rather than to
  ground it leaves an output error of (V(nm) - VDD/2) / A, tens of microvolts at most,
  instead of VDD/(2A). A ``.nodeset`` of VDD/2 on ``nm`` and ``out`` starts it in place.

Tight tolerances (``reltol=1e-7 abstol=1e-15 vntol=1e-9``) keep the simulator's own error
far below the 1 % of a cross-check.

ngspice also adds its default bulk junctions (IS = 1e-14 A) with GMIN = 1e-12 S across each;
they carry picoamperes at volts of reverse bias, which is what a cut-off stage reports as
its Iq.
"""
from __future__ import annotations

import types
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner, CornerShift, Polarity, Tech
from models.evaluate import Design
from models.stages import get_stage

from . import diffusion, mirrornet, ngspice
from .ngspice import NgspiceError, number

OPTIONS = "reltol=1e-7 abstol=1e-15 vntol=1e-9"
FEEDBACK_GAIN = 1.0  # 1, current gain from the held output's current into each gate (common-source pairs)
FOLLOWER_GAIN = 1e4  # 1, gain of the follower's feedback source; 1e5 and above fails to converge
INSTANCE = "X_STAGE"  # the stage's instance in the test bench
GROUND_PORT = "gnd"
OUT_TOLERANCE = 1e-3  # V, largest |V(out) - VDD/2| accepted as a rest point
BALANCE_TOLERANCE = (1e-3, 1e-9)  # (1, A), largest |I(pull-up) - I(pull-down)| accepted: rtol, atol


# ---------------------------------------------------------------------------------------
# Names
# ---------------------------------------------------------------------------------------
def stage_module(stage, design: Design | None = None) -> types.ModuleType:
    """The architecture module from a module or a registered name; checks the design's."""
    mod = get_stage(stage) if isinstance(stage, str) else stage
    if design is not None and design.architecture != mod.NAME:
        raise ValueError(f"design is a {design.architecture!r} design, not {mod.NAME!r}")
    return mod


def subcircuit_name(stage) -> str:
    """Name of the architecture's ``.subckt``: its registered name with ``-`` -> ``_``."""
    return stage_module(stage).NAME.replace("-", "_")


def model_name(stage, role: str, subckt: str | None = None) -> str:
    """Name of the level-1 card written for `role` in the ``.subckt`` named `subckt` (None:
    `subcircuit_name`): ``<subckt>_<role>``, e.g. ``floating_loop_mn_out``."""
    return f"{subcircuit_name(stage) if subckt is None else subckt}_{role}"


def device_name(role: str) -> str:
    """SPICE instance name of a transistor role, e.g. ``M_MN_OUT``."""
    return _element("M", role)


def _element(letter: str, name: str) -> str:
    upper = name.upper()
    return upper if upper.startswith(letter + "_") else f"{letter}_{upper}"


def _node(node: str) -> str:
    return GROUND_PORT if node == "0" else node


def drive_ports(stage) -> tuple[str, ...]:
    """The drive node(s) the amplifier acts on, in port order.

    Common-source output pair (both output sources on a rail): the gates of the pull-up
    and pull-down devices, ``("gp", "gn")``. Otherwise the topology's drive node (the
    followers' input ``nm``).
    """
    mod = stage_module(stage)
    ports = gate_nodes(mod) if common_source(mod) else ()
    return tuple(dict.fromkeys(ports + (mod.TOPOLOGY.drive,)))


def gate_nodes(stage) -> tuple[str, str]:
    """(gate of the pull-up output device, gate of the pull-down output device)."""
    mod = stage_module(stage)
    return mod.TOPOLOGY.spec(mod.PULL_UP).g, mod.TOPOLOGY.spec(mod.PULL_DOWN).g


def common_source(stage) -> bool:
    """True when both output devices have their source on a rail (a common-source pair)."""
    mod = stage_module(stage)
    return all(mod.TOPOLOGY.spec(r).s in ("vdd", "0") for r in (mod.PULL_UP, mod.PULL_DOWN))


def subcircuit_ports(stage) -> tuple[str, ...]:
    """Ports of the ``.subckt`` in order: ``vdd gnd out`` and the drive node(s)."""
    return ("vdd", GROUND_PORT, "out") + drive_ports(stage)


def _value(arr, i: int) -> float:
    """Element i of a design field (an array of shape (n,) or a scalar)."""
    a = np.asarray(arr, dtype=float)
    return float(a) if a.ndim == 0 else float(a.reshape(-1)[i])


def _shift(tech: Tech, corner: Corner) -> CornerShift:
    # A corner the technology does not define is no shift, as in models.evaluate.
    return tech.corners.get(Corner(corner), CornerShift())


def sizes(stage, design: Design, i: int, snap=None) -> dict[str, tuple[float, float]]:
    """Role -> (W, L) [m] of design i, passed through `snap` (e.g. ``tech.snap``) if given."""
    mod = stage_module(stage, design)
    out = {}
    for role in mod.ROLES:
        w, l = _value(design.w[role], i), _value(design.l[role], i)
        if snap is not None:
            w, l = float(snap(w)), float(snap(l))
        out[role] = (w, l)
    return out


def _length(x: float) -> str:
    """A drawn length [m] on a grid: 12 significant digits drop the binary noise of the
    snap (6e-05, not 5.9999999999999995e-05) and stay exact to far below any grid."""
    return format(float(x), ".12g")


# ---------------------------------------------------------------------------------------
# Netlist text
# ---------------------------------------------------------------------------------------
def model_cards(stage, design: Design, i: int, tech: Tech, corner: Corner = Corner.TT,
                temp: float | None = None, name: str | None = None, mirrors=None) -> str:
    """Level-1 ``.model`` cards of every device of design i, one per role.

    Parameters
    ----------
    stage : module or str
        Architecture module (models.stages) or its registered name.
    design : Design
        A population; element `i` is written.
    i : int
        Index of the design in the population.
    tech : Tech
        Technology; its constants hold at ``tech.tnom``.
    corner : Corner
        Process corner: its dvt is added to VTO's magnitude, its kp factor multiplies KP.
    temp : float or None
        Temperature [K]; None is ``tech.tnom``. The cards hold the constants of
        `models.devices.mos.at_conditions` at `temp` with TNOM = `temp`, for a deck run at
        ``.temp`` = `temp` (see `optimise.spice.ngspice.level1_model_card`).
    name : str or None
        Name of the ``.subckt`` that uses the cards (`stage_subcircuit`'s `name`); None is
        `subcircuit_name`.

    Returns
    -------
    str
        One line per role, in the topology's device order, named by `model_name`; then one
        per sized mirror of `mirrors` (study key -> Mirror, see `mirrornet`), if given.
    """
    mod = stage_module(stage, design)
    shift = _shift(tech, corner)
    wl = sizes(mod, design, i, tech.snap)
    lines = []
    for spec in mod.TOPOLOGY.devices:
        dvt, kp = (shift.dvt_n, shift.kp_n) if spec.polarity == Polarity.N else (shift.dvt_p, shift.kp_p)
        lines.append(ngspice.level1_model_card(
            model_name(mod, spec.role, name), tech.mos(spec.polarity), spec.polarity, wl[spec.role][1],
            temp=temp, tnom=tech.tnom, dvt=dvt, kp_scale=kp,
        ))
    return "\n".join(lines + mirrornet.mirror_cards(mod, mirrors, tech, corner, temp, name))


def stage_subcircuit(stage, design: Design, i: int, tech_or_models: Tech | Mapping[str, str],
                     grid: float | None = None, name: str | None = None,
                     extra_ports: tuple[str, ...] = (), mirrors=None) -> str:
    """The ``.subckt`` of design i, written from the architecture's topology.

    Parameters
    ----------
    stage : module or str
        Architecture module (models.stages) or its registered name.
    design : Design
        A population; element `i` is written.
    i : int
        Index of the design in the population.
    tech_or_models : Tech or mapping of str to str
        A Tech: the devices use the cards of `model_cards` given the same `name` (names
        from `model_name`) and W, L are snapped to ``tech.grid``. A mapping role -> model
        name: the devices use those models (a foundry kit's, say); W, L are snapped to
        `grid` if given, else written as designed.
    grid : float or None
        Drawing grid [m] for the mapping case; ignored with a Tech.
    name : str or None
        Name of the ``.subckt``; None is `subcircuit_name` (give each design its own name
        when one deck holds several).
    extra_ports : tuple of str
        Internal topology nodes to bring out as ports after the usual ones (a test bench
        that forces a follower's gates needs them); nodes already ports are skipped.
    mirrors : dict or None
        Study key -> Mirror: those bias sources written as mirrors (`mirrornet`).

    Returns
    -------
    str
        ``.subckt <name> vdd gnd out <drive ports> [extra ports]`` ... ``.ends``, without
        model cards.
    """
    mod = stage_module(stage, design)
    name = subcircuit_name(mod) if name is None else name
    if isinstance(tech_or_models, Tech):
        models = {role: model_name(mod, role, name) for role in mod.ROLES}
        snap = tech_or_models.snap
    else:
        models = dict(tech_or_models)
        missing = [r for r in mod.ROLES if r not in models]
        if missing:
            raise ValueError(f"no model name for {', '.join(missing)}; give one per role of {mod.NAME}: "
                             f"{', '.join(mod.ROLES)}")
        snap = None if grid is None else (lambda x: np.maximum(np.round(x / grid), 1.0) * grid)
    wl = sizes(mod, design, i, snap)
    ports = subcircuit_ports(mod)
    ports += tuple(p for p in dict.fromkeys(extra_ports) if p not in ports)
    lines = [
        f"* {mod.NAME}: output stage from stagefront (model estimate for early design, not sign-off)",
        f".subckt {name} {' '.join(ports)}",
    ]
    for spec in mod.TOPOLOGY.devices:
        w, l = wl[spec.role]
        bulk = spec.s if spec.role in design.tied else spec.rail
        nodes = " ".join(_node(n) for n in (spec.d, spec.g, spec.s, bulk))
        lines.append(f"{device_name(spec.role)} {nodes} {models[spec.role]} w={_length(w)} l={_length(l)}")
    lines += mirrornet.source_lines(mod, design, i, mirrors or {}, tech_or_models, snap, name)
    for res in mod.TOPOLOGY.resistors:
        val = _value(design.bias[res.bias], i)
        lines.append(f"{_element('R', res.name)} {_node(res.a)} {_node(res.b)} {number(val)}")
    lines.append(f".ends {name}")
    return "\n".join(lines)


def rest_testbench(stage, design: Design, i: int, tech: Tech, vdd: float, corner: Corner = Corner.TT,
                   temp: float | None = None, mirrors=None) -> str:
    """A complete ngspice deck for the rest point of design i (see the module notes).

    Parameters
    ----------
    stage : module or str
        Architecture module (models.stages) or its registered name.
    design : Design
    i : int
        Index of the design in the population.
    tech : Tech
    vdd : float
        Supply [V].
    corner : Corner
    temp : float or None
        Temperature [K]; None is ``tech.tnom``.

    Returns
    -------
    str
        Title, options, ``.temp``, model cards, the subcircuit, supply, feedback emulation,
        ``.op``; it saves every node voltage and the drain current ``[id]`` of the
        pull-down and pull-up output devices (`device_vector`).
    """
    mod = stage_module(stage, design)
    t = tech.tnom if temp is None else float(temp)
    t_c = round(t - ZERO_CELSIUS, 9)
    half = 0.5 * float(vdd)
    ports = subcircuit_ports(mod)
    lines = [
        f"stagefront {mod.NAME} design {i} at rest: {Corner(corner).value}, {t_c:g} degC, VDD = {float(vdd):g} V",
        f".options tnom={number(t_c)} {OPTIONS}",
        f".temp {number(t_c)}",
        model_cards(mod, design, i, tech, corner, temp, mirrors=mirrors),
        diffusion.add_geometry(stage_subcircuit(mod, design, i, tech, mirrors=mirrors), mod, tech, device_name),
        f"V_DD vdd 0 dc {number(vdd)}",
        f"V_MID mid 0 dc {number(half)}",
        f"{INSTANCE} {' '.join('0' if p == GROUND_PORT else p for p in ports)} {subcircuit_name(mod)}",
    ]
    fb, nodeset = feedback(mod, vdd)
    lines += fb + ([".nodeset " + " ".join(nodeset)] if nodeset else [])
    vectors = " ".join(device_vector(mod, role) for role in (mod.PULL_DOWN, mod.PULL_UP))
    lines += [f".save all {vectors}", ".op", ".end"]
    return "\n".join(lines)


def feedback(stage, vdd: float, node=None, mid: str = "mid", label: str = "") -> tuple[list[str], list[str]]:
    """The amplifier's feedback at rest, emulated as in the module notes.

    Parameters
    ----------
    stage : module or str
        Architecture module (models.stages) or its registered name.
    vdd : float
        Supply [V].
    node : callable or None
        Deck node of a subcircuit port (``"out"`` and the drive ports); None: the port's name.
    mid : str
        Deck node of the VDD/2 reference.
    label : str
        Appended to the element names (``V_HOLD<label>``, ``F_FB<label>_<GATE>``,
        ``E_FB<label>``) to keep several benches in one deck apart.

    Returns
    -------
    (list of str, list of str)
        Element lines and ``.nodeset`` entries (``v(node)=value``; the followers' only).
    """
    mod = stage_module(stage)
    node = node or (lambda port: port)
    out, half = node("out"), 0.5 * float(vdd)
    if common_source(mod):
        # The output current flows through V_HOLD into the reference; injected into the
        # gates it raises both, which lowers the output: negative feedback.
        hold = f"V_HOLD{label}"
        return [f"{hold} {out} {mid} dc 0"] + [
            f"F_FB{label}_{port.upper()} 0 {node(port)} {hold} {number(FEEDBACK_GAIN)}" for port in drive_ports(mod)
        ], []
    drive = node(drive_ports(mod)[0])
    return ([f"E_FB{label} {drive} {mid} {mid} {out} {number(FOLLOWER_GAIN)}"],
            [f"v({drive})={number(half)}", f"v({out})={number(half)}"])


def device_vector(stage, role: str, quantity: str = "id") -> str:
    """ngspice's vector name for a device quantity in the test bench, e.g.
    ``@m.x_stage.m_mn_out[id]`` (lower case, as the rawfile names it)."""
    stage_module(stage)
    return f"@m.{INSTANCE}.{device_name(role)}[{quantity}]".lower()


# ---------------------------------------------------------------------------------------
# Running
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class RestPoint:
    """ngspice's rest point of one design. SI.

    iq: frame current of the pull-down output device [A] (the stage's Iq; positive when it
    conducts in its natural direction). i_pull_up: the same for the pull-up device [A].
    v_out: output voltage [V]. nodes: topology node name -> voltage [V], every internal
    node of the stage.
    """

    iq: float
    i_pull_up: float
    v_out: float
    nodes: dict


def simulate_rest(stage, design: Design, i: int, tech: Tech, vdd: float, corner: Corner = Corner.TT,
                  temp: float | None = None, timeout: float = 60, mirrors=None) -> RestPoint:
    """Run `rest_testbench` in ngspice and read its rest point.

    Parameters are those of `rest_testbench`; `timeout` [s] bounds the ngspice process.

    Returns
    -------
    RestPoint

    Raises
    ------
    NgspiceError
        When ngspice fails (its own message), a vector is missing, or the feedback did not
        bring the stage to rest: V(out) more than 1 mV from VDD/2, or pull-up and pull-down
        currents apart by more than 0.1 % (plus 1 nA).
    """
    mod = stage_module(stage, design)
    deck = rest_testbench(mod, design, i, tech, vdd, corner, temp, mirrors)
    res = ngspice.run(deck, timeout=timeout)

    def get(name: str) -> float:
        try:
            return float(ngspice.vector(res, name)[0])
        except KeyError:
            raise NgspiceError(f"ngspice did not report {name}; it reported: {', '.join(sorted(res))}") from None

    # ngspice reports a level-1 device's [id] in the device's own frame (a conducting PMOS
    # gives a positive id, as does an NMOS), which is the frame current of models.devices.mos.
    iq = get(device_vector(mod, mod.PULL_DOWN))
    i_up = get(device_vector(mod, mod.PULL_UP))
    v_out = get("v(out)")
    rtol, atol = BALANCE_TOLERANCE
    if not abs(v_out - 0.5 * vdd) <= OUT_TOLERANCE or not abs(iq - i_up) <= rtol * max(abs(iq), abs(i_up)) + atol:
        raise NgspiceError(
            f"{mod.NAME} design {i}: the feedback did not bring the stage to rest at VDD/2 = {0.5 * vdd:g} V "
            f"(ngspice: V(out) = {v_out:.6g} V, pull-down {iq:.6g} A, pull-up {i_up:.6g} A); the stage has "
            f"no rest point with zero output current at this supply")
    ports = set(subcircuit_ports(mod))
    nodes = {}
    for node in mod.TOPOLOGY.nodes:
        key = f"v({node})" if node in ports else f"v({INSTANCE.lower()}.{node})"
        nodes[node] = get(key)
    return RestPoint(iq=iq, i_pull_up=i_up, v_out=v_out, nodes=nodes)


def rest_iq(stage, design: Design, i: int, tech: Tech, vdd: float, corner: Corner = Corner.TT,
            temp: float | None = None, timeout: float = 60, mirrors=None) -> float:
    """Iq of design i at rest according to ngspice [A]: `simulate_rest(...).iq`."""
    return simulate_rest(stage, design, i, tech, vdd, corner, temp, timeout, mirrors).iq
