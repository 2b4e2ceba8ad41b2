"""The simulator verification in the report: RUN/verify.csv read back, and its section.

`stagefront verify` writes verify.csv; the report reads it loosely (column names matched
case-blind with a few synonyms), so a table edited or produced by hand still shows. Errors
are simulator minus model: relative for currents, absolute volts for headrooms.
"""
from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..files.errors import InputError
from ..files.inputs import MAX_TABLE_BYTES, load_json, read_input_text
from ..files.units import format_eng
from .render import Cell, Details, Link, Table, short

_VERIFY_NAMES = {
    "id": ("id", "design", "design_id", "row"),
    "architecture": ("architecture", "arch"),
    "corner": ("corner", "process_corner"),
    "temp_c": ("temp_c", "temp", "temperature", "temperature_c", "t_c"),
    "vdd_v": ("vdd_v", "vdd", "supply", "supply_v"),
    "metric": ("metric", "quantity", "name", "what"),
    "model": ("model", "stagefront", "model_value", "predicted", "estimate"),
    "simulator": ("simulator", "sim", "simulated", "simulator_value", "spice", "ngspice"),
    "error": ("error", "err", "rel_error", "relative_error", "error_rel", "error_abs", "abs_error", "deviation",
              "difference", "diff"),
    "error_unit": ("error_unit", "unit", "error_kind", "kind"),
    "note": ("note", "notes", "message", "comment"),
}


def read_verification(run_path: Path) -> tuple:
    """RUN/verify.csv as (table with canonical column names where recognised, note).

    Column names are matched loosely (case, spaces and a few synonyms); unknown columns
    are kept as they are. Returns (None, note) when the file is absent or not CSV.

    Raises
    ------
    InputError
        verify.csv is not a regular file, is too large (`optimise.files.inputs`), or a cell
        of a numeric column (temp_c, vdd_v, model, simulator, error) is neither empty nor a
        finite number; the message names the file, line and column.
    """
    path = Path(run_path) / "verify.csv"
    if not path.exists():
        return None, "Verification has not been run: this run folder has no verify.csv (`stagefront verify RUN`)."
    text = read_input_text(path, str(path), MAX_TABLE_BYTES)
    try:
        table = pd.read_csv(io.StringIO(text), keep_default_na=False, na_values=[""], dtype=str)
    except (OSError, ValueError) as err:
        return None, f"verify.csv is present but cannot be read ({err}); it is left out."
    rename, taken = {}, set()
    for col in table.columns:
        norm = re.sub(r"[^a-z0-9]+", "_", str(col).strip().lower()).strip("_")
        for canon, names in _VERIFY_NAMES.items():
            if canon not in taken and norm in names:
                rename[col] = canon
                taken.add(canon)
                break
    table = table.rename(columns=rename)
    order = [c for c in _VERIFY_NAMES if c in table.columns] + [c for c in table.columns if c not in _VERIFY_NAMES]
    table = table[order]
    for col in _NUMERIC:
        if col in table:
            table[col] = [_finite(v, path, k + 2, col) for k, v in enumerate(table[col])]
    done = int(pd.to_numeric(table["error"], errors="coerce").notna().sum()) if "error" in table else len(table)
    return table, (f"From {path.name}: {len(table)} comparisons, {done} with a simulator result"
                   + (f", {len(table) - done} without (see the note column)." if done < len(table) else "."))


_NUMERIC = ("temp_c", "vdd_v", "model", "simulator", "error")
_NUMBER = re.compile(r"\s*[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?\s*")


def _finite(value, path: Path, line: int, col: str) -> float:
    """A numeric cell of verify.csv: NaN when empty, else a finite number (InputError otherwise)."""
    if value is None or (isinstance(value, float) and np.isnan(value)) or not str(value).strip():
        return np.nan
    if not _NUMBER.fullmatch(str(value)):
        raise InputError(str(path), f"line {line}, column {col}: {str(value)[:40]!r} is not a finite number",
                         "a finite decimal number, or empty where the simulator gave no result")
    return float(value)


def verification_caveat(run_path: Path) -> str:
    """The caveat `stagefront verify` left in RUN/verify.json (which models ngspice ran),
    or "" when there is none or the file cannot be read."""
    try:
        data = load_json(Path(run_path) / "verify.json")
    except (OSError, InputError):
        return ""
    caveat = data.get("caveat") if isinstance(data, dict) else None
    return caveat.removeprefix("note: ") if isinstance(caveat, str) else ""


def _volts(row: dict) -> bool:
    """True when the row's error is an absolute voltage (headrooms), False when relative."""
    unit = str(row.get("error_unit", "")).strip().lower()
    if unit in ("v", "volt", "volts", "abs", "absolute"):
        return True
    if unit in ("rel", "relative", "1", "fraction"):
        return False
    metric = row.get("metric")
    return isinstance(metric, str) and (metric.endswith("_v") or "headroom" in metric)


def _show_error(v: float, volts: bool, deg: bool = False) -> str:
    if deg:  # the AC bench's phase margin, compared in degrees
        return f"{v:+.3g} deg"
    return f"{v * 1e3:+.3g} mV" if volts else f"{100 * v:+.3g} %"


def _deg(row: dict) -> bool:
    return str(row.get("error_unit", "")).strip().lower() == "deg"


def _verify_cell(col: str, row: dict) -> Cell:
    value, metric = row[col], row.get("metric")
    if isinstance(value, (int, float, np.number)) and not isinstance(value, bool):
        v = float(value)
        if not np.isfinite(v):
            return Cell("", None)
        if col == "error":
            return Cell(_show_error(v, _volts(row), _deg(row)), abs(v))
        if col in ("model", "simulator") and isinstance(metric, str):
            unit = {"_a": "A", "_v": "V", "_w": "W", "_hz": "Hz", "_f": "F"}.get(metric[metric.rfind("_"):], "")
            return Cell(format_eng(v, unit) if unit else short(v, 6), v)
        return Cell(short(v, 6), v)
    return Cell("" if value is None else str(value))


# The largest errors listed one by one beside the summary; the rest stays in verify.csv.
WORST_ROWS = 20


def _at(row: dict) -> str:
    at = " ".join(str(row[c]) for c in ("id", "corner") if c in row)
    return at + "".join(f" {short(row[c])} {u}" for c, u in (("temp_c", "C"), ("vdd_v", "V")) if c in row)


def _stats(rs: list) -> list:
    """Cells: points, median |error|, 95th percentile |error|, worst error, rows holding it."""
    err = np.array([float(r["error"]) for r in rs])
    mag = np.abs(err)
    volts, deg = _volts(rs[0]), _deg(rs[0])
    top = float(mag.max())
    holders = [r for r, m in zip(rs, mag) if m == top]
    at = "; ".join(_at(r) for r in holders[:3]) + (f" (+{len(holders) - 3} more)" if len(holders) > 3 else "")
    worst = float(err[int(np.argmax(mag))])
    med, p95 = float(np.median(mag)), float(np.percentile(mag, 95))
    return [Cell(str(len(rs)), len(rs)), Cell(_show_error(med, volts, deg).lstrip("+"), med),
            Cell(_show_error(p95, volts, deg).lstrip("+"), p95), Cell(_show_error(worst, volts, deg), abs(worst)),
            Cell(at)]


def verification_blocks(verify: tuple, href: str = "verify.csv", caveat: str = "") -> list:
    """The blocks of the verification section from read_verification's (table, note).

    Per metric, over all corners and per corner: the points compared, the median and
    95th percentile of |error|, the worst error and the rows holding it; then the
    WORST_ROWS largest errors. Every comparison stays in verify.csv (linked as `href`),
    so the page stays small whatever the size of the table.
    """
    table, note = verify
    if table is None:
        return [note]
    records = table.to_dict("records")
    out = [Link(note + " Errors are simulator minus model: relative for currents (%), in millivolts for voltages "
                       "(headrooms)" + (", in degrees for the AC bench's phase margin (its unity-gain frequency "
                                      "relative)" if "error_unit" in table and (table["error_unit"] == "deg").any()
                                      else "") + ". Every comparison is in", href, ".")]
    if caveat:
        out.append(caveat)
    if not ({"metric", "error"} <= set(table.columns) and len(table)):
        return out
    good = [r for r in records if isinstance(r["error"], (int, float)) and np.isfinite(r["error"])]
    rows = []
    for metric in dict.fromkeys(table["metric"]):
        mine = [r for r in good if r["metric"] == metric]
        if not mine:
            rows.append([Cell(str(metric)), Cell("all")] + [Cell("0", 0)] + [Cell("", None)] * 3 + [Cell("")])
            continue
        rows.append([Cell(str(metric)), Cell("all")] + _stats(mine))
        if "corner" in table.columns:
            for corner in dict.fromkeys(r["corner"] for r in mine):
                rows.append([Cell(str(metric)), Cell(str(corner))] + _stats([r for r in mine if r["corner"] == corner]))
    out.append(Table("verification-summary", [("metric", "metric"), ("corner", "corner"), ("points", "points"),
                                              ("median", "median |error|"), ("p95", "95th percentile |error|"),
                                              ("worst", "worst error"), ("at", "worst at (design, PVT)")], rows))
    # Relative and absolute errors differ in scale: rank each metric's rows by its own worst.
    scale = {m: max(abs(float(r["error"])) for r in good if r["metric"] == m) or 1.0
             for m in dict.fromkeys(r["metric"] for r in good)}
    worst = sorted(good, key=lambda r: -abs(float(r["error"])) / scale[r["metric"]])[:WORST_ROWS]
    shown = [c for c in table.columns if c != "error_unit"]
    header = [(c, {"temp_c": "temp [C]", "vdd_v": "vdd [V]"}.get(c, c)) for c in shown]
    out.append(Details(f"The {len(worst)} largest errors (each relative to its metric's worst) of {len(records)} "
                       f"comparisons", Table("verification", header, [[_verify_cell(c, r) for c in shown]
                                                                      for r in worst])))
    return out
