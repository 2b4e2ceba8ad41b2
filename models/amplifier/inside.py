"""Every small-signal and slew metric of a stage inside its amplifier, at every element of
a batch: the nodal model at rest (`smallsignal`), its poles, zeros and loop gain
(`response`), slew rate and gate time (`slew`).
"""
from __future__ import annotations

import numpy as np

from . import response, slew, smallsignal

METRICS = ("ugf_hz", "phase_margin_deg", "p1_hz", "fint_hz", "fz_hz", "slew_v_per_s", "gate_time_s")


def model(stage, devs, bias, tech, op, nodes, vdd, c_load, amp, drive="both", g_source=None, cc=None):
    """(G, C, drive index, out index, device capacitances) of the stage in its amplifier;
    cc (m,) the compensation capacitance per element when the search sizes it."""
    caps = smallsignal.device_capacitances(stage, devs, tech, nodes, vdd)
    g, c = smallsignal.assemble(stage, devs, bias, tech, op, nodes, vdd, c_load, amp, drive, g_source, caps, cc)
    names = smallsignal.node_list(stage.TOPOLOGY)
    return g, c, names.index(smallsignal.drive_node(stage, drive)), names.index("out"), caps


def analyse(stage, devs, bias, tech, op, nodes, vdd, c_load, amp, drive, peaks, limits, g_source=None, cc=None):
    """The amplifier metrics of every element (m,).

    Parameters
    ----------
    stage, devs, bias, tech, op, nodes, vdd : the rest point (see `smallsignal.assemble`).
    c_load : float
        Load capacitance [F].
    amp : Amplifier
    drive : str
        Which gate the first stage drives ("both", "p", "n").
    peaks : (ndarray, ndarray)
        Peak source and sink currents at the drive limits [A] (m,).
    limits : list of dict node -> (m,)
        Output gate voltages at the sourcing and the sinking drive limit [V].
    g_source : dict, optional
        Bias-source output conductances (`smallsignal.assemble`).
    cc : ndarray (m,), optional
        Compensation capacitance per element [F] (a searched Cc); None: ``amp.cc``.

    Returns
    -------
    dict name -> (m,), ndarray of bool (m,)
        `METRICS` and "fp2_hz": unity-gain frequency of the loop gain [Hz], phase margin
        [deg], dominant, output and lowest internal pole [Hz], lowest right-half-plane
        zero [Hz] (inf: none), slew rate [V/s], gate time [s]; and the flags of the
        elements whose small-signal model could be solved (a failure elsewhere).
    """
    cc = np.broadcast_to(np.asarray(amp.cc if cc is None else cc, dtype=float), vdd.shape)
    g, c, i_drive, i_out, _ = model(stage, devs, bias, tech, op, nodes, vdd, c_load, amp, drive, g_source, cc)
    mu_p, mu_z, h0, mu_i, ok = response.poles_zeros(g, c, i_drive, i_out)
    t0 = amp.beta * amp.gm1_for(cc) * np.abs(h0)
    ugf, pm = response.unity_gain(t0, mu_p, mu_z)
    p1, fp2, fint = response.classify(mu_p, mu_i)
    topo = stage.TOPOLOGY
    gate_nodes = (topo.spec(stage.PULL_DOWN).g, topo.spec(stage.PULL_UP).g)
    driven = topo.nodes[i_drive] if i_drive < len(topo.nodes) else "out"
    cap_node = {}
    for node in gate_nodes:
        j = smallsignal.node_list(topo).index(node)
        cap_node[node] = c[:, j, j] - (cc if node == driven else 0.0)
    rest = {node: nodes[node] for node in gate_nodes}
    t_gate = slew.gate_time(stage, bias, cap_node, rest, limits, driven, amp.i1)
    return {
        "ugf_hz": ugf, "phase_margin_deg": pm, "p1_hz": p1, "fp2_hz": fp2, "fint_hz": fint,
        "fz_hz": response.rhp_zero(mu_z),
        "slew_v_per_s": slew.slew_rate(amp.i1, cc, c_load, *peaks), "gate_time_s": t_gate,
    }, ok
