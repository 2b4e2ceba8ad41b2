"""Bias sources as current mirrors (models.circuit.mirrors and their use in models.evaluate):
Monte Carlo against the linear sigma, the weak-inversion law with bias sources, the supply
sensitivity a finite output resistance gives against a hand derivation, the area, the
compliance check, the defaults that keep today's ideal sources, and the study tables.
"""
from __future__ import annotations

import dataclasses
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from stage_helpers import (
    STACKED,
    T_TEST,
    UM,
    floating_sizes,
    make_design,
    make_tech,
    mos_tech,
)

from models.circuit.mirrors import Mirror, source_keys, source_states
from models.devices.tech import Corner, ModelKind
from models.evaluate import Conditions, Targets, evaluate, monte_carlo_iq
from models.operating import corner_shifts, devices_at, rest_point
from models.stages import get_stage
from optimise.files.errors import InputError
from optimise.files.study import load_design, load_study, study_from_dict
from optimise.files.tables import read_toml

ROOT = Path(__file__).resolve().parents[1]
STUDY = ROOT / "studies" / "sensor-buffer.toml"
FLOAT_KEYS = ("ib_n", "ib_p", "ib_ctl_top", "ib_ctl_bot")


def at_one_point(vdd=3.3, vmin=None, vmax=None):
    return Conditions((Corner.TT,), (T_TEST,), vdd, vmin or vdd, vmax or vdd)


def demo():
    study = load_study(STUDY)
    return study, load_design(ROOT / "studies" / "sensor-buffer-floating-loop.toml", study.tech)


def test_source_keys_name_both_ends_of_a_shared_bias():
    # The study's names: one key per source, the two ends of ib_ctl (and of ib) apart.
    assert tuple(source_keys(get_stage("floating-loop").TOPOLOGY).values()) == FLOAT_KEYS
    assert tuple(source_keys(get_stage("fixed-bias").TOPOLOGY).values()) == ("ib_top", "ib_bot")
    assert tuple(source_keys(get_stage("follower").TOPOLOGY).values()) == ("ib_top", "ib_bot")


@pytest.mark.parametrize("form", [{"w": 4 * UM, "l": 2 * UM}, {"sigma_pct": 1.5, "r_out": 5e6}],
                         ids=["sized", "sigma-r_out"])
def test_monte_carlo_with_mirror_mismatch_matches_linear_sigma(form):
    # Pelgrom 1989 via the adjoint (DESIGN.md sec. 2.3): the linear sigma must be
    # confirmed by Monte Carlo of the exact solve, with every mirror's deviations drawn
    # (a sized mirror's two devices, an unsized one's delta). Measured here: within 1 %.
    # 10 %: the bar; with 4000 draws the sample sigma itself scatters by about
    # 1/sqrt(2 N) = 1.1 %, and the linearisation error is below 1 % at these sigmas.
    study, design = demo()
    mirrors = {k: Mirror(**form) for k in FLOAT_KEYS}
    targets = dataclasses.replace(study.targets, mirrors={"floating-loop": mirrors})
    cond = Conditions((Corner.TT,), (study.conditions.temps[0],), 3.3, 3.3, 3.3)
    res = evaluate(design, study.tech, cond, targets)
    linear = res.summary["iq_sigma_pct"][0]
    ideal = evaluate(design, study.tech, cond, study.targets).summary["iq_sigma_pct"][0]
    assert linear > 1.05 * ideal  # the mirrors add a visible share, so the check can fail
    iq, ok = monte_carlo_iq(design, study.tech, Corner.TT, cond.temps[0], 3.3, 4000, np.random.default_rng(7),
                            mirrors=mirrors)
    assert ok.all()
    mc = 100.0 * iq.std(ddof=1) / res.summary["iq_a"][0]
    assert mc == pytest.approx(linear, rel=0.10)


def test_ideal_mirrors_leave_todays_values_exactly():
    # The default (no [mirrors]) and an empty table are today's ideal sources, bit for bit,
    # in evaluate and in Monte Carlo ("same study, same numbers": DESIGN.md sec. 5).
    study, design = demo()
    base = evaluate(design, study.tech, study.conditions, study.targets)
    empty = evaluate(design, study.tech, study.conditions, dataclasses.replace(study.targets, mirrors={}))
    for name in ("iq_a", "iq_sigma_pct", "supply_sens_pct_per_v", "area_um2", "swing_v", "power_w"):
        assert np.array_equal(base.summary[name], empty.summary[name])
    assert list(base.margins) == list(empty.margins)
    args = (design, study.tech, Corner.TT, study.conditions.temps[0], 3.3, 200)
    today, _ = monte_carlo_iq(*args, np.random.default_rng(3))
    with_none, _ = monte_carlo_iq(*args, np.random.default_rng(3), mirrors={})
    assert np.array_equal(today, with_none)
    # An unsized mirror with no sigma and no output resistance is the ideal source again;
    # only the path through the nodal balance differs (rounding).
    zero = {"floating-loop": {k: Mirror(sigma_pct=0.0) for k in FLOAT_KEYS}}
    same = evaluate(design, study.tech, study.conditions, dataclasses.replace(study.targets, mirrors=zero))
    np.testing.assert_allclose(same.pvt["iq_a"], base.pvt["iq_a"], rtol=1e-9)
    np.testing.assert_allclose(same.pvt["iq_sigma_pct"], base.pvt["iq_sigma_pct"], rtol=1e-6)


def weak_inversion_design(scale_n=1.0, scale_ctl=1.0):
    """Matched densities, every loop device's bulk on its source (no body effect), bias in
    the nanoamperes: inversion coefficients about 1e-3 all round."""
    sizes = floating_sizes({"out": (60, 0.6), "d1": (18, 1.8), "d2": (18, 1.8), "ctl": (18, 1.8)})
    bias = {"ib_n": 2e-9 * scale_n, "ib_p": 2e-9 * scale_n, "ib_ctl": 4e-9 * scale_ctl}
    return make_design("floating-loop", sizes, bias, STACKED)


def test_weak_inversion_law_with_bias_sources():
    # Gilbert 1975, translinear product law: in weak inversion each loop gives
    # i_ctl Iq = ib^2 S_ctl S_out / (S_d1 S_d2) and i_nc + i_pc = ib_ctl, so
    # Iq ~ ib_n^2 / ib_ctl with ib_n and ib_p from one reference:
    # d ln Iq / d ln ib = 2 and d ln Iq / d ln ib_ctl = -1. ib_ctl's top end only sets the
    # drive current at rest (the amplifier drives MP_OUT's gate), so the bottom end takes
    # all of the -1. 2 %: the bar; EKV at IC about 1e-3 is within 0.3 % of the
    # exponential law (the reverse term of the diodes, e^(-VDS/UT), is far smaller).
    tech = make_tech(ModelKind.EKV)
    mirrors = {"floating-loop": {k: Mirror(sigma_pct=1.0) for k in FLOAT_KEYS}}
    targets = Targets(i_load=1e-9, c_load=1e-12, mirrors=mirrors)
    cond = at_one_point()

    # From the adjoint: each source's d Iq / d delta over Iq is d ln Iq / d ln I_source.
    stage = get_stage("floating-loop")
    d = weak_inversion_design()
    devs = devices_at(stage, d, tech, corner_shifts(tech, [Corner.TT]), np.array([T_TEST]), np.array([0]))
    vdd = np.array([3.3])
    src = source_states(stage.TOPOLOGY, mirrors["floating-loop"], tech, devs, d.bias, vdd)
    _, ok, sens, op = rest_point(stage, devs, d.bias, vdd, sources=src)
    assert ok.all()
    iq = op["mn_out"][0][0]
    rel = {name: sens[name][0][0] / iq for name in ("i_n", "i_p", "i_ctl_top", "i_ctl_bot")}
    assert rel["i_n"] + rel["i_p"] == pytest.approx(2.0, rel=0.02)
    assert rel["i_ctl_top"] + rel["i_ctl_bot"] == pytest.approx(-1.0, rel=0.02)
    assert abs(rel["i_ctl_top"]) < 1e-9

    # The same exponents from the solves themselves, central differences in ln ib.
    h = 1e-3

    def ln_iq(**kw):
        return math.log(evaluate(weak_inversion_design(**kw), tech, cond, targets).summary["iq_a"][0])

    assert (ln_iq(scale_n=1 + h) - ln_iq(scale_n=1 - h)) / (math.log(1 + h) - math.log(1 - h)) == \
        pytest.approx(2.0, rel=0.02)
    assert (ln_iq(scale_ctl=1 + h) - ln_iq(scale_ctl=1 - h)) / (math.log(1 + h) - math.log(1 - h)) == \
        pytest.approx(-1.0, rel=0.02)


def test_supply_sensitivity_with_finite_r_out_against_hand_derivation():
    # Hand derivation (square law, no length modulation, NMOS = PMOS constants, equal output
    # devices): equal currents give gn - VT = VDD - gp - VT, so gn + gp = VDD. KCL at gn:
    # (gp - gn) / R = i_bot = I0 + (gn - v_ref) / r (the bottom mirror, V_across = V(gn) - 0).
    # Then gn = (VDD - R I0 + R v_ref / r) / (2 + R / r) and Iq = beta / 2 (gn - VT)^2.
    # The top mirror only changes the drive current at rest (the amplifier drives gp).
    vt, kp, w, l = 0.5, 100e-6, 40.0, 1.0
    i0, r_bias, r_out, v_ref = 4e-6, 100e3, 2e6, 0.3
    tech = make_tech(ModelKind.SQUARE_LAW, mos_tech(vt0=vt, kp=kp))
    d = make_design("fixed-bias", {"mn_out": (w, l), "mp_out": (w, l)}, {"ib": i0, "r_bias": r_bias})
    mirrors = {"fixed-bias": {"ib_top": Mirror(sigma_pct=1.0, r_out=5e6),
                              "ib_bot": Mirror(sigma_pct=1.0, r_out=r_out, v_ref=v_ref)}}
    cond = at_one_point(1.8, 1.6, 2.0)
    res = evaluate(d, tech, cond, Targets(i_load=1e-9, c_load=1e-12, mirrors=mirrors))
    beta = kp * w / l

    def iq(vdd):
        gn = (vdd - r_bias * i0 + r_bias * v_ref / r_out) / (2.0 + r_bias / r_out)
        return 0.5 * beta * (gn - vt) ** 2

    def iq_ideal(vdd):  # r_out infinite: gn = (VDD - R I0) / 2
        return 0.5 * beta * ((vdd - r_bias * i0) / 2.0 - vt) ** 2

    hand = 100.0 * (iq(2.0) - iq(1.6)) / iq(1.8) / 0.4
    ideal = 100.0 * (iq_ideal(2.0) - iq_ideal(1.6)) / iq_ideal(1.8) / 0.4
    assert res.converged.all()
    assert res.summary["iq_a"][0] == pytest.approx(iq(1.8), rel=1e-9)  # exact solve, same equations
    assert res.summary["supply_sens_pct_per_v"][0] == pytest.approx(hand, rel=1e-7)
    assert abs(hand - ideal) > 0.01 * abs(ideal)  # r_out moves it: the check can fail


def test_area_counts_sized_mirrors_output_and_input_device():
    # Hand sum: the stage's W L plus, per sized mirror, its output device and its own 1:1
    # input diode (2 W L); unsized mirrors add nothing; times the layout factor.
    study, design = demo()
    mirrors = {"floating-loop": {"ib_n": Mirror(w=4 * UM, l=2 * UM), "ib_p": Mirror(w=3 * UM, l=1.5 * UM),
                                 "ib_ctl_bot": Mirror(sigma_pct=1.0, r_out=1e7)}}
    targets = dataclasses.replace(study.targets, mirrors=mirrors, layout_factor=1.5)
    res = evaluate(design, study.tech, study.conditions, targets)
    stage_area = sum(float(design.w[r][0] * design.l[r][0]) for r in get_stage("floating-loop").ROLES)
    hand = (stage_area + 2 * 4e-6 * 2e-6 + 2 * 3e-6 * 1.5e-6) * 1.5 * 1e12
    assert res.summary["area_um2"][0] == pytest.approx(hand, rel=1e-12)


def test_mirror_compliance_violation_worded_and_absent_when_met():
    # A mirror needs its VDSsat across it (Gray, Hurst, Lewis, Meyer, 5th ed., Sec. 4.2.2:
    # the output device must stay in saturation). A narrow, long output device has a large
    # VDSsat: the top ib_ctl mirror, with MP_OUT's VSG of about 1 V across it, violates;
    # a wide one does not.
    study, design = demo()
    bad = {"floating-loop": {"ib_ctl_top": Mirror(w=0.3 * UM, l=20 * UM)}}
    res = evaluate(design, study.tech, study.conditions, dataclasses.replace(study.targets, mirrors=bad))
    assert res.margins["mirror_compliance"][0] < 0
    lines = [v for v in res.violations[0] if "ib_ctl_top" in v]
    assert len(lines) == 1
    assert " V across its mirror is below the mirror's compliance voltage " in lines[0]
    assert " at " in lines[0] and " C, " in lines[0]  # the PVT point
    good = {"floating-loop": {"ib_ctl_top": Mirror(w=40 * UM, l=1 * UM)}}
    res = evaluate(design, study.tech, study.conditions, dataclasses.replace(study.targets, mirrors=good))
    assert res.margins["mirror_compliance"][0] > 0
    assert not [v for v in res.violations[0] if "mirror" in v]
    # Unsized mirrors without v_min are not checked, so no margin is added at all.
    plain = {"floating-loop": {"ib_n": Mirror(sigma_pct=1.0, r_out=1e7)}}
    res = evaluate(design, study.tech, study.conditions, dataclasses.replace(study.targets, mirrors=plain))
    assert "mirror_compliance" not in res.margins


def study_with(text: str):
    data = read_toml(STUDY)
    data.update(tomllib.loads(text))
    return study_from_dict(data, STUDY)


def test_study_mirror_tables_read():
    study = study_with('[mirrors.floating-loop]\nib_n = { w = 8, l = 2 }\n'
                       'ib_ctl_bot = { sigma_pct = 0.5, r_out = "20meg", v_ref = 0.6, v_min = "200m" }\n'
                       '[mirrors.follower]\nib_top = { w = "8u", l = "2u", polarity = "p" }\n')
    m = study.targets.mirrors
    assert m["floating-loop"]["ib_n"] == Mirror(w=8e-6, l=2e-6)
    assert m["floating-loop"]["ib_ctl_bot"] == Mirror(sigma_pct=0.5, r_out=20e6, v_ref=0.6, v_min=0.2)
    assert m["follower"]["ib_top"].sized
    assert load_study(STUDY).targets.mirrors == {}


@pytest.mark.parametrize("text, words", [
    ('[mirrors.floating-lop]\nib_n = { w = 8, l = 2 }', ["mirrors.floating-lop", "floating-loop"]),
    ('[mirrors.floating-loop]\nib_ctl = { w = 8, l = 2 }', ["ib_ctl", "ib_ctl_top"]),
    ('[mirrors.floating-loop]\nib_n = { w = 8, l = 2, sigma_pct = 1 }', ["mixes", "sigma_pct"]),
    ('[mirrors.floating-loop]\nib_n = { w = 8, l = 2, polarity = "n" }', ["polarity", "PMOS"]),
    ('[mirrors.floating-loop]\nib_p = { w = 0.01, l = 2 }', ["w = 0.01 um", "minimum"]),
    ('[mirrors.floating-loop]\nib_n = { w = 8 }', ["l"]),
    ('[mirrors.floating-loop]\nib_n = { sigma_pct = -1, r_out = "1meg" }', ["sigma_pct", "0 <="]),
    ('[mirrors.floating-loop]\nib_n = { sigma_pct = 1 }', ["r_out"]),
    ('[mirrors.floating-loop]\nib_n = { sigma_pct = 1, r_out = 0 }', ["r_out", "> 0 ohm"]),
    ('[mirrors.floating-loop]\nib_n = { sigma_pct = 1, r_out = "1meg", v_ref = -1 }', ["v_ref", ">= 0 V"]),
    ('[mirrors.floating-loop]\nib_n = 5', ["ib_n", "not a table"]),
])
def test_bad_mirror_tables_are_clear_errors(text, words):
    with pytest.raises(InputError) as err:
        study_with(text)
    msg = str(err.value)
    assert "sensor-buffer.toml" in msg
    for word in words:
        assert word in msg, msg


def test_search_constrains_mirror_compliance_for_every_architecture(tmp_path):
    # One architecture with sized mirrors, one without: both searches carry the same
    # constraint set (the other's margin is infinite), and front.csv and run.json name it.
    from optimise.search.runner import optimise_study
    text = STUDY.read_text().replace('technology = "tech/', f'technology = "{ROOT}/studies/tech/')
    text += '\n[mirrors.floating-loop]\nib_n = { w = 4, l = 2 }\nib_ctl_bot = { sigma_pct = 1, r_out = "10meg" }\n'
    study = tmp_path / "s.toml"
    study.write_text(text)
    out = tmp_path / "run"
    with (tmp_path / "log.txt").open("w") as stream:
        assert optimise_study(study, out, population=8, generations=1, stream=stream) == 0
    record = (out / "run.json").read_text()
    assert '"mirror_compliance"' in record
    assert "margin_mirror_compliance" in (out / "front.csv").read_text().splitlines()[0]


def test_mirror_output_resistance_loads_the_amplifiers_nodes():
    # The demo describes an amplifier: its small-signal model must see each mirror's output
    # conductance 1 / r_out where the source feeds a node. With 100 Mohm sources the rest
    # point moves little (Iq +1.5 %, as measured), but the high-resistance nodes of the bias
    # loop lose gain, so the dominant pole rises by about a fifth (30.6 -> 37.1 Hz measured);
    # without the conductances in the matrices it would move with Iq alone.
    study, design = demo()
    keys = source_keys(get_stage("floating-loop").TOPOLOGY).values()
    lossy = {"floating-loop": {k: Mirror(sigma_pct=0.0, r_out=1e8) for k in keys}}
    ideal = evaluate(design, study.tech, study.conditions, study.targets)
    real = evaluate(design, study.tech, study.conditions, dataclasses.replace(study.targets, mirrors=lossy))
    assert real.pvt["iq_a"][0, 0] / ideal.pvt["iq_a"][0, 0] == pytest.approx(1.0, abs=0.03)
    assert real.pvt["p1_hz"][0, 0] / ideal.pvt["p1_hz"][0, 0] > 1.1


def test_monte_carlo_draws_of_a_percent_mirror_have_its_sigma():
    # An unsized mirror is a normal deviation of its current with the study's percent
    # sigma: the draws' standard deviation is sigma_pct / 100. 200000 draws: the sample
    # standard deviation's relative error is 1 / sqrt(2 N) = 0.16 % (normal theory), so
    # 0.6 % is nearly four of them, and a 5 % wrong scale cannot pass.
    from models.circuit.mirrors import mirror_deviations

    topo = get_stage("follower").TOPOLOGY
    mirrors = {key: Mirror(sigma_pct=1.5, r_out=1e7) for key in source_keys(topo).values()}
    draws = mirror_deviations(topo, mirrors, None, 200_000, np.random.default_rng(4))
    assert set(draws) == {src.name for src in topo.sources}
    for name, d in draws.items():
        assert np.std(d) == pytest.approx(0.015, rel=6e-3), name
        assert abs(np.mean(d)) < 4 * 0.015 / math.sqrt(len(d))  # unbiased, within four standard errors


def test_rest_point_with_mirrors_is_the_same_with_and_without_sensitivities():
    # Mirrors with an output resistance: the stage's fast solve takes their currents at a
    # guess, the nodal Newton finishes the rest point. Asking for the Iq sensitivities must
    # not change that point or the devices' currents there (the two paths share the
    # Newton; rounding aside, 1e-12).
    tech = make_tech(ModelKind.EKV)
    mirrors = {k: Mirror(sigma_pct=1.0, r_out=2e6) for k in FLOAT_KEYS}
    stage = get_stage("floating-loop")
    d = weak_inversion_design()
    devs = devices_at(stage, d, tech, corner_shifts(tech, [Corner.TT]), np.array([T_TEST]), np.array([0]))
    vdd = np.array([3.3])
    src = source_states(stage.TOPOLOGY, mirrors, tech, devs, d.bias, vdd)
    n1, ok1, _, op1 = rest_point(stage, devs, d.bias, vdd, sources=src)
    n2, ok2, sens, op2 = rest_point(stage, devs, d.bias, vdd, sensitivity=False, sources=src)
    assert ok1.all() and ok2.all() and sens is None
    for name in n1:
        assert n2[name] == pytest.approx(n1[name], rel=1e-12)
    for role in stage.ROLES:
        assert op2[role][0] == pytest.approx(op1[role][0], rel=1e-12)
