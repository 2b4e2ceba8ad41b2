"""Violation messages state the number the check compared, with its unit, the limit and the
PVT point: for every kind of violation, the value in the message is recomputed here from
the per-PVT metrics the check reads (common practice, no source: a message must agree with
the comparison it reports).
"""
from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import numpy as np
import pytest

from models.evaluate import Conditions, evaluate
from models.wording import eng
from optimise.files.study import load_design, load_study

STUDIES = Path(__file__).resolve().parents[1] / "studies"
PREFIX = {"a": 1e-18, "f": 1e-15, "p": 1e-12, "n": 1e-9, "u": 1e-6, "m": 1e-3, "": 1.0, "k": 1e3, "M": 1e6,
          "G": 1e9}
# "= 87.2 uA" -> (87.2e-6, "A"); the unit must follow the number.
QUANTITY = re.compile(r"= (-?[0-9.]+(?:e[+-]?[0-9]+)?) ([afpnumkMG]?)(A|V|W|Hz)\b")


@pytest.fixture(scope="module")
def demo():
    study = load_study(STUDIES / "sensor-buffer.toml")
    design = load_design(STUDIES / "sensor-buffer-floating-loop.toml", study.tech)
    return study, design


def quantity(message: str) -> tuple[float, str]:
    m = QUANTITY.search(message)
    assert m, f"no '= NUMBER UNIT' in {message!r}"
    return float(m.group(1)) * PREFIX[m.group(2)], m.group(3)


def where(res, j) -> str:
    return f"at {res.corners[j].value}, {res.temps[j] - 273.15:g} C, {res.vdd[j]:g} V"


def one(res, start: str) -> str:
    found = [v for v in res.violations[0] if v.startswith(start)]
    assert len(found) == 1, (start, res.violations[0])
    return found[0]


def run(demo, cond=None, **targets):
    study, design = demo
    return evaluate(design, study.tech, cond or study.conditions, dataclasses.replace(study.targets, **targets))


# Three significant digits are shown: the printed value is within half a unit of the third.
SHOWN = 5e-3


@pytest.mark.parametrize("kind", ["iq_high", "iq_low"])
def test_iq_window_message_states_iq_with_its_mismatch_allowance(demo, kind):
    limit = {"iq_high": dict(iq_max=25e-6), "iq_low": dict(iq_min=25e-6)}[kind]
    res = run(demo, **limit)
    k = res.pvt["iq_a"] * (1 + (3 if kind == "iq_high" else -3) * res.pvt["iq_sigma_pct"] / 100)
    j = int(np.argmax(k[0]) if kind == "iq_high" else np.argmin(k[0]))
    text = one(res, "Iq + 3 sigma = " if kind == "iq_high" else "Iq - 3 sigma = ")
    value, unit = quantity(text)
    assert unit == "A" and value == pytest.approx(k[0, j], rel=SHOWN)
    # the nominal Iq, which the check does not compare, is not what the message states
    assert abs(value - res.pvt["iq_a"][0, j]) > SHOWN * value
    assert f"{'>' if kind == 'iq_high' else '<'} 25 uA {where(res, j)}" in text


def test_headroom_message_states_the_larger_headroom_in_volts(demo):
    res = run(demo, headroom_max=5e-3)
    hr = np.maximum(res.pvt["headroom_high_v"], res.pvt["headroom_low_v"])[0]
    j = int(np.argmax(hr))
    text = one(res, "headroom to ")
    value, unit = quantity(text)
    assert unit == "V" and value == pytest.approx(hr[j], rel=SHOWN)
    assert f"> 5 mV {where(res, j)}" in text


def test_load_current_message_states_the_smaller_peak_current(demo):
    res = run(demo, i_load=40e-3)
    peak = np.minimum(res.pvt["iout_source_a"], res.pvt["iout_sink_a"])[0]
    j = int(np.argmin(peak))
    text = one(res, "peak s")
    value, unit = quantity(text)
    assert unit == "A" and value == pytest.approx(peak[j], rel=SHOWN)
    assert f"< load 40 mA {where(res, j)}" in text
    # the stage cannot deliver 40 mA: its headroom is "cannot deliver", never a stand-in number
    assert not res.summary["delivers_load"][0] and np.isnan(res.summary["swing_v"][0])
    res = run(demo, i_load=40e-3, headroom_max=0.35)
    assert any(v.startswith("headroom: cannot deliver the 40 mA load") for v in res.violations[0])


def test_negative_peak_current_is_worded_as_flowing_the_wrong_way(demo):
    study, _ = demo
    design = load_design(STUDIES / "sensor-buffer-follower.toml", study.tech)
    res = evaluate(design, study.tech, study.conditions, study.targets)
    peak = np.minimum(res.pvt["iout_source_a"], res.pvt["iout_sink_a"])[0]
    text = one(res, "peak s")
    value, unit = quantity(text)
    assert value == pytest.approx(peak.min(), rel=SHOWN)
    assert (value < 0) == ("(flows the wrong way)" in text)


def test_ab_ratio_message_states_the_ratio_and_the_currents(demo):
    res = run(demo, ab_min=0.9)
    ab = res.pvt["ab_ratio"][0]
    j = int(np.argmin(ab))
    text = one(res, "ab_ratio")
    m = re.search(r"= ([0-9.e+-]+) \(", text)
    assert float(m.group(1)) == pytest.approx(ab[j], rel=SHOWN)
    assert f"of {eng(res.pvt['iq_a'][0, j], 'A')}) < 0.9 {where(res, j)}" in text


def test_output_pole_message_in_hertz_with_si_prefix(demo):
    res = run(demo, fp2_min=100e6)
    j = int(np.argmin(res.pvt["fp2_hz"][0]))
    text = one(res, "output pole = ")
    value, unit = quantity(text)
    assert unit == "Hz" and value == pytest.approx(res.pvt["fp2_hz"][0, j], rel=SHOWN)
    assert "< 100 MHz" in text and "meg" not in text


def test_vdd_min_message_states_the_needed_supply_and_the_supply(demo):
    cond = Conditions(demo[0].conditions.corners, demo[0].conditions.temps, 2.0, 1.5, 2.2)
    res = run(demo, cond)
    margin = (res.vdd - res.pvt["vdd_min_v"][0]) / res.vdd
    j = int(np.argmin(margin))
    text = one(res, "vdd_min = ")
    value, unit = quantity(text)
    assert unit == "V" and value == pytest.approx(res.pvt["vdd_min_v"][0, j], rel=SHOWN)
    assert f"> supply {eng(res.vdd[j], 'V')} {where(res, j)} (set by: " in text


def test_power_budget_is_checked_at_the_worst_pvt_point(demo):
    study, design = demo
    res = run(demo, power_max=100e-6)
    bias = sum(float(design.bias[b][0]) for b in ("ib_n", "ib_p", "ib_ctl"))
    # power at every PVT point: supply times Iq plus every bias branch (hand formula)
    power = res.vdd * (res.pvt["iq_a"][0] + bias)
    j = int(np.argmax(power))
    text = one(res, "power = ")
    value, unit = quantity(text)
    assert unit == "W" and value == pytest.approx(power[j], rel=SHOWN)
    assert f"> 100 uW {where(res, j)}" in text
    assert res.summary["power_max_w"][0] == pytest.approx(power.max(), rel=1e-12)
    assert res.summary["power_w"][0] == pytest.approx(power[study.conditions.nominal_index()], rel=1e-12)
    assert res.summary["power_max_w"][0] > res.summary["power_w"][0]  # 3.6 V and hot corners cost more
    assert res.margins["power"][0] == pytest.approx((100e-6 - power[j]) / 100e-6, rel=1e-9)


def test_peak_current_cap_message(demo):
    res = run(demo, iout_peak_max=5e-3)
    peak = np.maximum(res.pvt["iout_source_a"], res.pvt["iout_sink_a"])[0]
    j = int(np.argmax(peak))
    text = one(res, "peak output current at full drive = ")
    value, unit = quantity(text)
    assert unit == "A" and value == pytest.approx(peak[j], rel=SHOWN)
    assert f"> cap 5 mA {where(res, j)}" in text
    assert res.summary["iout_peak_a"][0] == pytest.approx(peak.max(), rel=1e-12)


def test_area_message(demo):
    study, design = demo
    res = run(demo, area_max=100e-12)
    area = sum(float(design.w[r][0] * design.l[r][0]) for r in design.w) * 1e12
    text = one(res, "area = ")
    assert text.startswith(f"area = {area:.4g} um^2 > 100 um^2")


def test_every_violation_states_its_value_at_a_pvt_point(demo):
    res = run(demo, iq_max=25e-6, iq_min=25e-6, headroom_max=5e-3, ab_min=0.9, fp2_min=100e6,
              power_max=100e-6, iout_peak_max=5e-3)
    assert len(res.violations[0]) == 7
    for text in res.violations[0]:
        assert " at " in text and re.search(r" C, [0-9.]+ V", text), text
        assert not re.search(r"[0-9]e-[0-9]+ [AVW]", text), text  # engineering notation, not raw SI


def _number_before(text: str, unit: str) -> float:
    m = re.search(r"= (-?[0-9.]+(?:e[+-]?[0-9]+)?) " + re.escape(unit), text)
    assert m, (unit, text)
    return float(m.group(1))


def test_amplifier_messages_state_the_compared_value(demo):
    # The demo describes its amplifier: limits set beyond the design so each check fails.
    res = run(demo, phase_margin_min=89.0, slew_min=1e9, gate_time_max=1e-12)
    pm = res.pvt["phase_margin_deg"][0]
    j = int(np.argmin(pm))
    text = one(res, "phase margin = ")
    assert _number_before(text, "deg") == pytest.approx(pm[j], rel=SHOWN)
    assert f"< 89 deg {where(res, j)}" in text and "unity gain at " in text
    slew = res.pvt["slew_v_per_s"][0]
    j = int(np.argmin(slew))
    text = one(res, "slew rate = ")
    assert _number_before(text, "V/us") * 1e6 == pytest.approx(slew[j], rel=SHOWN)
    assert f"< 1000 V/us {where(res, j)}" in text
    gate = res.pvt["gate_time_s"][0]
    j = int(np.argmax(gate))
    text = one(res, "time to move the gates to the drive limit = ")
    m = re.search(r"= ([0-9.]+) ([afpnum]?)s > 1 ps", text)
    assert m, text
    assert float(m.group(1)) * PREFIX[m.group(2)] == pytest.approx(gate[j], rel=SHOWN)
    assert where(res, j) in text
