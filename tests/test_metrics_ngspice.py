"""Supply sensitivity, lowest supply, headroom, peak currents and the output pole of `evaluate`
against ngspice running the same square-law equations (SPICE level 1, Shichman and Hodges,
IEEE JSSC 3(3), 1968) on the same circuit.

Level-1 cards come from `optimise.spice.netlist` (LD = 0, no junction or gate capacitance),
the stage from its topology; only the test bench around it is written here:
- supply sensitivity: Iq at rest at the lowest, nominal and highest supply (three ngspice
  rest points), combined as (Iq(max) - Iq(min)) / Iq(nom) / (max - min);
- headroom and peak currents: the driven gate forced to the model's drive-limit voltage,
  the output swept by a voltage source from VDD/2 to the rail (a DC sweep at full drive);
  the peak is the current at VDD/2, the headroom the distance from the rail at which the
  current has fallen to the load current;
- lowest supply: the stage at supplies 1 % above and 1 % below the reported minimum, with
  ngspice's own saturation voltage of the device the report names (``vdsat`` beside ``vds``);
- output pole: ``.ac`` with a 1 A test current into the output and C_load to ground; the
  output pair's gates follow the output in AC (the feedback that gm_out / (2 pi C_load)
  assumes) or, for the followers, their input is held. The pole is f Re(Y) / Im(Y) of the
  output admittance Y = 1 / V(out).

Process: [AH02] = P. E. Allen, D. R. Holberg, CMOS Analog Circuit Design, 2nd ed., Oxford
University Press, 2002, Table 3.1-2 (studies/tech/ah02-level1.toml), and the same constants
without length modulation where a check needs Iq independent of the supply or the output
conductance to be the transconductance alone. ngspice settings: reltol 1e-7, abstol 1e-15,
vntol 1e-9 (as the netlist writer uses).
"""
from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from stage_helpers import NO_CLM, STACKED, floating_sizes, make_design, mos_tech

from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner, ModelKind, Tech
from models.evaluate import Conditions, Targets, corner_shifts, devices_at, evaluate, rest_point
from models.stages import get_stage
from optimise.files.techfile import load_tech
from optimise.spice import netlist, ngspice
from optimise.spice import testbench as tb

pytestmark = pytest.mark.ngspice

AH02 = load_tech(Path(__file__).resolve().parents[1] / "studies" / "tech" / "ah02-level1.toml")
# [AH02] Table 3.1-2 without length modulation (lambda = 0 in the cards).
AH02_NO_CLM = Tech(name="ah02-no-clm", model=ModelKind.SQUARE_LAW,
                   nmos=mos_tech(vt0=0.7, kp=110e-6, gamma=0.4, phi=0.7, va_per_l=NO_CLM),
                   pmos=mos_tech(vt0=0.7, kp=50e-6, gamma=0.57, phi=0.8, va_per_l=NO_CLM), grid=1e-9, tnom=AH02.tnom)
C_LOAD = 10e-12  # F
TARGETS = Targets(i_load=100e-6, c_load=C_LOAD, vcomp=0.2)
SUPPLIES = (5.0, 4.0, 6.0)  # V: nominal, min, max


def approx(expected, rel=1e-12, abs=0.0):
    """pytest.approx without its default absolute floor of 1e-12, which would swallow the
    femtofarads, nanoamps and sensitivities compared here."""
    return pytest.approx(expected, rel=rel, abs=abs)


def designs():
    """Hand-sized designs of every architecture in the [AH02] process (sizes in um)."""
    fl = make_design("floating-loop", floating_sizes(dict(out=(60, 0.8), d1=(18, 2.4), d2=(18, 2.4), ctl=(18, 2.4)),
                                                     dict(out=(180, 0.8), d1=(54, 2.4), d2=(40, 2.4), ctl=(54, 2.4))),
                     dict(ib_n=2e-6, ib_p=3e-6, ib_ctl=4e-6))
    fb = make_design("fixed-bias", {"mn_out": (60, 0.8), "mp_out": (180, 0.8)}, dict(ib=4e-6, r_bias=860e3))
    fo = make_design("follower", {"mn_f": (200, 0.8), "mp_f": (600, 0.8), "mn_b": (20, 0.8), "mp_b": (60, 0.8)},
                     dict(ib=2e-6))
    return {d.architecture: d for d in (fl, fb, fo)}


DESIGNS = designs()


def header(title: str, tech: Tech, vdd: float) -> list[str]:
    t_c = round(tech.tnom - ZERO_CELSIUS, 9)
    return [title, f".options tnom={t_c!r} {netlist.OPTIONS}", f".temp {t_c!r}", f"V_DD vdd 0 dc {vdd!r}"]


def stage_lines(mod, design, tech, extra=()) -> tuple[list[str], tuple[str, ...]]:
    """Model cards, the subcircuit and its instance X_S (ports as node names, gnd on 0)."""
    ports = netlist.subcircuit_ports(mod) + tuple(p for p in extra if p not in netlist.subcircuit_ports(mod))
    sub = netlist.stage_subcircuit(mod, design, 0, tech, extra_ports=tuple(extra))
    inst = "X_S " + " ".join("0" if p == netlist.GROUND_PORT else p for p in ports) + f" {netlist.subcircuit_name(mod)}"
    return [netlist.model_cards(mod, design, 0, tech), sub, inst], ports


def model_nodes(design, tech, vdd):
    """The model's rest-point node voltages of design 0 at tt, tnom, supply vdd."""
    stage = get_stage(design.architecture)
    devs = devices_at(stage, design, tech, corner_shifts(tech, [Corner.TT]), np.full(1, tech.tnom), np.zeros(1, int))
    bias = {k: np.asarray(v, dtype=float) for k, v in design.bias.items()}
    nodes, ok, _, _ = rest_point(stage, devs, bias, np.full(1, vdd), sensitivity=False)
    assert ok.all()
    return {k: float(v[0]) for k, v in nodes.items()}


def model(design, tech, supplies=SUPPLIES, targets=TARGETS):
    res = evaluate(design, tech, Conditions((Corner.TT,), (tech.tnom,), *supplies), targets)
    assert res.converged.all()
    return res


# ---------------------------------------------------------------------------------------
# Supply sensitivity: two supplies and the nominal one
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("architecture", list(DESIGNS))
def test_supply_sensitivity_matches_ngspice(architecture):
    design = DESIGNS[architecture]
    res = model(design, AH02)
    iq = {v: netlist.rest_iq(architecture, design, 0, AH02, v) for v in SUPPLIES}
    nom, lo, hi = SUPPLIES
    sim = 100.0 * (iq[hi] - iq[lo]) / iq[nom] / (hi - lo)
    # Iq agrees to about 1e-5 at every supply (test_stages_ngspice.py); the difference of two
    # Iqs that are 3 % to 60 % apart keeps that to within 1e-3 of the sensitivity.
    assert res.summary["supply_sens_pct_per_v"][0] == approx(sim, rel=1e-3)
    assert abs(sim) > 1.0  # %/V: length modulation (and the fixed bias's VGS sum) make it bind


# ---------------------------------------------------------------------------------------
# Headroom and peak currents: a DC sweep at full drive
# ---------------------------------------------------------------------------------------
SWEEP_STEP = 1e-3  # V


def sweep(mod, design, tech, vdd, direction, node, value):
    """(output voltages, current pushed into the output) from VDD/2 to the rail."""
    lines, _ = stage_lines(mod, design, tech, extra=tb.bench_ports(mod))
    half = 0.5 * vdd
    stop = vdd if direction > 0 else 0.0
    deck = header(f"drive-limit sweep {direction:+d}", tech, vdd) + lines + [
        f"V_GATE {node} 0 dc {value!r}", f"V_OUT out 0 dc {half!r}",
        f".dc V_OUT {half!r} {stop!r} {direction * SWEEP_STEP!r}", ".end"]
    res = ngspice.run("\n".join(deck))
    v = np.real(ngspice.vector(res, "v(out)"))
    # SPICE: i(V_OUT) flows into the source's + node (the output), i.e. out of the stage.
    return v, np.real(ngspice.vector(res, "i(v_out)"))


DRIVES = [(arch, "both") for arch in DESIGNS] + [("floating-loop", "p"), ("floating-loop", "n")]


@pytest.mark.parametrize(("architecture", "drive"), DRIVES, ids=[f"{a}-{d}" for a, d in DRIVES])
def test_headroom_and_peak_currents_match_a_dc_sweep_at_full_drive(architecture, drive):
    # drive "p" or "n": the driver moves one gate of the floating loop only, the other follows
    # through the control pair (in ngspice, by the circuit's own KCL).
    design = DESIGNS[architecture]
    mod = get_stage(architecture)
    vdd = SUPPLIES[0]
    targets = dataclasses.replace(TARGETS, drive=drive)
    res = model(design, AH02, (vdd, vdd, vdd), targets)
    lim = tb.drive_limits(design, AH02, targets, Corner.TT, AH02.tnom, np.array([vdd]), np.array([0]))
    assert lim.ok.all()
    for direction, peak_key, head_key in ((+1, "iout_source_a", "headroom_high_v"),
                                          (-1, "iout_sink_a", "headroom_low_v")):
        node, value = lim.forced[direction]
        v, pushed = sweep(mod, design, AH02, vdd, direction, node, float(value[0]))
        cur = direction * pushed
        # The peak: the current at VDD/2, the sweep's first point. Same equations; the
        # simulator's tolerances leave about 1e-6 of it.
        assert res.summary[peak_key][0] == approx(cur[0], rel=1e-4)
        assert cur[0] > TARGETS.i_load  # the load is met, so the headroom is a crossing
        k = np.flatnonzero(cur < TARGETS.i_load)[0]
        v_at = np.interp(TARGETS.i_load, [cur[k], cur[k - 1]], [v[k], v[k - 1]])
        headroom = vdd - v_at if direction > 0 else v_at
        # Linear interpolation over 1 mV steps of a smooth triode curve: well under 10 uV.
        assert res.summary[head_key][0] == approx(headroom, abs=1e-5)
        assert 0.0 < headroom < 0.5 * vdd


# ---------------------------------------------------------------------------------------
# Lowest supply: just above and just below the reported minimum
# ---------------------------------------------------------------------------------------
def _region(vectors, role, instance="x_s"):
    """(|VDS|, ngspice's VDSsat) of a device of X_S from an operating point."""
    name = f"@m.{instance}.{netlist.device_name(role).lower()}"
    return tuple(abs(float(np.real(vectors[f"v({name}[{q}])"][0]))) for q in ("vds", "vdsat"))


def test_vdd_min_of_the_floating_loop_is_where_its_control_device_leaves_saturation():
    # No length modulation and every stacked source on its bulk: every gate-source voltage, and
    # so Iq, is the same at every supply while each device stays saturated.
    design = make_design("floating-loop", floating_sizes(dict(out=(40, 0.8), d1=(10, 2.4), d2=(10, 2.4), ctl=(10, 2.4)),
                                                         dict(out=(120, 0.8), d1=(30, 2.4), d2=(30, 2.4),
                                                              ctl=(30, 2.4))),
                         dict(ib_n=2e-6, ib_p=2e-6, ib_ctl=4e-6), tied=STACKED)
    mod = get_stage("floating-loop")
    # A driver that reaches 50 mV from the rails: the bias sources' compliance (diode stack + 50 mV)
    # then needs less than the control device does.
    res = model(design, AH02_NO_CLM, (5.0, 5.0, 5.0), dataclasses.replace(TARGETS, vcomp=0.05))
    vdd_min = float(res.pvt["vdd_min_v"][0, 0])
    what = res.requirement_names[int(res.pvt["vdd_min_what"][0, 0])]
    assert what == "mn_ctl leaves saturation", what
    for factor, saturated in ((1.01, True), (0.99, False)):
        vdd = factor * vdd_min
        deck = netlist.rest_testbench(mod, design, 0, AH02_NO_CLM, vdd).replace(".save all", ".save all " + " ".join(
            f"@m.x_stage.m_mn_ctl[{q}]" for q in ("vds", "vdsat")) + " @m.x_stage.m_mn_out[id]")
        out = ngspice.run(deck)
        vds, vdsat = _region(out, "mn_ctl", "x_stage")
        iq = float(np.real(ngspice.vector(out, "@m.x_stage.m_mn_out[id]")[0]))
        assert (vds > vdsat) == saturated, (factor, vds, vdsat)
        if saturated:
            # 1 % above the minimum the rest point is the nominal one (same equations, 1e-5).
            assert iq == approx(res.pvt["iq_a"][0, 0], rel=1e-5)


def test_vdd_min_of_the_fixed_bias_pair_is_where_its_output_devices_leave_saturation():
    # Output devices of equal beta and threshold magnitude ([AH02] N and P with W/L 5:11 for
    # K' 110:50): at rest each sits at VDS = VDD/2 and needs VDS >= VGS - VT, so the pair
    # needs VDD >= 2 (VGS - VT). Check: the rest gate-source voltages held, the supply 1 %
    # above and below the reported minimum.
    tech = AH02_NO_CLM
    design = make_design("fixed-bias", {"mn_out": (10, 2.0), "mp_out": (22, 2.0)}, dict(ib=2e-6, r_bias=100e3))
    mod = get_stage("fixed-bias")
    vdd_nom = 5.0
    res = model(design, tech, (vdd_nom, vdd_nom, vdd_nom))
    what = res.requirement_names[int(res.pvt["vdd_min_what"][0, 0])]
    assert what == "mn_out leaves saturation", what
    vdd_min = float(res.pvt["vdd_min_v"][0, 0])
    nodes = model_nodes(design, tech, vdd_nom)
    vgs, vsg = nodes["gn"], vdd_nom - nodes["gp"]
    lines, _ = stage_lines(mod, design, tech)
    for factor, saturated in ((1.01, True), (0.99, False)):
        vdd = factor * vdd_min
        deck = header("held gates", tech, vdd) + lines + [
            f"V_GN gn 0 dc {vgs!r}", f"V_GP vdd gp dc {vsg!r}", f"V_OUT out 0 dc {0.5 * vdd!r}",
            ".save all @m.x_s.m_mn_out[vds] @m.x_s.m_mn_out[vdsat] @m.x_s.m_mp_out[vds] @m.x_s.m_mp_out[vdsat]",
            ".op", ".end"]
        out = ngspice.run("\n".join(deck))
        for role in ("mn_out", "mp_out"):
            vds, vdsat = _region(out, role)
            assert (vds > vdsat) == saturated, (role, factor, vds, vdsat)


# ---------------------------------------------------------------------------------------
# Output pole: .ac on the same circuit
# ---------------------------------------------------------------------------------------
F_AC = 1e3  # Hz, far below the pole: Re(Y) and Im(Y) both well resolved


@pytest.mark.parametrize("architecture", list(DESIGNS))
def test_output_pole_matches_ngspice_ac(architecture):
    # Without an amplifier table fp2 = gm_out / (2 pi (C_load + C_gates)) for a common-source
    # pair (its pole-splitting limit; C_gates = c_drive_f, the output gates) and
    # gm_out / (2 pi C_load) for the followers; gm_out is the output conductance with the gates
    # following the output (common-source pair) or the input held (followers), which ngspice
    # measures here (its gates are driven by ideal sources, so C_gates is not in the deck). Without
    # length modulation the output devices' gds is zero, so ngspice's output admittance is
    # gm_out + j 2 pi f C_load exactly, apart from GMIN (1e-12 S) across the junctions.
    tech = AH02_NO_CLM
    design = DESIGNS[architecture]
    mod = get_stage(architecture)
    vdd = SUPPLIES[0]
    res = model(design, tech, (vdd, vdd, vdd))
    nodes = model_nodes(design, tech, vdd)
    lines, ports = stage_lines(mod, design, tech)
    bench = [f"C_LOAD out 0 {C_LOAD!r}", "I_TEST 0 out dc 0 ac 1", f"V_MID mid 0 dc {0.5 * vdd!r}"]
    if netlist.common_source(mod):
        for gate in netlist.gate_nodes(mod):
            # gate = rest value + (V(out) - VDD/2): DC at rest, and the output's swing in AC.
            bench += [f"E_{gate.upper()} {gate} x{gate} out mid 1", f"V_{gate.upper()} x{gate} 0 dc {nodes[gate]!r}"]
    else:
        bench.append(f"V_NM nm 0 dc {nodes['nm']!r}")
    deck = header("output pole", tech, vdd) + lines + bench + [f".ac lin 1 {F_AC!r} {F_AC!r}", ".end"]
    out = ngspice.run("\n".join(deck))
    y = 1.0 / complex(ngspice.vector(out, "v(out)")[0])
    assert y.imag == approx(2.0 * math.pi * F_AC * C_LOAD, rel=1e-9)  # the load is all the capacitance
    c_gates = float(res.pvt["c_drive_f"][0, 0]) if netlist.common_source(mod) else 0.0
    pole = y.real / (2.0 * math.pi * (C_LOAD + c_gates))
    # GMIN against a gm of 1e-4 S or more: 1e-8; ngspice's op to reltol 1e-7.
    assert res.pvt["fp2_hz"][0, 0] == approx(pole, rel=1e-5)
