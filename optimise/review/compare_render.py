"""`stagefront compare` output: the comparison's tables on the terminal and in compare.md, its
figure, and the command that writes compare.csv, compare.md and compare.png.
"""
from __future__ import annotations

import io
import sys
from pathlib import Path

from .. import CAUTION
from ..files.atomic import write_bytes, write_text
from ..files.errors import InputError
from .compare import Comparison, compare, group_table
from .text import markdown_table, show_objective

FILES = ("compare.csv", "compare.md", "compare.png")


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


def comparison_figure(c: Comparison):
    """Pairwise objective scatter of every group: colour per run, marker per architecture
    (`optimise.search.plots.objective_matrix` grouped by "run/architecture")."""
    from ..search import plots

    palette = [f"C{k}" for k in range(10)]
    run_colour = {r.label: palette[k % len(palette)] for k, r in enumerate(c.runs)}
    style = {g.label: (plots.STYLE.get(g.architecture, ("x", "black"))[0], run_colour[g.run]) for g in c.groups}
    return plots.objective_matrix(group_table(c, "run/architecture"), c.objectives,
                                  title="Fronts compared (colour: run, marker: architecture)",
                                  group="run/architecture", style=style)


def compare_runs(paths, out=None, overwrite: bool = False, stream=None) -> int:
    """`stagefront compare`: print the comparison; with `out`, write compare.csv/.md/.png.

    Parameters
    ----------
    paths : list of str or Path
        Run folders; their objectives (names and senses) must match.
    out : str or Path, optional
        Folder to write into. A folder that exists and is not empty is refused unless
        `overwrite`; only the three compare files are replaced, each atomically.
    overwrite : bool
        Allow writing into a non-empty `out`.
    stream : file-like, optional
        Where the text goes (default stdout).

    Returns
    -------
    int
        0.
    """
    stream = stream or sys.stdout
    out_dir = Path(out) if out else None
    if out_dir is not None:
        if out_dir.exists() and not out_dir.is_dir():
            raise InputError(f"--out {out_dir}", "exists and is not a folder", "a new or empty folder")
        if any(out_dir.resolve() == Path(p).resolve() for p in paths):
            raise InputError(f"--out {out_dir}", "is one of the run folders being compared",
                             "a separate folder", "write the comparison beside the runs, e.g. runs/compare")
        if out_dir.exists() and any(out_dir.iterdir()) and not overwrite:
            raise InputError(f"--out {out_dir}", "folder exists and is not empty",
                             "a new or empty folder", "choose another --out, or add --overwrite to replace "
                             + ", ".join(FILES) + " in it")
    c = compare(paths)
    stream.write(render_text(c))
    if out_dir is not None:
        buf = io.StringIO()
        c.pairs.to_csv(buf, index=False, float_format="%.17g")
        write_text(out_dir / "compare.csv", buf.getvalue())
        write_text(out_dir / "compare.md", render_markdown(c))
        from ..search.plots import png_bytes

        write_bytes(out_dir / "compare.png", png_bytes(comparison_figure(c)))
        stream.write(f"written: {', '.join(str(out_dir / f) for f in FILES)}\n")
    return 0
