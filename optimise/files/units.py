"""Quantities at the file and screen edges: engineering-suffix text in, SI floats out.

Reading follows the SPICE scale letters, case-insensitive: f p n u m k meg g t (and the
micro signs 'µ', 'μ'), so 'm' is milli and 'meg' is 1e6. A bare upper-case 'M' is refused:
SPICE reads it as milli, Verilog-A and SI as mega. A unit word may follow ("10uA", "1.8 V",
"280uA/V^2"); it never scales the value.

When the caller names the expected unit, a suffix equal to that unit is read as the unit
and not as a scale letter: with unit="K", "300K" is 300 (kelvin), while "300k" is 3e5.
Without an expected unit the SPICE rule holds: a leading scale letter is a prefix, so "1F"
is 1e-15 and "300K" is 3e5.
"""
from __future__ import annotations

import math
import re
from numbers import Real

# Scale letters, keyed in lower case. Exponents are exact so "0.18u" gives the float
# nearest 1.8e-7, not 0.18 * 1e-6.
_SCALE = {"f": -15, "p": -12, "n": -9, "u": -6, "µ": -6, "μ": -6, "m": -3, "k": 3, "meg": 6, "g": 9, "t": 12}
_DISPLAY = {-15: "f", -12: "p", -9: "n", -6: "u", -3: "m", 0: "", 3: "k", 6: "meg", 9: "g", 12: "t"}
_SI_LARGE = {6: "M", 9: "G", 12: "T"}  # display only: parse_quantity refuses a bare 'M'

# Unit symbols accepted when no unit is expected; compounds join them with / or *.
_SYMBOLS = {"V", "A", "F", "H", "Hz", "s", "m", "W", "J", "C", "K", "S", "ohm", "Ohm", "Ω"}

_NUMBER = re.compile(r"\s*([+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+))(?:[eE]([+-]?[0-9]+))?\s*(.*?)\s*")
_FACTOR = re.compile(r"([A-Za-zΩ]+)(?:\^-?[0-9]+(?:\.[0-9]+)?)?")

_UNITS = "an optional unit (V A F H Hz s m W J C K S ohm, combined with / * ^, e.g. 'A/V^2')"
ALLOWED = "a number, optionally followed by a scale letter (f p n u m k meg g t) and a unit, e.g. '2.5u', '100pF', '1.8 V'"


def _is_unit_word(word: str) -> bool:
    """True for a known unit symbol or a compound such as 'A/V^2' or 'V*m'."""
    for factor in re.split(r"[/*]", word):
        m = _FACTOR.fullmatch(factor)
        if m is None or m.group(1) not in _SYMBOLS:
            return False
    return True


def _unit_ok(rest: str, unit: str | None) -> bool:
    if rest == "":
        return True
    return rest == unit if unit is not None else _is_unit_word(rest)


def parse_quantity(value, unit: str | None = None) -> float:
    """Turn a number or suffixed text into an SI float.

    Parameters
    ----------
    value : int, float or str
        A number (returned as float) or text such as "2.5u", "100p", "1.8 V", "20meg",
        "10uA".
    unit : str, optional
        The unit the value must be in (e.g. "V", "A/V^2", "" for none). When given, a unit
        word in the text must equal it. When None, any known SI symbol or compound is
        accepted.

    Returns
    -------
    float
        The value in SI units.

    Raises
    ------
    ValueError
        Text that is not a number with an optional scale letter and unit, an ambiguous
        'M', or a unit other than `unit`. The message quotes the text and what is allowed.
    TypeError
        Anything that is neither a real number (bool excluded) nor a string.
    """
    if isinstance(value, Real) and not isinstance(value, bool):
        try:
            return float(value)
        except OverflowError:
            raise ValueError(f"an integer of {value.bit_length()} bits is too large for a float") from None
    if not isinstance(value, str):
        raise TypeError(f"{value!r} is a {type(value).__name__}; allowed: {ALLOWED}")
    m = _NUMBER.fullmatch(value)
    if m is None:
        raise ValueError(f"{value!r} is not a quantity; allowed: {ALLOWED}")
    mantissa, exponent, suffix = m.groups()
    suffix = "".join(suffix.split())  # "4.5n V*m" reads like "4.5nV*m"
    scale = 0
    if not (suffix == "" or suffix == unit):
        key = "meg" if suffix[:3].lower() == "meg" else suffix[:1]
        if key == "M":
            raise ValueError(
                f"{value!r}: the scale letter 'M' is ambiguous (SPICE reads milli, SI reads mega); "
                "allowed scale letters: f p n u m k meg g t; hint: write 'm' for 1e-3 or 'meg' for 1e6"
            )
        if key.lower() in _SCALE and _unit_ok(suffix[len(key):], unit):
            scale = _SCALE[key.lower()]
        elif not _unit_ok(suffix, unit):
            units = f"no unit or {unit!r}" if unit else "no unit" if unit == "" else _UNITS
            raise ValueError(
                f"{value!r}: suffix {suffix!r} is not allowed here; allowed: an optional scale letter "
                f"(f p n u m k meg g t) followed by {units}"
            )
    if exponent is not None and len(exponent.lstrip("+-")) > 6:
        return float(f"{mantissa}e{exponent}") * 10.0**scale  # over- or underflows anyway
    return float(f"{mantissa}e{int(exponent or 0) + scale}")


def format_eng(value: float, unit: str = "", digits: int = 4, spice: bool = False) -> str:
    """Engineering notation for display, e.g. 2.5e-6, "A" -> "2.5 uA".

    Parameters
    ----------
    value : float
        SI value.
    unit : str
        Unit symbol appended after the scale letter.
    digits : int
        Significant digits (trailing zeros dropped).
    spice : bool
        False (default, for people): SI prefixes, mega as 'M' ("2.5 MHz"), giga 'G', tera
        'T'. True (for text read back): the SPICE scale letters, mega as 'meg', so
        `parse_quantity(text, unit)` reads the text back (name the unit: "1 F" alone is
        one femto).

    Returns
    -------
    str
        Mantissa in [1, 1000) with the prefix. Zero, inf and nan get no prefix.
    """
    value = float(value)
    exp3 = 0
    if value != 0.0 and math.isfinite(value):
        exp3 = min(max(3 * math.floor(math.log10(abs(value)) / 3), -15), 12)
        # Rounding to `digits` can carry the mantissa to 1000: move up one scale step.
        if abs(float(f"{value / 10.0**exp3:.{digits}g}")) >= 1000.0 and exp3 < 12:
            exp3 += 3
    text = f"{value / 10.0**exp3:.{digits}g}"
    suffix = (_DISPLAY[exp3] if spice or exp3 < 6 else _SI_LARGE[exp3]) + unit
    if not suffix:
        return text
    return f"{text} {suffix}" if unit else text + suffix
