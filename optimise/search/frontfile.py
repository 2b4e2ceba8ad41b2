"""front.csv and run.json checked when read back: files from other people are not trusted.

A run folder is handed from one designer to another and may have been edited by hand.
`read_front_checked` reads front.csv as text and checks every cell before anything uses it:

- required columns ``id`` and ``architecture``, no duplicate or empty column names, every
  line as long as the header;
- ``id``: unique, 1 to 100 characters, no control characters;
- ``architecture``: a known architecture; every variable column of its roles and bias
  present and filled: sizes (``ROLE_w_um``, ``ROLE_l_um``) finite and within SIZE_UM
  micrometres, currents (``NAME_a``) within CURRENT_A amperes, resistances (``NAME_ohm``)
  within RESISTANCE_OHM ohms, ``ROLE_bulk`` ``rail`` or ``source``;
- ``overall_front`` and ``delivers_load``: true or false;
- every other column (metrics, constraint margins, whatever their names) a finite number or
  empty (``inf`` too in INFINITE_OK, where it means "none"); the metrics in NON_NEGATIVE not
  below zero.

Errors name the file, the line, the row id and the column. `check_run_record` does the same
for run.json (types and ranges of what report, compare, pick and sweep read from it).
"""
from __future__ import annotations

import csv
import io
import math
import re

import numpy as np
import pandas as pd

from models.stages import STAGES

from ..files.errors import InputError
from ..files.inputs import MAX_TABLE_BYTES, load_json, read_input_text
from ..files.space import OBJECTIVES
from ..files.tables import show

# Ranges of the variable columns, chosen to catch a value written in the wrong unit (a width
# in metres in a micrometre column, a current in microamperes in an ampere column) while
# allowing every real design ("common practice, no source"): 1 nm to 10 cm drawn sizes,
# bias currents up to 1 A, resistances up to 1 Tohm.
SIZE_UM = (1e-3, 1e5)
CURRENT_A = (0.0, 1.0)
RESISTANCE_OHM = (0.0, 1e12)
# Metrics that cannot be negative whatever the design.
NON_NEGATIVE = ("iq_a", "iq_min_a", "iq_max_a", "power_w", "power_max_w", "area_um2", "iq_sigma_pct", "c_drive_f")
TEXT_COLUMNS = ("id", "architecture")
# Amplifier columns where +inf is a value: no such zero or pole, no slew limit, never reached.
INFINITE_OK = ("fz_hz", "fint_hz", "p1_hz", "slew_v_per_s", "gate_time_s")
BOOL_COLUMNS = ("overall_front", "delivers_load")
_NUMBER = re.compile(r"\s*[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?\s*")
_CONTROL = re.compile(r"[\x00-\x1f\x7f\x85\u2028\u2029]")
_UNIT = {"A": "_a", "ohm": "_ohm"}
_TRUE, _FALSE = ("true", "1", "yes"), ("false", "0", "no")


def _variables(arch: str) -> dict:
    """Column -> (kind, unit text, (lo, hi)) of the variables an architecture's rows must fill."""
    stage = STAGES[arch]
    out = {}
    for role in stage.ROLES:
        out[f"{role}_w_um"] = ("size", "um", SIZE_UM)
        out[f"{role}_l_um"] = ("size", "um", SIZE_UM)
        out[f"{role}_bulk"] = ("bulk", "", None)
    for name, unit in stage.BIAS.items():
        out[f"{name}{_UNIT[unit]}"] = ("number", unit, CURRENT_A if unit == "A" else RESISTANCE_OHM)
    return out


def _bulk_column(col: str) -> bool:
    return col.endswith("_bulk")


def check_front(header: list, rows: list, where: str) -> pd.DataFrame:
    """The checked table of front.csv cells (`header`, rows of (line number, cells)).

    Returns the table as the rest of stagefront uses it: numbers as floats (NaN where a cell
    is empty), BOOL_COLUMNS as booleans, text columns as strings, bulk columns as
    ``rail``/``source`` or NaN.
    """
    def fail(line, rid, col, what, allowed="", hint=""):
        at = f"line {line}" + (f" (row {rid!r})" if rid else "")
        raise InputError(where, f"{at}, column {col}: {what}", allowed, hint)

    names = [str(c) for c in header]
    for k, col in enumerate(names):
        if not col.strip():
            raise InputError(where, f"line 1: column {k + 1} has no name", hint="front.csv has a header line of names")
        if names.index(col) != k:
            raise InputError(where, f"line 1: column {col!r} appears twice", "each column once")
    missing = [c for c in TEXT_COLUMNS if c not in names]
    if missing:
        raise InputError(where, f"has no column {', '.join(missing)}", "the columns `stagefront optimise` writes",
                         "re-run the search with this version")
    data = {c: [] for c in names}
    seen: dict = {}
    for line, cells in rows:
        if len(cells) != len(names):
            raise InputError(where, f"line {line} has {len(cells)} cells, the header {len(names)}",
                             "one cell per header column", "check for a missing or extra comma")
        cell = dict(zip(names, cells))
        rid = cell["id"]
        if not rid.strip() or len(rid) > 100 or _CONTROL.search(rid):
            fail(line, "", "id", f"{show(rid)} is not a usable row id", "1 to 100 characters, no control characters")
        if rid in seen:
            fail(line, rid, "id", f"the id is also on line {seen[rid]}", "unique row ids",
                 "give every row its own id")
        seen[rid] = line
        arch = cell["architecture"]
        if arch not in STAGES:
            fail(line, rid, "architecture", f"{show(arch)} is not an architecture", ", ".join(STAGES))
        need = _variables(arch)
        absent = [c for c in need if c not in cell]
        if absent:
            raise InputError(where, f"has no column {', '.join(absent)} for the {arch} row {rid!r} (line {line})",
                             hint="re-run the search with this version")
        for col in names:
            text = cell[col].strip()
            if col in TEXT_COLUMNS:
                data[col].append(cell[col])
            elif col in BOOL_COLUMNS:
                if text.lower() not in _TRUE + _FALSE:
                    fail(line, rid, col, f"{show(cell[col])} is not true or false", "True or False")
                data[col].append(text.lower() in _TRUE)
            elif _bulk_column(col):
                if col in need and text not in ("rail", "source"):
                    fail(line, rid, col, f"{show(cell[col])} is not a bulk tie", "rail, source")
                if col not in need and text not in ("", "rail", "source"):
                    fail(line, rid, col, f"{show(cell[col])} is not a bulk tie", "rail, source or empty")
                data[col].append(text or np.nan)
            else:
                data[col].append(_number(cell[col], col, need.get(col), line, rid, fail))
    table = pd.DataFrame(data, columns=names)
    for col in names:
        if col in TEXT_COLUMNS or _bulk_column(col):
            table[col] = table[col].astype(object)
        elif col in BOOL_COLUMNS:
            table[col] = table[col].astype(bool)
        else:
            table[col] = table[col].astype(float)
    return table


def _number(text: str, col: str, spec, line: int, rid: str, fail) -> float:
    """One numeric cell: empty (NaN) where allowed, else finite and in range."""
    if not text.strip():
        if spec is not None:
            fail(line, rid, col, "is empty", f"a number in {spec[1]}", "every variable of the row's architecture "
                                                                   "is needed to rebuild its design")
        return np.nan
    if col in INFINITE_OK and spec is None and text.strip().lower().lstrip("+") in ("inf", "infinity"):
        return math.inf
    if not _NUMBER.fullmatch(text):
        what = "is not a finite number" if text.strip().lower().lstrip("+-") in ("nan", "inf", "infinity") \
            else "is not a number"
        fail(line, rid, col, f"{show(text)} {what}", "a finite decimal number, or empty where no value applies")
    value = float(text)
    if not math.isfinite(value):
        fail(line, rid, col, f"{show(text)} is not a finite number", "a finite decimal number")
    if spec is not None:
        _, unit, (lo, hi) = spec
        if not lo < value <= hi:
            fail(line, rid, col, f"{value!r} {unit} is outside ({lo:g}, {hi:g}] {unit}",
                 f"a positive value in {unit} up to {hi:g}",
                 "sizes are in micrometres, currents in amperes, resistances in ohms")
    elif col in NON_NEGATIVE and value < 0:
        fail(line, rid, col, f"{value!r} is negative", "a value >= 0 (it cannot be negative)")
    return value


def read_front_checked(path, where: str | None = None) -> pd.DataFrame:
    """front.csv of a run folder, read with `read_input_text` and checked by `check_front`."""
    where = where or str(path)
    text = read_input_text(path, where, MAX_TABLE_BYTES)
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader, None)
        if header is None:
            raise InputError(where, "is empty", hint="front.csv has a header line, then one line per design")
        rows = []
        for cells in reader:
            if cells:  # blank lines carry nothing
                rows.append((reader.line_num, cells))
    except csv.Error as err:
        raise InputError(where, f"line {reader.line_num} is not CSV ({err})") from None
    return check_front(header, rows, where)


# ------------------------------------------------------------------------- run.json
def _kind(value, kind: str) -> bool:
    if kind == "int":
        return isinstance(value, int) and not isinstance(value, bool)
    if kind == "number":
        return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if kind == "numbers":
        return isinstance(value, list) and all(_kind(v, "number") for v in value)
    if kind == "strings":
        return isinstance(value, list) and all(isinstance(v, str) for v in value)
    return isinstance(value, {"str": str, "dict": dict, "bool": bool}[kind])


# key -> (kind, lowest allowed or None); keys absent are allowed (older versions wrote fewer).
RECORD_KEYS = {
    "study": ("str", None), "study_toml": ("str", None), "technology": ("str", None),
    "technology_toml": ("str", None), "seed": ("int", 0), "population": ("int", 1), "generations": ("int", 0),
    "constraints": ("strings", None), "status": ("str", None), "wall_time_s": ("number", 0),
    "evaluations": ("int", 0), "versions": ("dict", None), "architectures": ("dict", None),
}
ARCH_KEYS = {
    "evaluations": ("int", 0), "generations": ("int", 0), "wall_time_s": ("number", 0), "finished": ("bool", None),
    "hypervolume": ("numbers", None), "feasible_per_generation": ("numbers", None), "front_size": ("int", 0),
}
_ALLOWED = {"int": "an integer", "number": "a finite number", "numbers": "a list of finite numbers",
            "strings": "a list of strings", "str": "a string", "dict": "an object", "bool": "true or false"}


def _check_keys(where: str, table: dict, keys: dict, prefix: str) -> None:
    for key, (kind, lo) in keys.items():
        if key not in table or (table[key] is None and kind != "dict"):
            continue
        value = table[key]
        if not _kind(value, kind) or (lo is not None and value < lo):
            raise InputError(where, f"{prefix}{key!r} = {show(value)} is not usable",
                             _ALLOWED[kind] + (f" >= {lo}" if lo is not None else ""),
                             "run.json is written by `stagefront optimise`; restore the original")


def check_run_record(record, where: str) -> dict:
    """run.json's object with the types and ranges its readers rely on; InputError otherwise."""
    if not isinstance(record, dict):
        raise InputError(where, f"holds {show(record)}, not a JSON object", "the object `stagefront optimise` writes")
    objectives = record.get("objectives")
    if (not isinstance(objectives, dict) or not objectives
            or any(n not in OBJECTIVES or s not in ("min", "max") for n, s in objectives.items())):
        raise InputError(where, f"'objectives' = {show(objectives)} is not usable",
                         f"a table of objective -> \"min\"|\"max\" with names from {', '.join(OBJECTIVES)}")
    _check_keys(where, record, RECORD_KEYS, "")
    for arch, info in (record.get("architectures") or {}).items():
        if arch not in STAGES:
            raise InputError(where, f"'architectures' names {show(arch)}, not an architecture", ", ".join(STAGES))
        if not isinstance(info, dict):
            raise InputError(where, f"'architectures'.{arch} = {show(info)} is not an object")
        _check_keys(where, info, ARCH_KEYS, f"'architectures'.{arch}.")
        blocked = info.get("blocked")
        if blocked is not None and not isinstance(blocked, dict):
            raise InputError(where, f"'architectures'.{arch}.'blocked' = {show(blocked)} is not an object or null")
        if isinstance(blocked, dict) and not _kind(blocked.get("closest_violations", []), "strings"):
            raise InputError(where, f"'architectures'.{arch}.'blocked'.'closest_violations' is not a list of strings")
    return record


def read_run_record(path, where: str | None = None) -> dict:
    """run.json read strictly (`optimise.files.inputs.load_json`) and checked."""
    where = where or str(path)
    return check_run_record(load_json(path, where), where)
