"""Run folders: front.csv (one row per Pareto design) and run.json (what was run, how it went).

front.csv columns: id, architecture, overall_front (not dominated by any other
architecture's row either), every variable (`ROLE_w_um`, `ROLE_l_um`, `ROLE_bulk`,
`BIAS_a` or `BIAS_ohm`; empty where an architecture has no such role), every summary
metric under its contract name, and every constraint margin (`margin_NAME_pct`: the
worst margin over PVT in percent of its limit, >= 0 when met).

Numbers are clean: W and L as the drawing grid gives them (micrometres, rounded to the
picometre, so 21.08 and never 21.080000000000002), bias values to 6 significant digits,
and the rows are evaluated with exactly these values, so `stagefront evaluate` on a
row's design (`stagefront export-design`) reproduces its metrics. Metrics are written in
their shortest exact (round-trip) form.
"""
from __future__ import annotations

import io
import json
import platform
from pathlib import Path

import numpy as np
import pandas as pd

from models.evaluate import Design, Result, evaluate
from models.stages import get_stage

from ..files.atomic import write_text
from ..files.study import Study
from .nsga import ArchRun, non_dominated
from .problem import constraint_names, objective_values

PREFIX = {"floating-loop": "fl", "fixed-bias": "fb", "follower": "fo"}
UNIT_SUFFIX = {"A": "a", "ohm": "ohm"}
METRICS = ("iq_a", "iq_min_a", "iq_max_a", "power_w", "headroom_high_v", "headroom_low_v", "swing_v",
           "iout_source_a", "iout_sink_a", "ab_ratio", "area_um2", "iq_sigma_pct", "supply_sens_pct_per_v",
           "vdd_min_v", "fp2_hz", "c_drive_f", "power_max_w", "iout_peak_a", "delivers_load")
# With an [amplifier] table: the worst case over PVT of the stage inside its amplifier.
AMPLIFIER_COLUMNS = ("ugf_hz", "phase_margin_deg", "p1_hz", "fint_hz", "fz_hz", "slew_v_per_s", "gate_time_s")
# Significant digits of a bias value in front.csv (far below any model's accuracy).
BIAS_DIGITS = 6


def margin_column(name: str) -> str:
    """front.csv column of a constraint's margin, in percent of its limit."""
    return f"margin_{name}_pct"


def clean_design(design: Design) -> Design:
    """The design with sizes rounded to the picometre (the grid's own decimals in um)
    and bias values (and a searched compensation capacitor) to BIAS_DIGITS significant digits, converted the way a design file
    or a front.csv row is read back (micrometres x 1e-6), so evaluating it reproduces
    what front.csv says."""
    def um(x):
        return np.round(np.asarray(x, dtype=float) * 1e6, 6) * 1e-6

    def digits(b):
        return np.array([float(f"{v:.{BIAS_DIGITS}g}") for v in np.asarray(b, dtype=float)])

    return Design(design.architecture, {k: um(v) for k, v in design.w.items()},
                  {k: um(v) for k, v in design.l.items()}, {k: digits(b) for k, b in design.bias.items()},
                  design.tied, None if design.cc is None else digits(design.cc))


def metric_columns(study: Study) -> tuple[str, ...]:
    """The metric columns of front.csv: METRICS, and AMPLIFIER_COLUMNS when the study
    describes the amplifier."""
    return METRICS + (AMPLIFIER_COLUMNS if study.targets.amplifier is not None else ())


def variable_columns(archs) -> list[str]:
    """Variable column names for the architectures, in registry order."""
    cols = []
    for arch in archs:
        stage = get_stage(arch)
        for role in stage.ROLES:
            for c in (f"{role}_w_um", f"{role}_l_um", f"{role}_bulk"):
                if c not in cols:
                    cols.append(c)
        for name, unit in stage.BIAS.items():
            c = f"{name}_{UNIT_SUFFIX[unit]}"
            if c not in cols:
                cols.append(c)
    return cols


def design_rows(design: Design) -> list[dict]:
    """Variable cells of every design of a population (sizes in micrometres)."""
    stage = get_stage(design.architecture)
    rows = []
    for i in range(design.size):
        row = {}
        for role in stage.ROLES:
            row[f"{role}_w_um"] = round(float(design.w[role][i]) * 1e6, 6)
            row[f"{role}_l_um"] = round(float(design.l[role][i]) * 1e6, 6)
            row[f"{role}_bulk"] = "source" if role in design.tied else "rail"
        for name, unit in stage.BIAS.items():
            row[f"{name}_{UNIT_SUFFIX[unit]}"] = float(design.bias[name][i])
        if design.cc is not None:  # the searched compensation capacitor
            row["cc_f"] = float(design.cc[i])
        rows.append(row)
    return rows


def design_from_row(row: dict | pd.Series) -> Design:
    """The one-element Design of a front.csv row (inverse of design_rows)."""
    arch = row["architecture"]
    stage = get_stage(arch)
    w = {r: np.array([row[f"{r}_w_um"] * 1e-6]) for r in stage.ROLES}
    l = {r: np.array([row[f"{r}_l_um"] * 1e-6]) for r in stage.ROLES}
    tied = frozenset(r for r in stage.ROLES if row[f"{r}_bulk"] == "source")
    bias = {b: np.array([float(row[f"{b}_{UNIT_SUFFIX[u]}"])]) for b, u in stage.BIAS.items()}
    cc = row.get("cc_f") if hasattr(row, "get") else None
    cc = np.array([float(cc)]) if cc is not None and np.isfinite(float(cc)) else None
    return Design(arch, w, l, bias, tied, cc)


def front_table(study: Study, settings, runs: list[ArchRun]) -> tuple[pd.DataFrame, dict]:
    """front.csv rows of every architecture's feasible non-dominated set, re-evaluated.

    Returns the table and, per architecture, the evaluation Result of its rows."""
    frames, results = [], {}
    cnames = constraint_names(study)
    for run in runs:
        space = settings.spaces[run.architecture]
        X = run.X[run.feasible] if run.X is not None and len(run.X) else np.empty((0, len(space.free)))
        if len(X) == 0:
            continue
        design = clean_design(space.decode(X))
        rows = design_rows(design)
        # Grid snapping can merge distinct X into one design: keep the first of each.
        seen, keep = set(), []
        for i, r in enumerate(rows):
            key = tuple(sorted(r.items()))
            if key not in seen:
                seen.add(key)
                keep.append(i)
        design = design.take(np.array(keep))
        res = evaluate(design, study.tech, study.conditions, study.targets)
        F = objective_values(res, settings.objectives)
        # Sorted by the objectives; only rows that stay feasible and non-dominated after snapping.
        order = np.lexsort(F.T[::-1])
        order = order[(non_dominated(F) & res.feasible)[order]]
        design, res = design.take(order), res.take(order)
        results[run.architecture] = res
        df = pd.DataFrame(design_rows(design))
        df.insert(0, "architecture", run.architecture)
        df.insert(0, "id", [f"{PREFIX[run.architecture]}-{k + 1:03d}" for k in range(len(df))])
        for name in metric_columns(study):
            df[name] = res.summary[name]
        for name in cnames:
            if name != "converged":  # every row converged at every PVT point, or it would not be feasible
                df[margin_column(name)] = 100.0 * np.asarray(res.margins[name], dtype=float)
        df["_F"] = list(objective_values(res, settings.objectives))
        frames.append(df)
    if not frames:  # nothing feasible: keep the full header so the file still documents its columns
        amp = study.targets.amplifier
        cols = ["id", "architecture", "overall_front"] + variable_columns(study.architectures) \
            + (["cc_f"] if amp is not None and amp.cc_bounds is not None else []) + list(metric_columns(study))
        cols += [margin_column(n) for n in cnames if n != "converged"]
        return pd.DataFrame(columns=cols), results
    table = pd.concat(frames, ignore_index=True)
    F_all = np.stack(table.pop("_F").to_list())
    table.insert(2, "overall_front", non_dominated(F_all))
    cols = ["id", "architecture", "overall_front"] + [c for c in variable_columns(study.architectures) + ["cc_f"]
                                                       if c in table.columns]
    cols += [c for c in table.columns if c not in cols]
    return table[cols], results


def write_front(path: Path, table: pd.DataFrame) -> None:
    """front.csv, atomically; floats in their shortest exact (round-trip) form (the
    variables are clean numbers already: see `clean_design`)."""
    buf = io.StringIO()
    table.to_csv(buf, index=False)
    write_text(path, buf.getvalue())


def read_front(path) -> pd.DataFrame:
    """front.csv back as a table (keeps empty cells as NaN for absent roles)."""
    return pd.read_csv(path, keep_default_na=True)


def versions() -> dict:
    """Versions of Python and the libraries that shape the numbers."""
    import matplotlib
    import pymoo
    import scipy

    from .. import __version__

    return {"stagefront": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "pymoo": pymoo.__version__, "pandas": pd.__version__,
            "matplotlib": matplotlib.__version__, "platform": platform.platform()}


def run_record(study: Study, settings, runs: list[ArchRun], seed: int, population: int, generations: int,
               status: str, blocked: dict, wall: float, front_sizes: dict) -> dict:
    """The run.json object."""
    from .nsga import normaliser

    ideal, ref = normaliser(study, settings)
    return {
        "study": str(Path(study.path).resolve()),
        "study_toml": Path(study.path).read_text(),
        "technology": str(Path(study.tech_path).resolve()),
        "technology_toml": Path(study.tech_path).read_text(),
        "seed": seed,
        "population": population,
        "generations": generations,
        "objectives": settings.objectives,
        "objective_notes": "supply_sens_pct_per_v is minimised in magnitude; front.csv keeps its sign",
        "constraints": list(constraint_names(study)),
        "constraint_notes": "every front.csv row converged at every PVT point, so 'converged' has no margin column",
        "hypervolume_box": {"ideal": ideal.tolist(), "reference": ref.tolist(),
                            "note": "objectives as minimised (maximised ones negated), normalised to this box"},
        "status": status,
        "wall_time_s": wall,
        "evaluations": int(sum(r.evaluations for r in runs)),
        "versions": versions(),
        "architectures": {
            r.architecture: {"evaluations": r.evaluations, "generations": r.generations,
                             "wall_time_s": r.wall_time_s, "finished": r.finished,
                             "hypervolume": r.hypervolume, "feasible_per_generation": r.feasible_per_generation,
                             "front_size": int(front_sizes.get(r.architecture, 0)),
                             "blocked": blocked.get(r.architecture)}
            for r in runs
        },
    }


def write_json(path: Path, obj: dict) -> None:
    write_text(path, json.dumps(obj, indent=1, sort_keys=False) + "\n")


def closest_design_report(study: Study, settings, run: ArchRun) -> dict:
    """Why an architecture has no feasible design: the least-violating design's
    violations and which constraint most of the final set misses."""
    space = settings.spaces[run.architecture]
    cv = np.sum(np.maximum(run.G, 0.0), axis=1)
    best = int(np.argmin(cv))
    res: Result = evaluate(space.decode(run.X[best:best + 1]), study.tech, study.conditions, study.targets)
    names = constraint_names(study)
    share = {n: float(np.mean(run.G[:, k] > 0)) for k, n in enumerate(names)}
    worst = names[int(np.argmax(run.G[best]))]
    return {"closest_violations": res.violations[0], "blocking_constraint": worst,
            "closest_margin": float(-run.G[best].max()), "closest_margin_pct": float(-100.0 * run.G[best].max()),
            "share_of_final_set_violating": share}
