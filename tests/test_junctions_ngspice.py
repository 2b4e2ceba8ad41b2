"""Source and drain junction capacitances: the depletion formula of `models.devices.mos`
against ngspice's level 1 on the same constants, and the stage inside its amplifier with
junctions against ngspice's AC analysis of the netlisted bench.

Both sides run the same equations (SPICE level 1: CJ, MJ, CJSW, MJSW, PB with FC = 0.5,
over the AD/AS/PD/PS the netlists write), so the residuals are the simulator's own.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from models.devices.mos import junction_capacitance, junctions
from models.devices.tech import Corner, Polarity
from models.evaluate import evaluate
from models.stages import get_stage
from optimise.spice import acbench, ngspice
from optimise.spice import testbench as tb
from test_amplifier_ngspice import COND, STUDY, TARGETS, T, VDD
from test_stages_ngspice import TECH, design

# Invented junction constants of the order of a 0.35-0.5 um process (demo only, no source).
JUNCTIONS = {"cj": 1.2e-3, "mj": 0.45, "pb": 0.85, "cjsw": 3.5e-10, "mjsw": 0.3, "pbsw": 0.85}


def with_junctions(tech, extension=2e-6):
    return dataclasses.replace(tech, nmos=dataclasses.replace(tech.nmos, **JUNCTIONS),
                               pmos=dataclasses.replace(tech.pmos, **JUNCTIONS), diffusion_extension=extension)


def test_depletion_formula_limits():
    # Textbook limits of the step-graded junction (Antognetti and Massobrio, ch. 1, from
    # memory): c0 at zero bias, c0 / sqrt(2) at a reverse bias equal to PB with m = 1/2,
    # and the tangent continuation is continuous in value and slope at FC PB.
    assert junction_capacitance(1e-15, 0.5, 0.8, 0.0) == pytest.approx(1e-15, rel=1e-15)
    assert junction_capacitance(1e-15, 0.5, 0.8, 0.8) == pytest.approx(1e-15 / np.sqrt(2.0), rel=1e-15)
    v = -0.5 * 0.8  # forward bias FC PB
    h = 1e-7
    below, at, above = (float(junction_capacitance(1e-15, 0.5, 0.8, v + d)) for d in (h, 0.0, -h))
    assert below == pytest.approx(at, rel=1e-6) and above == pytest.approx(at, rel=1e-6)
    # Slopes either side agree to the finite difference's error (h / PB, about 1e-7).
    assert (at - below) / h == pytest.approx((above - at) / h, rel=1e-5)


@pytest.mark.ngspice
def test_junctions_against_ngspice_level1():
    # ngspice's level 1 reports its junction capacitances only in AC and transient work, so
    # each bias point is its own device in cut-off (VG = 0, VTO = 3 V: cut off even with the
    # drain forward biased and acting as the source; no overlap: the drain sees
    # its junction alone) with its own drain source carrying the AC volt; the drain current
    # over omega is the bulk-drain capacitance, from 0.6 V forward to 3 V reverse bias.
    mt = dataclasses.replace(TECH.nmos, **JUNCTIONS)
    tech = dataclasses.replace(TECH, nmos=mt, diffusion_extension=2e-6)
    w, f = 10e-6, 1e3
    area, perimeter = (float(x) for x in tech.diffusion(Polarity.N, w))
    v = np.linspace(-0.6, 3.0, 19)
    lines = ["junction check",
             f".model mn nmos (level=1 vto=3 kp=1e-4 cj={mt.cj!r} mj={mt.mj!r} cjsw={mt.cjsw!r} "
             f"mjsw={mt.mjsw!r} pb={mt.pb!r} tox=2e-8)"]
    for k, vk in enumerate(v):
        lines += [f"VD{k} d{k} 0 dc {float(vk)!r} ac 1",
                  f"M{k} d{k} 0 0 0 mn w={w!r} l=1e-6 ad={area!r} as={area!r} pd={perimeter!r} ps={perimeter!r}"]
    res = ngspice.run("\n".join(lines + [f".ac lin 1 {f!r} {f!r}", ".end"]))
    sim = np.array([abs(float(np.imag(res[f"i(vd{k})"][0]))) / (2 * np.pi * f) for k in range(len(v))])
    model = junctions(mt, area, perimeter, v)
    # The same closed form on both sides: agreement to the AC solution's rounding.
    np.testing.assert_allclose(model, sim, rtol=1e-7)
    assert sim[0] > 1.5 * sim[-1]  # the sweep spans forward to reverse bias


def test_diffusion_geometry_by_hand():
    # A 10 um wide device with a 2 um extension: area 10 x 2 um^2, perimeter 2 (10 + 2) um,
    # the rectangle the netlists write as AD/PD (SPICE's PD counts the gate edge).
    tech = dataclasses.replace(TECH, diffusion_extension=2e-6)
    area, perimeter = tech.diffusion(Polarity.N, 10e-6)
    assert (float(area), float(perimeter)) == pytest.approx((20e-12, 24e-6), rel=1e-12)


@pytest.mark.ngspice
def test_junction_defaults_are_ngspice_level1_defaults():
    # Only CJ and CJSW given, on both sides: the technology's defaults of MJ, MJSW and PB
    # must be the ones ngspice's level 1 applies, so that a file giving cj alone means what
    # the netlisted card means (ngspice's MOS1 defaults: MJ = MJSW = 0.5, PB = 0.8 V).
    mt = dataclasses.replace(TECH.nmos, cj=1e-3, cjsw=3e-10)
    area, perimeter, f = 20e-12, 24e-6, 1e3
    v = [float(x) for x in np.linspace(0.0, 3.0, 7)]
    lines = ["junction defaults", ".model mn nmos (level=1 vto=3 kp=1e-4 cj=1e-3 cjsw=3e-10 tox=2e-8)"]
    for k, vk in enumerate(v):
        lines += [f"VD{k} d{k} 0 dc {vk!r} ac 1",
                  f"M{k} d{k} 0 0 0 mn w=1e-5 l=1e-6 ad={area!r} as={area!r} pd={perimeter!r} ps={perimeter!r}"]
    res = ngspice.run("\n".join(lines + [f".ac lin 1 {f!r} {f!r}", ".end"]))
    sim = np.array([abs(float(np.imag(res[f"i(vd{k})"][0]))) / (2 * np.pi * f) for k in range(len(v))])
    # The grading exponents move the 3 V value by several percent: 1e-7 tells them apart.
    np.testing.assert_allclose(junctions(mt, area, perimeter, np.array(v)), sim, rtol=1e-7)


@pytest.fixture(scope="module")
def junction_study():
    tech = with_junctions(TECH)
    # A small load and a light compensation (10 MHz, 0.3 pF), so that the junctions on the
    # output and the gates move the phase margin by degrees (2 to 6 on these designs).
    amp = dataclasses.replace(TARGETS.amplifier, ugf=10e6, cc=0.3e-12)
    targets = dataclasses.replace(TARGETS, c_load=1e-12, amplifier=amp)
    return dataclasses.replace(STUDY, tech=tech, targets=targets)


CASES = ["fl-matched", "fl-mixed-lengths", "fb-demo"]


@pytest.mark.ngspice
@pytest.mark.parametrize("name", CASES)
def test_ac_bench_with_junctions_against_ngspice(junction_study, name):
    d = design(name)
    study = junction_study
    r = evaluate(d, study.tech, COND, study.targets)
    bare = evaluate(d, dataclasses.replace(study.tech, nmos=dataclasses.replace(study.tech.nmos, cj=0.0, cjsw=0.0),
                                           pmos=dataclasses.replace(study.tech.pmos, cj=0.0, cjsw=0.0)),
                    COND, study.targets)
    sim = acbench.simulate_ac(d, [0], study, tb.ModelSource(), Corner.TT, T)[(0, VDD)]
    pm, ugf = float(r.pvt["phase_margin_deg"][0, 0]), float(r.pvt["ugf_hz"][0, 0])
    # The same equations on both sides: without junctions the two agree to about 1e-2
    # degree and 1e-4 (tests/test_amplifier_ngspice.py); 0.2 degree and 0.5 % leave room
    # for the sampled crossing (40 points per decade) and nothing for a missing junction.
    assert sim["phase_margin_deg"] == pytest.approx(pm, abs=0.2)
    assert sim["ugf_hz"] == pytest.approx(ugf, rel=5e-3)
    # The check can fail: leaving the junctions out moves the model by more than that.
    moved = abs(float(bare.pvt["phase_margin_deg"][0, 0]) - pm)
    assert moved > 1.0, moved



def test_output_pole_without_amplifier_counts_the_output_junctions(junction_study):
    # No amplifier: fp2 = gm / (2 pi (C_load + C_gates + C_junctions)) (the pole-splitting
    # limit, Gray, Hurst, Lewis, Meyer, 5th ed., sec. 9.4). Hand sum: the two output drains'
    # junctions at VDD/2 of reverse bias, from `junctions` on the diffusion geometry.
    d = design("fb-demo")
    study = junction_study
    targets = dataclasses.replace(study.targets, amplifier=None)
    bare_tech = dataclasses.replace(study.tech, nmos=dataclasses.replace(study.tech.nmos, cj=0.0, cjsw=0.0),
                                    pmos=dataclasses.replace(study.tech.pmos, cj=0.0, cjsw=0.0))
    r_j, r_bare = evaluate(d, study.tech, COND, targets), evaluate(d, bare_tech, COND, targets)
    mod = get_stage(d.architecture)
    c_j = 0.0
    for role in (mod.PULL_UP, mod.PULL_DOWN):
        spec = mod.TOPOLOGY.spec(role)
        area, perimeter = study.tech.diffusion(spec.polarity, float(d.w[role][0]))
        c_j += float(junctions(study.tech.mos(spec.polarity), area, perimeter, 0.5 * VDD))
    assert c_j > 0.02 * targets.c_load  # the junctions are worth checking here
    # gm and the gates are the same on both sides: the poles' ratio is that of the totals.
    c_bare = targets.c_load + float(r_bare.pvt["c_drive_f"][0, 0])
    ratio = float(r_bare.pvt["fp2_hz"][0, 0]) / float(r_j.pvt["fp2_hz"][0, 0])
    assert ratio == pytest.approx((c_bare + c_j) / c_bare, rel=1e-12)
