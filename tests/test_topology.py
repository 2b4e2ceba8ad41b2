"""Topology records against hand-listed nodes and hand-stamped nodal matrices.

The shipped stages touch every bias node with a device terminal; a new topology may not: a
resistor divider fed by a current source has a tap that only the source and the resistors
touch. That tap is an unknown of the nodal systems like any other internal node, never a
rail and never the output (which the small-signal model appends itself).

Check values: the node list written out by hand, and the small-signal conductance matrix
stamped by hand with the nodal-analysis element stamps (a conductance G between nodes a
and b adds G to (a, a) and (b, b) and -G to (a, b) and (b, a); a transconductance gm from
node c into the drain row adds gm at (d, c); J. Vlach, K. Singhal, Computer Methods for
Circuit Analysis and Design, 2nd ed., Van Nostrand Reinhold 1994, ch. 2, from memory).
"""
from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from models.amplifier import smallsignal
from models.circuit.topology import DeviceSpec, ResistorSpec, SourceSpec, Topology
from models.devices.tech import Corner, Polarity
from models.evaluate import corner_shifts, devices_at
from optimise.files.techfile import load_tech

ROOT = Path(__file__).resolve().parents[1]
TECH = load_tech(ROOT / "studies" / "tech" / "ah02-level1.toml")
T = 300.15  # K

# A common-source NMOS whose gate is biased from the tap x of a divider fed by a current
# source from the supply, with a drain resistor from the supply to the output.
DIVIDER = Topology(
    devices=(DeviceSpec("mn", Polarity.N, d="out", g="g", s="0"),),
    sources=(SourceSpec("ib", "ib", a="vdd", b="x"),),
    resistors=(ResistorSpec("r_a", "r_a", "x", "g"), ResistorSpec("r_b", "r_b", "x", "0"),
               ResistorSpec("r_d", "r_d", "vdd", "out")),
    drive="g",
)


def test_node_list_holds_a_tap_only_sources_and_resistors_touch_and_never_the_output():
    # By hand: the device gives g (its drain is the output, its source a rail); the source
    # and the resistors add x; vdd, 0 and out are not unknowns of the rest-point system.
    assert DIVIDER.nodes == ("g", "x")
    assert smallsignal.node_list(DIVIDER) == ("g", "x", "out")


def test_small_signal_conductances_of_the_divider_are_the_hand_stamps():
    stage = SimpleNamespace(TOPOLOGY=DIVIDER)
    w, l = TECH.snap(np.array([20e-6])), TECH.snap(np.array([1e-6]))
    devs = devices_at(stage, SimpleNamespace(w={"mn": w}, l={"mn": l}, tied=()), TECH,
                      corner_shifts(TECH, [Corner.TT]), np.array([T]), np.zeros(1, dtype=int))
    vdd, v_g, v_x, v_out = 3.0, 1.0, 1.2, 1.5  # V: any point in saturation
    r_a, r_b, r_d = 20e3, 50e3, 10e3  # ohm
    op = {"mn": devs["mn"].eval(v_g, v_out, 0.0, 0.0)}
    _, gm, gds, _ = (float(np.ravel(x)[0]) for x in op["mn"])
    assert gm > 0 and gds > 0  # saturated, with length modulation
    nodes = {"g": np.array([v_g]), "x": np.array([v_x])}
    bias = {"ib": np.array([1e-4]), "r_a": np.array([r_a]), "r_b": np.array([r_b]), "r_d": np.array([r_d])}
    g, _ = smallsignal.assemble(stage, devs, bias, TECH, op, nodes, np.array([vdd]), 1e-12, None)
    gmin = smallsignal.GMIN
    # Rows and columns g, x, out; the ideal source stamps nothing, rails are AC ground.
    hand = np.array([
        [1 / r_a + gmin, -1 / r_a, 0.0],
        [-1 / r_a, 1 / r_a + 1 / r_b + gmin, 0.0],
        [gm, 0.0, gds + 1 / r_d + gmin],
    ])
    # 1e-15 relative: the same sums in another order, a few roundings.
    assert g[0] == pytest.approx(hand, rel=1e-15, abs=1e-30)


def test_amplifier_stamps_its_first_stage_and_resistive_load_by_hand():
    # The same divider inside an amplifier: the first stage's output resistance r1 from the
    # driven node (g) to ground, the resistive load from the output to ground, and no other
    # conductance (Cc and C1 are capacitances): G with the amplifier less G without is
    # exactly those two hand stamps.
    from models.records import Amplifier

    stage = SimpleNamespace(TOPOLOGY=DIVIDER)
    w, l = TECH.snap(np.array([20e-6])), TECH.snap(np.array([1e-6]))
    devs = devices_at(stage, SimpleNamespace(w={"mn": w}, l={"mn": l}, tied=()), TECH,
                      corner_shifts(TECH, [Corner.TT]), np.array([T]), np.zeros(1, dtype=int))
    op = {"mn": devs["mn"].eval(1.0, 1.5, 0.0, 0.0)}
    nodes = {"g": np.array([1.0]), "x": np.array([1.2])}
    bias = {"ib": np.array([1e-4]), "r_a": np.array([20e3]), "r_b": np.array([50e3]), "r_d": np.array([10e3])}
    amp = Amplifier(ugf=1e6, cc=2e-12, r1=5e6, c1=0.2e-12, i1=5e-6, r_load=2e3)
    vdd = np.array([3.0])
    bare, _ = smallsignal.assemble(stage, devs, bias, TECH, op, nodes, vdd, 1e-12, None)
    # One output device: it is both ends of the "pair", so the topology's drive node is used.
    stage = SimpleNamespace(TOPOLOGY=DIVIDER, PULL_UP="mn", PULL_DOWN="mn")
    inside, _ = smallsignal.assemble(stage, devs, bias, TECH, op, nodes, vdd, 1e-12, amp, drive="both")
    hand = np.zeros((3, 3))
    hand[0, 0] = 1.0 / amp.r1  # node g, the driven node
    hand[2, 2] = 1.0 / amp.r_load  # the output
    assert inside[0] - bare[0] == pytest.approx(hand, rel=1e-12, abs=1e-18)
