"""The amplifier metrics of `evaluate` (gate time, slew rate) against hand solutions.

The fixed-bias pair of test_metrics (square law, SPICE level 1, Shichman and Hodges, IEEE
JSSC 3(3), 1968; no length modulation, no body effect) solves in closed form: its gates at
rest and at both drive limits are written out below, and in saturation its gate
capacitances are Meyer's: cgs = 2/3 Cox W L plus the overlap W Cov, cgd = the overlap W Cov,
cgb = 0 (J. E. Meyer, "MOS models and circuit simulation", RCA Review 32, 1971; Tsividis,
Operation and Modeling of the MOS Transistor, 2nd ed., ch. 8; from memory).

Gate time: each output gate moves from rest to its drive-limit voltage, charged by the
current available at its node (the first stage's I1 at the driven gate gp, the bias source
ib at gn), with the capacitance at the node without the compensation capacitor; the figure
is the slowest node and direction. Slew rate: min(I1 / Cc, I_peak / (C_load + Cc)) (P. R.
Gray, P. J. Hurst, S. H. Lewis, R. G. Meyer, Analysis and Design of Analog Integrated
Circuits, 5th ed., Wiley 2009, sec. 9.6; from memory).
"""
from __future__ import annotations

import dataclasses

import pytest
from stage_helpers import make_design
from test_metrics import COND, FB_L, IB, R_BIAS, TARGETS, TECH_SQ, VB, VT, approx, fixed_bias_hand

from models.evaluate import evaluate
from models.records import Amplifier

# I1 small and C1 large so that the driven gate gp binds the gate time (its time is about
# 40 times gn's): a wrong capacitance or current at the driven node is then seen.
AMP = Amplifier(ugf=1e6, cc=2e-12, r1=1e7, c1=1e-12, i1=5e-6)
WN, WP = 4.0, 2.0  # um: unequal, so the sourcing and sinking gate swings differ


@pytest.fixture(scope="module")
def fixed_bias_amp():
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    res = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, amplifier=AMP))
    assert res.converged.all()
    return res


def test_gate_time_matches_the_hand_solution(fixed_bias_amp):
    res = fixed_bias_amp
    mt = TECH_SQ.nmos  # the test process has equal constants for both polarities

    def c_gate(w_um):
        # Meyer in saturation (every case here: VDS = VDD/2 > VGS - VT at rest).
        return 2.0 / 3.0 * mt.cox * w_um * FB_L * 1e-12 + 2.0 * mt.cov * w_um * 1e-6

    c_gp = c_gate(WP) + AMP.c1  # driven node: the first stage's own capacitance too, Cc left out
    c_gn = c_gate(WN)
    for j, vdd in enumerate(res.vdd):
        hand = fixed_bias_hand(vdd, WN, WP)
        ov_n = (2.0 * hand["iq"] / (TECH_SQ.nmos.kp * WN / FB_L)) ** 0.5
        gn_rest = VT + ov_n
        gp_rest = gn_rest + VB
        # Drive limits (both gates move together, gp - gn = VB): sourcing gp = vcomp + VB,
        # sinking gn = VDD - vcomp - VB.
        swing_source = gp_rest - (TARGETS.vcomp + VB)
        swing_sink = (vdd - TARGETS.vcomp - VB) - gn_rest
        assert abs(swing_source - swing_sink) > 0.1  # the two directions differ: max is told from min
        times = [c * s / i for c, i in ((c_gp, AMP.i1), (c_gn, IB)) for s in (swing_source, swing_sink)]
        # The rest gate to 1e-10 V in 1 V: 1e-9 relative.
        assert res.pvt["gate_time_s"][0, j] == approx(max(times), rel=1e-9)
    assert res.summary["gate_time_s"][0] == approx(res.pvt["gate_time_s"][0].max(), rel=1e-15)


def test_slew_rate_is_the_output_limit_when_the_peak_current_is_small(fixed_bias_amp):
    res = fixed_bias_amp
    for j, vdd in enumerate(res.vdd):
        hand = fixed_bias_hand(vdd, WN, WP)
        miller = AMP.i1 / AMP.cc
        output = min(hand["peak_src"], hand["peak_snk"]) / (TARGETS.c_load + AMP.cc)
        # Closed forms on both sides (peak currents to 1e-9, see test_metrics).
        assert res.pvt["slew_v_per_s"][0, j] == approx(min(miller, output), rel=1e-9)
    assert res.summary["slew_v_per_s"][0] == approx(res.pvt["slew_v_per_s"][0].min(), rel=1e-15)
