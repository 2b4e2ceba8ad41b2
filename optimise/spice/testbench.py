"""Test benches of the SPICE hand-off: a design's rest point, a load sweep and its two
drive-limit points, as one readable netlist or as many designs batched into one deck.

Model cards
-----------
`ModelSource` says where the devices' models come from: a user's card (a ``.lib`` file with
corner sections, referenced as ``.lib FILE CORNER``, or a plain card, ``.include FILE``),
with one model name per polarity for every device; or, without a card, the level-1 cards
that `optimise.spice` writes from the study's technology (one per device, baked at the
corner and temperature, TNOM equal to the run temperature).

Blocks
------
Every block is its own instance of the design's subcircuit with its own supply, so one deck
can hold many designs and supplies side by side (they share nothing but ground):

- ``rest``: the output held at VDD/2 by the amplifier's feedback, emulated as in
  `optimise.spice.netlist.feedback` (0 V source V_HOLD from the output to a VDD/2 reference and
  one current-controlled current source per output gate for a common-source pair; a
  voltage-controlled voltage source of gain 1e4 on the input for the followers). ``.op``
  gives Iq: the drain current of the pull-down output device.
- ``load`` (readable netlist only): the same feedback, plus a current source I_LOAD drawing
  current from the output, swept from -i_load (the stage sinks) to +i_load (it sources).
  The output stays at VDD/2 and the sweep shows how the class-AB control shares the load
  between the output devices. Here the feedback stays ideal, not replaced by the drive-limit
  voltages: a design that meets its peak-current target delivers i_load at mid-supply with
  its gates inside the driver's range (that is what iout_source_a >= i_load means), so a
  clamp would never act. The drive limit matters towards the rails, in the next blocks.
- ``src`` and ``snk``: the amplifier replaced by the drive limit. The driven gate is forced
  to the voltage the model's `driven()` gives at the limit (the pull-up's gate when sourcing,
  the pull-down's when sinking; with a driver that moves one gate only, that gate); every
  other node settles by the circuit's own equations (for the floating loop the other gate by
  KCL at it, for the fixed bias by the resistor, for the followers by the diode string). A
  voltage source V_OUT sweeps the output from VDD/2 to the rail; its current is the current
  the stage pushes into the load. At VDD/2 it is the peak source (sink) current; where it
  falls to the load current the output voltage gives the headroom to that rail, exactly as
  `models.evaluate` defines both (headroom VDD/2 when the peak is below the load current).

The followers' output gates are internal nodes; the subcircuit brings them out as extra
ports (`bench_ports`) so the drive-limit blocks can force them.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from models.circuit.mirrors import source_states
from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner, Polarity, Tech
from models.evaluate import Design, Targets, corner_shifts, devices_at, rest_point
from models.stages import get_stage

from ..files.errors import InputError
from ..files.inputs import MAX_CARD_BYTES, read_input_text
from .cards import check_card_path, check_model_name, comment_safe, scan_card
from . import netlist, ngspice
from .diffusion import add_geometry
from .netlist import common_source, gate_nodes, stage_module
from .ngspice import number, vector

SWEEP_POINTS = 100  # points of each drive-limit sweep from VDD/2 to the rail (9 mV apart at 1.8 V)
LOAD_POINTS = 100  # points of the readable netlist's load-current sweep
CORNERS = tuple(c.value for c in Corner)


# ---------------------------------------------------------------------------------------
# Model cards
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class ModelSource:
    """Where the device models come from.

    path None: level-1 cards from the technology (every corner it defines). Otherwise the
    user's card with `sections` (the corner sections found; empty for a plain card, which
    supports tt only) and the model names `nmos`, `pmos` used for every device.
    """

    path: Path | None = None
    nmos: str = "nch"
    pmos: str = "pch"
    sections: tuple[str, ...] = ()

    @property
    def level1(self) -> bool:
        return self.path is None

    def corners(self, tech: Tech) -> tuple[Corner, ...]:
        """Corners this source can simulate."""
        if self.level1:
            return tuple(tech.corners)
        if self.sections:
            return tuple(Corner(s) for s in CORNERS if s in self.sections)
        return (Corner.TT,)

    def reference(self, corner: Corner) -> str:
        """The deck line that brings the card in for `corner`."""
        if self.sections:
            return f'.lib "{self.path}" {Corner(corner).value}'
        return f'.include "{self.path}"'

    def describe(self) -> str:
        if self.level1:
            return "level-1 cards from the technology file"
        kind = f".lib sections {', '.join(self.sections)}" if self.sections else "plain card (tt only)"
        return f"{self.path} ({kind}); models {self.nmos} (NMOS), {self.pmos} (PMOS)"


_SECTION = re.compile(r"^\s*\.lib\s+([A-Za-z0-9_]+)\s*$", re.IGNORECASE)
_REFERENCE = re.compile(r"^\s*\.(lib|include|inc)\s+\S+", re.IGNORECASE)
_MODEL = re.compile(r"^\s*\.model\s+([^\s(]+)(?:\s*\(?\s*([A-Za-z]+))?", re.IGNORECASE)


def load_models(path, nmos: str = "nch", pmos: str = "pch", where: str = "--models",
                trust: bool = False) -> ModelSource:
    """Check a user's model file and find its corner sections.

    Parameters
    ----------
    path : str or os.PathLike
        A ``.lib`` file with sections (``.lib tt`` ... ``.endl tt``) or a plain card.
    nmos, pmos : str
        Model names used for the NMOS and PMOS devices.
    where : str
        Option name for messages.
    trust : bool
        Accept a card holding ``.control`` or ``shell`` lines (``--trust-card``).

    Returns
    -------
    ModelSource

    Raises
    ------
    InputError
        The file is missing, unreadable or not text, holds no ``.model`` card, or does not
        define the model names (binned names such as ``nch.1`` count as ``nch``). A file
        that itself includes other files is not searched for names; ngspice reports those.
    """
    check_model_name("--nmos", nmos)
    check_model_name("--pmos", pmos)
    p = Path(path)
    check_card_path(where, p.resolve())
    text = read_input_text(p, f"{where} {p}", MAX_CARD_BYTES,
                           hint="give the path of a SPICE model card (.lib or .mod)")
    scan_card(where, p, text, trust)
    sections, models, refs = [], {}, False
    for line in text.splitlines():
        m = _SECTION.match(line)
        if m:
            sections.append(m.group(1).lower())
            continue
        if _REFERENCE.match(line):
            refs = True
        m = _MODEL.match(line)
        if m:  # name -> the device types the card declares it with (nmos, pmos)
            models.setdefault(m.group(1).lower().split(".")[0], set()).add((m.group(2) or "").lower())
    if not models and not refs:
        raise InputError(f"{where} {p}", "holds no .model card", hint="a SPICE model file defines its devices with "
                         "'.model NAME nmos (...)' lines, optionally inside '.lib tt' ... '.endl tt' sections")
    if not refs:
        for option, name in (("--nmos", nmos), ("--pmos", pmos)):
            if name.lower() not in models:
                raise InputError(f"{where} {p}", f"defines no model {name!r} ({option})",
                                 ", ".join(sorted(models)), f"name the file's models with {option}")
            kind = option.lstrip("-")
            other = {"nmos": "pmos", "pmos": "nmos"}[kind]
            if other in models[name.lower()]:
                raise InputError(f"{where} {p}", f"model {name!r} ({option}) is declared {other.upper()} in the card "
                                 f"('.model {name} {other}')", f"{'an' if kind == 'nmos' else 'a'} {kind.upper()} model for {option}",
                                 f"name the card's {kind.upper()} model with {option}; "
                                 f"{'--pmos' if kind == 'nmos' else '--nmos'} takes the {other.upper()} one")
    # Sections that are not corners (a shared body, say) are allowed and not simulated.
    corners = tuple(s for s in CORNERS if s in sections)
    if sections and not corners:
        raise InputError(f"{where} {p}", f"has sections {', '.join(sections)} but none is a corner",
                         ", ".join(CORNERS), "name the sections after the corners (tt ff ss fs sf)")
    return ModelSource(p.resolve(), nmos, pmos, corners)


def design_models(stage, design: Design, i: int, tech: Tech, models: ModelSource, corner: Corner, temp: float,
                  name: str, mirrors=None) -> tuple[str, str]:
    """(model cards or "", subcircuit) of design i under the subcircuit name `name`; `mirrors`
    (study key -> Mirror) writes those bias sources as mirrors (`optimise.spice.mirrornet`)."""
    mod = stage_module(stage)
    if models.level1:
        # Level-1 cards named after the subcircuit, ``<name>_<role>``, at this corner and temperature.
        return (netlist.model_cards(mod, design, i, tech, corner, temp, name, mirrors),
                add_geometry(netlist.stage_subcircuit(mod, design, i, tech, name=name, extra_ports=gate_nodes(mod),
                                                      mirrors=mirrors), mod, tech, netlist.device_name))
    names = {s.role: (models.nmos if s.polarity == Polarity.N else models.pmos) for s in mod.TOPOLOGY.devices}
    return "", add_geometry(netlist.stage_subcircuit(mod, design, i, names, grid=tech.grid, name=name,
                                                     extra_ports=gate_nodes(mod), mirrors=mirrors), mod, tech,
                            netlist.device_name)


def header(title: str, models: ModelSource, corner: Corner, temp: float) -> list[str]:
    """Title, options, temperature and the card reference of a deck at one corner and temperature [K]."""
    t_c = round(float(temp) - ZERO_CELSIUS, 9)
    opts = f".options {netlist.OPTIONS}" + (f" tnom={t_c!r}" if models.level1 else "")
    lines = [comment_safe(title), opts, f".temp {t_c!r}"]
    if not models.level1:
        lines.append(models.reference(corner))
    return lines


def require_ngspice() -> None:
    """Raise NgspiceError (saying where it looked) unless an ngspice executable is found."""
    ngspice.require_executable()


# ---------------------------------------------------------------------------------------
# Drive limits from the model
# ---------------------------------------------------------------------------------------
def bench_ports(stage) -> tuple[str, ...]:
    """Ports of the test-bench subcircuit: the usual ones and both output gates."""
    mod = stage_module(stage)
    ports = netlist.subcircuit_ports(mod)
    return ports + tuple(g for g in gate_nodes(mod) if g not in ports)


def forced_gate(stage, direction: int, drive: str) -> str:
    """The gate the drive-limit block forces: the active output device's gate, or for a
    common-source pair driven on one gate only (drive "p" or "n"), that gate."""
    mod = stage_module(stage)
    up, down = gate_nodes(mod)
    if common_source(mod) and drive in ("p", "n"):
        return up if drive == "p" else down
    return up if direction > 0 else down


@dataclass
class Limits:
    """Model gate voltages at the drive limits of n elements (designs x supplies), SI.

    forced: direction (+1 source, -1 sink) -> (node name, voltage array (n,));
    ok: (n,) the model solved the rest point and both limits.
    """

    forced: dict
    ok: np.ndarray


def drive_limits(design: Design, tech: Tech, targets: Targets, corner: Corner, temp: float, vdd, idx) -> Limits:
    """The model's drive-limit gate voltages, as `models.evaluate` finds them.

    Parameters
    ----------
    design : Design
        A population of one architecture.
    tech : Tech
    targets : Targets
        Driver compliance and which gates it drives.
    corner : Corner
    temp : float
        Temperature [K].
    vdd : ndarray, shape (n,)
        Supply of each element [V].
    idx : ndarray of int, shape (n,)
        Design index of each element.

    Returns
    -------
    Limits
    """
    stage = get_stage(design.architecture)
    vdd = np.asarray(vdd, dtype=float)
    idx = np.asarray(idx, dtype=int)
    n = len(idx)
    # The devices and the rest point exactly as models.evaluate builds and solves them.
    devs = devices_at(stage, design, tech, corner_shifts(tech, [Corner(corner)] * n), np.full(n, float(temp)), idx)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    sources = source_states(stage.TOPOLOGY, targets.mirrors.get(design.architecture, {}), tech, devs, bias, vdd)
    nodes, ok, _, _ = rest_point(stage, devs, bias, vdd, sensitivity=False, sources=sources)
    if sources is not None:  # the driven points see the mirror currents of rest, as in models.evaluate
        bias = sources.rest_bias(bias, nodes, vdd)
    up, _ = gate_nodes(stage)
    forced = {}
    for direction in (+1, -1):
        gn, gp, _, ok_d = stage.driven(devs, bias, vdd, nodes, direction, targets.drive, targets.vcomp)
        node = forced_gate(stage, direction, targets.drive)
        forced[direction] = (node, gp if node == up else gn)
        ok = ok & ok_d
    return Limits(forced, ok)


# ---------------------------------------------------------------------------------------
# Blocks
# ---------------------------------------------------------------------------------------
def block_node(part: str, tag: str, node: str) -> str:
    """Top-level name of a block's node, e.g. ``src3_out`` (part src, tag 3)."""
    return f"{part}{tag}_{node}"


def instance(part: str, tag: str) -> str:
    return f"X_{part.upper()}{tag}"


def supply_lines(tag: str, vdd: float) -> list[str]:
    return [f"V_DD{tag} vdd{tag} 0 dc {number(vdd)}", f"V_MID{tag} mid{tag} 0 dc {number(0.5 * vdd)}"]


def _instance_line(mod, sub: str, part: str, tag: str) -> str:
    nodes = []
    for p in bench_ports(mod):
        nodes.append(f"vdd{tag}" if p == "vdd" else "0" if p == netlist.GROUND_PORT else block_node(part, tag, p))
    return f"{instance(part, tag)} {' '.join(nodes)} {sub}"


def feedback_block(mod, sub: str, part: str, tag: str, vdd: float) -> tuple[list[str], list[str]]:
    """An instance held at VDD/2 by the feedback emulation (`optimise.spice.netlist.feedback`).
    Returns (lines, nodeset entries)."""
    lines, nodeset = netlist.feedback(mod, vdd, lambda port: block_node(part, tag, port), f"mid{tag}",
                                    f"_{part.upper()}{tag}")
    return [_instance_line(mod, sub, part, tag)] + lines, nodeset


def drive_block(mod, sub: str, direction: int, tag: str, vdd: float, node: str, value: float,
                batch: bool) -> list[str]:
    """An instance with `node` forced to `value` [V] and the output on a sweep source.

    Readable netlist (batch False): V_OUT_<part> is a plain source at VDD/2, swept by its own
    ``.dc``. Batch: V(out) = VDD/2 (1 + direction s) for the shared sweep node s from 0 to 1.
    Either way I(V_OUT_<part>) is the current the stage pushes into the load.
    """
    part = "src" if direction > 0 else "snk"
    up = part.upper()
    out = block_node(part, tag, "out")
    lines = [_instance_line(mod, sub, part, tag),
             f"V_GATE_{up}{tag} {block_node(part, tag, node)} 0 dc {number(value)}"]
    if batch:
        e_node = block_node(part, tag, "sweep")
        lines += [f"E_OUT_{up}{tag} {e_node} 0 sweep 0 {number(direction * 0.5 * vdd)}",
                  f"V_OUT_{up}{tag} {out} {e_node} dc {number(0.5 * vdd)}"]
    else:
        lines.append(f"V_OUT_{up}{tag} {out} 0 dc {number(0.5 * vdd)}")
    return lines


def device_vector(part: str, tag: str, role: str) -> str:
    """Rawfile name of a block device's drain current, e.g. ``@m.x_rest3.m_mn_out[id]``."""
    return f"@m.{instance(part, tag)}.{netlist.device_name(role)}[id]".lower()


# ---------------------------------------------------------------------------------------
# Reading results
# ---------------------------------------------------------------------------------------
def rest_current(res: dict, mod, tag: str) -> tuple[float, float, float]:
    """(Iq, pull-up current, V(out)) of a rest block from an operating-point plot.

    Iq is the magnitude of the pull-down output device's drain current (ngspice's [id] is
    the device-frame current for level 1 and BSIM3 alike; the magnitude keeps it so for any
    model that signs it otherwise).
    """
    iq = abs(float(vector(res, device_vector("rest", tag, mod.PULL_DOWN))[0]))
    up = abs(float(vector(res, device_vector("rest", tag, mod.PULL_UP))[0]))
    out = float(vector(res, f"v({block_node('rest', tag, 'out')})")[0])
    return iq, up, out


def drive_point(s, current, vdd: float, direction: int, i_load: float) -> tuple[float, float]:
    """(peak current [A], headroom [V]) of one drive-limit sweep.

    Parameters
    ----------
    s : ndarray (k,)
        Normalised sweep from 0 (output at VDD/2) to 1 (output at the rail).
    current : ndarray (k,)
        I(V_OUT): current the stage pushes into the load at each point [A].
    vdd : float
    direction : +1 source, -1 sink.
    i_load : float
        Peak load current [A].

    Notes
    -----
    The definitions of `models.evaluate`: the peak is the current at VDD/2 (positive when
    delivered in `direction`); the headroom is the distance from the rail of the first
    output voltage, going from VDD/2 to the rail, where that current falls to i_load
    (linear interpolation between sweep points), and VDD/2 when the peak is below i_load.
    """
    s = np.asarray(s, dtype=float)
    cur = direction * np.asarray(current, dtype=float)
    peak = float(np.interp(0.0, s, cur))
    if peak < i_load:
        return peak, 0.5 * vdd
    below = np.flatnonzero(cur < i_load)
    if below.size == 0:  # never falls to the load current before the rail
        return peak, 0.0
    k = int(below[0])
    s0, s1, c0, c1 = s[k - 1], s[k], cur[k - 1], cur[k]
    s_at = s0 + (c0 - i_load) * (s1 - s0) / (c0 - c1)
    v_at = 0.5 * vdd * (1.0 + direction * s_at)
    return peak, (vdd - v_at) if direction > 0 else v_at
