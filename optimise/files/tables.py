"""Reading checked values out of parsed TOML tables: the shared helpers of every file
loader (technology, study, search, grid). Each raises InputError worded
where -> what -> allowed -> hint, naming the key as a table path.
"""
from __future__ import annotations

import datetime
import difflib
import math
import re
import tomllib

from .errors import InputError
from .inputs import read_input_text
from .units import parse_quantity


# Ceilings of the counts a file or an option sets ("common practice, no source"). A front
# needs tens to a few hundred designs per generation; a population of ten thousand already
# holds every metric at every PVT point (designs x points x about forty float64 arrays,
# ~150 MB at 45 points) each generation, and a hundred times that exhausts a laptop's
# memory. Evaluations (population x generations, per architecture) are capped so that a run
# ends in hours, not years; Monte Carlo draws are held in memory at once.
MAX_POPULATION = 10_000
MAX_GENERATIONS = 100_000
MAX_EVALUATIONS = 10**8
MAX_MONTECARLO = 1_000_000


def count(where: str, name: str, value, low: int, high: int, hint: str = "") -> int:
    """An integer `value` in [low, high] (not a boolean), else InputError naming `name`
    (a table path such as "[search] population" or an option such as "--population")."""
    if not isinstance(value, int) or isinstance(value, bool) or not low <= value <= high:
        raise InputError(where, f"{name + ' = ' if name else ''}{show(value)} is not allowed",
                         f"an integer from {low} to {high}", hint)
    return value


def check_evaluations(where: str, name: str, population: int, generations: int) -> None:
    """Population x generations at most MAX_EVALUATIONS, else InputError naming `name`."""
    if population * generations > MAX_EVALUATIONS:
        raise InputError(where, f"{name}: population {population} x generations {generations} = "
                                f"{population * generations:.3g} evaluations per architecture is too many",
                         f"at most {MAX_EVALUATIONS:.0e}", "fewer generations, or a smaller population")


def table_prefix(name: str) -> str:
    return f"[{name}] " if name else ""


def show(value) -> str:
    """Short description of a TOML value for messages."""
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (datetime.date, datetime.time)):
        return f"the date/time {value.isoformat()}"
    try:
        text = repr(value)
    except ValueError:  # an integer too long to print
        return "an integer too long to show"
    return text if len(text) <= 60 else text[:57] + "..."


def closest(key, choices) -> str:
    lower = {str(c).lower(): c for c in choices}
    near = difflib.get_close_matches(str(key).lower(), list(lower), n=1)
    return f"did you mean {lower[near[0]]!r}?" if near else ""


def check_keys(where: str, table: str, data: dict, allowed, required=(), hint: str = "") -> None:
    """Refuse unknown keys (suggesting the closest) first, then report missing ones."""
    for key in data:
        if key not in allowed:
            raise InputError(
                where, f"{table_prefix(table)}unknown key {show(key)}", ", ".join(allowed), closest(key, allowed) or hint
            )
    missing = [k for k in required if k not in data]
    if missing:
        raise InputError(
            where,
            f"{table_prefix(table)}missing required key{'s' if len(missing) > 1 else ''} {', '.join(missing)}",
            f"required keys{' in [' + table + ']' if table else ''}: {', '.join(required)}",
            hint,
        )


def sub_table(where: str, parent: str, key: str, value) -> dict:
    if not isinstance(value, dict):
        full = f"{parent}.{key}" if parent else key
        raise InputError(
            where, f"{table_prefix(parent)}{key} = {show(value)} is not a table", f"a table [{full}] of key = value lines"
        )
    return value


def number(where: str, table: str, key: str, value, unit: str, allow_inf: bool = False) -> float:
    """One numeric value: a TOML number or a suffixed string, in `unit`; nan is always
    refused, +-inf unless `allow_inf` (a field whose docs give inf a meaning)."""
    if isinstance(value, (bool, dict, list, datetime.date, datetime.time)):
        unit_text = f" in {unit}" if unit else ""
        allowed = f"a number{unit_text}, or a string with a scale letter (f p n u m k meg g t) such as \"2.5u\""
        raise InputError(where, f"{table_prefix(table)}{key} = {show(value)} is not a number", allowed)
    try:
        result = parse_quantity(value, unit)
    except (TypeError, ValueError) as err:
        raise InputError(where, f"{table_prefix(table)}{key}: {err}") from None
    if math.isnan(result) or (math.isinf(result) and not allow_inf):
        raise InputError(where, f"{table_prefix(table)}{key} = {show(value)} is not a finite number",
                         "a finite number (nan and inf are never allowed: they would switch a check off)")
    return result


def plain_number(value) -> bool:
    """Whether `value` is a number written without scale letter or unit (a TOML number, or
    a string such as "60"): such a size is micrometres whichever way it is written."""
    if isinstance(value, bool):
        return False
    if isinstance(value, (int, float)):
        return True
    return isinstance(value, str) and re.fullmatch(r"\s*[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?\s*",
                                                    value) is not None


# The largest drawn size read from a file: 10 cm, far beyond any device, so that a size
# written in the wrong unit (nanometres as micrometres, say) is refused, not taken
# ("common practice, no source"). front.csv is held to the same ceiling.
MAX_SIZE_M = 0.1


def micrometres(where: str, table: str, key: str, value) -> float:
    """A size in metres: a plain number (also as a string) is micrometres; a string with a
    scale letter ("60u", "0.35u") is metres. Sizes above MAX_SIZE_M are refused."""
    if plain_number(value):
        result = number(where, table, key, value, "") * 1e-6
    else:
        result = number(where, table, key, value, "m")
    if abs(result) > MAX_SIZE_M:
        raise InputError(where, f"{table_prefix(table)}{key} = {show(value)} is {result:g} m, larger than any device",
                         f"at most {MAX_SIZE_M * 1e6:g} um", "plain numbers are micrometres; \"60u\" is 60 um too")
    return result


def build(where: str, table: str, cls, kwargs: dict):
    """Construct a checked dataclass; its range errors get the file and table prefixed."""
    try:
        return cls(**kwargs)
    except ValueError as err:
        raise InputError(where, table_prefix(table) + " ".join(str(err).split())) from None


def read_toml(path, hint: str = "") -> dict:
    """Parse a TOML file. A missing or unreadable file, a folder, FIFO or device, a file
    over the size limit (`optimise.files.inputs`), text that is not UTF-8 and every TOML
    error become InputError naming the path; `hint` is added to a missing file's message."""
    where = str(path)
    text = read_input_text(path, where, hint=hint)
    return loads_toml(text, where)


def loads_toml(text: str, where: str) -> dict:
    """Parse TOML text (a file's contents, or a copy kept in run.json); every TOML error
    becomes InputError naming `where`."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise InputError(where, f"not valid TOML: {err}", hint="check quotes, brackets and '=' on that line") from None
    except (RecursionError, ValueError) as err:
        # tomllib lets these through for arrays nested thousands deep and for integers
        # longer than Python converts (4300 digits).
        reason = "arrays nested too deeply" if isinstance(err, RecursionError) else str(err).split(":")[0]
        raise InputError(where, f"not valid TOML: {reason}") from None
    return data
