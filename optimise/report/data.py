"""Every number the report shows, computed once from the run folder alone.

The study and technology are read back from the copies run.json keeps (`study_of_run`);
the picked designs are the knee, the best per objective and the next by knee distance
(`pick_rows`); `gather` solves the knee at every PVT point, confirms its mismatch spread by
Monte Carlo (`optimise.review.montecarlo`), sweeps the picked designs' Iq over the supply range and
reads RUN/verify.csv (`optimise.report.verification`).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from models.evaluate import Conditions, Result, evaluate

from ..files.errors import InputError
from ..files.study import Study
from ..review.montecarlo import Confirmation, confirm
from ..review.pick import rank
from ..search.runfolder import load_run, populations, study_of_run
from .verification import read_verification, verification_caveat

MC_SAMPLES = 5000
SWEEP_POINTS = 13
# Objective name -> (column label, unit shown, factor from SI).
OBJ_SHOW = {"power_w": ("power", "uW", 1e6), "swing_v": ("swing", "V", 1.0), "area_um2": ("area", "um^2", 1.0),
            "iq_sigma_pct": ("Iq sigma", "%", 1.0), "supply_sens_pct_per_v": ("supply sens.", "%/V", 1.0)}


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
    verify_href: str = "verify.csv"  # verify.csv as linked from the report
    verify_caveat: str = ""  # from RUN/verify.json: e.g. EKV study checked against level-1 cards
    knee_design: object = None  # the knee as a one-element Design


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
    data = ReportData(r.path, r.record, study, r.objectives, table, picks, verify=read_verification(r.path),
                      verify_caveat=verification_caveat(r.path))
    if not len(picks):
        return data
    cond, tech, targets = study.conditions, study.tech, study.targets
    [(_, knee_design)] = populations(picks.iloc[:1])
    data.knee = evaluate(knee_design, tech, cond, targets)
    data.knee_design = knee_design
    data.mc = confirm(knee_design, study, MC_SAMPLES, int(r.record.get("seed", 1)), result=data.knee)
    corner, temp, vnom = cond.typical, cond.temps[0], cond.vdd_nom
    supplies = np.unique(np.r_[np.linspace(cond.vdd_min, cond.vdd_max, SWEEP_POINTS), vnom])
    for ids, design in populations(picks):
        iq_v = np.stack([evaluate(design, tech, Conditions((corner,), (temp,), v, v, v), targets).pvt["iq_a"][:, 0]
                         for v in supplies], axis=1)
        for k, rid in enumerate(ids):
            data.sweep[rid] = (supplies, iq_v[k])
    return data
