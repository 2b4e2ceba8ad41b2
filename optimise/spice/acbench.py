"""The stage inside its amplifier in ngspice: the AC bench (loop gain, phase margin,
unity-gain frequency) and the slew bench, beside the model of `models.amplifier`.

AC bench (one per design and supply, each with its own nodes, ``ac<tag>_...``)
--------
- the stage's subcircuit on its own supply; the compensation capacitor ``C_C`` from the
  output to the driven node; the first stage as a voltage-controlled current source
  ``G_1`` of gm1 into the driven node, with its output resistance ``R_1`` (returned to a
  source at the node's rest voltage from the model, so no DC current flows in it) and its
  parasitic capacitance ``C_1``; the load capacitance (and resistance, to VDD/2) at the
  output;
- the feedback: ``E_BETA`` gives VDD/2 + beta (V(out) - VDD/2) at node fb; the AC source
  ``V_AC`` (0 V at DC) sits in series between fb and the first stage's inverting input in.
  Both ends are ideal (the output of a controlled source, the input of a transconductor),
  so this voltage injection breaks the loop exactly at AC while the DC loop sets the rest
  point (output at VDD/2, no output current): the loop gain is T = -V(fb) / V(in)
  (voltage injection: R. D. Middlebrook, "Measurement of loop gain in feedback systems",
  Int. J. Electronics 38(4), 1975; equivalent to the large-inductor / large-capacitor
  break, whose 1 GH and 1 kF entries spoiled ngspice's matrix on some designs here).
- The first stage's polarity makes the feedback negative: it injects gm1 (V(in-) - V(in+))
  when the stage inverts (a common-source pair: a higher gate lowers the output), the
  opposite for the followers.

Level-1 cards here carry the capacitances the model uses: TOX = 3.9 eps0 / Cox and
CGSO = CGDO = Cov (the DC cards of `optimise.spice.netlist` have none); a user's card
brings its own.

Slew bench: the loop closed directly (no break), the first stage a current source limited
to +-I1, I = I1 tanh(gm1 v_diff / I1) (a B source), and a step of the non-inverting input.
"""
from __future__ import annotations

import dataclasses

import numpy as np

from models.amplifier.inside import model as amplifier_model
from models.amplifier.response import poles_zeros
from models.amplifier.smallsignal import drive_node
from models.devices.tech import Corner
from models.operating import corner_shifts, devices_at, rest_point
from models.stages import get_stage

from . import ngspice
from . import testbench as tb
from .ngspice import NgspiceError, number

EPS_OX = 3.9 * 8.854214871e-12  # F/m, the oxide permittivity ngspice's level 1 uses for Cox = EPS_OX / TOX
POINTS_PER_DECADE = 40
F_START, F_STOP = 1.0, 1e10  # Hz


def cap_cards(mod, cards: str, tech) -> str:
    """Level-1 cards (one line per device, topology order) with TOX, CGSO and CGDO added, and
    the junctions CJ, MJ, CJSW, MJSW, PB (with the netlists' AD/AS/PD/PS they give the
    drain and source junction capacitances; level 1 has one built-in potential PB for the
    bottom and the sidewall, so a technology whose pbsw differs from pb is written with pb
    for both)."""
    out = []
    for spec, line in zip(mod.TOPOLOGY.devices, cards.splitlines()):
        mt = tech.mos(spec.polarity)
        extra = f" tox={number(EPS_OX / mt.cox)} cgso={number(mt.cov)} cgdo={number(mt.cov)}"
        extra += (f" cj={number(mt.cj)} mj={number(mt.mj)} cjsw={number(mt.cjsw)} mjsw={number(mt.mjsw)}"
                  f" pb={number(mt.pb)}")
        out.append(line[:line.rindex(")")] + extra + ")")
    return "\n".join(out)


def targets_of(targets, design, k: int):
    """The targets with the amplifier of design k: its own Cc when the search sizes it."""
    amp = targets.amplifier
    if design.cc is None:
        return targets
    return dataclasses.replace(targets, amplifier=dataclasses.replace(amp, cc=float(design.cc[k]), cc_bounds=None))


def rest_info(design, tech, targets, corner: Corner, temp: float, vdd, idx):
    """Per element (design idx, supply vdd): the driven node's rest voltage [V] and the sign
    of the stage's transfer H(0) from a current into the driven node to the output."""
    mod = get_stage(design.architecture)
    shifts = corner_shifts(tech, [corner] * len(vdd))
    devs = devices_at(mod, design, tech, shifts, np.full(len(vdd), temp), idx)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    nodes, ok, _, op = rest_point(mod, devs, bias, vdd, sensitivity=False)
    amp = targets.amplifier
    g, c, i_d, i_o, _ = amplifier_model(mod, devs, bias, tech, op, nodes, vdd, targets.c_load, amp, targets.drive,
                                        cc=amp.compensation(design.cc, idx))
    _, _, h0, _, _ = poles_zeros(g, c, i_d, i_o)
    node = drive_node(mod, targets.drive)
    return nodes[node], np.sign(h0), ok


def _node(tag: str, name: str) -> str:
    return f"ac{tag}_{name}"


def _stage_lines(mod, sub, tag, vdd, targets, v_rest, sign, inm, inp):
    """Supply, the stage instance, Cc, the first stage (VCCS, R1, C1) and the load."""
    amp = targets.amplifier
    node = drive_node(mod, targets.drive)
    ports = []
    for p in tb.bench_ports(mod):
        ports.append(_node(tag, "vdd") if p == "vdd" else "0" if p == tb.netlist.GROUND_PORT else _node(tag, p))
    out, drv, mid = _node(tag, "out"), _node(tag, node), _node(tag, "mid")
    a, b = (inm, inp) if sign < 0 else (inp, inm)
    lines = [f"V_DD{tag} {_node(tag, 'vdd')} 0 dc {number(vdd)}", f"V_MID{tag} {mid} 0 dc {number(0.5 * vdd)}",
             f"X_AC{tag} {' '.join(ports)} {sub}",
             f"C_C{tag} {out} {drv} {number(amp.cc)}",
             f"C_1{tag} {drv} 0 {number(amp.c1)}",
             f"V_R1REF{tag} {_node(tag, 'r1ref')} 0 dc {number(v_rest)}",
             f"R_1{tag} {drv} {_node(tag, 'r1ref')} {number(amp.r1)}",
             f"C_LOAD{tag} {out} 0 {number(targets.c_load)}"]
    if np.isfinite(amp.r_load):
        lines.append(f"R_LOAD{tag} {out} {mid} {number(amp.r_load)}")
    lines.append(f"E_BETA{tag} {_node(tag, 'fb')} {mid} {out} {mid} {number(amp.beta)}")
    return lines, (a, b), drv


def ac_block(mod, sub: str, tag: str, vdd: float, targets, v_rest: float, sign: float) -> list[str]:
    """One AC bench (see the module notes); nodes ``ac<tag>_...``."""
    amp = targets.amplifier
    inm, inp = _node(tag, "in"), _node(tag, "mid")
    lines, (a, b), drv = _stage_lines(mod, sub, tag, vdd, targets, v_rest, sign, inm, inp)
    lines += [f"G_1{tag} 0 {drv} {a} {b} {number(amp.transconductance)}",
              f"V_AC{tag} {inm} {_node(tag, 'fb')} dc 0 ac 1"]
    return lines


def ac_deck(design, members, study, models, corner: Corner, temp: float, tags=None):
    """A deck with one AC bench per (design, supply) element; returns (deck, tags, elements)."""
    mod = get_stage(design.architecture)
    tech, targets = study.tech, study.targets
    supplies = study.conditions.supplies
    idx = np.repeat(np.array(members, dtype=int), len(supplies))
    vdd = np.tile(np.array(supplies, dtype=float), len(members))
    v_rest, sign, _ = rest_info(design, tech, targets, corner, temp, vdd, idx)
    lines = tb.header(f"stagefront AC bench: {len(members)} {mod.NAME} designs, {corner.value}, "
                      f"{temp - 273.15:g} degC", models, corner, temp)
    tags = []
    for k in members:
        cards, sub = tb.design_models(mod, design, k, tech, models, corner, temp, f"d{k}")
        if cards:
            lines.append(cap_cards(mod, cards, tech))
        lines.append(sub)
    for e, (k, v) in enumerate(zip(idx, vdd)):
        tag = f"{k}v{e % len(supplies)}"
        tags.append(tag)
        lines += ac_block(mod, f"d{k}", tag, float(v), targets_of(targets, design, k), float(v_rest[e]),
                          float(sign[e]))
    lines += [f".ac dec {POINTS_PER_DECADE} {number(F_START)} {number(F_STOP)}", ".end"]
    return "\n".join(lines), tags, list(zip(idx.tolist(), vdd.tolist()))


def crossing(f, t):
    """Unity-gain frequency [Hz] and phase margin [deg] of a sampled loop gain t(f): the
    first fall of |t| through 1, interpolated linearly in log f (magnitude in dB, phase
    unwrapped from its value at the lowest frequency). (0, 180) when |t| never reaches 1."""
    mag = 20.0 * np.log10(np.abs(t))
    phase = np.degrees(np.unwrap(np.angle(t)))
    below = np.flatnonzero((mag[:-1] >= 0) & (mag[1:] < 0))
    if not below.size:
        return 0.0, 180.0
    j = below[0]
    x = mag[j] / (mag[j] - mag[j + 1])
    lf = np.log10(f[j]) + x * (np.log10(f[j + 1]) - np.log10(f[j]))
    ph = phase[j] + x * (phase[j + 1] - phase[j])
    return float(10.0 ** lf), float(180.0 + ph)


def simulate_ac(design, members, study, models, corner: Corner, temp: float, timeout: float = 300) -> dict:
    """ngspice's unity-gain frequency and phase margin of designs `members` at every
    supply: {(member, vdd): {"ugf_hz", "phase_margin_deg"}}. Raises NgspiceError."""
    deck, tags, elements = ac_deck(design, members, study, models, corner, temp)
    plots = ngspice.run_plots(deck, timeout=timeout)
    ac = next((p.vectors for p in plots if p.name.lower().startswith("ac")), None)
    if ac is None:
        raise NgspiceError(f"ngspice wrote {', '.join(p.name for p in plots)}; expected an AC analysis")
    f = np.real(np.asarray(ac["frequency"]))
    out = {}
    for tag, (k, v) in zip(tags, elements):
        t = -np.asarray(ac[f"v({_node(tag, 'fb')})"]) / np.asarray(ac[f"v({_node(tag, 'in')})"])
        ugf, pm = crossing(f, t)
        out[(int(k), float(v))] = {"ugf_hz": ugf, "phase_margin_deg": pm}
    return out


def slew_deck(design, k: int, study, models, corner: Corner, temp: float, step: float, t_stop: float):
    """A transient deck of design k at the nominal supply in the closed loop, the input
    stepping by `step` [V] (up) at 1 % of `t_stop` [s]. Returns (deck, output node)."""
    mod = get_stage(design.architecture)
    tech, targets = study.tech, targets_of(study.targets, design, k)
    amp = targets.amplifier
    vdd = float(study.conditions.vdd_nom)
    v_rest, sign, _ = rest_info(design, tech, targets, corner, temp, np.array([vdd]), np.array([k]))
    tag = "s"
    lines = tb.header(f"stagefront slew bench: {mod.NAME} design {k}", models, corner, temp)
    cards, sub = tb.design_models(mod, design, k, tech, models, corner, temp, f"d{k}")
    if cards:
        lines.append(cap_cards(mod, cards, tech))
    lines.append(sub)
    inm, inp = _node(tag, "fb"), _node(tag, "inp")
    body, (a, b), drv = _stage_lines(mod, f"d{k}", tag, vdd, targets, float(v_rest[0]), float(sign[0]), inm, inp)
    half = 0.5 * vdd
    t0 = 0.01 * t_stop
    gm1, i1 = amp.transconductance, amp.i1
    body += [f"V_IN{tag} {inp} 0 pwl(0 {number(half - 0.5 * step)} {number(t0)} {number(half - 0.5 * step)} "
             f"{number(t0 * 1.001)} {number(half + 0.5 * step)})",
             f"B_1{tag} 0 {drv} i={number(i1)}*tanh({number(gm1 / i1)}*(v({a})-v({b})))"]
    lines += body
    lines += [f".tran {number(t_stop / 2000)} {number(t_stop)}", ".end"]
    return "\n".join(lines), _node(tag, "out")


def simulate_slew(design, k: int, study, models, corner: Corner, temp: float, step: float, t_stop: float,
                  timeout: float = 120) -> float:
    """The output slew rate in ngspice [V/s]: the steepest slope of the output while it
    moves from 10 % to 90 % of the step (the first stage's tanh leaves saturation as the
    error shrinks, so a mean slope would mix in the linear settling)."""
    deck, out = slew_deck(design, k, study, models, corner, temp, step, t_stop)
    plots = ngspice.run_plots(deck, timeout=timeout)
    tr = next((p.vectors for p in plots if p.name.lower().startswith("transient")), None)
    if tr is None:
        raise NgspiceError(f"ngspice wrote {', '.join(p.name for p in plots)}; expected a transient")
    t = np.real(np.asarray(tr["time"]))
    v = np.real(np.asarray(tr[f"v({out})"]))
    v0, v1 = v[0], v[-1]
    inside = (v >= v0 + 0.1 * (v1 - v0)) & (v <= v0 + 0.9 * (v1 - v0))
    slope = np.diff(v) / np.maximum(np.diff(t), 1e-30)
    return float(np.max(slope[inside[1:] & inside[:-1]]))


def netlist_block(design, study, models, corner: Corner, temp: float, vdd: float, pvt: dict) -> list[str]:
    """The AC bench of design 0 for the readable netlist (`stagefront netlist`): comment
    lines with the model's figures, the stage's subcircuit under its own name with the
    capacitance cards, the bench (nodes ``ac_...``) and its ``.ac`` line."""
    mod = get_stage(design.architecture)
    targets = targets_of(study.targets, design, 0)
    v_rest, sign, _ = rest_info(design, study.tech, targets, corner, temp, np.array([vdd]), np.array([0]))
    sub = tb.netlist.subcircuit_name(mod) + "_ac"
    cards, subckt = tb.design_models(mod, design, 0, study.tech, models, corner, temp, sub)

    def mhz(key):
        v = pvt[key]
        return f"{v / 1e6:.4g} MHz" if np.isfinite(v) else "none"

    lines = [
        "*",
        "* AC bench: the stage inside its amplifier (stagefront's model of it predicts):",
        f"*   unity-gain frequency {mhz('ugf_hz')}, phase margin {pvt['phase_margin_deg']:.2f} deg",
        f"*   dominant pole {pvt['p1_hz']:.4g} Hz, output pole {mhz('fp2_hz')}, internal pole {mhz('fint_hz')}, "
        f"right-half-plane zero {mhz('fz_hz')}",
        "*   loop gain T = -V(ac0_fb) / V(ac0_in) from the .ac analysis; the loop is closed at DC",
        f"*   first stage G_1 = {targets.amplifier.transconductance:.6g} S into {drive_node(mod, targets.drive)}, "
        f"Cc = {targets.amplifier.cc:.6g} F, "
        f"R_1, C_1; C_C from the output; V_AC injects in series with the feedback",
    ]
    if cards:
        lines.append(cap_cards(mod, cards, study.tech))
    lines.append(subckt)
    lines += ac_block(mod, sub, "0", vdd, targets, float(v_rest[0]), float(sign[0]))
    lines.append(f".ac dec {POINTS_PER_DECADE} {number(F_START)} {number(F_STOP)}")
    return lines
