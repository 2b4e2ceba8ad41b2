"""Stage solves against the outside: translinear laws, trade rules, mismatch, swing, batches.

The stages never use the hand laws below; they solve every loop with the full device model.
Each test builds a technology in which it sets every constant (tests/stage_helpers.py), so
it can switch channel-length modulation off (va_per_l = inf) or tie a bulk to its source
(no body effect) exactly where a published law assumes it.

References: [Gil75] B. Gilbert, "Translinear circuits: a proposed classification", Electronics
Letters 11(1):14-16, 1975; [Min12] B. A. Minch, "Synthesis of static and dynamic translinear
circuits", ch. 10 in Advanced Circuits for Emerging Technologies, Wiley, 2012; [SW91]
E. Seevinck, R. J. Wiegerink, "Generalized translinear circuit principle", IEEE JSSC
26(8):1098-1102, 1991; [EKV95] C. C. Enz, F. Krummenacher, E. A. Vittoz, Analog Integrated
Circuits and Signal Processing 8(1):83-114, 1995; [Pel89] M. J. M. Pelgrom, A. C. J.
Duinmaijer, A. P. G. Welbers, IEEE JSSC 24(5):1433-1440, 1989. Published laws and values
derived from them by hand are asserted as equalities; common-practice rules (no source) only
as bounds or orderings.
"""
from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from stage_helpers import (
    FLOAT_ROLES,
    NO_CLM,
    STACKED,
    T_TEST,
    device_currents,
    floating_sizes,
    gate_source,
    make_design,
    make_tech,
    mos_tech,
    solve_rest,
    w_over_l,
)

from models.devices import mos
from models.devices.tech import Corner, ModelKind
from models.evaluate import (
    Conditions,
    Design,
    Targets,
    corner_shifts,
    devices_at,
    evaluate,
    monte_carlo_iq,
    rest_point,
)
from models.stages import floating_loop, get_stage
from optimise.files.study import load_design, load_study
from optimise.files.techfile import load_tech

EKV = ModelKind.EKV
SQ = ModelKind.SQUARE_LAW
STUDIES = Path(__file__).resolve().parent.parent / "studies"

# A process with distinct N and P constants (P: higher threshold, a third of the KP, larger
# slope factor), so no test passes by N/P symmetry alone. Invented for the tests.
N_WI = mos_tech(vt0=0.5, kp=100e-6, n=1.3)
P_WI = mos_tech(vt0=0.6, kp=40e-6, n=1.4)


def loop_terms(design, cur, side):
    """Per loop device of one side ("n" or "p"): (I, S = W/L), CW pair d1, d2 and CCW pair ctl, out."""
    return {k: (cur[f"m{side}_{k}"], w_over_l(design, f"m{side}_{k}")) for k in ("d1", "d2", "ctl", "out")}


def product_law_residual(design, cur, side):
    """I_CTL I_OUT / (S_CTL S_OUT) over I_D1 I_D2 / (S_D1 S_D2), minus one."""
    t = loop_terms(design, cur, side)
    q = {k: i / s for k, (i, s) in t.items()}
    return q["ctl"] * q["out"] / (q["d1"] * q["d2"]) - 1.0


def sqrt_law_residual(design, cur, side):
    """(sqrt(I_CTL/S_CTL) + sqrt(I_OUT/S_OUT)) over (sqrt(I_D1/S_D1) + sqrt(I_D2/S_D2)), minus one."""
    t = loop_terms(design, cur, side)
    r = {k: np.sqrt(i / s) for k, (i, s) in t.items()}
    return (r["ctl"] + r["out"]) / (r["d1"] + r["d2"]) - 1.0


# ---------------------------------------------------------------------------------------
# Translinear loop, weak inversion: product law
# ---------------------------------------------------------------------------------------
# Size choices (W, L in um) that are not matched: in every case the control and output devices
# run at current densities other than the diodes'. With ib_n = ib_p = 1 nA every loop device
# runs at IC between 8e-5 and 1.3e-3.
WI_CASES = {
    "wide-d2": (dict(out=(200, 1), d1=(20, 1), d2=(50, 1), ctl=(10, 1)),
                dict(out=(600, 1), d1=(30, 1), d2=(90, 1), ctl=(60, 2))),
    "long-d1": (dict(out=(400, 1), d1=(40, 2), d2=(10, 1), ctl=(30, 1)),
                dict(out=(500, 1), d1=(100, 1), d2=(20, 1), ctl=(100, 1))),
    "wide-ctl": (dict(out=(100, 1), d1=(10, 1), d2=(10, 1), ctl=(40, 1)),
                 dict(out=(300, 1), d1=(25, 1), d2=(50, 1), ctl=(25, 1))),
}
IB_WI = 1e-9  # A
VDD_WI = 3.0  # V: every loop device has VDS of 0.19 V or more (> 7 UT: reverse term below 1e-3), saturated


def _wi_rest(case, tied):
    n_side, p_side = WI_CASES[case]
    design = make_design("floating-loop", floating_sizes(n_side, p_side),
                         dict(ib_n=IB_WI, ib_p=IB_WI, ib_ctl=2 * IB_WI), tied=tied)
    stage, devs, _, vdd, nodes, ok = solve_rest(design, make_tech(EKV, N_WI, P_WI), VDD_WI)
    assert ok.all()
    cur = device_currents(stage, devs, vdd, nodes)
    # The currents the law names: I_D1 = I_D2 = ib, I_OUT = Iq (both output devices carry it).
    for role in ("mn_d1", "mn_d2", "mp_d1", "mp_d2"):
        assert cur[role][0] == pytest.approx(IB_WI, rel=1e-9)
    assert cur["mn_out"] == pytest.approx(cur["mp_out"], rel=1e-9)
    return design, devs, cur


@pytest.mark.parametrize("side", ["n", "p"])
@pytest.mark.parametrize("case", list(WI_CASES))
def test_weak_inversion_loop_obeys_the_translinear_product_law(case, side):
    design, devs, cur = _wi_rest(case, tied=STACKED)
    ics = [mos.inversion_coefficient(devs[r].mos, devs[r].w, devs[r].l, cur[r]) for r in FLOAT_ROLES]
    assert max(float(np.max(ic)) for ic in ics) < 2e-3  # the weak-inversion premise of the law
    # [Gil75], MOS in weak inversion with S = W/L [Min12]: I_D1 I_D2 / (S1 S2) = I_CTL I_OUT / (S_CTL S_OUT).
    # Tolerance 1 %: the EKV interpolation is not a pure exponential; ln F^-1(IC) = ln IC + sqrt(IC)
    # + O(IC), so the law is off by about sum(+-sqrt(IC)) over the loop, at most 0.5 % at these
    # inversion levels; the diodes' reverse term (VDS = VGS >= 0.19 V, e^(-VDS/UT) < 7e-4) adds less.
    # Measured: 0.0002 % to 0.51 %. At IC ~ 1e-2 the sqrt(IC) term alone reaches several %.
    assert abs(product_law_residual(design, cur, side)[0]) < 0.01


# ---------------------------------------------------------------------------------------
# Translinear loop, strong inversion: square-root law
# ---------------------------------------------------------------------------------------
SI_CASES = {
    "wide-d2": (dict(out=(20, 1), d1=(2, 1), d2=(5, 1), ctl=(1, 1)),
                dict(out=(60, 1), d1=(3, 1), d2=(9, 1), ctl=(6, 2))),
    "long-d1": (dict(out=(40, 1), d1=(4, 2), d2=(1, 1), ctl=(3, 1)),
                dict(out=(90, 1), d1=(10, 2), d2=(2.5, 1), ctl=(5, 1))),
    "wide-ctl": (dict(out=(10, 1), d1=(1, 1), d2=(1, 1), ctl=(4, 1)),
                 dict(out=(30, 1), d1=(2.5, 1), d2=(5, 1), ctl=(2.5, 1))),
}
IB_SI = 10e-6  # A
VDD_SI = 5.0  # V


@pytest.mark.parametrize("side", ["n", "p"])
@pytest.mark.parametrize("case", list(SI_CASES))
def test_strong_inversion_loop_obeys_the_square_root_law(case, side):
    n_side, p_side = SI_CASES[case]
    design = make_design("floating-loop", floating_sizes(n_side, p_side),
                         dict(ib_n=IB_SI, ib_p=IB_SI, ib_ctl=2 * IB_SI), tied=STACKED)
    tech = make_tech(SQ, mos_tech(vt0=0.5, kp=100e-6), mos_tech(vt0=0.6, kp=40e-6, gamma=0.4))
    stage, devs, _, vdd, nodes, ok = solve_rest(design, tech, VDD_SI)
    assert ok.all()
    vt = tech.mos(devs[f"m{side}_out"].p).vt0
    overdrive = [gate_source(stage, nodes, vdd, f"m{side}_{k}") - vt for k in ("d1", "d2", "ctl", "out")]
    assert min(float(ov[0]) for ov in overdrive) > 0.15  # strong inversion: VGS - VT well above 2 n UT
    cur = device_currents(stage, devs, vdd, nodes)
    # [SW91] (from memory; a law of the square-law model itself): sqrt(I1/S1) + sqrt(I2/S2) = sqrt(I3/S3) + sqrt(I4/S4)
    # with equal VT and KP and no body effect. The check asks for "a few percent"; 2 % is asserted.
    # Measured: below 1e-15 (the solve is exact for the square law here; only rounding remains).
    assert abs(sqrt_law_residual(design, cur, side)[0]) < 0.02


# ---------------------------------------------------------------------------------------
# Shared substrate: the hand laws fail, the solve does not use them
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("side", ["n", "p"])
@pytest.mark.parametrize("case", list(WI_CASES))
def test_product_law_fails_on_a_shared_substrate(case, side):
    design, _, cur = _wi_rest(case, tied=frozenset())
    # Conditions of [Gil75]/[Min12]: the law needs equal
    # bulk effect. With bulks on the rails MN_D2 and MN_CTL sit on sources VGS(D1) and VGS(OUT) above
    # the bulk; with constant slope factor n that costs (n - 1) times the source lift, and the law's
    # log error is (n - 1) ln(IC_D1 / IC_OUT), tens of percent for these unequal densities
    # (measured 13 % to 57 %). 5 % is far outside the 1 % the law meets with bulks tied.
    assert abs(product_law_residual(design, cur, side)[0]) > 0.05


@pytest.mark.parametrize("side", ["n", "p"])
def test_square_root_law_fails_on_a_shared_substrate(side):
    # Dense D1 (W/L = 0.5), wide D2, narrow CTL: D1 and OUT densities differ about 3x, so the sources
    # of MN_D2 (at VGS(D1)) and MN_CTL (at VGS(OUT)) differ by about 0.3 V.
    n_side = dict(out=(20, 1), d1=(1, 2), d2=(20, 1), ctl=(1, 1))
    p_side = dict(out=(50, 1), d1=(2.5, 2), d2=(50, 1), ctl=(2.5, 1))
    design = make_design("floating-loop", floating_sizes(n_side, p_side),
                         dict(ib_n=IB_SI, ib_p=IB_SI, ib_ctl=2 * IB_SI))
    tech = make_tech(SQ, mos_tech(vt0=0.5, kp=100e-6, gamma=0.6, phi=0.8),
                     mos_tech(vt0=0.6, kp=40e-6, gamma=0.5, phi=0.8))
    stage, devs, _, vdd, nodes, ok = solve_rest(design, tech, VDD_SI)
    assert ok.all()
    cur = device_currents(stage, devs, vdd, nodes)
    # The square-root law [SW91] holds only without body-effect difference. Here the
    # level-1 threshold shift gamma (sqrt(phi + VSB) - sqrt(phi)) is 0.297 V for MN_D2 (source 1.13 V)
    # and 0.233 V for MN_CTL (source 0.84 V): 0.065 V against 0.80 V of overdrive on the CTL + OUT side,
    # about 8 % (measured 8.8 % N, 7.2 % P).
    assert abs(sqrt_law_residual(design, cur, side)[0]) > 0.05


# ---------------------------------------------------------------------------------------
# Matched densities: Iq / ib_n is the W/L ratio (common practice)
# ---------------------------------------------------------------------------------------
# The demo's hand sizing: every loop device of one side at one density, outputs 10x the W/L
# of the diodes, the control devices the size of the upper diodes, ib_ctl = 2 ib. Bulks on
# the rails (shared substrate): with equal densities the body effect cancels between each
# stacked diode and its control device (the body effect cancels between them), so no tie is needed.
MATCHED_N = dict(out=(60, 0.35), d1=(18, 1.05), d2=(18, 1.05), ctl=(18, 1.05))
MATCHED_P = dict(out=(180, 0.35), d1=(54, 1.05), d2=(54, 1.05), ctl=(54, 1.05))
MATCHED_BIAS = dict(ib_n=2e-6, ib_p=2e-6, ib_ctl=4e-6)
VA_PER_L = (2e7, 1.5e7)  # V/m, N and P: 20 and 15 V per um, the demo process's values (invented)
VDD_MATCHED = 3.3  # V


def matched_tech(model, clm):
    va_n, va_p = VA_PER_L if clm else (NO_CLM, NO_CLM)
    return make_tech(model, mos_tech(vt0=0.55, kp=180e-6, n=1.35, gamma=0.6, phi=0.85, va_per_l=va_n),
                     mos_tech(vt0=0.65, kp=60e-6, n=1.4, gamma=0.5, phi=0.8, va_per_l=va_p))


def matched_rest(model, clm, n_side=MATCHED_N, p_side=MATCHED_P):
    design = make_design("floating-loop", floating_sizes(n_side, p_side), MATCHED_BIAS)
    stage, devs, _, vdd, nodes, ok = solve_rest(design, matched_tech(model, clm), VDD_MATCHED)
    assert ok.all()
    return design, device_currents(stage, devs, vdd, nodes)


@pytest.mark.parametrize("model", [EKV, SQ])
def test_matched_symmetric_loops_split_ib_ctl_evenly(model):
    _, cur = matched_rest(model, clm=False)
    # Both loops sized for Iq = 10 ib with their control device at ib: the consistent rest point
    # has each control device at ib_ctl / 2 (hand calculation from the loop equations, exact).
    assert cur["mn_ctl"][0] == pytest.approx(MATCHED_BIAS["ib_ctl"] / 2, rel=1e-6)


@pytest.mark.parametrize("model", [EKV, SQ])
def test_matched_densities_make_iq_over_ib_the_w_over_l_ratio(model):
    design, cur = matched_rest(model, clm=False)
    ratio = w_over_l(design, "mn_out") / w_over_l(design, "mn_d1")
    assert ratio[0] == pytest.approx(10.0, rel=1e-12)  # 1:10 sizing, (60/0.35) / (18/1.05)
    # Common practice, and [Gil75]/[SW91] worked by hand for a symmetric loop: equal densities
    # give VGS(OUT) = VGS(D1) under any law, so Iq / ib_n = (W/L)_out / (W/L)_d1 = 10. With length
    # modulation off this is exact; rel 1e-6 leaves room for the EKV reverse term, which differs
    # between a diode and its control device by under 1e-9 here (measured 1e-9 EKV, 4e-15 square law).
    assert cur["mn_out"][0] / MATCHED_BIAS["ib_n"] == pytest.approx(ratio[0], rel=1e-6)


@pytest.mark.parametrize("model", [EKV, SQ])
def test_length_modulation_moves_the_ratio_rule_by_several_percent(model):
    design, cur = matched_rest(model, clm=True)
    ratio = (w_over_l(design, "mn_out") / w_over_l(design, "mn_d1"))[0]
    deviation = cur["mn_out"][0] / MATCHED_BIAS["ib_n"] / ratio - 1.0
    # Hand calc from the length-modulation factor (Iq ~ (1 + VDS_out/VA_out) / (1 + VDS_ref/VA_ref)):
    # the output works at VDS = VDD/2 = 1.65 V with VA = 7 V (L = 0.35 um), the diode at VDS = VGS,
    # about 0.7 V with VA = 21 V: (1 + 1.65/7) / (1 + 0.7/21) = 1.20, and the control device (VDS about
    # 2 V) against its diode adds a little more. Measured +30 % (EKV), +29 % (square law).
    # Bounds as asked: clearly more than the 1e-6 of the CLM-free case, less than 50 %.
    assert 0.01 < abs(deviation) < 0.5


# ---------------------------------------------------------------------------------------
# Supply sensitivity (common practice)
# ---------------------------------------------------------------------------------------
SUPPLY_COND = Conditions((Corner.TT,), (T_TEST,), 3.3, 2.7, 3.6)
DEMO_TARGETS = Targets(i_load=500e-6, c_load=50e-12)


def scaled(side, k):
    """The same W/L with k times the length (and width)."""
    return {r: (w * k, l * k) for r, (w, l) in side.items()}


def floating_and_fixed(k=1):
    """The matched floating loop (CLM on) and a fixed-bias stage on the same output pair whose
    ib * r_bias equals the floating loop's rest gate gap, so both share the rest point at 3.3 V."""
    tech = matched_tech(EKV, clm=True)
    fl_design = make_design("floating-loop", floating_sizes(scaled(MATCHED_N, k), scaled(MATCHED_P, k)),
                            MATCHED_BIAS)
    _, _, _, _, nodes, ok = solve_rest(fl_design, tech, SUPPLY_COND.vdd_nom)
    assert ok.all()
    ib = 2e-6
    pair = {"mn_out": scaled(MATCHED_N, k)["out"], "mp_out": scaled(MATCHED_P, k)["out"]}
    fb_design = make_design("fixed-bias", pair, dict(ib=ib, r_bias=(nodes["gp"] - nodes["gn"])[0] / ib))
    return tech, fl_design, fb_design


def test_fixed_bias_iq_moves_with_supply_far_more_than_the_floating_loop():
    tech, fl_design, fb_design = floating_and_fixed()
    fl_res = evaluate(fl_design, tech, SUPPLY_COND, DEMO_TARGETS)
    fb_res = evaluate(fb_design, tech, SUPPLY_COND, DEMO_TARGETS)
    assert fl_res.converged.all() and fb_res.converged.all()
    # Same rest point at the nominal supply (the setup above), to rounding of the two solvers.
    assert fb_res.summary["iq_a"][0] == pytest.approx(fl_res.summary["iq_a"][0], rel=1e-6)
    # Common practice, no source: a fixed gate-to-gate voltage makes the two output VGS add
    # up to VDD - ib r_bias, so Iq follows the supply one-for-one in VGS; the floating loop only
    # through length modulation. Measured 1326 %/V against 10 %/V; "at least 10x" as asked.
    fl_sens = abs(fl_res.summary["supply_sens_pct_per_v"][0])
    fb_sens = abs(fb_res.summary["supply_sens_pct_per_v"][0])
    assert fb_sens > 10.0 * fl_sens


def test_longer_loop_devices_lower_the_floating_loop_supply_sensitivity():
    sens = {}
    for k in (1, 4):
        tech, fl_design, _ = floating_and_fixed(k)
        res = evaluate(fl_design, tech, SUPPLY_COND, DEMO_TARGETS)
        assert res.converged.all()
        sens[k] = abs(res.summary["supply_sens_pct_per_v"][0])
    # Common practice (longer loop devices), no source, and the hand calc that the sensitivity is
    # first order in lambda = 1 / (va_per_l L), so 4x the length should give about 1/4 of it.
    # Measured 10.0 -> 2.9 %/V (0.29x). Asserted: below half, a clear drop with margin for the
    # second-order terms.
    assert sens[4] < 0.5 * sens[1]


# ---------------------------------------------------------------------------------------
# Mismatch: Monte Carlo confirms the linear (adjoint) estimate
# ---------------------------------------------------------------------------------------
MC_SAMPLES = 20_000
MC_SEED = 20240611
MC_VDD = 3.3  # V


def mismatch_designs():
    """The demo's three hand sizings (studies/sensor-buffer-*.toml), in a test-built process
    with the demo's Pelgrom coefficients (AVT 8 / 9 mV um, Abeta 1.5 % um; invented)."""
    fb = make_design("fixed-bias", {"mn_out": (60, 0.35), "mp_out": (180, 0.35)}, dict(ib=4e-6, r_bias=530e3))
    fo = make_design("follower", {"mn_f": (200, 0.35), "mp_f": (600, 0.35), "mn_b": (20, 0.35), "mp_b": (60, 0.35)},
                     dict(ib=2e-6), tied={"mp_f", "mp_b"})
    fl = make_design("floating-loop", floating_sizes(MATCHED_N, MATCHED_P), MATCHED_BIAS)
    return {d.architecture: d for d in (fl, fb, fo)}


def mismatch_tech():
    return make_tech(EKV, mos_tech(vt0=0.55, kp=180e-6, n=1.35, gamma=0.6, phi=0.85, va_per_l=2e7, a_vt=8e-9,
                                   a_beta=1.5e-8),
                     mos_tech(vt0=0.65, kp=60e-6, n=1.4, gamma=0.5, phi=0.8, va_per_l=1.5e7, a_vt=9e-9,
                              a_beta=1.5e-8))


@pytest.mark.parametrize("architecture", ["floating-loop", "fixed-bias", "follower"])
def test_monte_carlo_iq_spread_matches_the_linear_estimate(architecture):
    design, tech = mismatch_designs()[architecture], mismatch_tech()
    res = evaluate(design, tech, Conditions((Corner.TT,), (T_TEST,), MC_VDD, MC_VDD, MC_VDD), DEMO_TARGETS)
    assert res.converged.all()
    linear_pct = res.summary["iq_sigma_pct"][0]
    iq, ok = monte_carlo_iq(design, tech, Corner.TT, T_TEST, MC_VDD, MC_SAMPLES, np.random.default_rng(MC_SEED))
    assert ok.all()
    mc_pct = 100.0 * np.std(iq) / res.summary["iq_a"][0]
    # [Pel89]: the linear propagation of the Pelgrom sigmas through the solved point must agree with
    # Monte Carlo. Tolerance from the sample count: the standard error of a standard deviation from
    # N normal draws is 1/sqrt(2 N) = 0.5 % at N = 20 000; 4 of those (2 %), plus 0.7 % for the
    # curvature of Iq in dVT at a few % sigma (the linear estimate leaves it out).
    # Measured MC / linear: 2.780 / 2.789 %, 1.538 / 1.545 %, 3.039 / 3.060 % (within 0.7 %).
    assert mc_pct == pytest.approx(linear_pct, rel=4.0 / math.sqrt(2 * MC_SAMPLES) + 0.007)


# ---------------------------------------------------------------------------------------
# Class-AB ratio: current left in the idle output device at the drive limit
# ---------------------------------------------------------------------------------------
VDD_AB_WI = 3.0  # V
VDD_AB_SQ = 5.0  # V


def _driven_ratio(model, n_side, ib, vdd, vcomp, drive="both"):
    """Symmetric loops (mirror process, mirrored sizes), stacked bulks tied, no length modulation.
    Returns (idle / Iq, limit kind, control currents at the limit, rest-point overdrive ratio r)."""
    tech = make_tech(model)  # P constants = N constants
    design = make_design("floating-loop", floating_sizes(n_side), dict(ib_n=ib, ib_p=ib, ib_ctl=2 * ib), tied=STACKED)
    stage, devs, bias, v, nodes, ok = solve_rest(design, tech, vdd)
    assert ok.all()
    rest = device_currents(stage, devs, v, nodes)
    assert rest["mn_ctl"][0] == pytest.approx(ib, rel=1e-9)  # symmetric: ib_ctl splits evenly at rest
    vt = tech.nmos.vt0
    r = (gate_source(stage, nodes, v, "mn_ctl") - vt) / (gate_source(stage, nodes, v, "mn_out") - vt)
    # Sourcing (+1): MP_OUT works, MN_OUT is the idle device; its gate gn comes out of driven().
    gn, gp, limit, ok_d = floating_loop.driven(devs, bias, v, nodes, +1, drive, vcomp)
    assert ok_d.all()
    idle = devs["mn_out"].current(gn, 0.5 * v, 0.0, 0.0)
    at_limit = device_currents(stage, devs, v, dict(nodes, gn=gn, gp=gp))
    return (idle / rest["mn_out"])[0], int(limit[0]), at_limit, float(r[0])


WI_AB = dict(out=(100, 1), d1=(10, 1), d2=(10, 1), ctl=(10, 1))


def test_class_ab_ratio_weak_inversion_is_one_half():
    # vcomp = 0.8 V: the driver's compliance stops gp while MN_CTL is still deep in saturation
    # (VDS = 0.57 V, 22 UT), and MP_CTL is off (gp fell by almost 2 V from rest, and its VSG with it).
    ratio, limit, at_limit, _ = _driven_ratio(EKV, WI_AB, IB_WI, VDD_AB_WI, vcomp=0.8)
    assert limit == 0  # compliance, as set up
    assert at_limit["mn_ctl"][0] == pytest.approx(2 * IB_WI, rel=1e-6)  # MN_CTL takes all of ib_ctl = 2 ib
    # Derived from the product law of [Gil75] by hand: the idle device keeps Iq/2 when
    # its control device carries 2 ib. Tolerance 1 %: MP_CTL carries 3e-26 of ib_ctl; the EKV
    # interpolation's sqrt(IC) departure from the exponential (IC 3e-4 to 1.2e-3 here) moves the
    # product by about 0.3 %. Measured 0.4985.
    assert ratio == pytest.approx(0.5, rel=0.01)


def test_class_ab_ratio_weak_inversion_at_the_control_saturation_edge():
    # vcomp tiny: the drive now stops where MN_CTL leaves saturation, VDS = VDSsat = 4 UT in weak
    # inversion ([EKV95] VDSsat/UT = 2 sqrt(IC) + 4, as models.devices.ekv uses it).
    ratio, limit, at_limit, _ = _driven_ratio(EKV, WI_AB, IB_WI, VDD_AB_WI, vcomp=1e-3)
    assert limit == 1  # control-device saturation edge
    assert at_limit["mp_ctl"][0] < 1e-20 * IB_WI  # the other control device is off
    # [Gil75] Iq/2 as above, but at VDS = 4 UT the reverse term takes exp(-4) = 1.8 % of MN_CTL's
    # forward current, so its VGS rises by that much more and the idle device loses 1.8 %:
    # expected about 0.5 (1 - e^-4) = 0.491. Within "a few %" of 0.5: 3 % asserted. Measured 0.4897.
    assert ratio == pytest.approx(0.5, rel=0.03)


@pytest.mark.parametrize(
    "ctl_w, r_expected, ratio_expected",
    [
        # Derived from the square-root law of [SW91] by hand: Imin/Iq = (1 - (sqrt2 - 1) r)^2.
        # r = 1 -> 0.343: the control device at the diodes' density (W/L 1, like D2).
        (1.0, 1.0, 0.343),
        # r = 0.5 -> 0.629: hand sizing, ov_ctl + ov_out = 2 ov_d with ov_ctl = ov_out / 2 gives
        # ov_ctl = 2/3 ov_d, so (W/L)_ctl = (3/2)^2 = 2.25 at the same current.
        (2.25, 0.5, 0.629),
    ],
)
def test_class_ab_ratio_square_law(ctl_w, r_expected, ratio_expected):
    side = dict(out=(10, 1), d1=(1, 1), d2=(1, 1), ctl=(ctl_w, 1))
    ratio, limit, at_limit, r = _driven_ratio(SQ, side, 10e-6, VDD_AB_SQ, vcomp=1e-3)
    assert r == pytest.approx(r_expected, rel=1e-9)  # the sizing gives the r the check names
    assert at_limit["mp_ctl"][0] == 0.0  # square law: the other control device is cut off exactly
    # The square law's current is continuous at the saturation edge, so stopping there costs nothing;
    # the values are quoted to 3 decimals: half a unit of the last digit. Measured 0.34315, 0.62868.
    assert ratio == pytest.approx(ratio_expected, abs=5e-4)


# ---------------------------------------------------------------------------------------
# Swing on the demo study (common practice)
# ---------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo():
    study = load_study(STUDIES / "sensor-buffer.toml")
    design = load_design(STUDIES / "sensor-buffer-floating-loop.toml", study.tech)
    return study, design


def test_floating_loop_swings_within_a_few_hundred_millivolts_of_the_rails(demo):
    study, design = demo
    res = evaluate(design, study.tech, study.conditions, study.targets)
    assert res.converged.all()
    # Common practice, no source: rail-to-rail common-source outputs get within a few hundred mV of
    # each rail at the load current. Bound: the demo study's own headroom_max, 0.35 V, at every PVT
    # point (worst case over corners, temperatures and supplies). Measured 18 mV at 0.5 mA.
    assert res.summary["headroom_high_v"][0] < 0.35
    assert res.summary["headroom_low_v"][0] < 0.35


@pytest.mark.parametrize("side", ["headroom_high_v", "headroom_low_v"])
def test_headroom_grows_with_load_current(demo, side):
    study, design = demo
    loads = (50e-6, 200e-6, 500e-6, 2e-3)  # A
    headroom = []
    for i_load in loads:
        res = evaluate(design, study.tech, study.conditions, dataclasses.replace(study.targets, i_load=i_load))
        assert res.converged.all()
        headroom.append(res.summary[side][0])
    # More load current needs more drop across the working output device (triode: about I / gds).
    assert np.all(np.diff(headroom) > 0)


@pytest.mark.parametrize("architecture", ["floating-loop", "fixed-bias", "follower"])
def test_output_current_slope_is_its_derivative(architecture):
    # Every stage's output(devs, gates, vdd, v) returns d(i_push - i_pull)/dv beside the two
    # currents (the headroom solve's Newton derivative, the output conductance with the
    # gates held). Checked against a central finite difference of the returned currents
    # (common practice, no source) over the output range, triode and saturation of both
    # devices, at the rest gates and with both gates moved 0.3 V either way.
    study = load_study(STUDIES / "sensor-buffer.toml")
    design = load_design(STUDIES / f"sensor-buffer-{architecture}.toml", study.tech)
    stage = get_stage(architecture)
    n = 21
    idx = np.zeros(n, dtype=int)
    devs = devices_at(stage, design, study.tech, corner_shifts(study.tech, [Corner.TT] * n),
                      np.full(n, study.conditions.temps[0]), idx)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    vdd = np.full(n, 3.3)
    nodes, ok, _, _ = rest_point(stage, devs, bias, vdd, sensitivity=False)
    assert ok.all()
    gate_n, gate_p = stage.gates(nodes)
    v = np.linspace(0.02, 0.98, n) * vdd
    h = 1e-5  # V: truncation (h^2 times the third derivative) and rounding (1e-16 |i| / h) far below 1e-6
    for shift in (0.0, 0.3, -0.3):
        gn, gp = gate_n + shift, gate_p + shift
        _, _, slope = stage.output(devs, gn, gp, vdd, v)
        up_push, up_pull, _ = stage.output(devs, gn, gp, vdd, v + h)
        dn_push, dn_pull, _ = stage.output(devs, gn, gp, vdd, v - h)
        fd = ((up_push - up_pull) - (dn_push - dn_pull)) / (2.0 * h)
        assert slope == pytest.approx(fd, rel=1e-6, abs=1e-6 * np.max(np.abs(fd)))

def test_floating_loop_ab_ratio_lies_between_zero_and_one(demo):
    study, design = demo
    res = evaluate(design, study.tech, study.conditions, study.targets)
    # Class AB, not class B, and the idle device cannot carry more than at rest. Measured 0.60 to 0.63.
    assert np.all((res.pvt["ab_ratio"] > 0.0) & (res.pvt["ab_ratio"] < 1.0))


# ---------------------------------------------------------------------------------------
# Fixed bias: cut-off at low supply is an answer, not a failure
# ---------------------------------------------------------------------------------------
# [AH02] Table 3.1-2: VT0 0.7 V both polarities, K' 110 / 50 uA/V^2, gamma 0.4 / 0.57,
# 2|phiF| 0.7 / 0.8 V; lambda 0.04 / 0.05 /V at L = 1 um gives va_per_l.
AH02_N = mos_tech(vt0=0.7, kp=110e-6, gamma=0.4, phi=0.7, va_per_l=1 / (0.04e-6))
AH02_P = mos_tech(vt0=0.7, kp=50e-6, gamma=0.57, phi=0.8, va_per_l=1 / (0.05e-6))
CUTOFF_DESIGN = dict(sizes={"mn_out": (20, 1), "mp_out": (44, 1)}, bias=dict(ib=10e-6, r_bias=50e3))


# Supplies (nominal, min, max) [V]. The lowest set leaves both devices exactly off at rest, where
# the square law has no conductance at all (the mismatch adjoint's Jacobian is singular there).
@pytest.mark.parametrize("supplies", [(1.5, 1.4, 1.6), (1.0, 0.9, 1.2), (0.8, 0.7, 0.9)])
def test_fixed_bias_cut_off_is_reported_as_iq_zero(supplies):
    design = make_design("fixed-bias", **CUTOFF_DESIGN)
    res = evaluate(design, make_tech(SQ, AH02_N, AH02_P), Conditions((Corner.TT,), (T_TEST,), *supplies),
                   Targets(i_load=100e-6, c_load=10e-12))
    # By hand: the sum of both output VGS is VDD - ib r_bias = VDD - 0.5 V, below VT0n + VT0p = 1.4 V
    # at every supply here, so the pair is off (hand calculation); Iq = 0 is a valid answer.
    assert np.all(res.pvt["iq_a"] == 0.0)
    assert res.converged.all()
    # An off pair cannot deliver the load: its headrooms and swing are nan by contract ("cannot
    # deliver", flagged by delivers_source/delivers_sink), every other metric is a number.
    undefined = {"headroom_high_v", "headroom_low_v", "swing_v"}
    assert not (res.pvt["delivers_source"] | res.pvt["delivers_sink"]).any()
    assert np.isnan(res.pvt["headroom_high_v"]).all() and np.isnan(res.summary["swing_v"]).all()
    assert not any(np.isnan(v.astype(float)).any() for k, v in res.pvt.items() if k not in undefined)
    assert not any(np.isnan(v.astype(float)).any() for k, v in res.summary.items() if k not in undefined)


def test_fixed_bias_cut_off_rest_point_has_zero_output_current():
    design = make_design("fixed-bias", **CUTOFF_DESIGN)
    stage, devs, _, vdd, nodes, ok = solve_rest(design, make_tech(SQ, AH02_N, AH02_P), 0.9)
    assert ok.all()
    cur = device_currents(stage, devs, vdd, nodes)
    # Zero net output current closes the equations at rest. Both currents are 0 at
    # cut-off; 1e-12 of the bias current allows for rounding.
    assert abs(cur["mn_out"][0] - cur["mp_out"][0]) < 1e-12 * CUTOFF_DESIGN["bias"]["ib"]


# ---------------------------------------------------------------------------------------
# Kirchhoff: every rest point the evaluation accepts balances every node
# ---------------------------------------------------------------------------------------
def kirchhoff_imbalance(stage, devs, bias, vdd, nodes):
    """Per element, the worst node imbalance relative to the currents meeting there: KCL at
    every internal node (no drive current at rest) and zero net current at the output, built
    here from the topology record, each device's own current and Ohm's law."""
    cur = device_currents(stage, devs, vdd, nodes)
    net, flow = {}, {}
    for spec in stage.TOPOLOGY.devices:
        into_drain = int(spec.polarity) * cur[spec.role]  # physical current into the drain terminal
        for node, sign in ((spec.d, -1.0), (spec.s, 1.0)):
            net[node] = net.get(node, 0.0) + sign * into_drain
            flow[node] = flow.get(node, 0.0) + np.abs(into_drain)
    volts = {"vdd": vdd, "0": 0.0, "out": 0.5 * vdd, **nodes}
    branches = [(src.a, src.b, bias[src.bias]) for src in stage.TOPOLOGY.sources]
    branches += [(res.a, res.b, (volts[res.a] - volts[res.b]) / bias[res.bias]) for res in stage.TOPOLOGY.resistors]
    for a, b, current in branches:  # current flowing from node a to node b
        for node, sign in ((a, -1.0), (b, 1.0)):
            net[node] = net.get(node, 0.0) + sign * current
            flow[node] = flow.get(node, 0.0) + np.abs(current)
    checked = [n for n in net if n not in ("vdd", "0")]
    # Imbalances below 1e-18 A count as balanced: a stage in cut-off carries almost nothing.
    return np.max([np.where(np.abs(net[n]) <= 1e-18, 0.0, np.abs(net[n]) / np.maximum(flow[n], 1e-30))
                   for n in checked], axis=0)


@pytest.mark.parametrize("model", ["ekv", "square-law"])
@pytest.mark.parametrize("architecture", ["floating-loop", "fixed-bias", "follower"])
def test_every_accepted_rest_point_balances_kirchhoff(demo, architecture, model):
    # Sizes over three decades, lengths over 30x, bias currents over four decades, half the
    # floating loops with their stacked and control devices in their own wells: operating
    # points from deep weak inversion to strong, and control devices driven into deep triode.
    # The square law runs on the Allen-Holberg level-1 technology, cut-off and kinks included.
    study, _ = demo
    if model == "square-law":
        study = dataclasses.replace(study, tech=load_tech(STUDIES / "tech" / "ah02-level1.toml"))
    stage = get_stage(architecture)
    rng = np.random.default_rng(11)
    n = 300
    w = {r: 10 ** rng.uniform(np.log10(0.5e-6), np.log10(500e-6), n) for r in stage.ROLES}
    l = {r: 10 ** rng.uniform(np.log10(0.35e-6), np.log10(10e-6), n) for r in stage.ROLES}
    bias = {k: 10 ** rng.uniform(-8.0, -4.0, n) for k in stage.BIAS}
    if "r_bias" in bias:
        bias["r_bias"] = 10 ** rng.uniform(4.0, 6.5, n)
    tied = frozenset(STACKED) if architecture == "floating-loop" else frozenset()
    for ties in (frozenset(), tied):
        design = Design(architecture, w, l, bias, ties)
        corner, temp, vdd = study.conditions.grid()
        k = len(vdd)
        idx_d, idx_p = np.repeat(np.arange(n), k), np.tile(np.arange(k), n)
        shifts = corner_shifts(study.tech, corner)
        devs = devices_at(stage, design, study.tech, {p: tuple(a[idx_p] for a in v) for p, v in shifts.items()},
                          temp[idx_p], idx_d)
        b_flat = {key: v[idx_d] for key, v in bias.items()}
        nodes, ok, _, _ = rest_point(stage, devs, b_flat, vdd[idx_p])
        # A wide population still solves almost everywhere: with EKV 0.5 % of these points
        # are reported as not converged (by the flags, never as numbers); with the square
        # law, whose stages cut off entirely at low bias, 12 %.
        assert ok.mean() > (0.95 if model == "ekv" else 0.85)
        # Kirchhoff to 1e-8 of the currents meeting at each node: the acceptance test of
        # rest_point is 1e-9 (its own assembly), this is an independent re-assembly.
        assert kirchhoff_imbalance(stage, devs, b_flat, vdd[idx_p], nodes)[ok].max() < 1e-8


# ---------------------------------------------------------------------------------------
# Vectorisation: no cross-talk between batch elements
# ---------------------------------------------------------------------------------------
N_POP = 50
CURRENT_METRICS = ("iq_a", "iout_source_a", "iout_sink_a")
VOLTAGE_DIFFERENCES = ("swing_v", "headroom_high_v", "headroom_low_v")


def random_population(architecture, seed):
    """N_POP designs with sizes and biases drawn log-uniformly over the demo's ranges."""
    rng = np.random.default_rng(seed)
    stage = get_stage(architecture)
    w = {r: 10 ** rng.uniform(np.log10(2e-6), np.log10(200e-6), N_POP) for r in stage.ROLES}
    l = {r: 10 ** rng.uniform(np.log10(0.35e-6), np.log10(3e-6), N_POP) for r in stage.ROLES}
    bias = {k: 10 ** rng.uniform(-6.5, -5.0, N_POP) for k in stage.BIAS}
    if "r_bias" in bias:
        bias["r_bias"] = 10 ** rng.uniform(5.0, 6.0, N_POP)
    return Design(architecture, w, l, bias)


def one_of(design, i):
    pick = {name: {k: np.asarray(v)[i:i + 1] for k, v in getattr(design, name).items()} for name in ("w", "l", "bias")}
    return Design(design.architecture, pick["w"], pick["l"], pick["bias"], design.tied)


def assert_same_results(a, b, cond):
    """Every PVT metric and the convergence flags of two Results of the same designs agree.

    rtol 1e-12, with absolute floors where a metric is a difference of near-equal numbers (its
    relative rounding is unbounded near zero): the peak output currents at a drive limit that
    equals the rest point are i_up - i_dn with both at Iq (floor 1e-12 Iq); swing and headroom
    are differences of voltages of order VDD (floor 1e-12 VDD); the supply sensitivity is
    100 (Iq_max - Iq_min) / Iq_nom / span, which a relative change e of one Iq moves by 100 e / span
    (floor for e = 1e-12).
    """
    np.testing.assert_array_equal(a.converged, b.converged)
    iq = np.maximum(a.pvt["iq_a"], 1e-30)
    for name in a.pvt:
        x, y = a.pvt[name].astype(float), b.pvt[name].astype(float)
        if name in CURRENT_METRICS:
            atol = 1e-12 * iq
        elif name in VOLTAGE_DIFFERENCES:
            atol = 1e-12 * a.vdd[None, :]
        elif name == "supply_sens_pct_per_v":
            atol = 100.0 * 1e-12 / (cond.vdd_max - cond.vdd_min)
        else:
            atol = 0.0
        # nan only as "cannot deliver" (a headroom and the swing), the same in both
        np.testing.assert_array_equal(np.isnan(x), np.isnan(y), err_msg=name)
        x, y = np.nan_to_num(x, posinf=np.inf, neginf=-np.inf), np.nan_to_num(y, posinf=np.inf, neginf=-np.inf)
        with np.errstate(invalid="ignore"):  # equal infinities (no right-half-plane zero: fz_hz = inf) agree
            assert np.all((x == y) | (np.abs(x - y) <= atol + 1e-12 * np.abs(y))), name


@pytest.mark.parametrize("architecture", ["floating-loop", "fixed-bias", "follower"])
def test_population_results_equal_single_design_results(demo, architecture):
    study, _ = demo
    design = random_population(architecture, seed=7)
    together = evaluate(design, study.tech, study.conditions, study.targets)
    assert together.converged.mean() > 0.9  # the population is mostly well-posed, so the check has teeth
    alone = [evaluate(one_of(design, i), study.tech, study.conditions, study.targets) for i in range(N_POP)]
    stacked = dataclasses.replace(
        together,
        pvt={k: np.concatenate([r.pvt[k] for r in alone]) for k in together.pvt},
        converged=np.concatenate([r.converged for r in alone]),
    )
    assert_same_results(together, stacked, study.conditions)


@pytest.mark.parametrize("chunk", [1, 37, 1000])
def test_chunk_size_does_not_change_results(demo, chunk):
    study, _ = demo
    design = random_population("floating-loop", seed=11)
    if chunk == 1:  # one element at a time is slow: a few designs are enough for it
        design = Design(design.architecture, *({k: v[:3] for k, v in getattr(design, n).items()}
                                               for n in ("w", "l", "bias")))
    reference = evaluate(design, study.tech, study.conditions, study.targets)
    chunked = evaluate(design, study.tech, study.conditions, study.targets, chunk=chunk)
    assert_same_results(reference, chunked, study.conditions)


def test_a_cut_off_design_does_not_disturb_its_population():
    tech = make_tech(SQ, AH02_N, AH02_P)
    cond = Conditions((Corner.TT,), (T_TEST,), 1.6, 1.5, 1.7)
    targets = Targets(i_load=100e-6, c_load=10e-12)
    # Hand calculation: the output VGS add up to VDD - ib r_bias. Designs 0 and 2 (2 and 5 kohm: 0.02 and
    # 0.05 V) conduct at 1.5 to 1.7 V (> VT0n + VT0p = 1.4 V); design 1 (300 kohm: 3 V) is far below.
    design = make_design("fixed-bias", {"mn_out": (20, 1), "mp_out": (44, 1)},
                         dict(ib=10e-6, r_bias=np.array([2e3, 300e3, 5e3])))
    together = evaluate(design, tech, cond, targets)
    alone = evaluate(one_of(design, 0), tech, cond, targets)
    np.testing.assert_allclose(together.pvt["iq_a"][:1], alone.pvt["iq_a"], rtol=1e-12)
