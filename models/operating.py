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
from .devices.table_data import TableSelect
from .devices.tech import Corner, CornerShift, Polarity, Tech
from .numerics.roots import solve_bracketed
from .records import Design


def corner_shifts(tech: Tech, corner):
    """Corner shifts per element: dict (polarity -> (dvt, kp factor, table slot)) of arrays
    (len(corner),); the slot is the corner's section in a table technology (else 0)."""
    table = {c: tech.corners.get(c, CornerShift()) for c in set(corner)}

    def slots(pol):
        if tech.tables is None:
            return np.zeros(len(corner), dtype=np.int64)
        return np.array([tech.tables[pol].slots[Corner(c).value] for c in corner], dtype=np.int64)

    return {
        Polarity.N: (np.array([table[c].dvt_n for c in corner]), np.array([table[c].kp_n for c in corner]),
                     slots(Polarity.N)),
        Polarity.P: (np.array([table[c].dvt_p for c in corner]), np.array([table[c].kp_p for c in corner]),
                     slots(Polarity.P)),
    }


def devices_at(stage, design: Design, tech: Tech, shifts, temp, idx_design, dvt=None, dbeta=None):
    """The Device dict for flat elements: design index idx_design, per-element corner
    shifts (see `corner_shifts`) and temperature [K]."""
    devs, mos = {}, {}
    for spec in stage.TOPOLOGY.devices:
        if spec.polarity not in mos:  # one set of constants per polarity, shared by its devices
            dv, kp, *slot = shifts[spec.polarity]
            select = None
            if tech.tables is not None:
                select = TableSelect(tech.tables[spec.polarity], slot[0] if slot else 0, temp)
            mos[spec.polarity] = at_conditions(tech.mos(spec.polarity), spec.polarity, tech.model, temp, tech.tnom,
                                               dv, kp, select)
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


def driven_point(stage, devs, bias, vdd, nodes, direction, targets):
    """One side at full drive: headroom, peak current, the gates, the limit and whether
    the stage delivers the peak load that way. Shapes (m,).

    Returns (headroom, peak, (gn, gp), limit, ok, can, v_at): headroom is nan where the
    stage cannot deliver the load current (can False), never a stand-in number; v_at is
    the output voltage at which it delivers it (mid-supply where it cannot).
    """
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
    active = stage.PULL_UP if direction > 0 else stage.PULL_DOWN
    gate_active = gp if direction > 0 else gn
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
    headroom = np.where(can, np.where(direction > 0, vdd - v_at, v_at), np.nan)
    return headroom, peak, (gn, gp), limit, ok & (ok_v | ~can), can, v_at


def ab_ratio(stage, devs, vdd, gates_source, gates_sink, v_source, v_sink, iq):
    """Smallest idle-device current over the output range at full drive, over Iq. Shape (m,).

    Sourcing (the pull-up at its drive limit) the pull-down is idle, sinking the pull-up.
    Each idle device's gate stays where the drive puts it while the output moves over the
    range that drive direction covers with the study's load returned to mid-supply: from
    mid-supply (no load current) to the point where the stage delivers the peak load
    (`v_source`, VDD - headroom_high_v; `v_sink`, headroom_low_v). The idle current rises
    with that device's drain-source voltage in every model kind (length modulation), so
    over that range it is smallest at mid-supply, not at the peak-load point where it was
    once read (length modulation adds 15-20 % there). It is read at both ends and the
    minimum taken. Outside that range (the output below mid-supply while sourcing, a
    capacitive load slewing) the idle device's own drain voltage, not the bias, takes its
    current away, which says nothing about the class-AB bias. Iq = 0 gives 0.
    """
    worst = np.full_like(vdd, np.inf)
    for (gn, gp), idle, v_end in ((gates_source, stage.PULL_DOWN, v_source), (gates_sink, stage.PULL_UP, v_sink)):
        gate = gn if idle == stage.PULL_DOWN else gp
        for v in (0.5 * vdd, v_end):
            i, _ = _output_device(stage, devs, idle, gate, vdd, v)
            worst = np.minimum(worst, np.abs(i))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(iq > 0, worst / iq, 0.0)


def rest_point(stage, devs, bias, vdd, sensitivity=True, sources=None):
    """Rest point of every element: the stage's fast solve, checked against the residuals
    of the full Kirchhoff system, with Newton on that system as the second chance.

    `sources` (a `mirrors.SourceStates`, None when every bias source is ideal) makes the
    mirror sources' currents depend on the voltages across them: the fast solve then runs
    twice (at the mirrors' reference currents, then at the currents its first answer
    gives) and the nodal Newton balances the rest exactly.

    Returns (nodes, ok, sens, op): node voltages, convergence flags, the Iq sensitivities
    of `NodalSystem.iq_sensitivity` when asked (else None), and every device evaluated at
    the rest point (role -> (i, gg, gd, gs), as `Device.eval` gives them), for the metrics
    that need currents or conductances at rest, plus every bias source's current and
    output conductance (source name -> (i, g), see `NodalSystem.assemble`).
    """
    topo = stage.TOPOLOGY
    norton = None if sources is None else sources.norton
    if sources is None:
        nodes, ok = stage.quiescent(devs, bias, vdd)
    else:
        nodes, _ = stage.quiescent(devs, sources.stage_bias(bias, topo.drive), vdd)
        nodes, ok = stage.quiescent(devs, sources.stage_bias(bias, topo.drive, _voltages(nodes, vdd)), vdd)
    system = NodalSystem(stage.TOPOLOGY, devs, bias, vdd, sources=norton)
    x = np.stack([nodes[nname] for nname in stage.TOPOLOGY.nodes] + [np.zeros_like(vdd)])
    if sources is not None:
        # Unequal sources into the drive node leave a drive current at rest: the residual
        # of the drive row with none is exactly minus it.
        x[-1] = -system.assemble(x, slice(None))[0][system.index[topo.drive]]
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
        sub = NodalSystem(stage.TOPOLOGY, subset(devs, bad), {k: v[bad] for k, v in bias.items()}, vdd[bad],
                          sources=None if norton is None else {k: (j[bad], g[bad]) for k, (j, g) in norton.items()})
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


def _voltages(nodes, vdd):
    """Node voltages with the rails and the output at rest (VDD/2)."""
    return {**nodes, "vdd": vdd, "0": np.zeros_like(vdd), "out": 0.5 * vdd}


def source_voltages(stage, nodes, vdd):
    """Voltage across every bias source at rest, V(a) - V(b): source name -> (m,) [V]."""
    v = _voltages(nodes, vdd)
    return {src.name: v[src.a] - v[src.b] for src in stage.TOPOLOGY.sources}


def pull_down_current(stage, op):
    """Iq: the current of the pull-down output device at the rest point [A], >= 0, from
    the rest-point evaluations `op` of `rest_point`."""
    return np.maximum(op[stage.PULL_DOWN][0], 0.0)


