"""Units and limits in study and design files: a size written as a string without a scale
letter means what the bare number means, and nan, inf, negative limits and supplies
outside 0 < min <= nominal <= max <= 60 V are refused with the key."""
from __future__ import annotations

import re

import pytest

from optimise.files.errors import InputError
from optimise.files.space import load_search
from optimise.files.study import load_study
from test_search import tiny_study


def _study(tmp_path, old, new):
    path = tiny_study(tmp_path)
    text = path.read_text()
    assert re.search(old, text), old
    path.write_text(re.sub(old, lambda m: new, text, count=1))
    return path


def _refused(path, *words):
    with pytest.raises(InputError) as err:
        load_search(load_study(path))
    for w in words:
        assert w in str(err.value), str(err.value)


def test_size_as_a_plain_string_is_micrometres_like_the_bare_number(tmp_path):
    bare = load_search(load_study(tiny_study(tmp_path)))
    text = tiny_study(tmp_path).read_text()
    m = re.search(r"mn_out = \{ w = \[(\d+), (\d+)\]", text)
    assert m
    quoted = tmp_path / "quoted.toml"
    quoted.write_text(text.replace(m.group(0), f'mn_out = {{ w = ["{m.group(1)}", "{m.group(2)}"]'))
    again = load_search(load_study(quoted))
    # Same numbers, same unit: the spaces must be identical, to the bit.
    assert repr(bare.spaces) == repr(again.spaces)


@pytest.mark.parametrize("key", ["iq_max", "iq_min", "headroom_max", "iq_sigmas", "area_max_um2"])
@pytest.mark.parametrize("value", ["nan", "inf", "-inf"])
def test_nan_and_inf_targets_are_refused(tmp_path, key, value):
    path = tiny_study(tmp_path, extra="")
    text = path.read_text()
    text = re.sub(rf"(?m)^{key} = .*\n", "", text)
    text = text.replace("[targets]\n", f"[targets]\n{key} = {value}\n")
    path.write_text(text)
    _refused(path, key, "finite")


@pytest.mark.parametrize("key, value", [("area_max_um2", "-1"), ("iq_sigmas", "-3"), ("iq_max", "-1e-6"),
                                        ("iq_min", "-1e-6"), ("headroom_max", "0")])
def test_negative_limits_are_refused(tmp_path, key, value):
    path = tiny_study(tmp_path)
    text = re.sub(rf"(?m)^{key} = .*\n", "", path.read_text())
    path.write_text(text.replace("[targets]\n", f"[targets]\n{key} = {value}\n"))
    _refused(path, key, "not allowed")


@pytest.mark.parametrize("supply, word", [("min = -5", "positive"), ("max = 1000", "above"),
                                          ("min = nan", "finite"), ("max = inf", "finite")])
def test_supplies_outside_the_sane_range_are_refused(tmp_path, supply, word):
    path = tiny_study(tmp_path)
    text = path.read_text()
    key = supply.split()[0]
    text = re.sub(rf"(?m)^{key} = .*\n", "", text, count=1) if "[supply]" in text else text
    path.write_text(text.replace("[supply]\n", f"[supply]\n{supply}\n"))
    _refused(path, "[supply]", word)


@pytest.mark.parametrize("bound", ['["nan", "1u"]', "[1, inf]", "[nan, 10]"])
def test_non_finite_bounds_are_refused(tmp_path, bound):
    path = tiny_study(tmp_path)
    text = path.read_text()
    text = re.sub(r'ib_n = \[[^\]]*\]', lambda m: f"ib_n = {bound}", text, count=1) if "ib_n" in text else text
    text = re.sub(r"mn_out = \{ w = \[[^\]]*\]", lambda m: f"mn_out = {{ w = {bound}", text, count=1)
    path.write_text(text)
    _refused(path, "finite")


def test_nan_temperature_is_refused(tmp_path):
    path = tiny_study(tmp_path)
    path.write_text(path.read_text().replace("temperatures_c = [27]", "temperatures_c = [27, nan]"))
    _refused(path, "temperatures_c")
