"""`stagefront pick`: filter a run's front by budgets, rank it, print the hand-off table.

Budgets are ``NAME OP VALUE`` with NAME a front.csv column and OP one of <=, >=, <, >, ==.
VALUE is read in the column's unit, named by the column's suffix: ``power_w<=200u`` is
200 uW, ``fp2_hz>=2meg`` 2 MHz, ``margin_headroom_pct>=10`` a margin of 10 % of its limit
(front.csv's margins are in percent). Columns in micrometres or percent (``*_um``,
``area_um2``, ``*_pct``) take plain numbers in that unit, since a scale letter would read
"100u" as 1e-4. Text columns (id, architecture,
``*_bulk``) and overall_front take ``==`` only. A budget on supply_sens_pct_per_v
applies to its magnitude, as the search minimises it. A row with no value in the column
(a role its architecture does not have) does not meet the budget.

Ranking is by the knee (default) or by one of the run's objectives in its sense, best
first. The knee is defined in `knee_distance`, always in the objective box of every design
in front.csv, so pick and the report name the same knee; budgets remove designs but never
change the box (pick's output says when the run's knee is among the removed).
"""
from __future__ import annotations

import difflib
import operator
import re
import sys
import textwrap
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import CAUTION
from ..files.errors import InputError
from ..files.units import parse_quantity
from ..search.runfolder import load_run
from . import handoff
from .compare import minimised

KNEE_WORDS = ("the knee (smallest Chebyshev distance to the ideal point of the objective box of every design in "
              "front.csv, each objective scaled to that box; the report's knee is the same)")

OPS = {"<=": operator.le, ">=": operator.ge, "<": operator.lt, ">": operator.gt, "==": operator.eq}
_SPLIT = re.compile(r"^(.*?)(<=|>=|==|!=|=<|=>|<>|<|>|=)(.*)$")
_TEXT_COLUMNS = ("id", "architecture")
_PLAIN = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
# Column suffix -> unit the VALUE is read in, and whether scale letters are allowed.
_SUFFIX_UNITS = (("_pct_per_v", "%/V", False), ("_um2", "um^2", False), ("_um", "um", False),
                 ("_pct", "%", False), ("_ohm", "ohm", True), ("_hz", "Hz", True), ("_a", "A", True),
                 ("_w", "W", True), ("_v", "V", True), ("_f", "F", True), ("_deg", "deg", False),
                 ("_v_per_s", "V/s", True), ("_s", "s", True))


@dataclass(frozen=True)
class Budget:
    """One parsed --where: `value` is an SI float (or text for a text column)."""

    text: str
    name: str
    op: str
    value: object
    magnitude: bool = False

    def mask(self, table: pd.DataFrame) -> np.ndarray:
        """Rows of `table` that meet the budget (a missing value never does)."""
        col = table[self.name]
        if isinstance(self.value, (str, bool)):
            return (col == self.value).to_numpy(dtype=bool)
        v = col.to_numpy(dtype=float)
        if self.magnitude:
            v = np.abs(v)
        with np.errstate(invalid="ignore"):
            return np.asarray(OPS[self.op](v, self.value)) & np.isfinite(v)


def column_unit(name: str) -> tuple[str, bool]:
    """(unit, scale letters allowed) of a numeric front.csv column, from its name."""
    for suffix, unit, scaled in _SUFFIX_UNITS:
        if name.endswith(suffix):
            return unit, scaled
    return "", True


def _is_text(table: pd.DataFrame, name: str) -> bool:
    return name in _TEXT_COLUMNS or name.endswith("_bulk") or not (
        pd.api.types.is_numeric_dtype(table[name]) or pd.api.types.is_bool_dtype(table[name]))


def parse_budget(text: str, table: pd.DataFrame, where: str = "--where") -> Budget:
    """Read one ``NAME OP VALUE`` budget against the columns of `table`.

    Parameters
    ----------
    text : str
        E.g. "power_w<=200u", "swing_v >= 2.5", "architecture==floating-loop".
    table : pandas.DataFrame
        The front.csv table; NAME must be one of its columns.
    where : str
        Option name for messages.

    Returns
    -------
    Budget

    Raises
    ------
    InputError
        No or an unknown operator, an unknown column (the message lists the columns), or a
        value that cannot be read in the column's unit.
    """
    columns = [c for c in table.columns]
    ops = ", ".join(OPS)
    m = _SPLIT.match(text)
    if m is None:
        raise InputError(f"{where} {text!r}", "has no comparison operator", f"NAME OP VALUE with OP one of {ops}",
                         "e.g. --where \"power_w<=200u\"")
    name, op, raw = m.group(1).strip(), m.group(2), m.group(3).strip()
    if op not in OPS:
        fix = {"=": "==", "=<": "<=", "=>": ">="}.get(op)
        raise InputError(f"{where} {text!r}", f"operator {op!r} is not supported", ops,
                         f"write {fix!r}" if fix else "state the budget as a bound, e.g. \"power_w<=200u\"")
    if name not in columns:
        close = difflib.get_close_matches(name, columns, n=1)
        raise InputError(f"{where} {text!r}", f"{name!r} is not a column of front.csv", ", ".join(columns),
                         f"did you mean {close[0]!r}?" if close else "name a column exactly as in front.csv")
    if raw == "":
        raise InputError(f"{where} {text!r}", f"no value after {op!r}", "a number in the column's unit, e.g. 200u")
    if name == "overall_front":
        flag = {"true": True, "yes": True, "1": True, "false": False, "no": False, "0": False}.get(raw.lower())
        if op != "==" or flag is None:
            raise InputError(f"{where} {text!r}", "overall_front takes == with a yes/no value",
                             "overall_front==true, overall_front==false")
        return Budget(text, name, op, flag)
    if _is_text(table, name):
        if op != "==":
            raise InputError(f"{where} {text!r}", f"{name} is text: only == compares it",
                             f"{name}==VALUE, e.g. {name}=={table[name].dropna().iloc[0]!r}"
                             if table[name].notna().any() else f"{name}==VALUE")
        return Budget(text, name, op, raw)
    unit, scaled = column_unit(name)
    try:
        if scaled:
            value = parse_quantity(raw, unit)
        else:
            plain = raw[:-len(unit)].strip() if unit and raw.endswith(unit) else raw
            if not _PLAIN.fullmatch(plain):
                raise ValueError(f"{raw!r} must be a plain number in {unit} (the column's unit); a scale letter "
                                 f"would change the meaning (\"100u\" is 1e-4)")
            value = float(plain)
    except (ValueError, TypeError) as err:
        raise InputError(f"{where} {text!r}", str(err)) from None
    return Budget(text, name, op, value, magnitude=(name == "supply_sens_pct_per_v"))


def apply_budgets(table: pd.DataFrame, budgets: list[Budget]) -> tuple[pd.DataFrame, list[tuple[Budget, int, int]]]:
    """Keep the rows that meet every budget; also returns (budget, rows in, rows out) per step."""
    trace = []
    for b in budgets:
        n_in = len(table)
        table = table[b.mask(table)]
        trace.append((b, n_in, len(table)))
    return table, trace


def knee_distance(F: np.ndarray, box: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Distances of each design to the ideal point of the front's own objective box.

    Each objective (as minimised, shape (n, m)) is scaled to [0, 1] over the designs given
    (or over the designs `box`, shape (p, m), when given: pick and the report pass every
    design of front.csv, so a filtered subset is measured in the same box):
    0 is the best value any of them reaches, 1 the worst; an objective on which they all
    agree scales to 0. The knee is the design with the smallest Chebyshev (largest-
    coordinate) distance to the ideal point (0, ..., 0): equivalently, the design whose
    *least* improved objective is improved the most from the worst value (max-min of the
    normalised improvement 1 - f). Ties are broken by the Euclidean distance. Both
    distances are in units of the box; the top design is never dominated by another of
    the designs given (a dominating design is no farther in either distance and strictly
    nearer in the Euclidean one).

    Parameters
    ----------
    F : numpy.ndarray
        Objective values, shape (n, m), all to be minimised.

    Returns
    -------
    chebyshev, euclid : numpy.ndarray
        Shape (n,) each.

    Notes
    -----
    This is the compromise solution of the global-criterion method with the L-infinity
    metric (K. Miettinen, Nonlinear Multiobjective Optimization, Kluwer, 1999, Part II,
    Sec. 2.1). The literature knows other knees, e.g. the largest bulge from the line
    through the extreme designs (I. Das, Struct. Optim. 18:107-115, 1999) or the sharpest
    trade-off angle (J. Branke et al., PPSN VIII, 2004); for a balanced first pick on a
    front of a few dozen designs in five objectives the box distance is simple and scale-free.
    """
    F = np.asarray(F, dtype=float)
    if F.size == 0:
        return np.zeros(len(F)), np.zeros(len(F))
    B = F if box is None or len(box) == 0 else np.asarray(box, dtype=float)
    lo, hi = B.min(axis=0), B.max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    Fn = (F - lo) / span
    return Fn.max(axis=1), np.sqrt((Fn ** 2).sum(axis=1))


def rank(table: pd.DataFrame, objectives: dict, by: str, box: pd.DataFrame | None = None) -> pd.DataFrame:
    """The rows, best first, with a `knee_distance` column (Chebyshev distance, see `knee_distance`).

    `by` is "knee" or an objective name; objectives are ranked in their sense (supply
    sensitivity in magnitude), ties broken by the knee distances, then by id. `box`: the
    rows whose objective ranges span the knee's box (default `table`; pick passes the
    whole front.csv).
    """
    F = minimised(table, objectives)
    cheb, eucl = knee_distance(F, None if box is None else minimised(box, objectives))
    ids = table["id"].astype(str).to_numpy()
    if by == "knee":
        order = np.lexsort((ids, eucl, cheb))
    else:
        order = np.lexsort((ids, eucl, cheb, F[:, list(objectives).index(by)]))
    out = table.iloc[order].copy()
    out["knee_distance"] = cheb[order]
    return out.reset_index(drop=True)


def _why_empty(table: pd.DataFrame, budgets: list[Budget]) -> str:
    """Which budget removed the last rows, and the nearest value among the rows it removed."""
    lines = [f"stagefront pick: no design meets the budgets ({len(table)} designs in front.csv):"]
    for b in budgets:
        kept = table[b.mask(table)]
        lines.append(f"  {b.text!r}: {len(table)} -> {len(kept)}")
        if len(kept) == 0:
            lines[-1] += "   <- removed the last designs"
            col = table[b.name]
            missing = int(col.isna().sum())
            if missing:
                lines.append(f"     {missing} of them have no {b.name} (their architecture has no such role)")
            present = col.dropna()
            if isinstance(b.value, (str, bool)):
                values = ", ".join(sorted({str(v) for v in present}))
                lines.append(f"     values present: {values or 'none'}")
            elif len(present):
                v = present.to_numpy(dtype=float)
                v = np.abs(v) if b.magnitude else v
                near = v.min() if b.op in ("<", "<=") else v.max() if b.op in (">", ">=") else \
                    v[np.argmin(np.abs(v - b.value))]
                what = {"<": "smallest", "<=": "smallest", ">": "largest", ">=": "largest"}.get(b.op, "nearest")
                unit, _ = column_unit(b.name)
                lines.append(f"     {what} {'|' + b.name + '|' if b.magnitude else b.name} among them: "
                             f"{near:.6g}{' ' + unit if unit else ''} (budget {b.value:.6g}{' ' + unit if unit else ''})")
            break
        table = kept
    return "\n".join(lines)


def pick_designs(run, where=(), by: str = "knee", count: int = 10, fmt: str = "md", stream=None,
                 err=None, wide: bool = False) -> int:
    """`stagefront pick`: filter, rank and print the hand-off table of a run folder.

    Parameters
    ----------
    run : str or Path
        Run folder (front.csv, run.json).
    where : sequence of str
        Budgets, all of which must hold (see the module docstring).
    by : str
        "knee" or one of the run's objectives.
    count : int
        How many designs to print, >= 1.
    fmt : str
        "md" (Markdown tables and notes) or "csv" (every front.csv column of the rows shown,
        on `stream`; notes on `err`).
    wide : bool
        One Markdown table with every column instead of the compact tables that fit a
        100-column terminal.
    stream, err : file-like, optional
        Table output (default stdout) and notes/explanations (default stderr).

    Returns
    -------
    int
        0, or 1 when no design is left (the reason is written to `err`).
    """
    stream, err = stream or sys.stdout, err or sys.stderr
    if count < 1:
        raise InputError("--count", f"{count} designs is too few", ">= 1")
    if fmt not in ("md", "csv"):
        raise InputError("--format", f"{fmt!r} is not a format", "md, csv")
    r = load_run(run)
    if by != "knee" and by not in r.objectives:
        hint = "filter other columns with --where" if by in r.table.columns else (
            f"did you mean {difflib.get_close_matches(by, list(r.objectives), n=1)[0]!r}?"
            if difflib.get_close_matches(by, list(r.objectives), n=1) else "")
        raise InputError("--by", f"{by!r} is neither 'knee' nor an objective of this run",
                         ", ".join(["knee"] + list(r.objectives)), hint)
    budgets = [parse_budget(w, r.table) for w in where]
    if len(r.table) == 0:
        err.write(f"stagefront pick: {r.path / 'front.csv'} has no designs: no architecture found a feasible "
                  f"one (run.json says what blocked each)\n")
        return 1
    kept, _ = apply_budgets(r.table, budgets)
    if len(kept) == 0:
        err.write(_why_empty(r.table, budgets) + "\n")
        return 1
    ranked = rank(kept, r.objectives, by, box=r.table)
    shown = ranked.head(count)
    order = KNEE_WORDS if by == "knee" \
        else f"{by} ({'smallest' if r.objectives[by] == 'min' else 'largest'}"  \
             f"{' magnitude' if by == 'supply_sens_pct_per_v' else ''} first)"
    note = (f"{len(shown)} of {len(kept)} designs meeting {'; '.join(b.text for b in budgets) or 'no budget'} "
            f"(of {len(r.table)} in {r.path / 'front.csv'}), ranked by {order}.")
    if budgets and len(kept) < len(r.table):
        knee = rank(r.table, r.objectives, "knee")["id"].iloc[0]
        note += (f" The box stays that of all {len(r.table)} designs (the budgets removed "
                 f"{len(r.table) - len(kept)}); the run's knee {knee} "
                 + ("meets the budgets." if knee in set(kept["id"]) else "does not meet the budgets."))
    if fmt == "csv":
        stream.write(handoff.wide(shown, r.objectives, "csv"))
        err.write(note + "\n")
        return 0
    stream.write(handoff.wide(shown, r.objectives) if wide else handoff.compact(shown, r.objectives))
    note += " Margins: worst over PVT in % of each limit (>= 0 met), as in front.csv."
    stream.write(f"\n{textwrap.fill(note, handoff.WIDTH)}\n\n{textwrap.fill(CAUTION, handoff.WIDTH)}\n")
    return 0
