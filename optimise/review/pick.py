"""`stagefront pick`: filter a run's front by budgets, rank it, print the hand-off table.

Budgets are ``NAME OP VALUE`` with NAME a front.csv column and OP one of <=, >=, <, >, ==.
VALUE is read in the column's unit, named by the column's suffix: ``power_w<=200u`` is
200 uW, ``fp2_hz>=2meg`` 2 MHz, ``margin_headroom>=10%`` a relative margin of 0.1. Columns
in micrometres or percent (``*_um``, ``area_um2``, ``*_pct``) take plain numbers in that
unit, since a scale letter would read "100u" as 1e-4. Text columns (id, architecture,
``*_bulk``) and overall_front take ``==`` only. A budget on supply_sens_pct_per_v
applies to its magnitude, as the search minimises it. A row with no value in the column
(a role its architecture does not have) does not meet the budget.

Ranking is by the knee (default) or by one of the run's objectives in its sense, best
first. The knee is defined in `knee_distance`.
"""
from __future__ import annotations

import difflib
import io
import operator
import re
import sys
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import CAUTION
from ..files.errors import InputError
from ..files.space import OBJECTIVES
from ..files.units import parse_quantity
from ..search.runfolder import load_run
from .compare import minimised
from .text import markdown_table

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
    if name.startswith("margin_"):
        return "", True
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
        if name.startswith("margin_") and raw.endswith("%"):
            value = parse_quantity(raw[:-1].strip(), "") / 100.0
        elif scaled:
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


def knee_distance(F: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distances of each design to the ideal point of the front's own objective box.

    Each objective (as minimised, shape (n, m)) is scaled to [0, 1] over the designs given:
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
    lo, hi = F.min(axis=0), F.max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    Fn = (F - lo) / span
    return Fn.max(axis=1), np.sqrt((Fn ** 2).sum(axis=1))


def rank(table: pd.DataFrame, objectives: dict, by: str) -> pd.DataFrame:
    """The rows, best first, with a `knee_distance` column (Chebyshev distance, see `knee_distance`).

    `by` is "knee" or an objective name; objectives are ranked in their sense (supply
    sensitivity in magnitude), ties broken by the knee distances, then by id.
    """
    F = minimised(table, objectives)
    cheb, eucl = knee_distance(F)
    ids = table["id"].astype(str).to_numpy()
    if by == "knee":
        order = np.lexsort((ids, eucl, cheb))
    else:
        order = np.lexsort((ids, eucl, cheb, F[:, list(objectives).index(by)]))
    out = table.iloc[order].copy()
    out["knee_distance"] = cheb[order]
    return out.reset_index(drop=True)


def _roles(table: pd.DataFrame) -> list[str]:
    """Device roles with a value in at least one row, in front.csv order."""
    return [c[:-len("_w_um")] for c in table.columns if c.endswith("_w_um") and table[c].notna().any()]


def _objective_scale(name: str, values: np.ndarray) -> tuple[str, float]:
    """(unit label, factor) for one objective column: one engineering prefix for the whole column."""
    unit = OBJECTIVES[name][0]
    if unit not in ("W", "V", "A"):
        return unit, 1.0
    v = np.abs(values[np.isfinite(values)])
    top = float(v.max()) if v.size and v.max() > 0 else 1.0
    exp3 = min(max(3 * int(np.floor(np.log10(top) / 3)), -12), 0)
    return {-12: "p", -9: "n", -6: "u", -3: "m", 0: ""}[exp3] + unit, 10.0 ** -exp3


def hand_off(rows: pd.DataFrame, objectives: dict, fmt: str) -> str:
    """The hand-off table of ranked rows as Markdown ("md") or CSV ("csv").

    Columns: rank, id, architecture, overall front, W and L per role in um (a bulk tied to
    its source is marked; CSV gives a bulk column for such roles), bias currents in uA,
    resistors in kohm, Iq in uA, every objective in one unit per column, the knee
    distance, and every constraint margin in percent. Roles no shown row has are left out.
    """
    roles = _roles(rows)
    bulk_shown = {r for r in roles if f"{r}_bulk" in rows.columns and (rows[f"{r}_bulk"] == "source").any()}
    bias_a = [c for c in rows.columns if c.endswith("_a") and c not in ("iq_a", "iq_min_a", "iq_max_a")
              and not c.startswith(("iout_",)) and rows[c].notna().any()]
    bias_ohm = [c for c in rows.columns if c.endswith("_ohm") and rows[c].notna().any()]
    margins = [c for c in rows.columns if c.startswith("margin_")]
    scales = {n: _objective_scale(n, rows[n].to_numpy(dtype=float)) for n in objectives}
    md = fmt == "md"

    def g(v, digits=4):
        return "" if not np.isfinite(v) else f"{v:.{digits}g}"

    header = ["rank", "id", "architecture", "overall front"]
    for r in roles:
        header += [f"{r} W/L [um]"] if md else [f"{r} W [um]", f"{r} L [um]"] + (
            [f"{r} bulk"] if r in bulk_shown else [])
    header += [f"{c[:-2]} [uA]" for c in bias_a] + [f"{c[:-4]} [kohm]" for c in bias_ohm] + ["iq [uA]"]
    header += [f"{n} [{scales[n][0]}]" for n in objectives] + ["knee distance"]
    header += [f"{c} [%]" for c in margins]
    body = []
    for k, row in enumerate(rows.to_dict("records"), start=1):
        cells = [k, row["id"], row["architecture"], "yes" if bool(row.get("overall_front", False)) else "no"]
        for r in roles:
            w, l, bulk = float(row[f"{r}_w_um"]), float(row[f"{r}_l_um"]), row.get(f"{r}_bulk")
            if md:
                cell = "" if not np.isfinite(w) else f"{g(w)}/{g(l)}" + (" (bulk=source)" if bulk == "source" else "")
                cells.append(cell)
            else:
                cells += [g(w, 6), g(l, 6)] + ([bulk if isinstance(bulk, str) else ""] if r in bulk_shown else [])
        digits = 4 if md else 6
        cells += [g(float(row[c]) * 1e6, digits) for c in bias_a]
        cells += [g(float(row[c]) * 1e-3, digits) for c in bias_ohm]
        cells.append(g(float(row["iq_a"]) * 1e6, digits))
        cells += [g(float(row[n]) * scales[n][1], digits) for n in objectives]
        cells.append(f"{row['knee_distance']:.3f}")
        cells += [f"{100 * float(row[c]):.1f}" if np.isfinite(float(row[c])) else "" for c in margins]
        body.append(cells)
    if md:
        return markdown_table(header, body) + "\n"
    buf = io.StringIO()
    pd.DataFrame(body, columns=header).to_csv(buf, index=False)
    return buf.getvalue()


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
                 err=None) -> int:
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
        "md" (Markdown table and notes) or "csv" (CSV only on `stream`; notes on `err`).
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
    ranked = rank(kept, r.objectives, by)
    shown = ranked.head(count)
    order = "the knee (Chebyshev distance to the ideal point of the box of the designs kept)" if by == "knee" \
        else f"{by} ({'smallest' if r.objectives[by] == 'min' else 'largest'}"  \
             f"{' magnitude' if by == 'supply_sens_pct_per_v' else ''} first)"
    note = (f"{len(shown)} of {len(kept)} designs meeting {'; '.join(b.text for b in budgets) or 'no budget'} "
            f"(of {len(r.table)} in {r.path / 'front.csv'}), ranked by {order}.")
    stream.write(hand_off(shown, r.objectives, fmt))
    if fmt == "md":
        stream.write(f"\n{note} Sizes W/L in um; margins are relative to each target (>= 0 met).\n\n{CAUTION}\n")
    else:
        err.write(note + "\n")
    return 0
