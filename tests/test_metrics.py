"""Every reported metric of `evaluate` against a hand solution or an independent computation.

Each case is chosen so that the published square-law (SPICE level 1, Shichman and Hodges,
IEEE JSSC 3(3), 1968) equations solve it in closed form: mirror-symmetric devices (P
constants = N constants), no length modulation (va_per_l = inf) and sources on their bulk,
so no body effect. The expected values are written out beside each assertion; the tests
then read the same numbers from the evaluate JSON object (optimise.review.evaluation) and a
front.csv row (optimise.search.export), so a metric that goes wrong anywhere between the
solve and the file is seen.

Mismatch: the adjoint sensitivities against central finite differences of the full solve
(threshold and current factor of every device moved in turn, signs included), and the
sigma against the Pelgrom area law (M. J. M. Pelgrom, A. C. J. Duinmaijer, A. P. G.
Welbers, "Matching properties of MOS transistors", IEEE JSSC 24(5):1433-1440, 1989)
summed by hand over those differences.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy.optimize import brentq
from stage_helpers import NO_CLM, STACKED, T_TEST, floating_sizes, make_design, make_tech, mos_tech

from models.devices.tech import Corner, ModelKind
from models.evaluate import Conditions, Targets, corner_shifts, devices_at, evaluate, rest_point
from models.stages import get_stage
from optimise.review.evaluation import result_to_dict
from optimise.search.export import design_from_row, design_rows

SQ = ModelKind.SQUARE_LAW
EKV = ModelKind.EKV
VT, KP = 0.5, 100e-6  # V, A/V^2: the test process (invented), both polarities
TECH_SQ = make_tech(SQ, mos_tech(vt0=VT, kp=KP, va_per_l=NO_CLM))
SUPPLIES = (3.3, 2.7, 3.6)  # V: nominal, min, max (evaluate's grid order: nominal first)
COND = Conditions((Corner.TT,), (T_TEST,), *SUPPLIES)
C_LOAD = 20e-12  # F
LAYOUT = 1.5  # area factor, not 1, so that leaving it out is seen
TARGETS = Targets(i_load=100e-6, c_load=C_LOAD, vcomp=0.2, layout_factor=LAYOUT)


def approx(expected, rel=1e-12, abs=0.0):
    """pytest.approx without its default absolute floor of 1e-12, which would swallow the
    femtofarads, nanoamps and sensitivities compared here."""
    return pytest.approx(expected, rel=rel, abs=abs)


# ---------------------------------------------------------------------------------------
# Fixed bias, hand-solved at every supply
# ---------------------------------------------------------------------------------------
IB, R_BIAS = 2e-6, 100e3  # A, ohm: vb = ib r_bias = 0.2 V between the gates
VB = IB * R_BIAS
FB_L = 2.0  # um, both devices
BETA_FB = KP * 2.0 / FB_L  # A/V^2, a 2 um / 2 um device
# (W of MN_OUT, W of MP_OUT) in um: equal devices, and each side the stronger one in turn, so
# that each output device's saturation is the binding requirement in one of the cases.
FB_WIDTHS = {"equal": (2.0, 2.0), "wide-n": (4.0, 2.0), "wide-p": (2.0, 4.0)}


def fixed_bias_hand(vdd, wn, wp):
    """Hand solution of the fixed-bias pair at supply vdd (square law, no CLM, equal VT).

    beta = KP W/L. Equal currents: beta_n ov_n^2 = beta_p ov_p^2 (ov = VGS - VT), and the two
    gate-source voltages add up to VDD - vb, so ov_n = (VDD - vb - 2 VT) / (1 + k), ov_p = k ov_n
    with k = sqrt(beta_n / beta_p); Iq = beta_n/2 ov_n^2; gm = beta ov each.
    Driven up (source): gp = vcomp + vb, gn = vcomp < VT (MN_OUT off); MP_OUT has
    VSG - VT = VDD - vcomp - vb - VT and at mid-supply VSD = VDD/2 < that (triode):
    I = beta (vov VSD - VSD^2/2). The headroom is the VSD at which the triode current equals
    the load: VSD = vov - sqrt(vov^2 - 2 I_load / beta). The sink side is the mirror image with
    MN_OUT's beta. Lowest supply: each output device stays saturated at VDD/2 while
    VDD >= 2 ov; the pair conducts while VDD >= vb + 2 VT; the bias sources need vb + 2 vcomp.
    """
    bn, bp = KP * wn / FB_L, KP * wp / FB_L
    k = math.sqrt(bn / bp)
    ov_n = (vdd - VB - 2.0 * VT) / (1.0 + k)
    ov_p = k * ov_n
    drive = vdd - TARGETS.vcomp - VB - VT
    vsd = 0.5 * vdd

    def peak(b):
        return b * (drive * vsd - 0.5 * vsd**2)

    def headroom(b):
        return drive - math.sqrt(drive**2 - 2.0 * TARGETS.i_load / b)

    return dict(iq=0.5 * bn * ov_n**2, gm=bn * ov_n + bp * ov_p, peak_src=peak(bp), peak_snk=peak(bn),
                head_high=headroom(bp), head_low=headroom(bn), req_n=2.0 * ov_n, req_p=2.0 * ov_p,
                vdd_min=max(2.0 * ov_n, 2.0 * ov_p, VB + 2.0 * VT, VB + 2.0 * TARGETS.vcomp))


@pytest.fixture(scope="module", params=list(FB_WIDTHS))
def fixed_bias(request):
    wn, wp = FB_WIDTHS[request.param]
    design = make_design("fixed-bias", {"mn_out": (wn, FB_L), "mp_out": (wp, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    res = evaluate(design, TECH_SQ, COND, TARGETS)
    assert res.converged.all()
    return request.param, design, res


def test_fixed_bias_per_supply_metrics_match_the_hand_solution(fixed_bias):
    case, _, res = fixed_bias
    wn, wp = FB_WIDTHS[case]
    for j, vdd in enumerate(res.vdd):
        hand = fixed_bias_hand(vdd, wn, wp)
        # Closed forms on both sides; the solver's gate to 1e-10 V or better: 1e-9 relative.
        assert res.pvt["iq_a"][0, j] == approx(hand["iq"], rel=1e-9)
        # Output pole without an amplifier: the pole-splitting limit of a Miller-compensated
        # common-source pair, gm_out / (2 pi (C_load + C_gates)) (Gray, Hurst, Lewis, Meyer,
        # 5th ed., sec. 9.4.1), gm_out = gm(MN_OUT) + gm(MP_OUT), C_gates = c_drive_f.
        c_gates = res.pvt["c_drive_f"][0, j]
        assert res.pvt["fp2_hz"][0, j] == approx(hand["gm"] / (2.0 * math.pi * (C_LOAD + c_gates)), rel=1e-9)
        # C_gates lies between the two textbook limits of the gate charge of devices in
        # saturation plus both overlaps: weak inversion (n-1)/n Cox W L, strong 2/3 Cox W L
        # (Tsividis, Operation and Modeling of the MOS Transistor, 2nd ed., ch. 8; from memory).
        mt = TECH_SQ.nmos
        wl = (wn + wp) * FB_L * 1e-12
        ov = 2.0 * mt.cov * (wn + wp) * 1e-6
        bounds = sorted((mt.cox * wl * (mt.n - 1.0) / mt.n + ov, mt.cox * wl * 2.0 / 3.0 + ov))
        assert bounds[0] * (1 - 1e-12) <= c_gates <= bounds[1] * (1 + 1e-12)
        # The gate at its drive limit is a closed form; the current at mid-supply too.
        assert res.pvt["iout_source_a"][0, j] == approx(hand["peak_src"], rel=1e-9)
        assert res.pvt["iout_sink_a"][0, j] == approx(hand["peak_snk"], rel=1e-9)
        # The output voltage is solved to 0.1 uV (models.operating.driven_point).
        assert res.pvt["headroom_high_v"][0, j] == approx(hand["head_high"], abs=2e-7)
        assert res.pvt["headroom_low_v"][0, j] == approx(hand["head_low"], abs=2e-7)
        assert res.pvt["swing_v"][0, j] == approx(vdd - hand["head_high"] - hand["head_low"], abs=4e-7)
        # Here an output device's saturation binds (2 ov >= 1.5 V > vb + 2 VT = 1.2 V) ...
        assert hand["vdd_min"] == approx(max(hand["req_n"], hand["req_p"]), rel=1e-12)
        assert res.pvt["vdd_min_v"][0, j] == approx(hand["vdd_min"], rel=1e-9)
        # ... the stronger device's partner, which needs the larger overdrive for the same current.
        named = res.requirement_names[int(res.pvt["vdd_min_what"][0, j])]
        assert named == ("mp_out leaves saturation" if wn > wp else "mn_out leaves saturation")
        # The idle device is cut off at the drive limit (gate at vcomp = 0.2 V < VT): class B.
        assert res.pvt["ab_ratio"][0, j] == 0.0


def test_fixed_bias_summary_matches_the_hand_solution(fixed_bias):
    case, design, res = fixed_bias
    wn, wp = FB_WIDTHS[case]
    s = {k: v[0] for k, v in res.summary.items()}
    nom, lo, hi = (fixed_bias_hand(v, wn, wp) for v in SUPPLIES)
    # Supply sensitivity, positive (Iq rises with the supply) and divided by the supply span.
    sens = 100.0 * (hi["iq"] - lo["iq"]) / nom["iq"] / (SUPPLIES[2] - SUPPLIES[1])
    if case == "equal":
        # (Iq(3.6 V) - Iq(2.7 V)) / Iq(3.3 V) / 0.9 V in %/V, ov = (VDD - 1.2 V)/2:
        # (1.44 - 0.5625) / 1.1025 / 0.9 * 100 = 88.4354 %/V
        assert sens == approx(88.4354, rel=1e-6)  # the hand figure above, 6 digits
        # Power: nominal supply times (Iq + the bias branch ib): 3.3 V (55.125 uA + 2 uA) = 188.5125 uW.
        assert s["power_w"] == approx(188.5125e-6, rel=1e-9)
    assert s["supply_sens_pct_per_v"] == approx(sens, rel=1e-9)
    assert np.all(res.pvt["supply_sens_pct_per_v"][0] == s["supply_sens_pct_per_v"])
    # Power of every case: VDD_nom (Iq + ib), the bias branch included.
    assert s["power_w"] == approx(3.3 * (nom["iq"] + IB), rel=1e-9)
    # Area: layout factor x sum of W L = 1.5 x (W_n + W_p) x 2 um.
    assert s["area_um2"] == approx(LAYOUT * (wn + wp) * FB_L, rel=1e-12)
    # Worst cases over the supplies: the lowest supply has the least drive, the highest needs most.
    assert s["iq_a"] == approx(nom["iq"], rel=1e-9)
    assert s["iq_min_a"] == approx(lo["iq"], rel=1e-9)
    assert s["iq_max_a"] == approx(hi["iq"], rel=1e-9)
    assert s["headroom_high_v"] == approx(lo["head_high"], abs=2e-7)
    assert s["headroom_low_v"] == approx(lo["head_low"], abs=2e-7)
    assert s["iout_source_a"] == approx(lo["peak_src"], rel=1e-9)
    assert s["iout_sink_a"] == approx(lo["peak_snk"], rel=1e-9)
    assert s["vdd_min_v"] == approx(hi["vdd_min"], rel=1e-9)
    # The lowest output pole over the supplies, each from the hand gm and the gates it drives.
    hands = [fixed_bias_hand(v, wn, wp) for v in res.vdd]
    assert s["fp2_hz"] == approx(min(h["gm"] / (2.0 * math.pi * (C_LOAD + c)) for h, c in
                                     zip(hands, res.pvt["c_drive_f"][0])), rel=1e-9)
    assert s["swing_v"] == approx(SUPPLIES[1] - lo["head_high"] - lo["head_low"], abs=4e-7)
    # The same numbers in the evaluate JSON object, with the binding requirement named.
    js = result_to_dict(res, 0)
    for key, value in s.items():
        assert js["summary"][key] == approx(float(value), rel=1e-15), key
    for j, row in enumerate(js["pvt"]):
        assert row["vdd_v"] == res.vdd[j] and row["iq_a"] == approx(res.pvt["iq_a"][0, j], rel=1e-15)
        assert row["vdd_min_set_by"] == ("mp_out leaves saturation" if wn > wp else "mn_out leaves saturation")
    # A front.csv row writes the sizes in micrometres and reads them back to the same design.
    row = design_rows(design)[0]
    assert row["mn_out_w_um"] == approx(wn, rel=1e-12) and row["r_bias_ohm"] == R_BIAS
    back = design_from_row(dict(row, architecture="fixed-bias"))
    assert back.w["mp_out"][0] == approx(wp * 1e-6, rel=1e-12)


# ---------------------------------------------------------------------------------------
# Floating loop, hand-solved: ab_ratio is the smaller of the two sides; power counts every branch
# ---------------------------------------------------------------------------------------
FL_VDD = 5.0  # V
FL_IB, FL_IB_CTL = 10e-6, 20e-6  # A
FL_N = dict(out=(10, 1), d1=(1, 1), d2=(1, 1), ctl=(1, 1))
FL_P = dict(out=(10, 1), d1=(1, 1), d2=(1, 1), ctl=(2.25, 1))  # a wider P control device: sides differ


def floating_hand(split=False):
    """Square-law loops with every stacked source on its bulk and no length modulation:
    ov(D1) + ov(D2) = ov(CTL) + ov(OUT), ov = sqrt(2 I / beta) (E. Seevinck, R. J. Wiegerink,
    "Generalized translinear circuit principle", IEEE JSSC 26(8), 1991). At rest both loops
    give the same Iq and the control currents add up to ib_ctl (solved by bisection here);
    at the drive limit the active control device carries all of ib_ctl (the other one is off),
    which fixes the idle output device's current from its own loop."""
    beta = {k: KP * w / l for k, (w, l) in FL_N.items()}
    beta_p = {k: KP * w / l for k, (w, l) in FL_P.items()}

    def iq_of(b, i_ctl):
        ov = 2.0 * math.sqrt(2.0 * FL_IB / b["d1"]) - math.sqrt(2.0 * i_ctl / b["ctl"])
        return 0.5 * b["out"] * ov**2

    i_nc = brentq(lambda i: iq_of(beta, i) - iq_of(beta_p, FL_IB_CTL - i), 1e-12, FL_IB_CTL - 1e-12, xtol=1e-20)
    iq = iq_of(beta, i_nc)
    if split:
        return iq, i_nc
    return iq, iq_of(beta, FL_IB_CTL) / iq, iq_of(beta_p, FL_IB_CTL) / iq


def test_floating_loop_ab_ratio_is_the_smaller_side_and_power_counts_every_branch():
    design = make_design("floating-loop", floating_sizes(FL_N, FL_P),
                         dict(ib_n=FL_IB, ib_p=FL_IB, ib_ctl=FL_IB_CTL), tied=STACKED)
    cond = Conditions((Corner.TT,), (T_TEST,), FL_VDD, FL_VDD, FL_VDD)
    targets = dataclasses.replace(TARGETS, vcomp=1e-3)  # the control device's saturation edge binds
    res = evaluate(design, TECH_SQ, cond, targets)
    assert res.converged.all()
    iq, ab_source, ab_sink = floating_hand()
    # The two sides differ (about 0.33 and 0.57), so min and max of them are told apart.
    assert ab_source < 0.8 * ab_sink < 0.8
    assert res.summary["iq_a"][0] == approx(iq, rel=1e-7)
    # Square law: continuous at the control device's saturation edge, so the limit costs nothing;
    # the edge is solved to 1 uV in the gates: 1e-5 relative.
    assert res.pvt["ab_ratio"][0, 0] == approx(min(ab_source, ab_sink), rel=1e-5)
    assert res.summary["ab_ratio"][0] <= 1.0
    # Power: VDD (Iq + ib_n + ib_p + ib_ctl), every bias branch (40 uA here, about a third of it).
    assert res.summary["power_w"][0] == approx(FL_VDD * (iq + 2 * FL_IB + FL_IB_CTL), rel=1e-7)
    # Area: 1.5 x (10 + 1 + 1 + 1 + 10 + 1 + 1 + 2.25) um^2 = 40.875 um^2.
    assert res.summary["area_um2"][0] == approx(40.875, rel=1e-12)


# ---------------------------------------------------------------------------------------
# Mismatch: adjoint sensitivities against finite differences of the full solve
# ---------------------------------------------------------------------------------------
MM_VDD = 3.3  # V
# An EKV process with length modulation and body effect, unequal N and P (invented for the test).
TECH_MM = make_tech(EKV, mos_tech(vt0=0.55, kp=180e-6, n=1.35, gamma=0.6, phi=0.85, va_per_l=2e7, a_vt=8e-9,
                                  a_beta=1.5e-8),
                    mos_tech(vt0=0.65, kp=60e-6, n=1.4, gamma=0.5, phi=0.8, va_per_l=1.5e7, a_vt=9e-9,
                             a_beta=1.5e-8))
MM_DESIGNS = {
    "floating-loop": make_design("floating-loop", floating_sizes(dict(out=(60, 0.5), d1=(6, 1.5), d2=(9, 1.5),
                                                                      ctl=(12, 1.0)),
                                                                 dict(out=(180, 0.5), d1=(30, 1.5), d2=(20, 1.5),
                                                                      ctl=(25, 1.0))),
                                 dict(ib_n=2e-6, ib_p=3e-6, ib_ctl=4e-6), tied={"mn_ctl"}),
    "fixed-bias": make_design("fixed-bias", {"mn_out": (60, 0.5), "mp_out": (180, 0.5)}, dict(ib=4e-6, r_bias=500e3)),
    "follower": make_design("follower", {"mn_f": (200, 0.5), "mp_f": (600, 0.5), "mn_b": (20, 0.5),
                                         "mp_b": (50, 0.7)}, dict(ib=2e-6), tied={"mp_b"}),
}


def _iq(design, dvt, dbeta, sensitivity=False):
    stage = get_stage(design.architecture)
    devs = devices_at(stage, design, TECH_MM, corner_shifts(TECH_MM, [Corner.TT]), np.full(1, T_TEST),
                      np.zeros(1, dtype=int), dvt, dbeta)
    bias = {k: np.asarray(v, dtype=float) for k, v in design.bias.items()}
    _, ok, sens, op = rest_point(stage, devs, bias, np.full(1, MM_VDD), sensitivity=sensitivity)
    assert ok.all()
    return float(op[stage.PULL_DOWN][0][0]), sens


def _finite_differences(design, base_vt, base_beta):
    """Central differences of Iq in each device's dvt and dbeta around the given deviations."""
    h_vt, h_beta = 1e-5, 1e-5  # V, 1: truncation ~ (h / UT)^2 ~ 1e-7, solve rounding ~ 1e-14 V / h ~ 1e-9
    fd = {}
    for role in get_stage(design.architecture).ROLES:
        for k, h in ((0, h_vt), (1, h_beta)):
            up = [dict(base_vt), dict(base_beta)]
            dn = [dict(base_vt), dict(base_beta)]
            up[k][role] = up[k][role] + h
            dn[k][role] = dn[k][role] - h
            fd[role, k] = (_iq(design, *up)[0] - _iq(design, *dn)[0]) / (2.0 * h)
    return fd


def _assert_sensitivities(sens, fd):
    scale = max(abs(v) for v in fd.values())
    for (role, k), value in fd.items():
        # Signs included: each sensitivity on its own, to the differences' truncation error.
        assert sens[role][k][0] == approx(value, rel=1e-5, abs=1e-7 * scale), (role, k)


@pytest.mark.parametrize("architecture", list(MM_DESIGNS))
def test_mismatch_sensitivities_away_from_the_mean_match_finite_differences(architecture):
    # The same check about a drawn-off point (every device 2 mV and +3 % off, the way a Monte
    # Carlo sample is): the adjoint must use the instance's own current factor there.
    design = MM_DESIGNS[architecture]
    roles = get_stage(architecture).ROLES
    base_vt = {r: np.full(1, 2e-3) for r in roles}
    base_beta = {r: np.full(1, 0.03) for r in roles}
    _, sens = _iq(design, base_vt, base_beta, sensitivity=True)
    _assert_sensitivities(sens, _finite_differences(design, base_vt, base_beta))


@pytest.mark.parametrize("architecture", list(MM_DESIGNS))
def test_mismatch_sensitivities_and_sigma_match_finite_differences(architecture):
    design = MM_DESIGNS[architecture]
    stage = get_stage(architecture)
    zero = {r: np.zeros(1) for r in stage.ROLES}
    iq0, sens = _iq(design, zero, zero, sensitivity=True)
    fd, var = _finite_differences(design, zero, zero), 0.0
    for role in stage.ROLES:
        spec = stage.TOPOLOGY.spec(role)
        mt = TECH_MM.mos(spec.polarity)
        area = design.w[role][0] * design.l[role][0]
        # [Pel89]: a matched pair differs by sigma = A / sqrt(W L); each device of the pair deviates
        # independently from the mean, so by A / sqrt(2 W L) (the pair's variance is the sum of two).
        var += (fd[role, 0] * mt.a_vt / math.sqrt(2.0 * area)) ** 2 + (fd[role, 1] * mt.a_beta / math.sqrt(2.0 * area)) ** 2
    _assert_sensitivities(sens, fd)
    # Sensitivities of both kinds matter here (none of the devices is negligible by construction).
    assert abs(fd[stage.PULL_DOWN, 0]) > 0 and abs(fd[stage.PULL_DOWN, 1]) > 0
    res = evaluate(design, TECH_MM, Conditions((Corner.TT,), (T_TEST,), MM_VDD, MM_VDD, MM_VDD),
                   Targets(i_load=10e-6, c_load=C_LOAD))
    assert res.summary["iq_a"][0] == approx(iq0, rel=1e-12)
    # The reported sigma, from the hand sum over the finite differences (truncation 1e-5 relative).
    assert res.summary["iq_sigma_pct"][0] == approx(100.0 * math.sqrt(var) / iq0, rel=1e-5)


def test_dense_fallback_of_the_adjoint_gives_the_same_sensitivities(monkeypatch):
    # The adjoint solve sends the elements its sparse elimination cannot vouch for to a dense
    # LAPACK solve; both must give J^-T dIq/dx. Forcing every element down the dense path must
    # leave every sensitivity as it was, to rounding of two elimination orders.
    import models.circuit.nodal as nodal

    design = MM_DESIGNS["floating-loop"]
    zero = {r: np.zeros(1) for r in get_stage("floating-loop").ROLES}
    _, sparse = _iq(design, zero, zero, sensitivity=True)
    monkeypatch.setattr(nodal, "solve_structured", lambda entries, rhs, k, m: (np.zeros((k, m)), np.zeros(m, bool)))
    _, dense_path = _iq(design, zero, zero, sensitivity=True)
    for role, (s_vt, s_beta) in sparse.items():
        assert dense_path[role][0][0] == approx(s_vt[0], rel=1e-9, abs=1e-12 * abs(s_vt[0]) + 1e-18), role
        assert dense_path[role][1][0] == approx(s_beta[0], rel=1e-9, abs=1e-18), role


def test_fixed_bias_drive_capacitance_is_the_saturation_gate_capacitance(fixed_bias):
    case, _, res = fixed_bias
    wn, wp = FB_WIDTHS[case]
    mt = TECH_SQ.nmos  # cox 5 fF/um^2, cov 0.2 fF/um (tests/stage_helpers.py), both polarities
    # A saturated device in strong inversion: Cgs = 2/3 Cox W L plus the overlap, and the gate-drain
    # overlap (P. E. Allen, D. R. Holberg, CMOS Analog Circuit Design, 2nd ed., Table 3.2-1, from
    # memory); both output gates: sum over MN_OUT and MP_OUT. The model interpolates towards the
    # weak-inversion value by 1/IC; IC is about 300 here (Iq 30-80 uA, Ispec 0.17 uA x W/L), so 1 %.
    hand = sum((2.0 / 3.0) * mt.cox * w * 1e-6 * FB_L * 1e-6 + 2.0 * mt.cov * w * 1e-6 for w in (wn, wp))
    assert res.summary["c_drive_f"][0] == approx(hand, rel=1e-2)


def test_drive_capacitance_in_weak_inversion_is_the_depletion_capacitance():
    # In weak inversion the gate sees the oxide in series with the depletion layer,
    # Cox W L (n - 1)/n (C. Enz, E. Vittoz, Charge-Based MOS Transistor Modeling, Wiley 2006,
    # from memory), plus both overlaps. EKV fixed-bias pair with its gates 0.25 V above each
    # rail (0.25 V below VT0): IC about 6e-4; the interpolation towards the strong-inversion value
    # raises the intrinsic part by (2/3 n/(n - 1) - 1) IC = 1.9 IC, about 0.1 %: 0.2 % asserted.
    tech = make_tech(EKV, mos_tech(vt0=VT, kp=KP, va_per_l=NO_CLM))
    vdd, w, l = 3.3, 2.0, 2.0  # V, um, um
    design = make_design("fixed-bias", {"mn_out": (w, l), "mp_out": (w, l)}, dict(ib=IB, r_bias=(vdd - 0.5) / IB))
    res = evaluate(design, tech, Conditions((Corner.TT,), (T_TEST,), vdd, vdd, vdd), TARGETS)
    assert res.converged.all()
    mt = tech.nmos
    hand = 2.0 * ((mt.n - 1.0) / mt.n * mt.cox * w * l * 1e-12 + 2.0 * mt.cov * w * 1e-6)
    assert res.summary["c_drive_f"][0] == approx(hand, rel=2e-3)


def test_a_failed_driven_point_is_reported_at_its_pvt_point(monkeypatch):
    # Numerical failure is reported per design and PVT point, never dropped: a driven point that
    # does not converge (forced here at the lowest supply, sourcing side) must clear `converged`
    # there, word the failure and make the design infeasible, while every other point stands.
    import models.evaluate as ev

    real = ev.driven_point

    def failing(stage, devs, bias, vdd, nodes, direction, targets):
        out = list(real(stage, devs, bias, vdd, nodes, direction, targets))
        if direction > 0:
            out[4] = out[4] & (vdd != SUPPLIES[1])
        return tuple(out)

    monkeypatch.setattr(ev, "driven_point", failing)
    design = make_design("fixed-bias", {"mn_out": (2.0, FB_L), "mp_out": (2.0, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    res = evaluate(design, TECH_SQ, COND, TARGETS)
    assert list(res.converged[0]) == [v != SUPPLIES[1] for v in res.vdd]
    assert not res.feasible[0]
    assert res.violations[0][0].startswith("operating point did not converge at 1 of 3 PVT points")


def test_chunks_bound_the_elements_solved_at_once(monkeypatch):
    import models.evaluate as ev

    sizes, real = [], ev._chunk

    def recording(stage, design, tech, cond_arrays, targets, idx_design, idx_pvt):
        sizes.append(len(idx_design))
        return real(stage, design, tech, cond_arrays, targets, idx_design, idx_pvt)

    monkeypatch.setattr(ev, "_chunk", recording)
    design = make_design("fixed-bias", {"mn_out": ([2.0, 3.0, 4.0], FB_L), "mp_out": (2.0, FB_L)},
                         dict(ib=IB, r_bias=R_BIAS))
    res = evaluate(design, TECH_SQ, COND, TARGETS, chunk=4)
    # 3 designs x 3 supplies = 9 elements in chunks of at most 4, each element once.
    assert sizes == [4, 4, 1]
    whole = real  # the same population in one chunk gives the same numbers (elements are independent)
    monkeypatch.setattr(ev, "_chunk", whole)
    one = evaluate(design, TECH_SQ, COND, TARGETS)
    np.testing.assert_array_equal(res.pvt["iq_a"], one.pvt["iq_a"])


# ---------------------------------------------------------------------------------------
# Every lowest-supply requirement on its own, and the follower by hand
# ---------------------------------------------------------------------------------------
FO_SIZES = {"mn_b": (1, 1), "mp_b": (4, 1), "mn_f": (10, 1), "mp_f": (40, 1)}  # um: 1:10 on both sides
FO_IB, FO_VDD = 10e-6, 3.3  # A, V


def _requirements(design, vdd, vcomp):
    stage = get_stage(design.architecture)
    devs = devices_at(stage, design, TECH_SQ, corner_shifts(TECH_SQ, [Corner.TT]), np.full(1, T_TEST),
                      np.zeros(1, dtype=int))
    bias = {k: np.asarray(v, dtype=float) for k, v in design.bias.items()}
    nodes, ok, _, op = rest_point(stage, devs, bias, np.full(1, vdd), sensitivity=False)
    assert ok.all()
    return {name: float(v[0]) for name, v in stage.requirements(devs, bias, np.full(1, vdd), nodes, op, vcomp)}


def _ov(i, w, l=1.0):
    """Square-law overdrive sqrt(2 I / beta) [V] of a device of W/L w/l in the test process."""
    return math.sqrt(2.0 * i / (KP * w / l))


def test_each_lowest_supply_requirement_matches_the_hand_solution():
    vcomp = 0.3  # V
    # Fixed bias (equal devices): cut-off at vb + 2 VT, each output device 2 ov, the bias
    # sources vb + 2 vcomp (see fixed_bias_hand).
    fb = make_design("fixed-bias", {"mn_out": (4.0, FB_L), "mp_out": (2.0, FB_L)}, dict(ib=IB, r_bias=R_BIAS))
    hand = fixed_bias_hand(3.3, 4.0, 2.0)
    got = _requirements(fb, 3.3, vcomp)
    want = {"output pair cuts off": VB + 2 * VT, "mn_out leaves saturation": hand["req_n"],
            "mp_out leaves saturation": hand["req_p"], "ib sources lose compliance": VB + 2 * vcomp}
    assert got == approx(want, rel=1e-9)
    # Floating loop (floating_hand): each output device 2 ov_out at Iq; each control device
    # needs VSG(MP_OUT) + VGS(MN_OUT) + its own ov; each bias source its diode stack
    # (2 (VT + ov_d), no body effect with the sources on their bulks) plus vcomp.
    fl = make_design("floating-loop", floating_sizes(FL_N, FL_P), dict(ib_n=FL_IB, ib_p=FL_IB, ib_ctl=FL_IB_CTL),
                     tied=STACKED)
    iq, i_nc = floating_hand(split=True)
    gates = 2 * VT + _ov(iq, 10) + _ov(iq, 10)
    want = {"mn_out leaves saturation": 2 * _ov(iq, 10), "mp_out leaves saturation": 2 * _ov(iq, 10),
            "mn_ctl leaves saturation": gates + _ov(i_nc, 1), "mp_ctl leaves saturation": gates + _ov(FL_IB_CTL - i_nc, 2.25),
            "ib_n source loses compliance": 2 * (VT + _ov(FL_IB, 1)) + vcomp,
            "ib_p source loses compliance": 2 * (VT + _ov(FL_IB, 1)) + vcomp}
    assert _requirements(fl, FL_VDD, vcomp) == approx(want, rel=1e-7)
    # Follower (test_follower_matches_the_hand_solution): each bias source needs twice its
    # diode's gate-source voltage plus vcomp, each follower 2 ov at Iq.
    fo = make_design("follower", FO_SIZES, dict(ib=FO_IB), tied=set(FO_SIZES))
    iq = FO_IB * 10
    want = {"ib top source loses compliance": 2 * (VT + _ov(FO_IB, 1) + vcomp),
            "ib bottom source loses compliance": 2 * (VT + _ov(FO_IB, 4) + vcomp),
            "mn_f leaves saturation": 2 * _ov(iq, 10), "mp_f leaves saturation": 2 * _ov(iq, 40)}
    assert _requirements(fo, FO_VDD, vcomp) == approx(want, rel=1e-9)


def test_follower_matches_the_hand_solution():
    # Every bulk on its source (no body effect), no length modulation, 1:10 current densities on
    # both sides: the loop VGS(MN_B) + VSG(MP_B) = VGS(MN_F) + VSG(MP_F) holds with each follower
    # at its diode's overdrive, so Iq = 10 ib (the square-root law of Seevinck and Wiegerink 1991
    # with equal densities). Drive limit up: the top source reaches VDD - vcomp, so MN_F's VGS is
    # VDD/2 - vcomp at mid-supply (saturated: its drain is on the supply) and MP_F, whose gate sits
    # two diode drops lower, is off (VSG 0.22 V < VT): the peak is beta_F/2 (VDD/2 - vcomp - VT)^2.
    design = make_design("follower", FO_SIZES, dict(ib=FO_IB), tied=set(FO_SIZES))
    cond = Conditions((Corner.TT,), (T_TEST,), FO_VDD, FO_VDD, FO_VDD)
    res = evaluate(design, TECH_SQ, cond, TARGETS)
    assert res.converged.all()
    iq = 10 * FO_IB
    assert res.summary["iq_a"][0] == approx(iq, rel=1e-9)
    assert VT + _ov(FO_IB, 1) + VT + _ov(FO_IB, 4) + TARGETS.vcomp - FO_VDD / 2 < VT  # the idle device is off
    drive = FO_VDD / 2 - TARGETS.vcomp - VT
    assert res.summary["iout_source_a"][0] == approx(0.5 * KP * 10 * drive**2, rel=1e-9)
    assert res.summary["iout_sink_a"][0] == approx(0.5 * KP * 40 * drive**2, rel=1e-9)
    # Output conductance of the followers at rest: gm = beta ov each (no body effect here).
    gm = KP * 10 * _ov(iq, 10) + KP * 40 * _ov(iq, 40)
    assert res.summary["fp2_hz"][0] == approx(gm / (2 * math.pi * C_LOAD), rel=1e-9)
    # Lowest supply: the top source, twice MN_B's VGS plus vcomp (1.894 V + 0.4 V = 2.294 V).
    assert res.summary["vdd_min_v"][0] == approx(2 * (VT + _ov(FO_IB, 1) + TARGETS.vcomp), rel=1e-9)
    # Power: VDD (Iq + ib) = 3.3 V x 110 uA.
    assert res.summary["power_w"][0] == approx(3.3 * 110e-6, rel=1e-9)


@pytest.mark.parametrize("direction", [+1, -1])
def test_bracketed_fallback_finds_the_same_drive_limit_edge(monkeypatch, direction):
    # The floating loop's drive limit at the control device's saturation edge is a Newton solve
    # with a bracketed search behind it for the elements Newton leaves. With Newton made to fail
    # there, the fallback must find the same gates (to its 1e-9 V bracket) and the same kind of limit.
    from models.stages import floating_loop

    design = make_design("floating-loop", floating_sizes(FL_N, FL_P), dict(ib_n=FL_IB, ib_p=FL_IB, ib_ctl=FL_IB_CTL),
                         tied=STACKED)
    stage = get_stage("floating-loop")
    devs = devices_at(stage, design, TECH_SQ, corner_shifts(TECH_SQ, [Corner.TT]), np.full(1, T_TEST),
                      np.zeros(1, dtype=int))
    bias = {k: np.asarray(v, dtype=float) for k, v in design.bias.items()}
    vdd = np.full(1, FL_VDD)
    nodes, ok, _, _ = rest_point(stage, devs, bias, vdd, sensitivity=False)
    newton_edge = floating_loop.driven(devs, bias, vdd, nodes, direction, "both", 1e-3)
    real = floating_loop.newton

    def failing(fun, x0, step_max=0.25, xtol=1e-8, max_iter=60):
        x, ok = real(fun, x0, step_max, xtol, max_iter)
        return x, ok & (step_max != 0.2)  # the edge solve (step_max 0.2) reports failure

    monkeypatch.setattr(floating_loop, "newton", failing)
    gn, gp, limit, ok_b = floating_loop.driven(devs, bias, vdd, nodes, direction, "both", 1e-3)
    assert ok_b.all() and newton_edge[3].all()
    assert limit[0] == newton_edge[2][0] == 1  # the control device's saturation edge
    assert gn[0] == approx(newton_edge[0][0], abs=1e-7)
    assert gp[0] == approx(newton_edge[1][0], abs=1e-7)


def test_supply_sensitivity_of_a_stage_cut_off_at_the_nominal_supply():
    # vb = 2.45 V: the pair is off at 2.7 V and 3.3 V (VDD - vb < 2 VT) and conducts at 3.6 V, with
    # ov = (3.6 - 2.45 - 1)/2 = 75 mV. Iq(nominal) = 0, so the largest Iq of the group stands in
    # for it (a stage that conducts at some supplies only must not look supply-stable):
    # 100 (Iq(3.6) - 0) / Iq(3.6) / 0.9 V = 111.11 %/V.
    design = make_design("fixed-bias", {"mn_out": (2.0, FB_L), "mp_out": (2.0, FB_L)}, dict(ib=IB, r_bias=2.45 / IB))
    res = evaluate(design, TECH_SQ, COND, TARGETS)
    assert list(res.pvt["iq_a"][0] > 0) == [False, False, True]  # nominal, min, max
    assert res.pvt["iq_a"][0, 2] == approx(0.5 * BETA_FB * 0.075**2, rel=1e-6)
    assert res.summary["supply_sens_pct_per_v"][0] == approx(100.0 / 0.9, rel=1e-12)


def test_margins_are_relative_to_their_limits_at_the_worst_pvt_point(fixed_bias):
    case, design, res0 = fixed_bias
    wn, wp = FB_WIDTHS[case]
    hand = {v: fixed_bias_hand(v, wn, wp) for v in SUPPLIES}
    sigma = res0.pvt["iq_sigma_pct"][0] / 100.0  # checked against finite differences above
    iq = res0.pvt["iq_a"][0]
    # Limits placed so that each margin is set by a different supply; g = (limit - achieved)/limit
    # for upper limits and (achieved - limit)/limit for lower ones (pymoo convention, feasible >= 0).
    targets = dataclasses.replace(TARGETS, iq_min=40e-6, iq_max=100e-6, iq_sigmas=3.0, headroom_max=0.4,
                                  ab_min=0.0, fp2_min=1.2 * float(res0.pvt["fp2_hz"][0].min()),
                                  area_max=20e-12)
    res = evaluate(design, TECH_SQ, COND, targets)
    m = {k: v[0] for k, v in res.margins.items()}
    assert m["iq_low"] == approx(min((iq * (1 - 3 * sigma) - 40e-6) / 40e-6), rel=1e-9)
    assert m["iq_high"] == approx(min((100e-6 - iq * (1 + 3 * sigma)) / 100e-6), rel=1e-9)
    worst_head = max(max(h["head_high"], h["head_low"]) for h in hand.values())
    assert m["headroom"] == approx((0.4 - worst_head) / 0.4, rel=1e-6)
    worst_load = min(min(h["peak_src"], h["peak_snk"]) for h in hand.values())
    assert m["load_current"] == approx((worst_load - TARGETS.i_load) / TARGETS.i_load, rel=1e-9)
    assert m["fp2"] == approx(1 / 1.2 - 1, rel=1e-9)
    assert m["area"] == approx((20.0 - LAYOUT * (wn + wp) * FB_L) / 20.0, rel=1e-12)
    assert m["vdd_min"] == approx(min((v - hand[v]["vdd_min"]) / v for v in SUPPLIES), rel=1e-9)
    assert m["ab_ratio"] > 1e300  # ab_min = 0 switches the check off (the largest float stands for inf)
    assert res.feasible[0] == all(value >= 0 for value in m.values())
    # The worded violations of the failing margins, and reading the last design by a negative index.
    assert any(v.startswith("Iq - 3 sigma = ") for v in res.violations[0]) == (m["iq_low"] < 0)
    assert any("output pole" in v for v in res.violations[0])
    assert res.violations[-1] == res.violations[0]
    # The evaluate JSON object gives temperatures in degrees Celsius.
    assert result_to_dict(res, 0)["pvt"][0]["temp_c"] == approx(T_TEST - 273.15, abs=1e-9)


def test_fast_paths_solve_ordinary_designs_without_their_fallbacks(monkeypatch):
    # Each stage solves its rest point and drive limits with a fast path (closed forms, Newton
    # from a close start) and keeps slower, safer solves behind it for the elements the fast path
    # leaves. On ordinary designs (every device in its intended region) the fast path must do the
    # whole job: a fallback that quietly takes over would hide a broken start or Jacobian.
    from models.circuit.nodal import NodalSystem
    from models.stages import floating_loop

    def refuse(*args, **kwargs):
        raise AssertionError("a fallback solve was needed")

    monkeypatch.setattr(NodalSystem, "solve", refuse)
    monkeypatch.setattr(floating_loop, "_quiescent_bracketed", refuse)
    monkeypatch.setattr(floating_loop, "_edge_bracketed", refuse)
    cases = [(d, TECH_MM) for d in MM_DESIGNS.values()]
    cases += [(make_design("floating-loop", floating_sizes(FL_N, FL_P), dict(ib_n=FL_IB, ib_p=FL_IB, ib_ctl=FL_IB_CTL),
                           tied=STACKED), TECH_SQ),
              (make_design("fixed-bias", {"mn_out": (4.0, FB_L), "mp_out": (2.0, FB_L)}, dict(ib=IB, r_bias=R_BIAS)),
               TECH_SQ),
              (make_design("follower", FO_SIZES, dict(ib=FO_IB), tied=set(FO_SIZES)), TECH_SQ)]
    for design, tech in cases:
        for vcomp in (0.2, 1e-3):  # the driver's compliance first, then the control device's edge
            res = evaluate(design, tech, COND, dataclasses.replace(TARGETS, vcomp=vcomp))
            assert res.converged.all(), (design.architecture, vcomp)
