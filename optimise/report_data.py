"""Every number the report shows, computed once from the run folder alone.

The study and technology are read back from the copies run.json keeps (`study_of_run`);
the picked designs are the knee, the best per objective and the next by knee distance
(`pick_rows`); `gather` solves the knee at every PVT point, confirms its mismatch spread by
Monte Carlo (`optimise.montecarlo`), sweeps the picked designs' Iq over the supply range and
reads RUN/verify.csv (`optimise.report_verify`).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from models.evaluate import Conditions, Design, Result, evaluate

from .compare import load_run
from .errors import InputError
from .export import design_from_row
from .montecarlo import Confirmation, confirm
from .pick import rank
from .report_verify import read_verification
from .study import Study, load_study, study_from_dict
from .tables import loads_toml
from .techfile import tech_from_dict

MC_SAMPLES = 5000
SWEEP_POINTS = 13
# Objective name -> (column label, unit shown, factor from SI).
OBJ_SHOW = {"power_w": ("power", "uW", 1e6), "swing_v": ("swing", "V", 1.0), "area_um2": ("area", "um^2", 1.0),
            "iq_sigma_pct": ("Iq sigma", "%", 1.0), "supply_sens_pct_per_v": ("supply sens.", "%/V", 1.0)}


def study_of_run(run_path: Path, record: dict) -> Study:
    """The run's study, rebuilt from the study and technology text run.json keeps.

    Falls back to the study path run.json names when the copies are absent.
    """
    where = str(run_path / "run.json")
    study_text, tech_text = record.get("study_toml"), record.get("technology_toml")
    if not isinstance(study_text, str) or not isinstance(tech_text, str):
        path = Path(str(record.get("study", "")))
        if not path.is_file():
            raise InputError(where, f"keeps no copy of the study and its study file {str(path)!r} is not found",
                             hint="re-run `stagefront optimise` with this version")
        return load_study(path)
    path = Path(str(record.get("study", "study")))
    path = path if path.stem else Path("study.toml")
    try:
        tech = tech_from_dict(loads_toml(tech_text, where), where)
        return study_from_dict(loads_toml(study_text, where), path, tech)
    except InputError as err:
        raise InputError(where, f"its copy of the study cannot be read again: {err.what}", err.allowed,
                         err.hint) from None


def populations(rows: pd.DataFrame) -> list[tuple[list, Design]]:
    """Front rows as populations: (row ids, Design) per architecture and set of bulk ties."""
    groups: dict = {}
    for _, row in rows.iterrows():
        try:
            d = design_from_row(row)
        except KeyError as err:
            raise InputError("front.csv", f"has no column {err.args[0]!r} for the {row['architecture']} design "
                                          f"{row['id']}", hint="re-run the search with this version") from None
        groups.setdefault((d.architecture, d.tied), []).append((row["id"], d))
    out = []
    for (arch, tied), members in groups.items():
        ds = [d for _, d in members]
        cat = lambda attr: {k: np.concatenate([getattr(d, attr)[k] for d in ds]) for k in getattr(ds[0], attr)}  # noqa: E731
        out.append(([i for i, _ in members], Design(arch, cat("w"), cat("l"), cat("bias"), tied)))
    return out


def pick_rows(table: pd.DataFrame, objectives: dict, count: int) -> pd.DataFrame:
    """The knee, then the best design per objective, then the next designs by knee distance.

    Returns up to `count` rows in that order with a `pick` column (why each was picked) and
    a `knee_distance` column.
    """
    by_knee = rank(table, objectives, "knee")
    reasons: dict[str, list[str]] = {by_knee["id"].iloc[0]: ["knee"]}
    for name in objectives:
        best = rank(table, objectives, name)["id"].iloc[0]
        reasons.setdefault(best, []).append(f"best {OBJ_SHOW.get(name, (name,))[0]}")
    for k, rid in enumerate(by_knee["id"], start=1):
        if len(reasons) >= count:
            break
        reasons.setdefault(rid, [f"knee rank {k}"])
    ids = list(reasons)[:count]
    out = by_knee.set_index("id").loc[ids].reset_index()
    out.insert(0, "pick", ["; ".join(reasons[i]) for i in ids])
    return out


@dataclass
class ReportData:
    """What the report shows, computed once for both renderings."""

    path: Path
    record: dict
    study: Study
    objectives: dict
    table: pd.DataFrame
    picks: pd.DataFrame
    knee: Result | None = None
    mc: Confirmation | None = None
    sweep: dict = field(default_factory=dict)  # id -> (vdd (p,), iq (p,))
    verify: tuple = (None, "")  # (DataFrame or None, note)


def gather(run, count: int = 8) -> ReportData:
    """Read the run folder and compute every number the report shows.

    Parameters
    ----------
    run : str or Path
        Run folder with front.csv and run.json.
    count : int
        Picked designs to show (>= 1).

    Returns
    -------
    ReportData

    Raises
    ------
    InputError
        A missing or unreadable run folder, front.csv or run.json.
    """
    if count < 1:
        raise InputError("--count", f"{count} designs is too few", ">= 1")
    r = load_run(run)
    study = study_of_run(r.path, r.record)
    table = r.table
    picks = pick_rows(table, r.objectives, count) if len(table) else table.iloc[0:0]
    data = ReportData(r.path, r.record, study, r.objectives, table, picks, verify=read_verification(r.path))
    if not len(picks):
        return data
    cond, tech, targets = study.conditions, study.tech, study.targets
    [(_, knee_design)] = populations(picks.iloc[:1])
    data.knee = evaluate(knee_design, tech, cond, targets)
    data.mc = confirm(knee_design, study, MC_SAMPLES, int(r.record.get("seed", 1)), result=data.knee)
    corner, temp, vnom = cond.typical, cond.temps[0], cond.vdd_nom
    supplies = np.unique(np.r_[np.linspace(cond.vdd_min, cond.vdd_max, SWEEP_POINTS), vnom])
    for ids, design in populations(picks):
        iq_v = np.stack([evaluate(design, tech, Conditions((corner,), (temp,), v, v, v), targets).pvt["iq_a"][:, 0]
                         for v in supplies], axis=1)
        for k, rid in enumerate(ids):
            data.sweep[rid] = (supplies, iq_v[k])
    return data
