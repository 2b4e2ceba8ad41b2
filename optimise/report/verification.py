"""The simulator verification in the report: RUN/verify.csv read back, and its section.

`stagefront verify` writes verify.csv; the report reads it loosely (column names matched
case-blind with a few synonyms), so a table edited or produced by hand still shows. Errors
are simulator minus model: relative for currents, absolute volts for headrooms.
"""
from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..files.units import format_eng
from .render import Cell, Details, Table, short

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
    are kept as they are. Returns (None, note) when the file is absent or unreadable.
    """
    path = Path(run_path) / "verify.csv"
    if not path.is_file():
        return None, "Verification has not been run: this run folder has no verify.csv (`stagefront verify RUN`)."
    try:
        table = pd.read_csv(path, keep_default_na=False, na_values=[""])
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
    done = int(pd.to_numeric(table["error"], errors="coerce").notna().sum()) if "error" in table else len(table)
    return table, (f"From {path.name}: {len(table)} comparisons, {done} with a simulator result"
                   + (f", {len(table) - done} without (see the note column)." if done < len(table) else "."))


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


def verification_blocks(verify: tuple) -> list:
    """The blocks of the verification section from read_verification's (table, note)."""
    table, note = verify
    if table is None:
        return [note]
    records = table.to_dict("records")
    out = [note + " Errors are simulator minus model: relative for currents (%), in millivolts for voltages "
                  "(headrooms)" + (", in degrees for the AC bench's phase margin (its unity-gain frequency "
                                   "relative)" if "error_unit" in table and (table["error_unit"] == "deg").any()
                                   else "") + "."]
    if {"metric", "error"} <= set(table.columns) and len(table):
        rows = []
        for metric in dict.fromkeys(table["metric"]):
            rs = [r for r in records if r["metric"] == metric and isinstance(r["error"], (int, float))
                  and np.isfinite(r["error"])]
            if not rs:
                rows.append([Cell(str(metric)), Cell("0", 0), Cell("", None), Cell("", None), Cell("")])
                continue
            err = np.array([float(r["error"]) for r in rs])
            w = rs[int(np.argmax(np.abs(err)))]
            at = " ".join(str(w[c]) for c in ("id", "corner") if c in w)
            at += "".join(f" {short(w[c])} {u}" for c, u in (("temp_c", "C"), ("vdd_v", "V")) if c in w)
            rows.append([Cell(str(metric)), Cell(str(len(rs)), len(rs)),
                         Cell(_show_error(float(np.median(np.abs(err))), _volts(w), _deg(w)).lstrip("+"),
                              float(np.median(np.abs(err)))),
                         Cell(_show_error(float(w["error"]), _volts(w), _deg(w)), abs(float(w["error"]))), Cell(at)])
        out.append(Table("verification-summary", [("metric", "metric"), ("points", "points"),
                                                  ("median", "median |error|"), ("worst", "worst error"),
                                                  ("at", "worst at")], rows))
    shown = [c for c in table.columns if c != "error_unit"]
    header = [(c, {"temp_c": "temp [C]", "vdd_v": "vdd [V]"}.get(c, c)) for c in shown]
    out.append(Details(f"All {len(records)} comparisons",
                       Table("verification", header, [[_verify_cell(c, r) for c in shown] for r in records])))
    return out
