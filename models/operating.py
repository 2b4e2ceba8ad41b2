"""The operating points every metric is read from: devices at their corner and temperature,
the rest point (fast solve, residual check, nodal fallback, adjoint sensitivities) and the
driven points at each drive limit.

All arrays are flat, shape (m,), one element per (design, PVT point) pair.
"""
from __future__ import annotations

import numpy as np

from .circuit.nodal import NodalSystem
from .devices.device import Device, subset
from .devices.mos import at_conditions
from .devices.tech import CornerShift, Polarity, Tech
from .numerics.roots import solve_bracketed
from .records import Design


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


def driven_point(stage, devs, bias, vdd, nodes, direction, targets, iq, gates=False):
    """Headroom, peak current and idle-device ratio on one side, the drive limit and the
    convergence flags; with `gates`, also the output gate voltages at the drive limit
    (gate of the pull-down, gate of the pull-up). Shapes (m,)."""
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
    if gates:
        return headroom, peak, ab, limit, ok & (ok_v | ~can), (gn, gp)
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


