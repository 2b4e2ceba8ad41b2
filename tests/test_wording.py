"""Engineering notation of the worded messages (models.wording) against the SI prefixes
(BIPM, The International System of Units, 9th ed., 2019, Table 7: a 1e-18, f, p, n, u (for
micro), m, k, M 1e6, G, T 1e12)."""
from __future__ import annotations

import math

import pytest

from models.wording import eng, percent


@pytest.mark.parametrize(("value", "unit", "text"), [
    (8.72e-5, "A", "87.2 uA"),
    (1.2e6, "Hz", "1.2 MHz"),  # mega is "M" here (display), not the SPICE "meg"
    (2.5e13, "Hz", "25 THz"),
    (3.3e15, "Hz", "3300 THz"),  # above tera: tera with a large mantissa
    (1.5e-18, "A", "1.5 aA"),
    (1e-19, "A", "1e-19 A"),  # below atto: scientific notation, no prefix
    (0.0, "V", "0 V"),
    (-3.3e-3, "V", "-3.3 mV"),
    (999.96, "V", "1 kV"),  # rounding carries the mantissa to the next prefix
    (1500.0, "", "1.5k"),  # a plain number keeps its prefix letter glued on
    (20e-15, "F", "20 fF"),
    (2.2e-12, "F", "2.2 pF"),
    (4.7e-9, "s", "4.7 ns"),
    (1.0, "W", "1 W"),
])
def test_eng_uses_the_si_prefixes(value, unit, text):
    assert eng(value, unit) == text


def test_eng_of_non_finite_values_and_percent():
    assert eng(math.inf, "Hz") == "inf Hz" and eng(math.nan, "V") == "nan V"
    assert percent(0.052) == "5.2 %"
