"""The common-source output pair shared by the floating-loop and fixed-bias stages:
MN_OUT (drain out, gate gn, source ground) and MP_OUT (drain out, gate gp, source supply).
Both architectures differ only in how they bias the two gates."""
from __future__ import annotations


def gates(nodes):
    """Gates of the pull-down (MN_OUT) and pull-up (MP_OUT) output devices."""
    return nodes["gn"], nodes["gp"]


def gm_output(op):
    """Transconductance that sets the output pole, gm(MN_OUT) + gm(MP_OUT) at rest [S],
    from the rest-point evaluations `op` (role -> (i, gg, gd, gs))."""
    return op["mn_out"][1] - op["mp_out"][1]


def output(devs, gate_n, gate_p, vdd, v):
    """Currents of the output devices with the gates held and the output at v.

    Returns (i_push, i_pull, d_net): current from MP_OUT into the output, current from the
    output through MN_OUT, and d(i_push - i_pull)/dv. Shapes (m,).
    """
    i_p, _, gpd, _ = devs["mp_out"].eval(gate_p, v, vdd, vdd)
    i_n, _, gnd, _ = devs["mn_out"].eval(gate_n, v, 0.0, 0.0)
    return i_p, i_n, gpd - gnd
