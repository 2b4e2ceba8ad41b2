"""Large-signal speed of the stage inside its amplifier: output slew rate and the time the
driving stage needs to move the output gates from rest to the drive limit.

Slew rate: the smaller of the Miller limit I1 / Cc (the first stage's whole current goes
into the compensation capacitor while the driven node stays put) and the output limit
I_peak / (C_load + Cc) (the output device's peak current charges the load and Cc).
Gate time: each output gate moves from its rest voltage to its voltage at the drive limit
(both solved) with the capacitance at its node, charged by the current available there:
I1 at the driven node, the bias sources feeding any other gate (the floating pair's ib_ctl,
the fixed-bias ib, the followers' ib), conservatively even in the direction where a diode
could supply more. The gates move together; the slower sets the time, and the slower of
the two directions is the figure. Early-design estimates: the capacitances are the
small-signal ones at rest.

References: P. R. Gray, P. J. Hurst, S. H. Lewis, R. G. Meyer, Analysis and Design of
Analog Integrated Circuits, 5th ed., Wiley 2009, sec. 9.6 (slew rate of the two-stage op
amp, SR = I / Cc; from memory).
"""
from __future__ import annotations

import numpy as np


def slew_rate(i1, cc, c_load, i_source, i_sink):
    """Output slew rate [V/s] (m,): min(I1 / Cc, min(I_source, I_sink) / (C_load + Cc)), >= 0
    (a stage cut off at its drive limit slews at 0)."""
    cc = np.asarray(cc, dtype=float)
    with np.errstate(divide="ignore"):
        miller = np.where(cc > 0, i1 / np.where(cc > 0, cc, 1.0), np.inf)
    return np.maximum(np.minimum(miller, np.minimum(i_source, i_sink) / (c_load + cc)), 0.0)


def available_current(stage, bias, node, driven, i1):
    """Current that can charge a gate node [A] (m,): I1 at the driven node, else the sum of
    the bias sources connected to it."""
    if node == driven:
        return np.asarray(i1, dtype=float)
    total = 0.0
    for src in stage.TOPOLOGY.sources:
        if node in (src.a, src.b):
            total = total + np.abs(np.asarray(bias[src.bias], dtype=float))
    return np.asarray(total, dtype=float)


def gate_time(stage, bias, cap_node, rest, limits, driven, i1):
    """Time to move the output gates from rest to the drive limit [s] (m,).

    Parameters
    ----------
    stage : module
    bias : dict bias name -> (m,)
    cap_node : dict node -> (m,)
        Capacitance at each output gate [F] (the compensation capacitor left out).
    rest : dict node -> (m,)
        Rest voltages of the output gates [V].
    limits : list of dict node -> (m,)
        Gate voltages at each drive limit (sourcing, sinking) [V].
    driven : str
        The node the first stage drives.
    i1 : float
        First stage's available current [A].
    """
    worst = 0.0
    for lim in limits:
        for node, c in cap_node.items():
            i_av = available_current(stage, bias, node, driven, i1)
            with np.errstate(divide="ignore", invalid="ignore"):
                t = np.where(i_av > 0, c * np.abs(lim[node] - rest[node]) / np.where(i_av > 0, i_av, 1.0), np.inf)
            worst = np.maximum(worst, t)
    return worst
