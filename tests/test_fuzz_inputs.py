"""Generated hostile inputs for every file stagefront reads from people: technology, study,
design and grid files and front.csv. Each case starts from a valid shipped document and
changes one entry (a value replaced by a hostile one, a key removed or an unknown key added).
The loader must either accept it or raise InputError (never another exception, the
traceback case), and what it accepts must hold no NaN, no negative value where none can be,
and no value read at the wrong scale. The loaders are called in-process (no CLI start-up) so
that a few thousand cases fit in seconds.
"""
from __future__ import annotations

import copy
import datetime
import math
import tempfile
import tomllib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from optimise.files.errors import InputError
from optimise.files.folders import component
from optimise.files.space import load_search
from optimise.files.study import load_design, study_from_dict
from optimise.files.tables import MAX_SIZE_M
from optimise.files.techfile import tech_from_dict
from optimise.search.frontfile import CURRENT_A, NON_NEGATIVE, RESISTANCE_OHM, SIZE_UM, check_front
from optimise.sweep.grid import dumps, load_grid
from test_search import tiny_study

ROOT = Path(__file__).resolve().parent.parent
TECH_PATH = ROOT / "studies" / "tech" / "demo350-invented.toml"
TECH = tomllib.loads(TECH_PATH.read_text())
FUZZ = settings(deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
                database=None)
WORK = Path(tempfile.mkdtemp(prefix="stagefront-fuzz-"))
STUDY_PATH = tiny_study(WORK)
STUDY = tomllib.loads(STUDY_PATH.read_text())
DESIGN = {"architecture": "floating-loop",
          "devices": {r: {"w": w, "l": 0.7} for r, w in (("mn_out", 60), ("mp_out", 150), ("mn_d1", 6), ("mn_d2", 6),
                                                          ("mn_ctl", 6), ("mp_d1", 18), ("mp_d2", 18),
                                                          ("mp_ctl", 18))},
          "bias": {"ib_n": "1u", "ib_p": "1u", "ib_ctl": "2u"}}

# Values a careless or hostile writer puts where a number belongs.
HOSTILE = st.one_of(
    st.sampled_from([math.nan, math.inf, -math.inf, -1, -1e-6, 0, 0.0, 1e300, -1e300, 1e-300, True, False, "",
                     "nan", "inf", "-inf", "NaN", "60", "-60", "60u", "-60u", "1e400", "abc", "60 um", "1..2", "0x10",
                     "--1", "60meg", "1e-30", " 60 ", "6e-5", [], {}, [1, 2], ["1u", "nan"], {"w": 1},
                     datetime.date(2020, 1, 1), 10 ** 400]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.integers(min_value=-10 ** 20, max_value=10 ** 20),
    st.text(max_size=10),
)


def leaves(doc, prefix=()):
    """Key paths of every entry of a nested dict (tables and values)."""
    out = []
    for k, v in doc.items():
        out.append(prefix + (k,))
        if isinstance(v, dict):
            out += leaves(v, prefix + (k,))
    return out


def mutated(base: dict, data) -> dict:
    """`base` with one entry replaced, removed, or an unknown key added beside it."""
    doc = copy.deepcopy(base)
    path = data.draw(st.sampled_from(leaves(doc)))
    parent = doc
    for k in path[:-1]:
        parent = parent[k]
    action = data.draw(st.sampled_from(["replace", "replace", "replace", "delete", "add", "in-list"]))
    if action == "delete":
        del parent[path[-1]]
    elif action == "add":
        parent[data.draw(st.sampled_from(["x", "kp_n", "W", "nan", ""]))] = data.draw(HOSTILE)
    elif action == "in-list" and isinstance(parent[path[-1]], list) and parent[path[-1]]:
        items = parent[path[-1]]
        items[data.draw(st.integers(0, len(items) - 1))] = data.draw(HOSTILE)
    else:
        parent[path[-1]] = data.draw(HOSTILE)
    return doc


def finite_fields(obj, allow_inf=()) -> None:
    """No field of a record is NaN; only `allow_inf` fields may be infinite."""
    for name in getattr(obj, "__slots__", ()) or vars(obj):
        value = getattr(obj, name)
        if isinstance(value, float):
            assert not math.isnan(value), name
            assert math.isfinite(value) or name in allow_inf, (name, value)


# ---------------------------------------------------------------------------- technology
@settings(FUZZ, max_examples=700)
@given(st.data())
def test_technology_fuzz(data):
    doc = mutated(TECH, data)
    try:
        tech = tech_from_dict(doc, "fuzz.toml")
    except InputError:
        return
    for mos in (tech.nmos, tech.pmos):
        finite_fields(mos, allow_inf=("va_per_l",))
        # Sizes are metres in a technology file: a plain 0.4 or "60" (micrometres meant)
        # is far outside the 10 nm .. 100 um the check allows, never silently taken.
        assert 1e-8 <= mos.w_min <= 1e-4 and 1e-8 <= mos.l_min <= 1e-4
        assert mos.kp > 0 and mos.vt0 > 0 and mos.a_vt >= 0 and mos.cox > 0
    assert 0 < tech.grid < 1e-5


# ---------------------------------------------------------------------------- study
@settings(FUZZ, max_examples=400)
@given(st.data())
def test_study_fuzz(data):
    doc = mutated({k: v for k, v in STUDY.items() if k != "technology"}, data)
    doc["technology"] = STUDY["technology"]
    try:
        study = study_from_dict(doc, STUDY_PATH)
        settings_ = load_search(study)
    except InputError:
        return
    c, t = study.conditions, study.targets
    assert 0 < c.vdd_min <= c.vdd_nom <= c.vdd_max <= 60
    assert all(math.isfinite(x) and x > 0 for x in c.temps)  # kelvin
    finite_fields(t, allow_inf=("iq_max", "headroom_max", "area_max", "power_max", "iout_peak_max",
                                  "gate_time_max"))
    for name in ("i_load", "c_load", "iq_min", "iq_max", "iq_sigmas", "headroom_max", "ab_min", "area_max",
                 "fp2_min", "layout_factor", "power_max", "iout_peak_max"):
        assert getattr(t, name) >= 0, name
    assert t.iq_min <= t.iq_max
    for space in settings_.spaces.values():
        for v in space.variables:
            assert math.isfinite(v.lo) and math.isfinite(v.hi) and 0 < v.lo <= v.hi, v
            if v.kind in ("w", "l"):  # metres: a micrometre bound read as metres would be >= 1e-3
                assert v.hi <= MAX_SIZE_M, v


# ---------------------------------------------------------------------------- design
@pytest.fixture(scope="module")
def tech():
    from optimise.files.techfile import load_tech

    return load_tech(TECH_PATH)


@settings(FUZZ, max_examples=600)
@given(data=st.data())
def test_design_fuzz(tech, data):
    doc = mutated(DESIGN, data)
    path = WORK / "design.toml"
    try:
        path.write_text(dumps(doc))
    except (TypeError, ValueError):  # a value TOML cannot hold (nan is fine, a huge int is not)
        return
    try:
        d = load_design(path, tech)
    except InputError:
        return
    for table in (d.w, d.l, d.bias):
        for k, v in table.items():
            assert np.all(np.isfinite(v)) and np.all(v > 0), (k, v)
    for role in d.w:
        # A size is micrometres whether written 60 or "60"; never metres by accident.
        assert d.w[role][0] <= MAX_SIZE_M and d.l[role][0] <= MAX_SIZE_M and d.w[role][0] >= tech.nmos.w_min * 0.999


@settings(FUZZ, max_examples=300)
@given(x=st.floats(min_value=1.0, max_value=999.0), form=st.sampled_from(["number", "string", "suffix"]))
def test_a_size_means_the_same_however_it_is_written(tech, x, form):
    # 60, "60" and "60u" are all 60 um (DESIGN.md sec. 5: sizes in micrometres, suffixes in SI).
    x = float(f"{x:.6g}")
    shown = {"number": x, "string": repr(x), "suffix": f"{x!r}u"}[form]
    doc = copy.deepcopy(DESIGN)
    doc["devices"]["mn_out"]["w"] = shown
    path = WORK / f"size-{form}.toml"
    path.write_text(dumps(doc))
    d = load_design(path, tech)
    assert d.w["mn_out"][0] == pytest.approx(x * 1e-6, rel=1e-12)  # one scale, exact to rounding


# ---------------------------------------------------------------------------- grid
GRID = {"base": str(STUDY_PATH), "name": "fuzz",
        "axes": {"supply.nominal": [3.0, 3.3], "load.current": ["300u", "500u"], "technology": [str(TECH_PATH)]},
        "search": {"population": 8, "generations": 2}}


@settings(FUZZ, max_examples=120)
@given(data=st.data())
def test_grid_fuzz(data):
    doc = mutated(GRID, data)
    path = WORK / "grid.toml"
    try:
        path.write_text(dumps(doc))
    except (TypeError, ValueError):
        return
    try:
        grid = load_grid(path)
    except InputError:
        return
    assert component(grid.name) == component(component(grid.name))
    for cell in grid.cells:
        assert cell.name == component(cell.name) and cell.name not in (".", "..")
        # The cell's study file is valid TOML (names reach it only through comment-safe
        # text and quoted strings); an invalid cell study is refused when the cell runs
        # (each cell fails on its own), and one that loads holds sane supplies.
        data_ = tomllib.loads(cell.toml)
        try:
            study = study_from_dict(data_, WORK / f"{cell.name}.toml")
        except InputError:
            continue
        c = study.conditions
        assert 0 < c.vdd_min <= c.vdd_nom <= c.vdd_max <= 60


# ---------------------------------------------------------------------------- front.csv
def _front():
    """A valid two-row fixed-bias front.csv (header and cells as text)."""
    header = ["id", "architecture", "overall_front", "mn_out_w_um", "mn_out_l_um", "mn_out_bulk", "mp_out_w_um",
              "mp_out_l_um", "mp_out_bulk", "ib_a", "r_bias_ohm", "iq_a", "power_w", "area_um2", "swing_v",
              "supply_sens_pct_per_v", "margin_area", "margin_iq_low_pct"]
    rows = [["fb-001", "fixed-bias", "True", "60", "0.7", "rail", "150", "0.7", "rail", "4e-06", "100000.0",
             "1e-05", "3.3e-05", "147.0", "2.9", "-1.5", "0.9", ""],
            ["fb-002", "fixed-bias", "False", "80", "0.7", "rail", "200", "0.7", "source", "5e-06", "90000.0",
             "2e-05", "6.6e-05", "196.0", "2.8", "3.0", "0.8", "12.5"]]
    return header, rows


TEXTS = st.one_of(st.sampled_from(["", "nan", "NaN", "inf", "-inf", "-1", "0", "-0", "1e400", "6e-05", "4", "1e13",
                                   "abc", "True", "rail", "source", "fb-001", "floating-loop", "class-d", " ",
                                   "1,5", "1e-3", "100001"]),
                  st.floats(allow_nan=True, allow_infinity=True).map(repr), st.text(max_size=8))


@settings(FUZZ, max_examples=600)
@given(data=st.data())
def test_front_csv_fuzz(data):
    header, rows = _front()
    row = data.draw(st.integers(0, len(rows) - 1))
    col = data.draw(st.integers(0, len(header) - 1))
    rows[row][col] = data.draw(TEXTS)
    try:
        table = check_front(header, [(k + 2, r) for k, r in enumerate(rows)], "front.csv")
    except InputError as err:
        assert "front.csv" in str(err)
        return
    assert table["id"].is_unique
    for name in header[3:]:
        if name.endswith("_bulk"):
            assert set(table[name]) <= {"rail", "source"}
            continue
        values = table[name].to_numpy(dtype=float)
        assert not np.isinf(values).any(), name
        given_empty = [not r[header.index(name)].strip() for r in rows]
        assert (np.isnan(values) == np.array(given_empty)).all(), name  # NaN only where the cell was empty
        if name.endswith("_um"):
            assert ((values > SIZE_UM[0]) & (values <= SIZE_UM[1])).all(), name
        if name.endswith("_a") and name not in NON_NEGATIVE:
            assert ((values > CURRENT_A[0]) & (values <= CURRENT_A[1])).all(), name
        if name.endswith("_ohm"):
            assert ((values > RESISTANCE_OHM[0]) & (values <= RESISTANCE_OHM[1])).all(), name
        if name in NON_NEGATIVE:
            assert (values[~np.isnan(values)] >= 0).all(), name
