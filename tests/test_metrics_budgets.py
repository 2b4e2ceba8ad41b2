"""The amplifier metrics of `evaluate` (gate time, slew rate), the budget and amplifier
margins and the mirror compliance margin against hand solutions.

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

import numpy as np
import pytest
from stage_helpers import STACKED, T_TEST, floating_sizes, make_design
from test_metrics import (
    COND,
    FB_L,
    FL_IB,
    FL_IB_CTL,
    FL_N,
    FL_P,
    FL_VDD,
    IB,
    R_BIAS,
    TARGETS,
    TECH_SQ,
    VB,
    VT,
    approx,
    fixed_bias_hand,
)

from models.circuit.mirrors import Mirror
from models.devices.tech import Corner
from models.evaluate import Conditions, evaluate
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


def test_budget_and_amplifier_margins_are_relative_to_their_limits():
    # Limits placed so that each margin is set at a known supply; g = (limit - achieved) / limit
    # for upper limits, (achieved - limit) / limit for lower ones (feasible >= 0). The achieved
    # values are the hand figures: power VDD (Iq + ib), the larger peak current, and the gate
    # time and slew rate checked above.
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    base = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, amplifier=AMP))
    hand = {v: fixed_bias_hand(v, WN, WP) for v in base.vdd}
    power = {v: v * (h["iq"] + IB) for v, h in hand.items()}
    peak_hi = {v: max(h["peak_src"], h["peak_snk"]) for v, h in hand.items()}
    gate, slew = base.pvt["gate_time_s"][0], base.pvt["slew_v_per_s"][0]
    pm = base.pvt["phase_margin_deg"][0]
    targets = dataclasses.replace(TARGETS, amplifier=AMP, power_max=200e-6, iout_peak_max=2e-3,
                                  gate_time_max=1.1 * float(gate.min()), slew_min=1.05 * float(slew.min()),
                                  phase_margin_min=0.9 * float(pm.max()))
    res = evaluate(design, TECH_SQ, COND, targets)
    m = {k: v[0] for k, v in res.margins.items()}
    assert m["power"] == approx(min((200e-6 - p) / 200e-6 for p in power.values()), rel=1e-9)
    assert m["iout_peak"] == approx(min((2e-3 - p) / 2e-3 for p in peak_hi.values()), rel=1e-9)
    assert m["gate_time"] == approx(min((targets.gate_time_max - gate) / targets.gate_time_max), rel=1e-12)
    assert m["slew"] == approx(1 / 1.05 - 1, rel=1e-12)
    assert m["phase_margin"] == approx(min((pm - targets.phase_margin_min) / targets.phase_margin_min), rel=1e-12)
    # Each limit is broken at some supply, and the violation says so.
    assert min(m[k] for k in ("gate_time", "slew", "phase_margin")) < 0
    text = " ".join(res.violations[0])
    assert "time to move the gates to the drive limit" in text and "slew rate" in text and "phase margin" in text


def test_mirror_compliance_margin_is_the_voltage_across_each_source_over_its_limit():
    # Unsized mirrors with no mismatch and no output conductance are the ideal sources, so
    # the rest point is the hand one: i_top (supply to gp) has VDD - V(gp) across it, i_bot
    # (gn to ground) V(gn). The margin is (V_across - v_min) / v_min at the worst source and
    # supply (the compliance check of a mirror: Gray, Hurst, Lewis, Meyer, 5th ed., sec. 4.2).
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    v_top, v_bot = 1.2, 1.3  # V: each source binds at a different supply
    mirrors = {"fixed-bias": {"ib_top": Mirror(v_min=v_top), "ib_bot": Mirror(v_min=v_bot)}}
    res = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, mirrors=mirrors))
    rel = []
    for j, vdd in enumerate(res.vdd):
        hand = fixed_bias_hand(vdd, WN, WP)
        gn = VT + (2.0 * hand["iq"] / (TECH_SQ.nmos.kp * WN / FB_L)) ** 0.5
        across_top, across_bot = vdd - (gn + VB), gn
        # The gates to 1e-10 V: 1e-9 relative.
        assert res.pvt["mirror_v_i_top"][0, j] == approx(across_top, rel=1e-9)
        assert res.pvt["mirror_v_i_bot"][0, j] == approx(across_bot, rel=1e-9)
        rel += [(across_top - v_top) / v_top, (across_bot - v_bot) / v_bot]
    assert min(rel) < 0 < max(rel)  # met somewhere, broken somewhere: min is told from max
    assert res.margins["mirror_compliance"][0] == approx(min(rel), rel=1e-9)
    # Each violated source is worded once, at the supply where it has least voltage across it
    # (the lowest supply for both here, the nominal one listed first: argmin is told from argmax).
    worded = 0
    for key, name, limit in (("ib_top", "i_top", v_top), ("ib_bot", "i_bot", v_bot)):
        across = res.pvt[f"mirror_v_{name}"][0]
        lines = [v for v in res.violations[0] if f"bias source {key}:" in v]
        if across.min() >= limit:
            assert not lines
            continue
        j = int(np.argmin(across))
        assert len(lines) == 1 and lines[0].endswith(f", {res.vdd[j]:g} V")
        worded += 1
    assert worded >= 1


def test_slew_rate_is_the_smaller_peak_current_over_the_output_capacitance():
    # A first stage with 1 mA: the output limit min(I_source, I_sink) / (C_load + Cc) binds
    # (about 10 V/us against the Miller limit's 500 V/us), and the unequal devices give
    # unequal peak currents, so the smaller one is told from the larger.
    amp = dataclasses.replace(AMP, i1=1e-3)
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    res = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, amplifier=amp))
    for j, vdd in enumerate(res.vdd):
        hand = fixed_bias_hand(vdd, WN, WP)
        assert hand["peak_snk"] > 1.2 * hand["peak_src"]
        output = hand["peak_src"] / (TARGETS.c_load + amp.cc)
        assert output < 0.1 * amp.i1 / amp.cc
        assert res.pvt["slew_v_per_s"][0, j] == approx(output, rel=1e-9)  # peak currents to 1e-9


def test_feedback_factor_leaves_the_loop_gain_and_its_unity_gain_frequency_unchanged():
    # gm1 = 2 pi f_u Cc / beta makes the loop gain beta gm1 / (2 pi f Cc) of a Miller
    # amplifier cross 1 near f_u for every feedback factor (Gray, Hurst, Lewis, Meyer, 5th ed.,
    # sec. 9.4): beta scales the loop gain, gm1 undoes it, so the crossing and the phase there
    # are the same to the unity-gain search's tolerance (1e-9 decades) for beta = 1 and 1/4.
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    runs = [evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, amplifier=dataclasses.replace(AMP, beta=b)))
            for b in (1.0, 0.25)]
    full, quarter = (r.pvt for r in runs)
    assert quarter["ugf_hz"][0] == approx(full["ugf_hz"][0], rel=1e-8)
    assert quarter["phase_margin_deg"][0] == approx(full["phase_margin_deg"][0], rel=1e-8)
    # And the crossing is near the target: within 25 %, as C1 = 1 pF beside Cc = 2 pF and the
    # non-dominant poles pull it down (0.80 to 0.89 MHz here); a wrong beta moves it 16-fold.
    assert full["ugf_hz"][0] == approx(AMP.ugf, rel=0.25)


def test_unsized_mirror_sigma_adds_its_share_from_a_finite_difference_of_the_bias():
    # A mirror with sigma_pct delivers I0 (1 + delta), sigma(delta) = sigma_pct / 100: its share
    # of the Iq variance is (dIq / d ln I0 * sigma(delta))^2, added to the devices' own. The
    # slope by central difference of the full solve in ib_n (+-1e-4 relative; square law: the
    # truncation is ~1e-8 relative, the rest points are solved to ~1e-12).
    design = make_design("floating-loop", floating_sizes(FL_N, FL_P), dict(ib_n=FL_IB, ib_p=FL_IB, ib_ctl=FL_IB_CTL),
                         tied=STACKED)
    cond = Conditions((Corner.TT,), (T_TEST,), FL_VDD, FL_VDD, FL_VDD)
    sigma_pct = 2.0
    mirrors = {"floating-loop": {"ib_n": Mirror(sigma_pct=sigma_pct)}}
    with_mirror = evaluate(design, TECH_SQ, cond, dataclasses.replace(TARGETS, mirrors=mirrors))
    ideal = evaluate(design, TECH_SQ, cond, TARGETS)
    iq = ideal.summary["iq_a"][0]
    h = 1e-4
    iq_pm = [evaluate(dataclasses.replace(design, bias={**design.bias, "ib_n": design.bias["ib_n"] * (1 + s * h)}),
                      TECH_SQ, cond, TARGETS).summary["iq_a"][0] for s in (1, -1)]
    slope = (iq_pm[0] - iq_pm[1]) / (2 * h)  # dIq / d ln ib_n
    share = 100.0 * slope * sigma_pct / 100.0 / iq
    expect = np.hypot(ideal.summary["iq_sigma_pct"][0], share)
    assert share > 0.3 * ideal.summary["iq_sigma_pct"][0]  # a visible share, so the check can fail
    assert with_mirror.summary["iq_sigma_pct"][0] == approx(expect, rel=1e-6)


def test_unequal_mirror_currents_into_the_driven_gate_are_taken_by_the_driver(monkeypatch):
    # A finite output resistance on the top source only (unsized mirror, r_out = 1 Mohm,
    # v_ref = 0: I = ib + V_across / r_out) makes the two bias currents differ. The surplus
    # enters the driven gate gp, where the first stage takes it at rest; the resistor still
    # carries the bottom source's ib, so the gate-to-gate voltage and Iq are the ideal
    # hand values (KCL at gn). The stage's fast solve, with the drive current set from its
    # residual, must balance this without the nodal Newton fallback.
    from models.circuit.nodal import NodalSystem

    def refuse(*args, **kwargs):
        raise AssertionError("a fallback solve was needed")

    monkeypatch.setattr(NodalSystem, "solve", refuse)
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    mirrors = {"fixed-bias": {"ib_top": Mirror(r_out=1e6)}}
    res = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, mirrors=mirrors))
    assert res.converged.all()
    for j, vdd in enumerate(res.vdd):
        # The gates to 1e-10 V: 1e-9 relative (about 1.5 uA of surplus here, so it is seen).
        assert res.pvt["iq_a"][0, j] == approx(fixed_bias_hand(vdd, WN, WP)["iq"], rel=1e-9)


def test_sized_mirrors_add_their_two_devices_to_the_area_with_the_layout_factor():
    # A sized 1:1 mirror is its output device plus its own input diode: 2 W L each, and the
    # layout factor (1.5 here, so leaving it out is seen) over the whole drawn area.
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    mirrors = {"fixed-bias": {"ib_top": Mirror(w=3e-6, l=2e-6), "ib_bot": Mirror(w=5e-6, l=1e-6)}}
    res = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, mirrors=mirrors))
    hand = TARGETS.layout_factor * ((WN + WP) * FB_L + 2 * 3 * 2 + 2 * 5 * 1)  # um^2
    assert res.summary["area_um2"][0] == approx(hand, rel=1e-12)


def test_loop_gain_falls_twenty_decibels_a_decade_down_to_the_unity_gain_frequency(fixed_bias_amp):
    # The Bode data of one design (models.evaluate.loop_gain_at): 0 dB and the phase margin at
    # the unity-gain frequency evaluate reports, and a Miller-compensated amplifier's loop
    # gain falls at 20 dB per decade between its dominant pole and f_u (Gray, Hurst, Lewis,
    # Meyer, 5th ed., sec. 9.4), so a decade below f_u it is 20 dB, to within what the
    # non-dominant poles near f_u take off at f_u (measured 1.2 dB here: 2 dB allowed).
    from models.evaluate import loop_gain_at

    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    targets = dataclasses.replace(TARGETS, amplifier=AMP)
    j = 0
    f_u = float(fixed_bias_amp.pvt["ugf_hz"][0, j])
    pm = float(fixed_bias_amp.pvt["phase_margin_deg"][0, j])
    assert 10 * fixed_bias_amp.pvt["p1_hz"][0, j] < 0.1 * f_u  # the decade below f_u is above p1
    mag, phase = loop_gain_at(design, TECH_SQ, Corner.TT, T_TEST, float(fixed_bias_amp.vdd[j]), targets,
                              np.array([0.1 * f_u, f_u]))
    assert mag[1] == pytest.approx(0.0, abs=1e-6)  # the crossing solved to 1e-9 decades
    assert 180.0 + phase[1] == approx(pm, rel=1e-9)
    assert mag[0] == pytest.approx(20.0, abs=2.0)


def test_a_failed_drive_limit_solve_clears_converged_at_its_point(monkeypatch):
    # The stage's own drive-limit solve reports failure per element; evaluate must carry it
    # to `converged` at that PVT point (here the highest supply, sinking side) and nowhere else.
    from models.stages import fixed_bias

    real = fixed_bias.driven

    def failing(devs, bias, vdd, nodes, direction, drive, vcomp):
        gn, gp, limit, ok = real(devs, bias, vdd, nodes, direction, drive, vcomp)
        return gn, gp, limit, ok & ~((direction < 0) & (vdd == COND.vdd_max))

    monkeypatch.setattr(fixed_bias, "driven", failing)
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    res = evaluate(design, TECH_SQ, COND, TARGETS)
    assert list(res.converged[0]) == [v != COND.vdd_max for v in res.vdd]
    assert not res.feasible[0]


def test_a_design_meeting_every_target_is_feasible():
    # Feasible means converged everywhere and every margin >= 0: a design that meets all the
    # limits must come out feasible (and one limit broken makes it infeasible).
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    ok = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, iq_max=1e-3, power_max=1e-2))
    assert all(v[0] >= 0 for v in ok.margins.values()) and ok.feasible[0]
    bad = evaluate(design, TECH_SQ, COND, dataclasses.replace(TARGETS, iq_max=1e-6))
    assert bad.margins["iq_high"][0] < 0 and not bad.feasible[0]


def test_peak_output_current_summary_is_the_largest_either_way(fixed_bias_amp):
    # iout_peak_a (the short-circuit figure) is the largest peak current at full drive over
    # both directions and every supply: the wider N device's sink current at the highest supply.
    res = fixed_bias_amp
    hand = max(max(fixed_bias_hand(v, WN, WP)[k] for k in ("peak_src", "peak_snk")) for v in res.vdd)
    assert hand > 1.2 * min(min(fixed_bias_hand(v, WN, WP)[k] for k in ("peak_src", "peak_snk")) for v in res.vdd)
    assert res.summary["iout_peak_a"][0] == approx(hand, rel=1e-9)  # peak currents to 1e-9


def test_a_metric_that_is_not_a_number_at_a_solved_point_is_a_violation(monkeypatch):
    # Numerical failure is never silent: a peak current that comes out nan at a point whose
    # solve reported success must make its margin fail (-1), not pass.
    import models.evaluate as ev

    real = ev.driven_point

    def nan_peak(stage, devs, bias, vdd, nodes, direction, targets):
        out = list(real(stage, devs, bias, vdd, nodes, direction, targets))
        out[1] = np.where(vdd == COND.vdd_min, np.nan, out[1])
        return tuple(out)

    monkeypatch.setattr(ev, "driven_point", nan_peak)
    design = make_design("fixed-bias", {"mn_out": (WN, FB_L), "mp_out": (WP, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    res = evaluate(design, TECH_SQ, COND, TARGETS)
    assert res.converged.all()
    assert res.margins["load_current"][0] == -1.0 and not res.feasible[0]


def test_gate_capacitance_on_a_table_technology_lies_within_the_oxide_bounds():
    # The output gates' capacitance c_drive_f from the card's own cgg: every MOS gate sees
    # at least its two overlaps (2 Cov W) and at most the whole oxide over the channel plus
    # them ((Cox L + 2 Cov) W), whatever the bias (the charge-sheet bounds; Tsividis,
    # Operation and Modeling of the MOS Transistor, 2nd ed., ch. 8, from memory).
    from pathlib import Path

    from models.stages import get_stage
    from optimise.files.study import load_design, load_study

    root = Path(__file__).resolve().parents[1]
    study = load_study(root / "studies" / "sensor-buffer-180.toml")
    # The 3.3 V demo design, its lengths brought inside the tables.
    demo = load_design(root / "studies" / "sensor-buffer-floating-loop.toml",
                       load_study(root / "studies" / "sensor-buffer.toml").tech)
    design = dataclasses.replace(demo, l={k: np.clip(v, 0.36e-6, 1.8e-6) for k, v in demo.l.items()})
    cond = Conditions((Corner.TT,), (300.15,), 1.8, 1.8, 1.8)
    res = evaluate(design, study.tech, cond, dataclasses.replace(study.targets, amplifier=None))
    assert res.converged.all()
    mod = get_stage(design.architecture)
    lo = hi = 0.0
    for role in (mod.PULL_UP, mod.PULL_DOWN):
        mt = study.tech.mos(mod.TOPOLOGY.spec(role).polarity)
        w, l = float(design.w[role][0]), float(design.l[role][0])
        lo += 2 * mt.cov * w
        hi += (mt.cox * l + 2 * mt.cov) * w
    c = float(res.pvt["c_drive_f"][0, 0])
    assert lo < c < hi, (lo, c, hi)


def test_a_stage_that_sinks_too_little_does_not_deliver_the_load():
    # delivers_load needs both directions at every PVT point: a pull-down four times
    # narrower than the demo's sinks about a quarter of its peak, so a load between the
    # two peaks is sourced but not sunk.
    from pathlib import Path

    from models.stages import get_stage
    from optimise.files.study import load_design, load_study

    root = Path(__file__).resolve().parents[1]
    study = load_study(root / "studies" / "sensor-buffer.toml")
    demo = load_design(root / "studies" / "sensor-buffer-floating-loop.toml", study.tech)
    down = get_stage(demo.architecture).PULL_DOWN
    design = dataclasses.replace(demo, w={**demo.w, down: demo.w[down] / 4})
    cond = Conditions((Corner.TT,), (300.15,), 3.3, 3.3, 3.3)
    probe = evaluate(design, study.tech, cond, study.targets)
    src, snk = float(probe.pvt["iout_source_a"][0, 0]), float(probe.pvt["iout_sink_a"][0, 0])
    assert snk < 0.7 * src
    res = evaluate(design, study.tech, cond, dataclasses.replace(study.targets, i_load=np.sqrt(src * snk)))
    assert bool(res.pvt["delivers_source"][0, 0]) and not bool(res.pvt["delivers_sink"][0, 0])
    assert not bool(res.summary["delivers_load"][0])
