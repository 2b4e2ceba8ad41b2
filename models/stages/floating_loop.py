"""Common-source push-pull pair with a translinear floating class-AB control.

Topology
--------
MN_OUT (drain out, gate gn, source ground) and MP_OUT (drain out, gate gp, source supply).
N loop: ib_n flows from the supply into the stacked diodes MN_D2 (top, node nb2) and MN_D1
(bottom, node nb1); nb2 drives the gate of MN_CTL, whose source is gn and drain gp. The P
loop mirrors it: MP_D1 (from the supply, node pb1), MP_D2 (node pb2), ib_p to ground,
MP_CTL with gate pb2, source gp, drain gn. One ib_ctl source feeds gp from the supply,
another pulls ib_ctl out of gn; at rest ib_ctl splits between MN_CTL and MP_CTL.
Loops: VGS(MN_D1) + VGS(MN_D2) = VGS(MN_CTL) + VGS(MN_OUT), and the P twin.

Validity: every device as its model allows (EKV all regions or level-1 square law); ideal
bias current sources; the amplifier holds the output at VDD/2 at rest.

References
----------
B. Gilbert, "Translinear circuits: a proposed classification", Electronics Letters 11(1), 1975.
E. Seevinck, R. J. Wiegerink, "Generalized translinear circuit principle", IEEE JSSC 26(8), 1991.
D. M. Monticelli, "A quad CMOS single-supply op amp with rail-to-rail output swing",
IEEE JSSC 21(6), 1986 (the class of circuit).
"""
from __future__ import annotations

import numpy as np

from ..circuit.topology import DeviceSpec, SourceSpec, Topology
from ..devices.device import subset
from ..devices.tech import Polarity
from ..numerics.roots import newton, solve_bracketed
from .common_source import gates, gm_output, output  # noqa: F401 (the stage interface)

NAME = "floating-loop"
ROLES = ("mn_out", "mp_out", "mn_d1", "mn_d2", "mn_ctl", "mp_d1", "mp_d2", "mp_ctl")
BIAS = {"ib_n": "A", "ib_p": "A", "ib_ctl": "A"}
# Translinear pairs whose matching the loop rests on: (replica diode, device it stands for).
REPLICAS = (("mn_d1", "mn_out"), ("mp_d1", "mp_out"), ("mn_d2", "mn_ctl"), ("mp_d2", "mp_ctl"))
PULL_DOWN, PULL_UP = "mn_out", "mp_out"

TOPOLOGY = Topology(
    devices=(
        DeviceSpec("mn_out", Polarity.N, d="out", g="gn", s="0"),
        DeviceSpec("mp_out", Polarity.P, d="out", g="gp", s="vdd"),
        DeviceSpec("mn_d1", Polarity.N, d="nb1", g="nb1", s="0"),
        DeviceSpec("mn_d2", Polarity.N, d="nb2", g="nb2", s="nb1"),
        DeviceSpec("mn_ctl", Polarity.N, d="gp", g="nb2", s="gn"),
        DeviceSpec("mp_d1", Polarity.P, d="pb1", g="pb1", s="vdd"),
        DeviceSpec("mp_d2", Polarity.P, d="pb2", g="pb2", s="pb1"),
        DeviceSpec("mp_ctl", Polarity.P, d="gn", g="pb2", s="gp"),
    ),
    sources=(
        SourceSpec("i_n", "ib_n", "vdd", "nb2"),
        SourceSpec("i_p", "ib_p", "pb2", "0"),
        SourceSpec("i_ctl_top", "ib_ctl", "vdd", "gp"),
        SourceSpec("i_ctl_bot", "ib_ctl", "gn", "0"),
    ),
    drive="gp",
)


def bias_total(bias):
    """Current of all bias branches [A]: ib_n + ib_p + ib_ctl."""
    return bias["ib_n"] + bias["ib_p"] + bias["ib_ctl"]


def _stacks(devs, bias, vdd):
    zero = np.zeros_like(vdd)
    nb1 = devs["mn_d1"].diode(bias["ib_n"], zero, zero)
    nb2 = devs["mn_d2"].diode(bias["ib_n"], nb1, zero)
    pb1 = devs["mp_d1"].diode(bias["ib_p"], vdd, vdd)
    pb2 = devs["mp_d2"].diode(bias["ib_p"], pb1, vdd)
    return nb1, nb2, pb1, pb2


def _ctl_sum(devs, nb2, pb2, gn, gp, vdd, partials=False):
    """i(MN_CTL) + i(MP_CTL), its derivatives with respect to gn and gp, and the two
    currents; with `partials`, also each device's (d/dgn, d/dgp)."""
    i_nc, _, ncd, ncs = devs["mn_ctl"].eval(nb2, gp, gn, 0.0)
    i_pc, _, pcd, pcs = devs["mp_ctl"].eval(pb2, gn, gp, vdd)
    if partials:
        return i_nc + i_pc, ncs + pcd, ncd + pcs, i_nc, i_pc, (ncs, ncd), (pcd, pcs)
    return i_nc + i_pc, ncs + pcd, ncd + pcs, i_nc, i_pc


def quiescent(devs, bias, vdd):
    """Operating point at rest, output held at VDD/2 with zero output current.

    Diode stacks are closed form; the two gate nodes follow from a damped Newton on
    [i(MN_OUT) - i(MP_OUT), i(MN_CTL) + i(MP_CTL) - ib_ctl] (on their logarithms with EKV).
    EKV starts from the weak-inversion estimate of the two product laws: each loop gives
    i_ctl Iq = ib^2 S_ctl S_out / (S_d1 S_d2) (S = W/L), and the two control currents add up
    to ib_ctl. The square law starts from the matched-density estimate
    Iq = ib (W/L)_out / (W/L)_d1 (geometric mean of both loops). A nested bracketed solve
    takes the stragglers.

    Returns (nodes, ok): node voltages (each shape (m,)) and the convergence flags.
    """
    out = 0.5 * vdd
    nb1, nb2, pb1, pb2 = _stacks(devs, bias, vdd)
    dn, dp = devs["mn_out"], devs["mp_out"]

    def aspect(role):
        return devs[role].w / devs[role].l

    logs = dn.ekv is not None
    if logs:
        a_n = bias["ib_n"] ** 2 * aspect("mn_ctl") * aspect("mn_out") / (aspect("mn_d1") * aspect("mn_d2"))
        a_p = bias["ib_p"] ** 2 * aspect("mp_ctl") * aspect("mp_out") / (aspect("mp_d1") * aspect("mp_d2"))
        iq0 = (a_n + a_p) / bias["ib_ctl"]
    else:  # no weak inversion in the square law: the matched-density estimate, geometric mean of both loops
        iq0 = np.sqrt(bias["ib_n"] * aspect("mn_out") / aspect("mn_d1") * bias["ib_p"] * aspect("mp_out") / aspect("mp_d1"))
    gn0 = dn.gate_for(iq0, 0.0, 0.0, out)
    gp0 = dp.gate_for(iq0, vdd, vdd, out)
    # With EKV the currents are positive near the answer and their logarithms nearly
    # linear in the gate voltages (exactly so in weak inversion), so Newton on the
    # logarithms of both balances converges in a few steps where Newton on the currents
    # crawls down the exponentials. Both forms have the same root; an element whose
    # currents are not all positive at an iterate (a control device driven backwards on
    # the way) takes the plain step there. The square law keeps the plain form throughout.

    def fun(x, idx):
        d = subset(devs, idx)
        gn, gp = x
        i_n, gn_g, _, _ = d["mn_out"].eval(gn, out[idx], 0.0, 0.0)
        i_p, gp_g, _, _ = d["mp_out"].eval(gp, out[idx], vdd[idx], vdd[idx])
        s, s_gn, s_gp, _, _ = _ctl_sum(d, nb2[idx], pb2[idx], gn, gp, vdd[idx])
        ib = bias["ib_ctl"][idx]
        r = np.stack([i_n - i_p, s - ib])
        jac = np.empty((x.shape[1], 2, 2))
        jac[:, 0, 0], jac[:, 0, 1] = gn_g, -gp_g
        jac[:, 1, 0], jac[:, 1, 1] = s_gn, s_gp
        if logs:  # each row over its current where all are positive (over 1 elsewhere)
            pos = (i_n > 1e-300) & (i_p > 1e-300) & (s > 1e-300)
            d_n, d_p, d_s = (np.where(pos, a, 1.0) for a in (i_n, i_p, s))
            r = np.where(pos, np.stack([np.log(d_n / d_p), np.log(d_s / ib)]), r)
            jac[:, 0, 0] /= d_n
            jac[:, 0, 1] /= d_p
            jac[:, 1] /= d_s[:, None]
        return r, jac

    # With EKV, Newton is quadratic here (the next step would be about step^2 per volt),
    # so a last step below 1 uV leaves the gates within about 1e-12 V. The square law has
    # kinks (cut-off, the saturation edge) that spoil that, so it asks for steps below
    # 10 nV. Where a current is far steeper than usual (a control device in deep triode),
    # the residual check of evaluate.rest_point finds the imbalance and the full nodal
    # Newton finishes the job.
    x, ok = newton(fun, np.stack([gn0, gp0]), xtol=1e-6 if logs else 1e-8)
    gn, gp = x
    if not ok.all():
        bad = np.flatnonzero(~ok)
        gn_b, gp_b, ok_b = _quiescent_bracketed(subset(devs, bad), {k: v[bad] for k, v in bias.items()},
                                                vdd[bad], nb2[bad], pb2[bad])
        gn[bad], gp[bad], ok[bad] = gn_b, gp_b, ok_b
    nodes = {"nb1": nb1, "nb2": nb2, "pb1": pb1, "pb2": pb2, "gn": gn, "gp": gp}
    return nodes, ok


def _quiescent_bracketed(devs, bias, vdd, nb2, pb2):
    """Fallback: bisection-safeguarded solve in gn, with gp from i(MP_OUT) = i(MN_OUT)."""
    out = 0.5 * vdd

    def gp_of(gn, idx):
        d = subset(devs, idx)
        target = d["mn_out"].current(gn, out[idx], 0.0, 0.0)

        def f(gp, jdx):
            dd = subset(d, jdx)
            i, g, _, _ = dd["mp_out"].eval(gp, out[idx][jdx], vdd[idx][jdx], vdd[idx][jdx])
            return i - target[jdx], g

        gp, _ = solve_bracketed(f, -vdd[idx], vdd[idx])
        return gp

    def fun(gn, idx):
        d = subset(devs, idx)
        gp = gp_of(gn, idx)
        _, gn_g, _, _ = d["mn_out"].eval(gn, out[idx], 0.0, 0.0)
        _, gp_g, _, _ = d["mp_out"].eval(gp, out[idx], vdd[idx], vdd[idx])
        s, s_gn, s_gp, _, _ = _ctl_sum(d, nb2[idx], pb2[idx], gn, gp, vdd[idx])
        with np.errstate(divide="ignore", invalid="ignore"):
            dgp = np.where(gp_g != 0, gn_g / gp_g, 0.0)
        return s - bias["ib_ctl"][idx], s_gn + s_gp * dgp

    m = len(vdd)
    gn, ok = solve_bracketed(fun, -0.5 * np.ones(m), vdd.copy())
    return gn, gp_of(gn, np.arange(m)), ok


def _other_gate(devs, bias, vdd, nb2, pb2, driven_node, v_f, x0):
    """Solve the undriven gate from KCL at it, i(MN_CTL) + i(MP_CTL) = ib_ctl.

    Returns (other, d other / d v_f, ok), each shape (m,); x0 is the starting guess.
    """
    def parts(d, n2, p2, v, vf, x):
        if driven_node == "gp":
            s, s_x, s_f, _, _ = _ctl_sum(d, n2, p2, x, vf, v)
        else:
            s, s_f, s_x, _, _ = _ctl_sum(d, n2, p2, vf, x, v)
        return s, s_x, s_f

    def fun(x, idx):
        d = subset(devs, idx)
        s, s_x, _ = parts(d, nb2[idx], pb2[idx], vdd[idx], v_f[idx], x)
        return s - bias["ib_ctl"][idx], s_x

    other, ok = solve_bracketed(fun, -0.5 * np.ones_like(vdd), vdd + 0.5, x0=x0)
    _, s_x, s_f = parts(devs, nb2, pb2, vdd, v_f, other)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = np.where(s_x != 0, -s_f / s_x, 0.0)
    return other, slope, ok


def driven(devs, bias, vdd, nodes, direction, drive, vcomp):
    """Gate voltages at the drive limit.

    The driven gate moves from rest towards the rail until the driver's compliance, or
    until the active side's control device (the one whose drain is the active output
    gate: MN_CTL when sourcing, MP_CTL when sinking) reaches its saturation voltage,
    whichever comes first. The other gate follows from KCL at it.

    Parameters
    ----------
    direction : +1 to source current into the load (MP_OUT active), -1 to sink.
    drive : "both" (the driver moves the active side's gate), "p" or "n" (one gate only).
    vcomp : driver compliance [V]: a driven gate stays vcomp away from the rail it moves to.

    Returns
    -------
    gn, gp : ndarray (m,)
    limit : ndarray of int (m,), 0 compliance, 1 control device at its saturation edge
    ok : ndarray of bool (m,)
    """
    if drive == "both":
        driven_node = "gp" if direction > 0 else "gn"
    else:
        driven_node = "g" + drive
    other_node = "gn" if driven_node == "gp" else "gp"
    bound = vcomp * np.ones_like(vdd) if direction > 0 else vdd - vcomp
    nb2, pb2 = nodes["nb2"], nodes["pb2"]
    role = "mn_ctl" if direction > 0 else "mp_ctl"

    # 1. The saturation edge of the active control device, both gates at once: KCL at the
    #    gates, i(MN_CTL) + i(MP_CTL) = ib_ctl, and (gp - gn) = VDSsat(i of that device).
    def fun(x, idx):
        d = subset(devs, idx)
        g_n, g_p = x
        s, s_gn, s_gp, i_nc, i_pc, pn, pp = _ctl_sum(d, nb2[idx], pb2[idx], g_n, g_p, vdd[idx], partials=True)
        i_a, (da_gn, da_gp) = (i_nc, pn) if direction > 0 else (i_pc, pp)
        sat, dsat = d[role].vdsat(i_a, slope=True)  # and d VDSsat / d|i|
        r = np.stack([s - bias["ib_ctl"][idx], (g_p - g_n) - sat])
        jac = np.empty((x.shape[1], 2, 2))
        jac[:, 0, 0], jac[:, 0, 1] = s_gn, s_gp
        jac[:, 1, 0], jac[:, 1, 1] = -1.0 - dsat * da_gn, 1.0 - dsat * da_gp
        return r, jac

    # Start where the active control device carries all of ib_ctl at its saturation edge.
    ib_ctl = bias["ib_ctl"]
    sat0 = devs[role].vdsat(ib_ctl)
    if direction > 0:
        gn0 = devs["mn_ctl"].source_for(ib_ctl, nb2, 0.0, sat0)
        x0 = np.stack([gn0, gn0 + sat0])
    else:
        gp0 = devs["mp_ctl"].source_for(ib_ctl, pb2, vdd, sat0)
        x0 = np.stack([gp0 - sat0, gp0])
    # With EKV, a last step below 10 uV leaves the gates within about 1e-9 V (quadratic
    # convergence). The square law has its saturation kink right at this edge, so Newton
    # converges more slowly there: it asks for steps below 1 uV.
    ekv = devs[role].ekv is not None
    x, ok_edge = newton(fun, x0, step_max=0.2, xtol=1e-5 if ekv else 1e-6, max_iter=80)
    gn, gp = x[0].copy(), x[1].copy()
    v_edge = gp if driven_node == "gp" else gn
    # The edge comes first when the driven gate meets it before its compliance bound.
    rest = nodes[driven_node]
    edge_first = ok_edge & ((v_edge >= bound) & (v_edge <= rest + 1e-9) if direction > 0
                            else (v_edge <= bound) & (v_edge >= rest - 1e-9))
    limit = edge_first.astype(int)
    ok = edge_first.copy()

    # 2. Elsewhere the driver's compliance stops the gate first: the other gate from KCL.
    comp = np.flatnonzero(~edge_first)
    if comp.size:
        sub, sb = subset(devs, comp), {k: v[comp] for k, v in bias.items()}
        other, _, ok_c = _other_gate(sub, sb, vdd[comp], nb2[comp], pb2[comp], driven_node, bound[comp],
                                     nodes[other_node][comp])
        g_n, g_p = (other, bound[comp]) if driven_node == "gp" else (bound[comp], other)
        _, _, _, i_nc, i_pc = _ctl_sum(sub, nb2[comp], pb2[comp], g_n, g_p, vdd[comp])
        margin = (g_p - g_n) - sub[role].vdsat(i_nc if direction > 0 else i_pc)
        gn[comp], gp[comp], ok[comp] = g_n, g_p, ok_c
        # 3. A negative margin at the compliance bound means the edge comes first but its
        #    Newton solve failed: bracket the edge between rest and the bound instead.
        late = comp[margin < 0]
        if late.size:
            g_n, g_p, ok_l = _edge_bracketed(subset(devs, late), {k: v[late] for k, v in bias.items()}, vdd[late],
                                             nb2[late], pb2[late], driven_node, direction,
                                             bound[late], nodes[driven_node][late], nodes[other_node][late])
            gn[late], gp[late], ok[late], limit[late] = g_n, g_p, ok_l, 1
    return gn, gp, limit, ok


def _edge_bracketed(devs, bias, vdd, nb2, pb2, driven_node, direction, bound, rest, warm):
    """Fallback: bisection-safeguarded search of the driven gate between its compliance
    bound and its rest value for the saturation edge of the active control device, with
    the other gate solved from KCL at each trial."""
    role = "mn_ctl" if direction > 0 else "mp_ctl"
    slope = 1.0 if driven_node == "gp" else -1.0  # rough d(margin)/d(driven gate), for Newton only
    warm = warm.copy()

    def at(d, b, v, n2, p2, v_f, x0):
        other, _, ok = _other_gate(d, b, v, n2, p2, driven_node, v_f, x0)
        g_n, g_p = (other, v_f) if driven_node == "gp" else (v_f, other)
        _, _, _, i_nc, i_pc = _ctl_sum(d, n2, p2, g_n, g_p, v)
        return g_n, g_p, (g_p - g_n) - d[role].vdsat(i_nc if direction > 0 else i_pc), ok

    def fmargin(v_f, idx):
        g_n, g_p, mg, _ = at(subset(devs, idx), {k: v[idx] for k, v in bias.items()}, vdd[idx], nb2[idx],
                             pb2[idx], v_f, warm[idx])
        warm[idx] = g_n if driven_node == "gp" else g_p
        return mg, np.full_like(v_f, slope)

    _, _, m_rest, _ = at(devs, bias, vdd, nb2, pb2, rest, warm)
    v_f, ok_f = solve_bracketed(fmargin, bound, rest, xtol=1e-9)
    # Already out of saturation at rest: the drive limit is the rest point itself.
    v_f = np.where(m_rest <= 0, rest, v_f)
    g_n, g_p, _, ok_h = at(devs, bias, vdd, nb2, pb2, v_f, warm)
    return g_n, g_p, (ok_f | (m_rest <= 0)) & ok_h


def requirements(devs, bias, vdd, nodes, op, vcomp):
    """Lowest supply each device or source needs at rest to keep its region [V].

    Gate-source voltages at rest hardly depend on the supply, so each condition turns
    into a supply requirement at the solved point; `op` holds the rest-point evaluations
    (role -> (i, gg, gd, gs)). Returns a list of (what, required).
    """
    gn, gp = nodes["gn"], nodes["gp"]
    iq, i_nc, i_pc = op["mn_out"][0], op["mn_ctl"][0], op["mp_ctl"][0]
    vgs_n = gn
    vsg_p = vdd - gp
    return [
        ("mn_out leaves saturation", 2.0 * devs["mn_out"].vdsat(iq)),
        ("mp_out leaves saturation", 2.0 * devs["mp_out"].vdsat(iq)),
        ("mn_ctl leaves saturation", vsg_p + vgs_n + devs["mn_ctl"].vdsat(i_nc)),
        ("mp_ctl leaves saturation", vsg_p + vgs_n + devs["mp_ctl"].vdsat(i_pc)),
        ("ib_n source loses compliance", nodes["nb2"] + vcomp),
        ("ib_p source loses compliance", (vdd - nodes["pb2"]) + vcomp),
    ]
