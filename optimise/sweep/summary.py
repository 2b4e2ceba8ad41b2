"""The comparison across a sweep's cells: summary.csv, summary.md and fronts.png.

One row per cell (see `optimise.sweep.runner` for the columns); the fronts of every finished
cell on the same pairwise objective axes, one colour per cell and one marker per
architecture. Cells are compared with `optimise.review.compare` (dominance in the objectives as
searched), so "on joint front" means the same here as "on the union front" there.
"""
from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pandas as pd

from .. import CAUTION
from ..files.atomic import write_bytes, write_text
from .grid import Grid

DONE = ("finished", "reused")


def cell_row(grid: Grid, cell, state: dict, out: Path) -> dict:
    from ..review.compare import minimised
    from ..search.frontfile import read_front_checked, read_run_record

    row = {"cell": cell.name}
    row.update({k: (v if isinstance(v, (str, int, float)) else json.dumps(v)) for k, v in cell.values.items()})
    row.update(status=state["status"], reason=state.get("reason", ""), front_size=np.nan, hypervolume=np.nan,
               evaluations=np.nan, wall_time_s=state.get("wall_time_s", np.nan))
    run = out / "cells" / cell.name
    if state["status"] in DONE:
        record = read_run_record(run / "run.json")
        table = read_front_checked(run / "front.csv")
        archs = record.get("architectures", {})
        finals = [a["hypervolume"][-1] for a in archs.values() if a.get("hypervolume")]
        row.update(front_size=len(table), hypervolume=max(finals) if finals else 0.0,
                   evaluations=record.get("evaluations"), wall_time_s=record.get("wall_time_s"))
        if len(table) == 0:
            blocked = [f"{a}: '{b['blocked']['blocking_constraint']}' blocks the closest design"
                       for a, b in archs.items() if (b.get("blocked") or {}).get("blocking_constraint")]
            row["reason"] = "no feasible design" + (f" ({'; '.join(blocked)})" if blocked else "")
        F = minimised(table, grid.objectives) if len(table) else None
        for k, name in enumerate(grid.objectives):
            best = int(np.argmin(F[:, k])) if F is not None else None
            row[f"best_{name}"] = float(table[name].iloc[best]) if best is not None else np.nan
            row[f"best_{name}_id"] = str(table["id"].iloc[best]) if best is not None else ""
    row.update(run_folder=str(run), study_file=str(out / "studies" / f"{cell.name}.toml"))
    return row


def joint_front(grid: Grid, out: Path, rows: list[dict]):
    """Designs per cell that no design of any other cell dominates; the comparison of the cells."""
    from ..review.compare import compare

    done = [r for r in rows if r["status"] in DONE]
    if not done:
        return None
    c = compare([r["run_folder"] for r in done])
    counts = {}
    for g, n in zip(c.groups, c.on_union):
        counts[g.run] = counts.get(g.run, 0) + n
    labels = [r.label for r in c.runs]
    for r, lab in zip(done, labels):
        r["on_joint_front"] = counts.get(lab, 0)
    return c


def overlay_figure(c, cells: list[str]):
    """Every cell's front on the pairwise objective axes: one colour per cell, one marker
    per architecture (`optimise.search.plots.objective_matrix` grouped by "cell/architecture")."""
    import matplotlib

    from ..review.compare import group_table
    from ..search import plots

    # ten well-separated hues first (tab10), then the light shades of tab20: neighbouring
    # cells never get two shades of one hue
    palette = list(matplotlib.colormaps["tab10"].colors) + list(matplotlib.colormaps["tab20"].colors[1::2])
    colour = {name: palette[k % len(palette)] for k, name in enumerate(cells)}
    style = {g.label: (plots.STYLE.get(g.architecture, ("x", "black"))[0], colour.get(g.run, "black"))
             for g in c.groups}
    return plots.objective_matrix(group_table(c, "cell/architecture"), c.objectives,
                                  title="Fronts of the sweep's cells", group="cell/architecture", style=style)


def write_summary(grid: Grid, out: Path, rows: list[dict], comparison, montecarlo: int) -> None:
    from ..review.text import markdown_table, show_objective

    cols = (["cell"] + list(grid.axes) + ["status", "reason", "front_size", "hypervolume", "on_joint_front",
                                          "evaluations", "wall_time_s"]
            + [f"best_{n}{s}" for n in grid.objectives for s in ("", "_id")])
    extra = [k for r in rows for k in r if k.startswith("mc_") or k == "linear_sigma_pct"]
    cols += list(dict.fromkeys(extra)) + ["run_folder", "study_file"]
    table = pd.DataFrame(rows).reindex(columns=cols)
    buf = io.StringIO()
    table.to_csv(buf, index=False, float_format="%.17g")
    write_text(out / "summary.csv", buf.getvalue())

    axes = list(grid.axes)
    header = ["cell"] + axes + ["status", "front", "HV", "on joint front"] + [f"best {n}" for n in grid.objectives]
    if montecarlo:
        header += ["MC design", "MC sigma", "linear sigma"]
    body = []
    for r in rows:
        done = r["status"] in DONE
        line = [r["cell"]] + [r[a] for a in axes] + [r["status"], r["front_size"] if done else "-",
                                                      f"{r['hypervolume']:.4f}" if done else "-",
                                                      r.get("on_joint_front", "-") if done else "-"]
        line += [show_objective(n, r[f"best_{n}"]) if done and r["front_size"] else "-" for n in grid.objectives]
        if montecarlo:
            ok = "mc_sigma_pct" in r
            line += [r.get("mc_design_id", "-") or "-", f"{r['mc_sigma_pct']:.3f} %" if ok else "-",
                     f"{r['linear_sigma_pct']:.3f} %" if ok else "-"]
        body.append(line)
    md = [f"# Sweep {grid.name}", "", f"Grid file `{grid.path}`, base study `{grid.base}`, {len(rows)} cells: "
          + ", ".join(f"{sum(r['status'] == s for r in rows)} {s}" for s in ("finished", "reused", "failed",
                                                                             "not run")
                      if any(r["status"] == s for r in rows)) + ".", "",
          markdown_table(header, body), ""]
    trouble = [r for r in rows if r["reason"] or r.get("mc_error")]
    if trouble:
        md += ["## Failures and notes", ""]
        for r in trouble:
            mc = f"; Monte Carlo: {r['mc_error']}" if r.get("mc_error") else ""
            md.append(f"- `{r['cell']}` ({r['status']}): {r['reason']}{mc}")
        md.append("")
    md += ["Best values are the front.csv values of each cell's best design in that objective; \"on joint "
           "front\" counts a cell's designs that no design of any other cell dominates. The hypervolume box "
           "depends on the study's supply and targets, so hypervolumes compare only between cells that share "
           "them; cells at different supplies, loads or technologies answer different questions.", ""]
    if montecarlo:
        md += [f"Monte Carlo: {montecarlo} mismatch draws of each cell's knee design (`stagefront pick` knee) "
               "at tt (or the first corner), the nominal temperature and supply, against the linear estimate.", ""]
    if comparison is not None and comparison.groups:
        md += ["![fronts of every cell](fronts.png)", ""]
    md.append(CAUTION)
    write_text(out / "summary.md", "\n".join(md) + "\n")

    if comparison is not None and comparison.groups:
        from ..search.plots import png_bytes

        write_bytes(out / "fronts.png", png_bytes(overlay_figure(comparison, [r["cell"] for r in rows])))


def knee_rows(grid: Grid, out: Path, rows: list[dict]) -> dict:
    """Per finished cell with a front: (study, knee row) for Monte Carlo; the knee is
    `stagefront pick`'s (`optimise.review.pick.rank`)."""
    from ..files.study import load_study
    from ..review.pick import rank
    from ..search.frontfile import read_front_checked

    jobs = {}
    for r in rows:
        if r["status"] in DONE and r["front_size"]:
            knee = rank(read_front_checked(Path(r["run_folder"]) / "front.csv"), grid.objectives, "knee").iloc[0]
            r["mc_design_id"] = str(knee["id"])
            jobs[r["cell"]] = (load_study(r["study_file"]), knee.drop("knee_distance").to_dict())
    return jobs
