"""Run folders read back: front.csv and run.json checked (`load_run`), the study rebuilt from
the copies run.json keeps (`study_of_run`), and front rows as populations (`populations`).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from models.evaluate import Design

from ..files.errors import InputError
from ..files.study import Study, load_study, study_from_dict
from ..files.tables import loads_toml
from ..files.techfile import tech_from_dict
from .export import design_from_row
from .frontfile import read_front_checked, read_run_record


@dataclass(frozen=True)
class RunFolder:
    """One run folder as read back: its label, objectives (name -> "min"|"max", run.json
    order), front.csv table (raw SI floats under the contract names) and run.json record."""

    path: Path
    label: str
    objectives: dict
    table: pd.DataFrame
    record: dict


def load_run(path) -> RunFolder:
    """Read a run folder (front.csv and run.json) and check what compare and pick rely on.

    Parameters
    ----------
    path : str or Path
        The run folder written by `stagefront optimise`.

    Returns
    -------
    RunFolder
        Labelled by the folder name (callers may relabel to keep labels unique).

    Raises
    ------
    InputError
        A missing folder or file, unreadable JSON, objectives that are not a name -> sense
        table, a front.csv without a column for one of the objectives, and every cell or key
        that `optimise.search.frontfile` refuses (naming file, line, row and column).
    """
    path = Path(path)
    if not path.is_dir():
        raise InputError(str(path), "is not a run folder", "a folder written by `stagefront optimise`",
                         "check the path")
    for name in ("front.csv", "run.json"):
        if not (path / name).is_file():
            raise InputError(str(path), f"has no {name}", "a folder written by `stagefront optimise`",
                             "an interrupted run writes both; a folder with only checkpoint/ needs --resume")
    record = read_run_record(path / "run.json")
    objectives = record["objectives"]
    table = read_front_checked(path / "front.csv")
    missing = [c for c in objectives if c not in table.columns] if len(table) else []
    if missing:
        raise InputError(str(path / "front.csv"), f"has no column {', '.join(missing)}",
                         "the columns `stagefront optimise` writes", "re-run the search with this version")
    for name in objectives:
        empty = table["id"][table[name].isna()].tolist() if name in table.columns else []
        if empty:
            raise InputError(str(path / "front.csv"), f"row {empty[0]!r}, column {name}: is empty",
                             "a number in every objective column", "restore the file `stagefront optimise` wrote")
    return RunFolder(path, path.resolve().name or str(path), dict(objectives), table, record)


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
        # A table technology's arrays stay beside the technology file the run names.
        tech_dir = Path(str(record.get("technology", ""))).parent
        tech = tech_from_dict(loads_toml(tech_text, where), where, tech_dir)
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
        groups.setdefault((d.architecture, d.tied, d.cc is None), []).append((row["id"], d))
    out = []
    for (arch, tied, no_cc), members in groups.items():
        ds = [d for _, d in members]
        cat = lambda attr: {k: np.concatenate([getattr(d, attr)[k] for d in ds]) for k in getattr(ds[0], attr)}  # noqa: E731
        cc = None if no_cc else np.concatenate([d.cc for d in ds])  # a searched compensation capacitor
        out.append(([i for i, _ in members], Design(arch, cat("w"), cat("l"), cat("bias"), tied, cc)))
    return out
