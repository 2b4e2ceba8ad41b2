"""Small-signal nodal model of an output stage at rest, inside its amplifier.

From the solved rest point: every device's gm, gmb, gds (the partials of its drain
current, exactly those of the rest-point Kirchhoff system) and its capacitances
(`models.devices.mos.capacitances`), the bias sources (ideal, conductance 0, unless an
output conductance per source is given), the resistors, the load (C_load, optional R), the
compensation capacitor Cc from the output to the driven node, and the first stage's output
resistance and parasitic capacitance at the driven node. The matrices G and C (m, k, k)
are over the node list of the rest-point Kirchhoff system (`Topology.nodes`) with the
output appended: there the output is held at VDD/2, here it is free. Rails are AC ground.

Convention: (G + s C) v = i, i the small-signal currents injected into the nodes.
All arrays are over the flat batch (m,) of (design, PVT point) pairs.
"""
from __future__ import annotations

import numpy as np

from ..circuit.topology import RAILS
from ..devices.mos import capacitances, junctions

GMIN = 1e-12  # S from every node to ground, as SPICE's GMIN: keeps G regular when length modulation is off


def node_list(topo) -> tuple[str, ...]:
    """Unknowns of the small-signal model: the topology's internal nodes, then "out"."""
    return tuple(topo.nodes) + ("out",)


def common_source(stage) -> bool:
    """True when both output devices have their source on a rail (a common-source pair)."""
    topo = stage.TOPOLOGY
    return all(topo.spec(r).s in RAILS for r in (stage.PULL_UP, stage.PULL_DOWN))


def drive_node(stage, drive: str = "both") -> str:
    """The node the first stage drives: the gate of the pull-up (drive "p") or pull-down
    (drive "n") device of a common-source pair, else the topology's drive node (the
    pull-up gate of the floating loop and the fixed-bias stage, the followers' input)."""
    if common_source(stage) and drive in ("p", "n"):
        return stage.TOPOLOGY.spec(stage.PULL_UP if drive == "p" else stage.PULL_DOWN).g
    return stage.TOPOLOGY.drive


def rest_voltages(nodes, vdd) -> dict:
    """Node name -> rest voltage (m,), rails and the output (VDD/2) included."""
    v = {name: np.asarray(val, dtype=float) for name, val in nodes.items()}
    v["vdd"], v["0"], v["out"] = vdd, np.zeros_like(vdd), 0.5 * vdd
    return v


def device_capacitances(stage, devs, tech, nodes, vdd) -> dict:
    """Role -> (cgs, cgd, cgb, cdb, csb) [F] of every device at the rest point."""
    v = rest_voltages(nodes, vdd)
    out = {}
    for spec in stage.TOPOLOGY.devices:
        dev = devs[spec.role]
        vb = v[spec.s] if dev.tied else v[spec.rail]
        out[spec.role] = capacitances(dev.mos, tech.mos(spec.polarity), dev.w, dev.l, v[spec.g], v[spec.d],
                                      v[spec.s], vb, tech.diffusion(spec.polarity, dev.w))
    return out


def output_junctions(stage, devs, tech, nodes, vdd):
    """Junction capacitance [F] (m,) the devices put on the output node at rest (output at
    VDD/2): each drain or source on the output, against its bulk (a rail, or the device's own
    source for a device in its own well; a source on its own well carries none, and the
    well's own junction to the substrate is not modelled)."""
    v = rest_voltages(nodes, vdd)
    total = np.zeros(np.shape(vdd))
    for spec in stage.TOPOLOGY.devices:
        dev = devs[spec.role]
        mt = tech.mos(spec.polarity)
        if mt.cj == 0.0 and mt.cjsw == 0.0:
            continue
        area, perimeter = tech.diffusion(spec.polarity, dev.w)
        bulk = spec.s if dev.tied else spec.rail
        for node in (spec.d, spec.s):
            if node == "out" and node != bulk:
                total = total + junctions(mt, area, perimeter, spec.polarity * (v["out"] - v[bulk]))
    return total


class _Stamp:
    """Adds two-terminal and controlled elements into (m, k, k) matrices; rails skipped."""

    def __init__(self, names, m):
        self.index = {name: j for j, name in enumerate(names)}
        k = len(names)
        self.g = np.zeros((m, k, k))
        self.c = np.zeros((m, k, k))

    def branch(self, mat, a, b, val):
        ia, ib = self.index.get(a), self.index.get(b)
        if ia is not None:
            mat[:, ia, ia] += val
        if ib is not None:
            mat[:, ib, ib] += val
        if ia is not None and ib is not None:
            mat[:, ia, ib] -= val
            mat[:, ib, ia] -= val

    def current(self, d, s, col, val):
        """A current val * v(col) flowing from node d through the element to node s."""
        j = self.index.get(col)
        if j is None:
            return
        for node, sign in ((d, 1.0), (s, -1.0)):
            i = self.index.get(node)
            if i is not None:
                self.g[:, i, j] += sign * val


def assemble(stage, devs, bias, tech, op, nodes, vdd, c_load, amp, drive="both", g_source=None, caps=None,
             cc=None):
    """G and C (m, k, k) of the stage at rest inside its amplifier.

    Parameters
    ----------
    stage : module
        The architecture (models.stages).
    devs : dict role -> Device
        Devices at their conditions (flat batch (m,)).
    bias : dict bias name -> (m,)
        Bias values [A or ohm] (the resistors' values are read here).
    tech : Tech
    op : dict role -> (i, gg, gd, gs)
        Rest-point evaluations (`models.operating.rest_point`).
    nodes : dict node -> (m,)
        Rest-point node voltages [V].
    vdd : ndarray (m,)
        Supply [V].
    c_load : float
        Load capacitance [F].
    amp : Amplifier or None
        The surrounding amplifier; None: no compensation capacitor and no first stage
        (the driven node then has only the stage's own elements and GMIN).
    drive : str
        Which gate the first stage drives (`drive_node`).
    g_source : dict source name -> (m,) or float, optional
        Output conductance [S] of each bias source, from its node a to its node b; the
        sources are ideal (0 S) where not given.
    caps : dict, optional
        Device capacitances of `device_capacitances`, when the caller has them.
    cc : ndarray (m,), optional
        Compensation capacitance per element [F] (a searched Cc); None: ``amp.cc``.

    Returns
    -------
    G, C : ndarray (m, k, k)
        Over `node_list(stage.TOPOLOGY)` [S], [F].
    """
    topo = stage.TOPOLOGY
    names = node_list(topo)
    m = len(vdd)
    st = _Stamp(names, m)
    caps = device_capacitances(stage, devs, tech, nodes, vdd) if caps is None else caps
    for spec in topo.devices:
        dev = devs[spec.role]
        _, gg, gd, gs = op[spec.role]
        p = dev.p
        bulk = spec.s if dev.tied else spec.rail
        # Physical drain current p*i from drain to source; its partials p*g per node
        # (bulk: minus the sum, zero when the bulk sits on the source, see Device.eval).
        for col, val in ((spec.g, p * gg), (spec.d, p * gd), (spec.s, p * gs), (bulk, -p * (gg + gd + gs))):
            st.current(spec.d, spec.s, col, val)
        cgs, cgd, cgb, cdb, csb = caps[spec.role]
        for a, b, val in ((spec.g, spec.s, cgs), (spec.g, spec.d, cgd), (spec.g, bulk, cgb), (spec.d, bulk, cdb),
                          (spec.s, bulk, csb)):
            if a != b:
                st.branch(st.c, a, b, val)
    for src in topo.sources:
        if g_source is not None and src.name in g_source:
            st.branch(st.g, src.a, src.b, np.broadcast_to(np.asarray(g_source[src.name], dtype=float), (m,)))
    for res in topo.resistors:
        st.branch(st.g, res.a, res.b, 1.0 / np.broadcast_to(np.asarray(bias[res.bias], dtype=float), (m,)))
    st.branch(st.c, "out", "0", np.full(m, float(c_load)))
    if amp is not None:
        node = drive_node(stage, drive)
        if np.isfinite(amp.r_load):
            st.branch(st.g, "out", "0", np.full(m, 1.0 / amp.r_load))
        st.branch(st.c, "out", node, np.broadcast_to(np.asarray(amp.cc if cc is None else cc, dtype=float), (m,)))
        st.branch(st.c, node, "0", np.full(m, amp.c1))
        st.branch(st.g, node, "0", np.full(m, 1.0 / amp.r1))
    idx = np.arange(len(names))
    st.g[:, idx, idx] += GMIN
    return st.g, st.c
