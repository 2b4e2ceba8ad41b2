"""Engineering-suffix parsing and display at the file and screen edges."""
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from optimise.files.units import format_eng, parse_quantity


def test_numbers_pass_through_as_float():
    value = parse_quantity(3)
    assert value == 3.0 and type(value) is float


# SPICE number convention (scale factors T G MEG K M U N P F, case-insensitive, M = milli).
@pytest.mark.parametrize(
    "text, expected",
    [
        ("1f", 1e-15),
        ("100p", 1e-10),
        ("5n", 5e-9),
        ("2.5u", 2.5e-6),
        ("2.5µ", 2.5e-6),  # micro sign U+00B5
        ("2.5μ", 2.5e-6),  # Greek small mu U+03BC
        ("3m", 3e-3),
        ("2k", 2e3),
        ("20meg", 2e7),
        ("1g", 1e9),
        ("1t", 1e12),
    ],
)
def test_scale_letters(text, expected):
    assert parse_quantity(text) == pytest.approx(expected, rel=1e-15)


def test_lower_case_m_is_milli_not_mega():
    assert parse_quantity("5m") == pytest.approx(5e-3, rel=1e-15)


def test_scale_letters_ignore_case_as_in_spice():
    assert [parse_quantity(t) for t in ("10UA", "5N", "1MEG", "1Meg")] == pytest.approx([1e-5, 5e-9, 1e6, 1e6])


def test_bare_upper_case_m_is_refused_as_ambiguous():
    with pytest.raises(ValueError, match=r"'1M'.*ambiguous.*'meg'"):
        parse_quantity("1M")


@pytest.mark.parametrize(
    "text, expected",
    [("1.8 V", 1.8), ("3.3V", 3.3), ("10uA", 1e-5), ("280uA/V^2", 2.8e-4), ("100 pF", 1e-10), ("4.5n V*m", 4.5e-9)],
)
def test_trailing_unit_word_does_not_scale(text, expected):
    assert parse_quantity(text) == pytest.approx(expected, rel=1e-15)


def test_scale_is_exact_decimal():
    # 0.18u must be the float nearest 1.8e-7, not 0.18 * 1e-6 rounded twice.
    assert parse_quantity("0.18u") == 1.8e-7


def test_without_expected_unit_a_leading_letter_is_a_scale():
    # SPICE rule: "1F" is one femto, not one farad.
    assert parse_quantity("1F") == pytest.approx(1e-15)


def test_expected_unit_wins_over_a_scale_letter():
    assert parse_quantity("300K", unit="K") == 300.0
    assert parse_quantity("300k", unit="K") == 3e5


def test_unit_other_than_the_expected_one_is_refused():
    with pytest.raises(ValueError, match=r"'3.3A'.*no unit or 'V'"):
        parse_quantity("3.3A", unit="V")


def test_unit_word_where_none_belongs_is_refused():
    with pytest.raises(ValueError, match=r"'1.3x'.*followed by no unit"):
        parse_quantity("1.3x", unit="")


@pytest.mark.parametrize("text", ["abc", "", "  ", "1.2.3", "2e", "2.5uu", "1 0", "nan", "inf", "2.5x", "u5"])
def test_bad_text_names_the_text_and_what_is_allowed(text):
    with pytest.raises(ValueError, match=r"allowed") as info:
        parse_quantity(text)
    assert repr(text) in str(info.value)


@pytest.mark.parametrize("value", [True, None, [1.0], {"a": 1}])
def test_non_text_non_number_is_a_type_error(value):
    with pytest.raises(TypeError, match="allowed"):
        parse_quantity(value)


def test_integer_too_large_for_a_float_is_refused():
    with pytest.raises(ValueError, match="too large"):
        parse_quantity(10**400)


@pytest.mark.parametrize(
    "value, unit, text",
    [
        (2.5e-6, "A", "2.5 uA"),
        (0.0, "V", "0 V"),
        (-3.3e-3, "V", "-3.3 mV"),
        (12.5e6, "Hz", "12.5 MHz"),  # SI prefix on screen, never the SPICE 'meg'
        (4.7e9, "Hz", "4.7 GHz"),
        (1.8e-7, "", "180n"),
        (42.0, "", "42"),
        (999.96, "Hz", "1 kHz"),  # rounding to 4 digits carries into the next scale letter
    ],
)
def test_format_eng(value, unit, text):
    assert format_eng(value, unit) == text


def test_format_eng_spice_letters_for_text_read_back():
    assert format_eng(12.5e6, "Hz", spice=True) == "12.5 megHz"


def test_format_eng_digits():
    assert format_eng(1.23456e-6, "A", digits=3) == "1.23 uA"


@settings(max_examples=100, deadline=None)
@given(
    st.floats(min_value=1e-18, max_value=1e18) | st.floats(min_value=-1e18, max_value=-1e-18) | st.just(0.0),
    st.sampled_from(["", "A", "V", "Hz", "F", "K", "m"]),
)
def test_format_eng_reads_back_with_its_unit(value, unit):
    # The unit must be named: "1 F" alone is one femto by the SPICE rule.
    assert parse_quantity(format_eng(value, unit, digits=12, spice=True), unit) == pytest.approx(value, rel=1e-11, abs=0.0)


@settings(max_examples=100, deadline=None)
@given(st.text(max_size=20) | st.from_regex(r"[+-]?[0-9.]{1,5}(e-?[0-9]{1,3})? ?[a-zA-Zµμ/^*0-9]{0,6}", fullmatch=True))
def test_any_text_gives_a_float_or_value_error(text):
    try:
        value = parse_quantity(text)
    except ValueError:
        return
    assert isinstance(value, float)
