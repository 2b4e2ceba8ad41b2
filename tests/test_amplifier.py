"""The stage inside its amplifier: the small-signal nodal model against the textbook's
two-stage Miller formulas, its limits, and the study's [amplifier] table.

Sources: P. R. Gray, P. J. Hurst, S. H. Lewis, R. G. Meyer, Analysis and Design of Analog
Integrated Circuits, 5th ed., Wiley 2009, sec. 9.4 (frequency response of the two-stage op
amp, Miller compensation and pole splitting; section number from memory), cited [GHLM].
"""
from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

from models.amplifier import response
from models.amplifier.inside import model as amplifier_model
from models.devices.tech import Corner
from models.evaluate import Conditions, Targets, corner_shifts, devices_at, evaluate, rest_point
from models.records import Amplifier
from models.stages import get_stage
from optimise.files.errors import InputError
from optimise.files.study import load_design, load_study, study_from_dict
from optimise.files.tables import read_toml
from optimise.files.techfile import load_tech

ROOT = Path(__file__).resolve().parents[1]
TECH = load_tech(ROOT / "studies" / "tech" / "ah02-level1.toml")
T = 300.15
UM = 1e-6


def _fixed_bias(vdd=3.0):
    """A fixed-bias pair on ah02 whose gates are tied by 100 ohm (1 V across, ib = 10 mA):
    at AC the two gates are one node, so the stage is the textbook's second stage."""
    from models.evaluate import Design
    d = Design("fixed-bias", {"mn_out": TECH.snap(np.array([60 * UM])), "mp_out": TECH.snap(np.array([180 * UM]))},
               {"mn_out": TECH.snap(np.array([0.8 * UM])), "mp_out": TECH.snap(np.array([0.8 * UM]))},
               {"ib": np.array([10e-3]), "r_bias": np.array([100.0])})
    return d, vdd


def _model(design, amp, vdd, c_load=10e-12, tech=TECH):
    stage = get_stage(design.architecture)
    idx = np.zeros(1, dtype=int)
    devs = devices_at(stage, design, tech, corner_shifts(tech, [Corner.TT]), np.array([T]), idx)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    nodes, ok, _, op = rest_point(stage, devs, bias, np.array([vdd]), sensitivity=False)
    assert ok.all()
    g, c, i_d, i_o, caps = amplifier_model(stage, devs, bias, tech, op, nodes, np.array([vdd]), c_load, amp)
    return g, c, i_d, i_o, caps, op


def _two_node(op, caps, amp, c_load):
    """The textbook's two-node values of the fixed-bias pair: gm2, R2, C1 (gates), C2
    (output), the Miller capacitance (Cc plus both gate-drain capacitances)."""
    gm2 = op["mn_out"][1] - op["mp_out"][1]
    gds = op["mn_out"][2] - op["mp_out"][2]
    c1 = amp.c1 + sum(caps[r][0] + caps[r][2] for r in ("mn_out", "mp_out"))
    cc = amp.cc + sum(caps[r][1] for r in ("mn_out", "mp_out"))
    c2 = c_load + sum(caps[r][3] for r in ("mn_out", "mp_out"))
    return float(gm2[0]), 1.0 / float(gds[0]), float(np.ravel(c1)[0]), float(np.ravel(c2)[0]), float(np.ravel(cc)[0])


def test_pole_splitting_against_the_textbook_where_p2_is_far_above_p1():
    design, vdd = _fixed_bias()
    amp = Amplifier(ugf=1e6, cc=3e-12, r1=10e6, c1=0.2e-12, i1=5e-6)
    g, c, i_d, i_o, caps, op = _model(design, amp, vdd)
    mu_p, mu_z, _, _, _ = response.poles_zeros(g, c, i_d, i_o)
    p = np.sort(np.abs(response.to_rad(mu_p[0])))
    z = response.to_rad(mu_z[0])
    gm2, r2, c1, c2, cc = _two_node(op, caps, amp, 10e-12)
    # [GHLM] sec. 9.4: p1 = 1 / (gm2 R1 R2 Cc), p2 = gm2 Cc / (C1 C2 + Cc (C1 + C2)),
    # right-half-plane zero z = gm2 / Cc (Cc here with the gate-drain capacitances it adds to).
    p1_book = 1.0 / (gm2 * amp.r1 * r2 * cc)
    p2_book = gm2 * cc / (c1 * c2 + cc * (c1 + c2))
    z_book = gm2 / cc
    assert p[1] / p[0] > 1e4  # where the approximations hold: p2 >> p1
    # 2 %: the approximations drop terms of order p1/p2 (1e-4 here) and the 100-ohm gate
    # link adds a third pole near 1e10 rad/s, a few 1e-3 above p2.
    assert p[0] == pytest.approx(p1_book, rel=0.02)
    assert p[1] == pytest.approx(p2_book, rel=0.02)
    rhp = z[np.isfinite(z) & (z.real > 0)]
    assert np.min(np.abs(rhp)) == pytest.approx(z_book, rel=0.02)


def test_exact_nodal_poles_where_the_approximations_fail():
    design, vdd = _fixed_bias()
    # A low R1 and a small Cc: p1 and p2 are within a decade, the pole-splitting
    # approximation is off by tens of percent, the two-node quadratic stays exact.
    amp = Amplifier(ugf=1e6, cc=0.05e-12, r1=20e3, c1=2e-12, i1=5e-6, gm1=1e-4)
    g, c, i_d, i_o, caps, op = _model(design, amp, vdd)
    mu_p, _, _, _, _ = response.poles_zeros(g, c, i_d, i_o)
    p = np.sort(np.abs(response.to_rad(mu_p[0])))
    gm2, r2, c1, c2, cc = _two_node(op, caps, amp, 10e-12)
    r1 = amp.r1
    # [GHLM] sec. 9.4, the denominator of the two-node transfer before approximation:
    # D(s) = 1 + s ((C1 + Cc) R1 + (C2 + Cc) R2 + gm2 R1 R2 Cc) + s^2 R1 R2 (C1 C2 + Cc (C1 + C2)).
    b1 = (c1 + cc) * r1 + (c2 + cc) * r2 + gm2 * r1 * r2 * cc
    b2 = r1 * r2 * (c1 * c2 + cc * (c1 + c2))
    exact = np.sort(np.abs(np.roots([b2, b1, 1.0])))
    p2_book = gm2 * cc / (c1 * c2 + cc * (c1 + c2))
    assert p[1] / p[0] < 30
    assert abs(p2_book / exact[1] - 1) > 0.1  # the approximation does not hold here
    # 1 %: only the 100-ohm gate link (a third pole far above) separates the two.
    assert p[0] == pytest.approx(exact[0], rel=0.01)
    assert p[1] == pytest.approx(exact[1], rel=0.01)


def _demo():
    study = load_study(ROOT / "studies" / "sensor-buffer.toml")
    design = load_design(ROOT / "studies" / "sensor-buffer-floating-loop.toml", study.tech)
    return study, design


def _at_typical(study, targets, design):
    cond = Conditions((Corner.TT,), (study.conditions.temps[0],), 3.3, 3.3, 3.3)
    return evaluate(design, study.tech, cond, targets)


def test_huge_compensation_takes_the_phase_margin_to_90_degrees():
    # Common practice: with gm1 fixed, a growing Cc pulls the unity-gain frequency gm1 / Cc
    # down below every non-dominant pole, so the margin tends to the 90 degrees of a
    # single-pole loop. The right-half-plane zero gm2 / Cc falls with Cc too and keeps
    # atan(gm1 / gm2) of it (hand calculation from the two formulas): gm1 = 1 uS, far
    # below gm2 (about 1 mS), makes that 0.06 degree.
    study, design = _demo()
    pms = []
    for cc in (1e-12, 10e-12, 100e-12, 1e-9):
        amp = dataclasses.replace(study.targets.amplifier, cc=cc, gm1=1e-6)
        r = _at_typical(study, dataclasses.replace(study.targets, amplifier=amp), design)
        pms.append(float(r.pvt["phase_margin_deg"][0, 0]))
    assert all(b > a for a, b in zip(pms, pms[1:]))
    # Within 0.5 degree at 1 nF: the unity gain (about 160 Hz) is over 1000x below the
    # output pole and the zero, which then cost less than 0.1 degree.
    assert 89.5 < pms[-1] <= 90.0


def test_without_compensation_the_stage_is_unstable_at_unity_gain():
    # Common practice: an uncompensated two-stage amplifier has two or more poles near its
    # crossing and oscillates as a follower.
    study, design = _demo()
    # gm1 = 300 uS: a first stage for about 1.5 MHz with a 30 pF Cc.
    amp = dataclasses.replace(study.targets.amplifier, cc=0.0, gm1=3e-4)
    targets = dataclasses.replace(study.targets, amplifier=amp)
    r = _at_typical(study, targets, design)
    assert r.pvt["phase_margin_deg"][0, 0] < 0
    stage = get_stage("floating-loop")
    idx = np.zeros(1, dtype=int)
    devs = devices_at(stage, design, study.tech, corner_shifts(study.tech, [Corner.TT]),
                      np.array([study.conditions.temps[0]]), idx)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    nodes, _, _, op = rest_point(stage, devs, bias, np.array([3.3]), sensitivity=False)
    g, c, i_d, i_o, _ = amplifier_model(stage, devs, bias, study.tech, op, nodes, np.array([3.3]), 50e-12, amp)
    _, _, h0, _, _ = response.poles_zeros(g, c, i_d, i_o)
    closed = response.closed_loop_poles(g, c, amp.beta * amp.gm1 * np.sign(h0), i_d, i_o)
    assert np.any(closed[np.isfinite(closed)].real > 0)
    # The same loop compensated with 30 pF is stable: every closed-loop pole in the left half-plane.
    amp3 = dataclasses.replace(amp, cc=30e-12)
    g, c, i_d, i_o, _ = amplifier_model(stage, devs, bias, study.tech, op, nodes, np.array([3.3]), 50e-12, amp3)
    closed = response.closed_loop_poles(g, c, amp3.beta * amp3.gm1 * np.sign(h0), i_d, i_o)
    assert np.all(closed[np.isfinite(closed)].real < 0)


def test_without_an_amplifier_fp2_includes_the_gate_capacitance_and_no_new_columns():
    study, design = _demo()
    off = dataclasses.replace(study.targets, amplifier=None, phase_margin_min=0.0, slew_min=0.0)
    r = _at_typical(study, off, design)
    assert "phase_margin_deg" not in r.pvt and "phase_margin" not in r.margins
    # [GHLM] sec. 9.4, the pole-splitting limit Cc >> C1, C2: p2 = gm2 / (C1 + C2).
    stage = get_stage("floating-loop")
    idx = np.zeros(1, dtype=int)
    devs = devices_at(stage, design, study.tech, corner_shifts(study.tech, [Corner.TT]),
                      np.array([study.conditions.temps[0]]), idx)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    _, _, _, op = rest_point(stage, devs, bias, np.array([3.3]), sensitivity=False)
    gm = stage.gm_output(op)[0]
    expect = gm / (2 * np.pi * (off.c_load + r.pvt["c_drive_f"][0, 0]))
    assert r.pvt["fp2_hz"][0, 0] == pytest.approx(expect, rel=1e-12)
    assert r.pvt["fp2_hz"][0, 0] < gm / (2 * np.pi * off.c_load)


def test_slew_is_the_smaller_of_the_miller_and_the_output_limit():
    study, design = _demo()
    r = _at_typical(study, study.targets, design)
    amp = study.targets.amplifier
    i_peak = min(r.pvt["iout_source_a"][0, 0], r.pvt["iout_sink_a"][0, 0])
    # [GHLM] sec. 9.6 (from memory): SR = I / Cc; the output limit I_peak / (C_load + Cc).
    expect = min(amp.i1 / amp.cc, i_peak / (study.targets.c_load + amp.cc))
    assert r.pvt["slew_v_per_s"][0, 0] == pytest.approx(expect, rel=1e-12)
    assert r.pvt["gate_time_s"][0, 0] > 0


def test_amplifier_table_is_checked(tmp_path):
    path = ROOT / "studies" / "sensor-buffer.toml"
    data = read_toml(path)
    study_from_dict(data, path)  # the shipped table is valid
    for key, value, words in (("compensation", "-3p", "compensation"), ("r_out", 0, "r_out"),
                              ("current", "big", "current"), ("feedback", 2.0, "feedback")):
        bad = dict(data, amplifier=dict(data["amplifier"], **{key: value}))
        with pytest.raises(InputError, match=words):
            study_from_dict(bad, path)
    bad = dict(data, amplifier=dict(data["amplifier"], colour="red"))
    with pytest.raises(InputError, match="colour"):
        study_from_dict(bad, path)
    no_amp = {k: v for k, v in data.items() if k != "amplifier"}
    with pytest.raises(InputError, match="phase_margin_min needs an \\[amplifier\\]"):
        study_from_dict(no_amp, path)
    targets = {k: v for k, v in data["targets"].items() if k not in ("phase_margin_min", "slew_min")}
    s = study_from_dict(dict(no_amp, targets=targets), path)
    assert s.targets.amplifier is None


def test_targets_refuse_amplifier_limits_without_an_amplifier():
    with pytest.raises(ValueError, match="needs an amplifier"):
        Targets(i_load=1e-3, c_load=1e-12, phase_margin_min=60.0)


def test_evaluate_json_carries_the_amplifier(capsys):
    import json

    from optimise.cli import main

    assert main(["evaluate", str(ROOT / "studies" / "sensor-buffer.toml"), "--design",
                 str(ROOT / "studies" / "sensor-buffer-floating-loop.toml"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    amp = out["amplifier"]
    assert amp["unity_gain_hz"] == 1e6 and amp["compensation_f"] == 3e-12
    # gm1 = 2 pi ugf Cc / beta (Amplifier's definition).
    assert amp["transconductance_s"] == pytest.approx(2 * np.pi * 1e6 * 3e-12)
    for name in ("ugf_hz", "phase_margin_deg", "p1_hz", "fint_hz", "fz_hz", "slew_v_per_s", "gate_time_s"):
        assert name in out["summary"] and name in out["pvt"][0]
    assert out["summary"]["phase_margin_deg"] == min(r["phase_margin_deg"] for r in out["pvt"])
    assert out["feasible"]  # the hand-sized design meets 60 degrees at every PVT point


def test_evaluate_says_when_no_amplifier_is_described(tmp_path, capsys):
    from optimise.cli import main
    from optimise.sweep.grid import dumps

    data = read_toml(ROOT / "studies" / "sensor-buffer.toml")
    data = {k: v for k, v in data.items() if k != "amplifier"}
    data["targets"] = {k: v for k, v in data["targets"].items() if k not in ("phase_margin_min", "slew_min")}
    data["technology"] = str(ROOT / "studies" / "tech" / "demo350-invented.toml")
    path = tmp_path / "no-amp.toml"
    path.write_text(dumps(data))
    assert main(["evaluate", str(path), "--design", str(ROOT / "studies" / "sensor-buffer-floating-loop.toml")]) == 0
    text = capsys.readouterr().out
    assert "amplifier: none described" in text and "phase_margin_deg" not in text


def test_pick_reads_the_new_columns_in_their_units():
    from optimise.review.pick import column_unit

    assert column_unit("phase_margin_deg") == ("deg", False)
    assert column_unit("slew_v_per_s") == ("V/s", True)
    assert column_unit("gate_time_s") == ("s", True)


def test_sweep_may_vary_the_amplifier(tmp_path):
    from optimise.sweep.grid import load_grid

    grid = tmp_path / "grid.toml"
    grid.write_text(f'base = "{(ROOT / "studies" / "sensor-buffer.toml").as_posix()}"\n[axes]\n'
                    '"amplifier.unity_gain" = ["1meg", "3meg"]\n"targets.phase_margin_min" = [45, 60]\n')
    g = load_grid(grid)
    assert len(g.cells) == 4
    for cell in g.cells:
        path = tmp_path / f"{cell.name}.toml"
        path.write_text(cell.toml)
        s = load_study(path)
        assert s.targets.amplifier.ugf in (1e6, 3e6) and s.targets.phase_margin_min in (45, 60)


def test_ekv_capacitances_reach_their_textbook_limits():
    from models.devices import ekv
    from models.devices.conditions import at_conditions
    from models.devices.tech import ModelKind, Polarity

    tech = load_tech(ROOT / "studies" / "tech" / "demo350-invented.toml")
    mt = tech.nmos
    m = at_conditions(mt, Polarity.N, ModelKind.EKV, tech.tnom, tech.tnom)
    w, l = 10e-6, 1e-6
    cwl, cov = mt.cox * w * l, mt.cov * w
    # Enz and Vittoz 2006, ch. 4 (from memory): strong-inversion saturation cgs = 2/3 Cox W L,
    # cgd = 0; weak inversion cgb = (n - 1)/n Cox W L; triode at VDS = 0 cgs = cgd = 1/2 Cox W L.
    # Tolerances: the limits are approached as 1/sqrt(IC) (strong) and IC (weak).
    cgs, cgd, cgb, cdb, csb = ekv.capacitances(m, mt, w, l, 3.0, 3.3, 0.0)  # IC about 1e3
    assert (cgs - cov) / cwl == pytest.approx(2 / 3, rel=0.02) and (cgd - cov) / cwl < 1e-6
    cgs, cgd, cgb, _, _ = ekv.capacitances(m, mt, w, l, 0.2, 1.0, 0.0)  # IC about 1e-4
    assert cgb / cwl == pytest.approx((m.n - 1) / m.n, rel=0.01) and (cgs - cov) / cwl < 0.01
    cgs, cgd, _, _, _ = ekv.capacitances(m, mt, w, l, 3.0, 0.0, 0.0)
    assert (cgs - cov) / cwl == pytest.approx(0.5, rel=0.02) and cgs == pytest.approx(cgd, rel=1e-12)
    assert cdb == 0 and csb == 0  # no junction data in the technology file


def test_square_law_capacitances_follow_meyer():
    from models.devices import square_law
    from models.devices.conditions import at_conditions
    from models.devices.tech import ModelKind, Polarity

    mt = TECH.nmos
    m = at_conditions(mt, Polarity.N, ModelKind.SQUARE_LAW, TECH.tnom, TECH.tnom)
    w, l = 10e-6, 1e-6
    cwl, cov = mt.cox * w * l, mt.cov * w
    # Meyer, RCA Review 32, 1971: saturation cgs = 2/3 Cox W L, cgd = 0 (plus overlap);
    # VDS = 0 in strong inversion: cgs = cgd = 1/2 Cox W L; accumulation: cgb = Cox W L.
    cgs, cgd, cgb, _, _ = square_law.capacitances(m, mt, w, l, 2.0, 3.0, 0.0)
    assert cgs == pytest.approx(2 / 3 * cwl + cov, rel=1e-12) and cgd == pytest.approx(cov) and cgb == 0
    cgs, cgd, _, _, _ = square_law.capacitances(m, mt, w, l, 2.0, 0.0, 0.0)
    assert cgs - cov == pytest.approx(0.5 * cwl, rel=1e-12) and cgd == pytest.approx(cgs, rel=1e-12)
    _, _, cgb, _, _ = square_law.capacitances(m, mt, w, l, -1.0, 1.0, 0.0)
    assert cgb == pytest.approx(cwl, rel=1e-12)
    # Drain and source exchanged: the same device.
    a = square_law.capacitances(m, mt, w, l, 2.0, 0.3, 0.0)
    b = square_law.capacitances(m, mt, w, l, 2.0, 0.0, 0.3)
    assert a[0] == pytest.approx(b[1]) and a[1] == pytest.approx(b[0])


def test_square_law_capacitances_in_depletion_and_triode_by_hand():
    from models.devices import square_law
    from models.devices.conditions import at_conditions
    from models.devices.tech import ModelKind, Polarity

    mt = TECH.nmos
    m = at_conditions(mt, Polarity.N, ModelKind.SQUARE_LAW, TECH.tnom, TECH.tnom)
    w, l = 10e-6, 1e-6
    cwl, cov = mt.cox * w * l, mt.cov * w
    # Meyer (RCA Review 32, 1971) as SPICE level 1 evaluates it. Depletion, VGST = -phi/4:
    # cgs = 2/3 C0 + 4/3 C0 VGST / phi = C0 / 3, cgb = -VGST C0 / phi = C0 / 4, cgd = 0.
    vt = float(np.ravel(square_law.threshold(m, 0.0, 0.0)[0])[0])
    cgs, cgd, cgb, _, _ = square_law.capacitances(m, mt, w, l, vt - m.phi / 4, 2.0, 0.0)
    assert cgs - cov == pytest.approx(cwl / 3, rel=1e-12) and cgb == pytest.approx(cwl / 4, rel=1e-12)
    assert cgd == pytest.approx(cov, rel=1e-12)
    # Triode with the source lifted 0.5 V off the bulk, VGST = 1 V, VDS = 0.5 V (VDSAT = VGST):
    # cgs = 2/3 C0 (1 - (VDSAT - VDS)^2 / (2 VDSAT - VDS)^2) = 2/3 C0 8/9, cgd = 2/3 C0 5/9.
    vs = 0.5
    vt_s = float(np.ravel(square_law.threshold(m, vs, 0.0)[0])[0])
    cgs, cgd, _, _, _ = square_law.capacitances(m, mt, w, l, vs + vt_s + 1.0, vs + 0.5, vs)
    assert cgs - cov == pytest.approx(2 / 3 * cwl * 8 / 9, rel=1e-12)
    assert cgd - cov == pytest.approx(2 / 3 * cwl * 5 / 9, rel=1e-12)


def test_the_search_can_size_the_compensation_capacitor(tmp_path):
    from optimise.cli import main
    from optimise.search.export import design_from_row, read_front
    from optimise.sweep.grid import dumps

    data = read_toml(ROOT / "studies" / "sensor-buffer.toml")
    data["technology"] = str(ROOT / "studies" / "tech" / "demo350-invented.toml")
    data["architectures"] = ["floating-loop"]
    data["bounds"] = {"floating-loop": data["bounds"]["floating-loop"]}
    data["conditions"] = {"temperatures_c": [27], "corners": ["tt", "ss"]}
    data["amplifier"] = dict(data["amplifier"], compensation=["1p", "10p"])
    data["search"] = {"population": 12, "generations": 4}
    path = tmp_path / "cc.toml"
    path.write_text(dumps(data))
    study = load_study(path)
    assert study.targets.amplifier.cc_bounds == (1e-12, 1e-11)
    assert main(["optimise", str(path), "--out", str(tmp_path / "run")]) == 0
    front = read_front(tmp_path / "run" / "front.csv")
    assert len(front) and front["cc_f"].between(1e-12, 1e-11).all()
    row = front.iloc[0]
    design = design_from_row(row)
    res = evaluate(design, study.tech, study.conditions, study.targets)
    # The row's own Cc sets gm1 = 2 pi f_u Cc and the Miller slew I1 / Cc.
    assert res.summary["phase_margin_deg"][0] == pytest.approx(row["phase_margin_deg"], rel=1e-9)
    assert res.summary["slew_v_per_s"][0] <= study.targets.amplifier.i1 / row["cc_f"] * (1 + 1e-12)
    # A design without its own Cc is refused with a clear message.
    with pytest.raises(ValueError, match="needs its own value"):
        evaluate(dataclasses.replace(design, cc=None), study.tech, study.conditions, study.targets)
    # A design file gives it with the compensation key.
    text = 'compensation = "4p"\n' + (ROOT / "studies" / "sensor-buffer-floating-loop.toml").read_text()
    dfile = tmp_path / "d.toml"
    dfile.write_text(text)
    d = load_design(dfile, study.tech)
    assert d.cc[0] == 4e-12


def test_loop_gain_slope_is_the_derivative_of_its_magnitude():
    # response.loop_gain returns d log10|T| / d log10 f beside log10 |T|. Checked against a
    # central finite difference of the returned magnitude (common practice, no source) and,
    # between the dominant and the output pole, against the Bode asymptote: -20 dB a decade,
    # a slope of -1 ([GHLM] sec. 9.4, a single dominant pole below the crossing).
    design, vdd = _fixed_bias()
    amp = Amplifier(ugf=1e6, cc=3e-12, r1=10e6, c1=0.2e-12, i1=5e-6)
    g, c, i_d, i_o, _, _ = _model(design, amp, vdd)
    mu_p, mu_z, h0, _, _ = response.poles_zeros(g, c, i_d, i_o)
    t0 = amp.beta * amp.transconductance * np.abs(h0)
    f = 10.0 ** np.linspace(0.0, 11.0, 45)[None, :]  # 1 Hz to 100 GHz: every pole and the zero
    h = 1e-4  # decades: truncation error ~ h^2 |d3 log|T|| < 1e-7, rounding ~ 1e-16 / h
    logt, _, slope = response.loop_gain(t0, mu_p, mu_z, f)
    up = response.loop_gain(t0, mu_p, mu_z, f * 10.0 ** h)[0]
    down = response.loop_gain(t0, mu_p, mu_z, f * 10.0 ** -h)[0]
    assert slope == pytest.approx((up - down) / (2.0 * h), abs=1e-6)
    p = np.sort(np.abs(response.to_rad(mu_p[0]))) / (2.0 * np.pi)
    f_mid = np.sqrt(p[0] * p[1])  # p2 / p1 > 1e4: both poles and the zero over 100x away
    mid = response.loop_gain(t0, mu_p, mu_z, np.array([[f_mid]]))[2]
    # 1e-2: each pole or zero 100x away adds at most (1/100)^2 / ln(10) to the slope.
    assert float(mid[0, 0]) == pytest.approx(-1.0, abs=1e-2)


GMIN_SPICE = 1e-12  # S: the SPICE default GMIN (ngspice manual, .options GMIN, default 1.0e-12; from memory)


def test_without_length_modulation_gmin_alone_sets_the_output_resistance():
    # Output devices without length modulation (va_per_l = inf: gds = 0 in saturation) and
    # no load resistor leave the output node only the small-signal model's GMIN, which it
    # puts from every node to ground at SPICE's default value (ngspice puts its GMIN across
    # each pn junction instead). The DC gain and the dominant pole are then the textbook's
    # with R2 = 1 / GMIN: the figures a designer reads for ideal devices are those of a
    # 1 Tohm output, finite and fixed.
    no_clm = dataclasses.replace(TECH, nmos=dataclasses.replace(TECH.nmos, va_per_l=math.inf),
                                 pmos=dataclasses.replace(TECH.pmos, va_per_l=math.inf))
    design, vdd = _fixed_bias()
    amp = Amplifier(ugf=1e6, cc=3e-12, r1=10e6, c1=0.2e-12, i1=5e-6)
    g, c, i_d, i_o, caps, op = _model(design, amp, vdd, tech=no_clm)
    gds = op["mn_out"][2] - op["mp_out"][2]
    assert float(gds[0]) == 0.0  # both output devices saturated, no length modulation
    mu_p, _, h0, _, _ = response.poles_zeros(g, c, i_d, i_o)
    gm2 = float((op["mn_out"][1] - op["mp_out"][1])[0])
    c1 = float(np.ravel(amp.c1 + sum(caps[r][0] + caps[r][2] for r in ("mn_out", "mp_out")))[0])
    cc = float(np.ravel(amp.cc + sum(caps[r][1] for r in ("mn_out", "mp_out")))[0])
    c2 = float(np.ravel(10e-12 + sum(caps[r][3] for r in ("mn_out", "mp_out")))[0])
    r1, r2 = amp.r1, 1.0 / GMIN_SPICE
    # [GHLM] sec. 9.4: the second stage's DC gain -gm2 R2 after R1 at the driven gate, and
    # p1 = 1 / b1 with b1 = (C1 + Cc) R1 + (C2 + Cc) R2 + gm2 R1 R2 Cc (p2 / p1 > 1e10 here).
    b1 = (c1 + cc) * r1 + (c2 + cc) * r2 + gm2 * r1 * r2 * cc
    p = np.sort(np.abs(response.to_rad(mu_p[0])))
    # 1e-3: GMIN at the two gate nodes beside 1 / R1 (2e-5), the 100-ohm gate link (1e-9)
    # and the dropped terms of order p1 / p2 are all far below it.
    assert abs(float(h0[0])) == pytest.approx(gm2 * r1 * r2, rel=1e-3)
    assert p[0] == pytest.approx(1.0 / b1, rel=1e-3)
