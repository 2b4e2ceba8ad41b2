"""Numbers in words people read: engineering notation with SI prefixes, for the violation
messages of `models.summary` (and anything else that shows a value with its unit).

Display only, never read back: mega is "M" as in SI ("1.2 MHz"), not the SPICE "meg"
that `optimise.files.units` reads. Pure string formatting, no state.
"""
from __future__ import annotations

import math

_PREFIX = {-18: "a", -15: "f", -12: "p", -9: "n", -6: "u", -3: "m", 0: "", 3: "k", 6: "M", 9: "G", 12: "T"}


def eng(value, unit: str = "", digits: int = 3) -> str:
    """`value` [SI] in engineering notation with an SI prefix: eng(8.72e-5, "A") = "87.2 uA".

    Parameters
    ----------
    value : float
    unit : str
        Unit symbol after the prefix ("A", "V", "Hz", "W"); "" for a plain number, which
        then keeps its prefix letter glued on ("1.5k").
    digits : int
        Significant digits (trailing zeros dropped).

    Returns
    -------
    str
        Mantissa in [1, 1000), a space, prefix and unit. Zero, nan, inf and magnitudes
        below 1e-18 (scientific notation then) get no prefix.
    """
    value = float(value)
    if not math.isfinite(value):
        return f"{value} {unit}".rstrip()
    if value != 0.0 and abs(value) < 1e-18:  # below atto: plain scientific notation
        return f"{value:.{digits}g} {unit}".rstrip()
    exp3 = 0
    if value != 0.0:
        exp3 = min(max(3 * math.floor(math.log10(abs(value)) / 3), -18), 12)
        if abs(float(f"{value / 10.0 ** exp3:.{digits}g}")) >= 1000.0 and exp3 < 12:
            exp3 += 3  # rounding carried the mantissa to 1000
    text = f"{value / 10.0 ** exp3:.{digits}g}"
    if "e" in text:  # .3g writes 1e+03 for 999.96 when the carry above did not apply
        text = f"{float(text):.0f}"
    suffix = _PREFIX[exp3] + unit
    if not unit:
        return text + suffix
    return f"{text} {suffix}"


def percent(fraction: float, digits: int = 3) -> str:
    """A fraction as percent: percent(0.052) = "5.2 %"."""
    return f"{100.0 * float(fraction):.{digits}g} %"
