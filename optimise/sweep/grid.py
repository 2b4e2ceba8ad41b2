"""Grid files: a base study and the axes to vary, expanded into one study per cell.

A grid file (TOML) names a base study and, per axis, the values to try::

    base = "sensor-buffer.toml"          # the base study, relative to the grid file
    name = "sensor-buffer-grid"          # optional (default: the grid file's name)
    [axes]                               # every combination is one cell, in file order
    architecture = ["floating-loop", "follower"]
    "supply.nominal" = [3.0, 3.3]
    "load.current" = ["300u", "500u"]
    technology = ["tech/demo350-invented.toml", "tech/demo180-invented.toml"]
    [search]                             # optional overrides for every cell
    population = 24
    generations = 10

Axis keys:

- ``architecture``: one architecture per cell (the cell searches ``architectures = [it]``;
  the base's [bounds.X], [ties.X] and [mirrors.X] tables of the other architectures are dropped). The
  base study must have [bounds.X] for every value.
- ``technology``: a technology file, relative to the grid file.
- ``seed``: the search seed.
- dotted study keys: ``supply.nominal|min|max``, ``conditions.temperatures_c|corners``,
  ``load.current|capacitance``, ``driver.compliance|drive``, ``targets.NAME`` (every key of
  a study's [targets]), ``amplifier.NAME`` (every key of the [amplifier] table),
  ``search.population|generations|checkpoint_every``, and any
  ``bounds.``/``ties.`` path that exists in the base study (e.g.
  ``"bounds.floating-loop.ib_n" = [["0.3u", "10u"], ["1u", "10u"]]``).

Supply range: when a cell sets ``supply.nominal`` and no axis sets ``supply.min`` or
``supply.max``, the base's min and max scale with the nominal by the base's ratios
(base 3.3 V in [2.7, 3.6] V -> nominal 3.0 V in [2.45455, 3.27273] V, six significant
digits), so every cell keeps the same relative tolerance and min <= nominal <= max holds.
A min or max that an axis sets is taken as given; a cell whose range is then out of order
fails with the study's own message, like any other invalid cell.

Each cell becomes a complete study file (technology paths made absolute) that
`stagefront optimise` runs on its own. Mistakes in the grid file itself (unknown keys,
empty axes, a missing base or technology file, an unknown architecture) raise InputError
naming the grid file and the key; a value that only makes one cell's study invalid is
reported as that cell's failure when the sweep runs it.
"""
from __future__ import annotations

import copy
import hashlib
import itertools
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path

from models.stages import STAGES

from .. import CAUTION
from ..files.errors import InputError
from ..files.folders import component
from ..files.study import (
    CONDITION_KEYS,
    DRIVER_KEYS,
    AMPLIFIER_KEYS,
    AMPLIFIER_TARGET_UNITS,
    LOAD_KEYS,
    SUPPLY_KEYS,
    TARGET_UNITS,
    load_study,
)
from ..files.tables import (MAX_GENERATIONS, MAX_POPULATION, check_evaluations, check_keys, closest, count, number,
                            read_toml, show, sub_table)

GRID_KEYS = ("base", "name", "description", "axes", "search")
SEARCH_OVERRIDES = {"population": 4, "generations": 1, "checkpoint_every": 1}  # key -> smallest allowed
# The most cells of one grid: each is a whole search, so a thousand is already days of work on
# a workstation and a folder of a thousand run folders ("common practice, no source").
MAX_CELLS = 1000
SEARCH_CEILINGS = {"population": MAX_POPULATION, "generations": MAX_GENERATIONS, "checkpoint_every": MAX_GENERATIONS}
STUDY_AXES = (("architecture", "technology", "seed")
              + tuple(f"supply.{k}" for k in SUPPLY_KEYS) + tuple(f"conditions.{k}" for k in CONDITION_KEYS)
              + tuple(f"load.{k}" for k in LOAD_KEYS) + tuple(f"driver.{k}" for k in DRIVER_KEYS)
              + tuple(f"targets.{k}" for k in TARGET_UNITS) + tuple(f"search.{k}" for k in SEARCH_OVERRIDES)
              + tuple(f"targets.{k}" for k in AMPLIFIER_TARGET_UNITS) + tuple(f"amplifier.{k}" for k in AMPLIFIER_KEYS))


@dataclass(frozen=True)
class Cell:
    """One grid cell: its folder-safe name, its axis values (as written) and its study file text."""

    name: str
    values: dict
    toml: str


@dataclass(frozen=True)
class Grid:
    """A checked grid file: where it is, its base study, its axes and the expanded cells."""

    path: Path
    name: str
    base: Path
    axes: dict
    search: dict
    cells: tuple[Cell, ...]
    objectives: dict


def _flatten(table: dict, prefix: str = "") -> dict:
    """[axes] entries as dotted key -> value list; bare dotted keys parse as nested tables."""
    out = {}
    for key, value in table.items():
        full = f"{prefix}{key}"
        if isinstance(value, dict):
            out.update(_flatten(value, full + "."))
        else:
            out[full] = value
    return out


def _has_path(data: dict, parts) -> bool:
    for p in parts:
        if not isinstance(data, dict) or p not in data:
            return False
        data = data[p]
    return True


def _set_path(data: dict, parts, value) -> None:
    for p in parts[:-1]:
        data = data.setdefault(p, {})
    data[parts[-1]] = value


def label(value) -> str:
    """A short folder-safe text for an axis value ("300u", "3.3", "tt+ss")."""
    if isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, float):
        text = f"{value:g}"
    elif isinstance(value, list):
        text = "+".join(label(v) for v in value)
    elif isinstance(value, dict):
        text = "+".join(f"{k}-{label(v)}" for k, v in value.items())
    else:
        text = str(value)
    return component(text)


def _axis_labels(keys) -> dict:
    """Per axis, the word that goes before its value in a cell name (the key's last part,
    or the whole key where two axes share a last part); architecture and technology none."""
    last = [k.rsplit(".", 1)[-1] for k in keys]
    out = {}
    for k, tail in zip(keys, last):
        if k in ("architecture", "technology"):
            out[k] = ""
        else:
            out[k] = (tail if last.count(tail) == 1 else k.replace(".", "-")) + "-"
    return out


def load_grid(path) -> Grid:
    """Read and check a grid file and expand it into cells.

    Parameters
    ----------
    path : str or Path
        The grid file (TOML; see the module docstring for the format).

    Returns
    -------
    Grid
        With one `Cell` per combination of axis values, in file order (the last axis
        varies fastest).

    Raises
    ------
    InputError
        Naming the grid file and the key: unknown or missing keys, an axis that is not a
        non-empty array or repeats a value, an unknown architecture, a technology or base
        file that does not exist, a base study that is itself invalid, [search] overrides
        out of range.
    """
    path = Path(path)
    where = str(path)
    data = read_toml(path)
    check_keys(where, "", data, GRID_KEYS, ("base", "axes"))
    base_ref = data["base"]
    if not isinstance(base_ref, str) or not base_ref:
        raise InputError(where, f"base = {show(base_ref)} is not a file path",
                         "a path to a study TOML file, relative to the grid file")
    base = path.parent / base_ref
    if not base.is_file():
        raise InputError(where, f"base = {base_ref!r}: no such study file ({base})",
                         "a path to a study TOML file, relative to the grid file", "check the path")
    study = load_study(base)  # the base must be valid on its own
    from ..files.space import load_search

    settings = load_search(study)
    objectives = settings.objectives
    name = data.get("name", path.stem)
    if not isinstance(name, str) or not name:
        raise InputError(where, f"name = {show(name)} is not a non-empty string")

    search = sub_table(where, "", "search", data.get("search", {}))
    check_keys(where, "search", search, tuple(SEARCH_OVERRIDES))
    for key, value in search.items():
        count(where, f"[search] {key}", value, SEARCH_OVERRIDES[key], SEARCH_CEILINGS[key])

    axes = _flatten(sub_table(where, "", "axes", data["axes"]))
    if not axes:
        raise InputError(where, "[axes] is empty", "one or more axes, e.g. architecture = [\"floating-loop\"]")
    cells = math.prod(len(v) if isinstance(v, list) else 1 for v in axes.values())
    if cells > MAX_CELLS:
        raise InputError(where, f"[axes] make {' x '.join(str(len(v)) for v in axes.values() if isinstance(v, list))}"
                                f" = {cells} cells, too many", f"at most {MAX_CELLS} cells",
                         "each cell is a whole search: fewer values per axis")
    for key, values in axes.items():
        _check_axis(where, key, values, study, path.parent)
    largest = {k: max(axes.get(f"search.{k}", [search.get(k, getattr(settings, k))]))
               for k in ("population", "generations")}
    check_evaluations(where, "the largest cell", largest["population"], largest["generations"])
    cells = _expand(where, name, base, axes, search, study, path.parent)
    return Grid(path, name, base, axes, search, cells, objectives)


def _check_axis(where, key, values, study, folder: Path) -> None:
    raw = study.raw
    if key not in STUDY_AXES and not (key.split(".")[0] in ("bounds", "ties") and _has_path(raw, key.split("."))):
        raise InputError(where, f"[axes] unknown key {key!r}",
                         ", ".join(STUDY_AXES) + ", or a bounds./ties. path present in the base study",
                         closest(key, STUDY_AXES) or "quote dotted keys: \"supply.nominal\" = [3.0, 3.3]")
    if not isinstance(values, list) or not values:
        raise InputError(where, f"[axes] {key} = {show(values)} is not a non-empty array",
                         "an array of the values to try, e.g. [3.0, 3.3]")
    shown = [json.dumps(v, sort_keys=True, default=str) for v in values]
    for k, s in enumerate(shown):
        if s in shown[:k]:
            raise InputError(where, f"[axes] {key} repeats the value {show(values[k])}", "each value once")
    for v in values:
        if key == "architecture":
            if not isinstance(v, str) or v not in STAGES:
                raise InputError(where, f"[axes] architecture: {show(v)} is not known", ", ".join(STAGES),
                                 closest(v, STAGES) if isinstance(v, str) else "")
            if v not in raw.get("bounds", {}):
                raise InputError(where, f"[axes] architecture: {v!r} has no [bounds.{v}] table in the base "
                                        f"study {study.path}", f"architectures with bounds there: "
                                 f"{', '.join(raw.get('bounds', {})) or 'none'}", f"add [bounds.{v}] to the base study")
        elif key == "technology":
            if not isinstance(v, str) or not (folder / v).is_file():
                raise InputError(where, f"[axes] technology: {show(v)} is not a technology file "
                                        f"(looked for {folder / str(v)})",
                                 "paths relative to the grid file", "check the path")
        elif key.startswith("search."):
            sub = key.split(".", 1)[1]
            count(where, f"[axes] {key}", v, SEARCH_OVERRIDES[sub], SEARCH_CEILINGS[sub])
        elif key == "seed":
            if not isinstance(v, int) or isinstance(v, bool) or v < 0:
                raise InputError(where, f"[axes] seed: {show(v)} is not allowed", "non-negative integers")
        elif key.startswith("supply."):
            number(where, "axes", key, v, "V")


def _expand(where, name, base: Path, axes: dict, search: dict, study, folder: Path) -> tuple[Cell, ...]:
    keys = list(axes)
    words = _axis_labels(keys)
    cells, used = [], set()
    cond = study.conditions
    for combo in itertools.product(*(axes[k] for k in keys)):
        values = dict(zip(keys, combo))
        parts = []
        for k, v in values.items():
            text = label(Path(v).stem) if k == "technology" else label(v)
            parts.append(words[k] + text)
        cname = "_".join(parts)
        if len(cname) > 200:  # a folder name (and a study name) of sane length: cut, with a digest of the whole
            cname = f"{cname[:183]}-{hashlib.sha256(cname.encode()).hexdigest()[:16]}"
        if cname in used:  # two values that only differ in characters a folder name cannot hold
            cname = f"{cname}_{len(cells) + 1}"
        used.add(cname)
        data = copy.deepcopy(study.raw)
        data["technology"] = str(study.tech_path.resolve())
        if search:
            data["search"] = {**data.get("search", {}), **search}
        for k, v in values.items():
            if k == "architecture":
                data["architectures"] = [v]
                for table in ("bounds", "ties", "mirrors"):
                    if table in data:
                        data[table] = {a: t for a, t in data[table].items() if a == v}
            elif k == "technology":
                data["technology"] = str((folder / v).resolve())
            else:
                _set_path(data, k.split("."), copy.deepcopy(v))
        if "supply.nominal" in values:
            vnom = number(where, "axes", "supply.nominal", values["supply.nominal"], "V")
            for end, base_v in (("min", cond.vdd_min), ("max", cond.vdd_max)):
                if f"supply.{end}" not in values and end in study.raw.get("supply", {}):
                    data["supply"][end] = float(f"{vnom * base_v / cond.vdd_nom:.6g}")
        data["name"] = cname
        setting = ", ".join(f"{k} = {_inline(v)}" for k, v in values.items())
        if "description" in data:
            data["description"] = f"{data['description']} [{name}: {setting}]"
        header = (f"# Cell {cname} of the sweep {_one_line(name)}: the base study {_one_line(base.name)} with\n"
                  f"# {_one_line(setting)}.\n"
                  "# Written by `stagefront sweep`; run it on its own with `stagefront optimise THIS-FILE`.\n"
                  f"# {CAUTION}\n")
        cells.append(Cell(cname, values, header + dumps(data)))
    return tuple(cells)


def _one_line(text) -> str:
    """`text` fit for a TOML comment: control characters and line breaks become spaces."""
    return re.sub(r"[\x00-\x1f\x7f\x85\u2028\u2029]+", " ", str(text))


# ------------------------------------------------------------------------- TOML writer
def _key(key: str) -> str:
    return key if re.fullmatch(r"[A-Za-z0-9_-]+", key) else json.dumps(key)


def _inline(value) -> str:
    """One TOML value (inline form)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        return repr(value) if math.isfinite(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, str):
        return json.dumps(value)  # a valid TOML basic string (\uXXXX escapes included)
    if isinstance(value, list):
        return "[" + ", ".join(_inline(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_inline(v)}" for k, v in value.items()) + " }"
    raise TypeError(f"cannot write {type(value).__name__} as TOML")


def dumps(data: dict) -> str:
    """TOML text of a study table: tables two levels deep as [a] / [a.b] sections,
    deeper ones inline (`tomllib.loads(dumps(d)) == d` for study data)."""
    lines: list[str] = []

    def emit(path, table):
        sections = {k: v for k, v in table.items() if isinstance(v, dict) and len(path) < 2}
        plain = {k: v for k, v in table.items() if k not in sections}
        if path and (plain or not sections):
            lines.append("")
            lines.append("[" + ".".join(_key(p) for p in path) + "]")
        for k, v in plain.items():
            lines.append(f"{_key(k)} = {_inline(v)}")
        for k, v in sections.items():
            emit(path + [k], v)

    emit([], data)
    return "\n".join(lines) + "\n"
