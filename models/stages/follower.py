"""Complementary source followers biased by two series diodes.

Topology
--------
MN_F (drain supply, gate nt, source out) and MP_F (drain ground, gate nb, source out).
The bias string: ib flows from the supply into nt, through the diode-connected MN_B
(nt to nm) and MP_B (nm to nb), and out of nb to ground. The amplifier drives nm.
Loop: VGS(MN_B) + VSG(MP_B) = VGS(MN_F) + VSG(MP_F). Low output impedance, but the
output loses a gate-source voltage to each rail. With bulks on the rails both followers
carry a strong body effect (their sources sit at mid-supply).

Validity: as the device model allows; ideal current sources.
"""
from __future__ import annotations

import numpy as np

from ..circuit.topology import DeviceSpec, SourceSpec, Topology
from ..devices.device import subset
from ..devices.tech import Polarity
from ..numerics.roots import solve_bracketed

NAME = "follower"
ROLES = ("mn_f", "mp_f", "mn_b", "mp_b")
BIAS = {"ib": "A"}
# Translinear pairs whose matching the loop rests on: (bias diode, follower it stands for).
REPLICAS = (("mn_b", "mn_f"), ("mp_b", "mp_f"))
PULL_DOWN, PULL_UP = "mp_f", "mn_f"

TOPOLOGY = Topology(
    devices=(
        DeviceSpec("mn_f", Polarity.N, d="vdd", g="nt", s="out"),
        DeviceSpec("mp_f", Polarity.P, d="0", g="nb", s="out"),
        DeviceSpec("mn_b", Polarity.N, d="nt", g="nt", s="nm"),
        DeviceSpec("mp_b", Polarity.P, d="nb", g="nb", s="nm"),
    ),
    sources=(
        SourceSpec("i_top", "ib", "vdd", "nt"),
        SourceSpec("i_bot", "ib", "nb", "0"),
    ),
    drive="nm",
)


def bias_total(bias):
    """Current of the bias string [A]: ib."""
    return bias["ib"]


def _string(devs, ib, nm, vdd):
    """Diode voltages nt, nb for input nm, with their slopes d nt/d nm and d nb/d nm."""
    zero = np.zeros_like(nm)
    nt = devs["mn_b"].diode(ib, nm, zero)
    nb = devs["mp_b"].diode(ib, nm, vdd)
    _, ng, nd, ns = devs["mn_b"].eval(nt, nt, nm, zero)
    _, pg, pd, ps = devs["mp_b"].eval(nb, nb, nm, vdd)
    return nt, nb, -ns / (ng + nd), -ps / (pg + pd)


def quiescent(devs, bias, vdd):
    """Operating point at rest: the input voltage nm that gives zero output current at
    VDD/2 (bracketed Newton in nm; the diodes are closed form). Returns (nodes, ok)."""
    out = 0.5 * vdd

    def fun(nm, idx):
        d = subset(devs, idx)
        nt, nb, dnt, dnb = _string(d, bias["ib"][idx], nm, vdd[idx])
        i_n, gn, _, _ = d["mn_f"].eval(nt, vdd[idx], out[idx], 0.0)
        i_p, gp, _, _ = d["mp_f"].eval(nb, 0.0, out[idx], vdd[idx])
        return i_n - i_p, gn * dnt - gp * dnb

    nm, ok = solve_bracketed(fun, -0.5 * np.ones_like(vdd), vdd + 0.5, x0=out)
    nt, nb, _, _ = _string(devs, bias["ib"], nm, vdd)
    return {"nt": nt, "nm": nm, "nb": nb}, ok


def driven(devs, bias, vdd, nodes, direction, drive, vcomp):
    """Gates at the drive limit: the input rises (falls) until the top (bottom) bias
    source reaches its compliance, vcomp from the rail. Returns gn, gp, limit (0), ok;
    here gn is the gate of the pull-down MP_F and gp the gate of the pull-up MN_F."""
    if direction > 0:
        target, role = vdd - vcomp, "mn_b"
    else:
        target, role = vcomp * np.ones_like(vdd), "mp_b"

    def fun(nm, idx):
        d = subset(devs, idx)
        nt, nb, dnt, dnb = _string(d, bias["ib"][idx], nm, vdd[idx])
        node, slope = (nt, dnt) if role == "mn_b" else (nb, dnb)
        return node - target[idx], slope

    nm, ok = solve_bracketed(fun, -1.0 - vdd, 2.0 * vdd + 1.0, x0=nodes["nm"])
    nt, nb, _, _ = _string(devs, bias["ib"], nm, vdd)
    return nb, nt, np.zeros(vdd.shape, dtype=int), ok


def gates(nodes):
    """Gates of the pull-down (MP_F) and pull-up (MN_F) output devices."""
    return nodes["nb"], nodes["nt"]


def output(devs, gate_n, gate_p, vdd, v):
    """(i_push, i_pull, d(i_push - i_pull)/dv) with the gates held and the output at v."""
    zero = np.zeros_like(vdd)
    i_up, _, _, us = devs["mn_f"].eval(gate_p, vdd, v, zero)
    i_dn, _, _, ds = devs["mp_f"].eval(gate_n, zero, v, vdd)
    return i_up, i_dn, us - ds


def gm_output(op):
    """Output conductance of the followers at rest (gm plus body gm of both) [S], from
    the rest-point evaluations `op` (role -> (i, gg, gd, gs))."""
    return op["mp_f"][3] - op["mn_f"][3]


def requirements(devs, bias, vdd, nodes, op, vcomp):
    """Lowest supply for each condition at rest [V], as (what, required) pairs."""
    out = 0.5 * vdd
    iq = op["mp_f"][0]
    return [
        ("ib top source loses compliance", 2.0 * (nodes["nt"] - out + vcomp)),
        ("ib bottom source loses compliance", 2.0 * (out - nodes["nb"] + vcomp)),
        ("mn_f leaves saturation", 2.0 * devs["mn_f"].vdsat(iq)),
        ("mp_f leaves saturation", 2.0 * devs["mp_f"].vdsat(iq)),
    ]
