"""Common-source push-pull pair with a fixed gate-to-gate voltage: the baseline.

Topology
--------
MN_OUT (drain out, gate gn, source ground), MP_OUT (drain out, gate gp, source supply).
A current ib flows from the supply into gp, through r_bias to gn and out of gn to ground,
so V(gp) - V(gn) = ib r_bias whatever the supply. The two output gate-source voltages
must then add up to VDD - ib r_bias: they move one-for-one with the supply, and Iq with
them. At low supply the pair may cut off entirely; Iq = 0 is then the answer.

Validity: as the device model allows; ideal current sources and resistor.
"""
from __future__ import annotations

import numpy as np

from ..circuit.topology import DeviceSpec, ResistorSpec, SourceSpec, Topology
from ..devices.device import subset
from ..devices.tech import Polarity
from ..numerics.roots import solve_bracketed
from .common_source import gates, gm_output, output  # noqa: F401 (the stage interface)

NAME = "fixed-bias"
ROLES = ("mn_out", "mp_out")
BIAS = {"ib": "A", "r_bias": "ohm"}
REPLICAS = ()  # no translinear pair: the gate-to-gate voltage is fixed
PULL_DOWN, PULL_UP = "mn_out", "mp_out"

TOPOLOGY = Topology(
    devices=(
        DeviceSpec("mn_out", Polarity.N, d="out", g="gn", s="0"),
        DeviceSpec("mp_out", Polarity.P, d="out", g="gp", s="vdd"),
    ),
    sources=(
        SourceSpec("i_top", "ib", "vdd", "gp"),
        SourceSpec("i_bot", "ib", "gn", "0"),
    ),
    resistors=(ResistorSpec("r_bias", "r_bias", "gp", "gn"),),
    drive="gp",
)


def bias_total(bias):
    """Current of the bias branch [A]: ib."""
    return bias["ib"]


def quiescent(devs, bias, vdd):
    """Operating point at rest: the gate common mode that gives zero output current.

    One bracketed Newton solve in gn with gp = gn + ib r_bias. Returns (nodes, ok).
    """
    out = 0.5 * vdd
    vb = bias["ib"] * bias["r_bias"]

    def fun(gn, idx):
        d = subset(devs, idx)
        i_n, g_n, _, _ = d["mn_out"].eval(gn, out[idx], 0.0, 0.0)
        i_p, g_p, _, _ = d["mp_out"].eval(gn + vb[idx], out[idx], vdd[idx], vdd[idx])
        return i_n - i_p, g_n - g_p

    gn, ok = solve_bracketed(fun, -vb - 0.5, vdd + 0.5, x0=0.5 * (vdd - vb))
    return {"gn": gn, "gp": gn + vb}, ok


def driven(devs, bias, vdd, nodes, direction, drive, vcomp):
    """Gates at the drive limit: both gates move together (their difference is fixed)
    until one of them reaches the driver's compliance, vcomp from the rail it moves to.

    Returns gn, gp, limit (always 0: compliance) and ok, each shape (m,).
    """
    vb = bias["ib"] * bias["r_bias"]
    if direction > 0:
        gp = vcomp + np.maximum(vb, 0.0)
        gn = gp - vb
    else:
        gn = vdd - vcomp - np.maximum(vb, 0.0)
        gp = gn + vb
    return gn, gp, np.zeros(vdd.shape, dtype=int), np.ones(vdd.shape, dtype=bool)


def requirements(devs, bias, vdd, nodes, op, vcomp):
    """Lowest supply for each condition at rest [V], as (what, required) pairs; `op` holds
    the rest-point evaluations (role -> (i, gg, gd, gs))."""
    iq = op["mn_out"][0]
    vb = bias["ib"] * bias["r_bias"]
    return [
        ("output pair cuts off", vb + devs["mn_out"].mos.vt0 + devs["mp_out"].mos.vt0),
        ("mn_out leaves saturation", 2.0 * devs["mn_out"].vdsat(iq)),
        ("mp_out leaves saturation", 2.0 * devs["mp_out"].vdsat(iq)),
        ("ib sources lose compliance", vb + 2.0 * vcomp),
    ]
