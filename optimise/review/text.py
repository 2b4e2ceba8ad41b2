"""Text helpers the commands share: `markdown_table` (pick, compare, report, sweep summary)
and `show_objective` (an objective value with its unit).
"""
from __future__ import annotations

import numpy as np

from ..files.space import OBJECTIVES
from ..files.units import format_eng


def show_objective(name: str, value: float) -> str:
    """An objective value for the screen: engineering notation for SI units, else a plain number."""
    if not np.isfinite(value):
        return "n/a"
    unit = OBJECTIVES.get(name, ("", ""))[0]
    if unit in ("W", "V", "A", "Hz", "F"):
        return format_eng(value, unit)
    return f"{value:.4g} {unit}".rstrip()


def markdown_table(header, rows) -> str:
    """A GitHub-flavoured Markdown table; numbers right-aligned, text left-aligned."""
    def num(cell):
        try:
            float(str(cell).split()[0].rstrip("%"))
            return True
        except (ValueError, IndexError):
            return False

    rows = [[str(c) for c in r] for r in rows]
    header = [str(h) for h in header]
    right = [bool(rows) and all(num(r[k]) or r[k] in ("", "-", "n/a") for r in rows) for k in range(len(header))]
    width = [max([len(header[k])] + [len(r[k]) for r in rows]) for k in range(len(header))]

    def line(cells):
        return "| " + " | ".join(c.rjust(w) if rt else c.ljust(w) for c, w, rt in zip(cells, width, right)) + " |"

    rule = "|" + "|".join(("-" * (w + 1) + ":") if rt else ("-" * (w + 2)) for w, rt in zip(width, right)) + "|"
    return "\n".join([line(header), rule] + [line(r) for r in rows])
