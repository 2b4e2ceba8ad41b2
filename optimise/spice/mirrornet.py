"""Bias sources in a netlist as the study describes them, so that ngspice runs the circuit the
model solves (`models.circuit.mirrors`).

- Ideal (not named in the study's [mirrors]): ``I_<NAME> a b dc I0``, as before.
- Unsized (sigma_pct, r_out, v_ref): the Norton form ``I_<NAME> a b dc (I0 - v_ref/r_out)``
  with ``R_<NAME>_OUT a b r_out`` in parallel, so the source delivers
  I0 + (V(a) - V(b) - v_ref) / r_out exactly as the model's. Its sigma is a mismatch
  figure: nothing to write at the nominal point.
- Sized (w, l): a 1:1 mirror of real devices, its own reference current I0 (ideal) into the
  input diode ``M_<NAME>_IN`` and the output device ``M_<NAME>_OUT`` with drain on the
  source's node, gate on the diode, source and bulk on the rail (PMOS from the supply,
  NMOS to ground). With the technology's level-1 cards each mirror has its own card
  ``<subckt>_<key>`` (LAMBDA depends on L); with a user's card both devices use the card's
  model of their polarity.

Imports nothing from `netlist` (which imports this module).
"""
from __future__ import annotations

import math

import numpy as np

from models.circuit.mirrors import source_keys, source_polarity
from models.devices.tech import Corner, CornerShift, Polarity, Tech

from . import ngspice
from .ngspice import number

GROUND = "gnd"


def _node(node: str) -> str:
    return GROUND if node == "0" else node


def _name(letter: str, name: str) -> str:
    upper = name.upper()
    return upper if upper.startswith(letter + "_") else f"{letter}_{upper}"


def card_name(subckt: str, key: str) -> str:
    """Level-1 card of a sized mirror's devices, ``<subckt>_<key>`` (e.g. ``floating_loop_ib_n``)."""
    return f"{subckt}_{key}"


def _value(arr, i: int) -> float:
    a = np.asarray(arr, dtype=float)
    return float(a) if a.ndim == 0 else float(a.reshape(-1)[i])


def source_lines(mod, design, i: int, mirrors: dict, models, snap, subckt: str) -> list[str]:
    """The element lines of every bias source of design i.

    Parameters
    ----------
    mod : module
        Architecture module.
    design : Design
    i : int
        Index of the design in the population.
    mirrors : dict
        Study key -> Mirror for this architecture (`Targets.mirrors[architecture]`); {} is
        every source ideal.
    models : Tech or mapping
        As `netlist.stage_subcircuit`'s `tech_or_models`: a Tech (the level-1 cards of
        `mirror_cards`) or role -> model name (a sized mirror uses the model of a role of its
        polarity).
    snap : callable or None
        Drawing-grid snap of W and L.
    subckt : str
        Name of the subcircuit (for the card names).
    """
    keys = source_keys(mod.TOPOLOGY)
    lines = []
    for src in mod.TOPOLOGY.sources:
        i0 = _value(design.bias[src.bias], i)
        mir = mirrors.get(keys[src.name])
        a, b = _node(src.a), _node(src.b)
        element = _name("I", src.name)
        if mir is None:
            lines.append(f"{element} {a} {b} dc {number(i0)}")
        elif not mir.sized:
            finite = not math.isinf(mir.r_out)
            j = i0 - (mir.v_ref / mir.r_out if finite else 0.0)
            lines.append(f"{element} {a} {b} dc {number(j)}")
            if finite:
                lines.append(f"{_name('R', src.name)}_OUT {a} {b} {number(mir.r_out)}")
        else:
            pol = source_polarity(src)
            if isinstance(models, Tech):
                model = card_name(subckt, keys[src.name])
            else:
                model = next(models[s.role] for s in mod.TOPOLOGY.devices if s.polarity == pol)
            w, l = (float(snap(x)) if snap is not None else x for x in (mir.w, mir.l))
            size = f"w={format(w, '.12g')} l={format(l, '.12g')}"
            ref = f"{src.name}_ref"
            if pol == Polarity.P:  # from the supply: output drain on b, reference from the diode to ground
                lines += [f"{element}_REF {ref} {GROUND} dc {number(i0)}",
                          f"{_name('M', src.name)}_IN {ref} {ref} vdd vdd {model} {size}",
                          f"{_name('M', src.name)}_OUT {b} {ref} vdd vdd {model} {size}"]
            else:  # to ground: output drain on a, reference from the supply into the diode
                lines += [f"{element}_REF vdd {ref} dc {number(i0)}",
                          f"{_name('M', src.name)}_IN {ref} {ref} {GROUND} {GROUND} {model} {size}",
                          f"{_name('M', src.name)}_OUT {a} {ref} {GROUND} {GROUND} {model} {size}"]
    return lines


def mirror_cards(mod, mirrors, tech: Tech, corner: Corner, temp, subckt: str | None) -> list[str]:
    """Level-1 cards of the sized mirrors (one per mirror, its L in LAMBDA), at the corner and
    temperature of `netlist.model_cards`; mirrors None is none; subckt None is the
    architecture's own subcircuit name (`netlist.subcircuit_name`)."""
    mirrors = mirrors or {}
    subckt = subckt or mod.NAME.replace("-", "_")
    shift = tech.corners.get(Corner(corner), CornerShift())
    keys = source_keys(mod.TOPOLOGY)
    lines = []
    for src in mod.TOPOLOGY.sources:
        mir = mirrors.get(keys[src.name])
        if mir is None or not mir.sized:
            continue
        pol = source_polarity(src)
        dvt, kp = (shift.dvt_n, shift.kp_n) if pol == Polarity.N else (shift.dvt_p, shift.kp_p)
        lines.append(ngspice.level1_model_card(card_name(subckt, keys[src.name]), tech.mos(pol), pol,
                                               float(tech.snap(mir.l)), temp=temp, tnom=tech.tnom, dvt=dvt,
                                               kp_scale=kp))
    return lines
