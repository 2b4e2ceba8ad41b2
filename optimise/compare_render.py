"""The comparison as text: the tables of `stagefront compare` on the terminal and in compare.md.

Also the two text helpers other commands share: `markdown_table` (pick, report, sweep
summary) and `show_objective` (an objective value with its unit).
"""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from . import CAUTION
from .space import OBJECTIVES
from .units import format_eng

if TYPE_CHECKING:
    from .compare import Comparison


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


def _pct(x: float) -> str:
    """A share as a percentage that never rounds a non-zero share to 0 % or a partial one to 100 %."""
    if 0.0 < x < 0.005:
        return "<1 %"
    if 0.995 <= x < 1.0:
        return ">99 %"
    return f"{100 * x:.0f} %"


def _share(x: float, n: int) -> str:
    return f"{round(x * n)}/{n} ({_pct(x)})"


def _sections(c: Comparison):
    """(title, header, rows) of the tables shown on screen and in compare.md."""
    obj = c.objectives
    sense = ", ".join(f"{n} ({s})" for n, s in obj.items())
    groups_rows = [[f"[{k + 1}]", g.label, len(g.F), f"{n} ({_pct(n / len(g.F))})"]
                   for k, (g, n) in enumerate(zip(c.groups, c.on_union))]
    share = {(p.group_a, p.group_b): p.share_a_dominated_by_b for p in c.pairs.itertuples()}
    share.update({(p.group_b, p.group_a): p.share_b_dominated_by_a for p in c.pairs.itertuples()})
    matrix = [[f"[{k + 1}] {a.label}"] + ["-" if a is b else _share(share[(a.label, b.label)], len(a.F)) for b in c.groups]
              for k, a in enumerate(c.groups)]
    best = [[g.label] + [show_objective(n, c.best.loc[g.label, n]) for n in obj] for g in c.groups]
    verdicts = []
    for p in c.pairs.itertuples():
        who, _, rest = p.verdict.partition(" ")
        v = f"{ {'a': p.group_a, 'b': p.group_b}[who]} {rest}" if who in ("a", "b") else p.verdict
        verdicts.append([p.group_a, p.group_b, _share(p.share_a_dominated_by_b, p.designs_a),
                         _share(p.share_b_dominated_by_a, p.designs_b), v])
    return [
        (f"Groups (objectives: {sense})", ["#", "run/architecture", "designs", "on the union front"], groups_rows),
        ("Share of the row group's designs dominated by some design of the column group",
         ["dominated group"] + [f"by [{k + 1}]" for k in range(len(c.groups))], matrix),
        ("Best value each group reaches", ["run/architecture"] + list(obj), best),
        ("Pairs", ["a", "b", "a dominated by b", "b dominated by a", "verdict"], verdicts),
    ]


def _text_table(header, rows) -> str:
    rows = [[str(x) for x in r] for r in rows]
    width = [max([len(str(h))] + [len(r[k]) for r in rows]) for k, h in enumerate(header)]
    right = [all(x[:1].isdigit() or x[:1] in "-<>+." for x in (r[k] for r in rows)) for k in range(len(header))]
    lines = ["  " + "  ".join(str(h).rjust(w) if rt else str(h).ljust(w)
                              for h, w, rt in zip(header, width, right))]
    lines += ["  " + "  ".join(x.rjust(w) if rt else x.ljust(w) for x, w, rt in zip(r, width, right))
              for r in rows]
    return "\n".join(line.rstrip() for line in lines)


def render_text(c: Comparison) -> str:
    """The comparison as plain text for the terminal."""
    out = [f"compare: {len(c.runs)} run(s): " + ", ".join(f"{r.label} ({r.path})" for r in c.runs), ""]
    if not c.groups:
        out.append("no run has a feasible design: nothing to compare")
    for title, header, rows in (_sections(c) if c.groups else []):
        if rows:
            out += [title + ":", _text_table(header, rows), ""]
    out += [f"note: {n}" for n in c.notes]
    out.append(CAUTION)
    return "\n".join(out) + "\n"


def render_markdown(c: Comparison, plot: str | None = "compare.png") -> str:
    """The comparison as a Markdown document (compare.md)."""
    out = ["# Front comparison", "", "| run | folder | study | seed | population | generations |",
           "|---|---|---|--:|--:|--:|"]
    for r in c.runs:
        rec = r.record
        out.append(f"| {r.label} | {r.path} | {rec.get('study', '')} | {rec.get('seed', '')} | "
                   f"{rec.get('population', '')} | {rec.get('generations', '')} |")
    out.append("")
    out.append("Dominance is Pareto dominance in the objectives as searched (maximised ones negated, supply "
               "sensitivity in magnitude); a design equal to another is not dominated by it.")
    out.append("")
    for title, header, rows in (_sections(c) if c.groups else []):
        if rows:
            out += [f"## {title}", "", markdown_table(header, rows), ""]
    if c.notes:
        out += ["## Notes", ""] + [f"- {n}" for n in c.notes] + [""]
    if plot and c.groups:
        out += [f"![pairwise objectives of every group]({plot})", ""]
    out.append(CAUTION)
    return "\n".join(out) + "\n"
