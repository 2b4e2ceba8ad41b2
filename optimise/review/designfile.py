"""`stagefront export-design`: one front.csv row as a design file, ready for `stagefront
evaluate` (which then shows its full PVT table) or for editing by hand.

The file holds every role (so it also evaluates under a study without ties), with the
study's ties noted beside the tied roles, sizes in micrometres exactly as front.csv gives
them and bias values in their shortest exact form: evaluating it under the run's study
reproduces the row's metrics.
"""
from __future__ import annotations

import sys
from pathlib import Path

from models.stages import get_stage

from .. import CAUTION
from ..files.atomic import write_text
from ..files.errors import InputError
from ..files.space import study_ties
from ..search.export import UNIT_SUFFIX
from ..search.runfolder import load_run, study_of_run


def _toml_number(x: float) -> str:
    """A float as TOML: its shortest exact form, integers with no decimal point added."""
    text = repr(float(x))
    return text[:-2] if text.endswith(".0") else text


def design_text(row: dict, run_path: Path, study_path: str, ties: dict) -> str:
    """The design file (TOML text) of one front.csv row."""
    arch = row["architecture"]
    stage = get_stage(arch)
    lines = [f"# Design {row['id']} of the run {run_path} (front.csv), written by stagefront export-design.",
             f"# Evaluate it: stagefront evaluate {study_path} --design THIS-FILE",
             "# Sizes in micrometres, bias in amperes or ohms. " + CAUTION,
             f'architecture = "{arch}"', f'name = "{row["id"]}"', ""]
    for role in stage.ROLES:
        lines.append(f"[devices.{role}]" + (f"  # tied to {ties[role]} in the study" if role in ties else ""))
        lines.append(f"w = {_toml_number(row[f'{role}_w_um'])}")
        lines.append(f"l = {_toml_number(row[f'{role}_l_um'])}")
        if row.get(f"{role}_bulk") == "source":
            lines.append('bulk = "source"')
    lines.append("")
    lines.append("[bias]")
    for name, unit in stage.BIAS.items():
        lines.append(f"{name} = {_toml_number(row[f'{name}_{UNIT_SUFFIX[unit]}'])}   # {unit}")
    return "\n".join(lines) + "\n"


def export_design(run, row_id: str, out=None, overwrite: bool = False, stream=None) -> int:
    """Write front.csv row `row_id` of `run` as a design file (`out`, or stdout).

    Raises InputError for an unknown row (listing a few ids) or an existing `out` without
    `overwrite`. Returns 0.
    """
    stream = stream or sys.stdout
    r = load_run(run)
    ids = [str(i) for i in r.table["id"]] if len(r.table) else []
    if row_id not in ids:
        near = ", ".join(ids[:5]) + (" ..." if len(ids) > 5 else "")
        raise InputError(str(r.path / "front.csv"), f"has no row {row_id!r}", near or "no rows (nothing feasible)",
                         "row ids are front.csv's id column, e.g. fl-001")
    row = r.table[r.table["id"] == row_id].iloc[0].to_dict()
    study = study_of_run(r.path, r.record)
    study_path = str(r.record.get("study", study.path))
    text = design_text(row, r.path, study_path, study_ties(study, row["architecture"]))
    if out is None:
        stream.write(text)
        return 0
    out = Path(out)
    if out.exists() and not overwrite:
        raise InputError("--out", f"{str(out)!r} exists", "a new file, or --overwrite to replace it")
    if out.suffix.lower() != ".toml":
        raise InputError("--out", f"{str(out)!r} is not a .toml file name", "a path ending in .toml")
    write_text(out, text)
    print(f"design: {out}  (stagefront evaluate {study_path} --design {out})", file=stream)
    print(CAUTION, file=stream)
    return 0
