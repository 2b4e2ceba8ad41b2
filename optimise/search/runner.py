"""`stagefront optimise`: search every architecture of a study and write the run folder.

The folder holds front.csv, run.json, three plots and checkpoint/ (one search state per
architecture, as arrays: `checkpoint`). An existing folder is never overwritten unless asked (--overwrite);
--resume continues a stopped run from its checkpoints with the settings it was started with.
Ctrl-C stops the search, writes the front found so far and says so.

Checkpoints are arrays and JSON, never pickles: resuming a run folder from elsewhere reads
data only, and refuses when the study or technology text differs from the run's start.
"""
from __future__ import annotations

import json
import sys
import time
from dataclasses import replace
from pathlib import Path

from models.validity import length_warnings

from .. import CAUTION
from ..files.atomic import write_bytes
from ..files.errors import InputError
from ..files.folders import clear, component, is_empty, locked, mark
from ..files.inputs import load_json
from ..files.tables import MAX_GENERATIONS, MAX_POPULATION, check_evaluations, count, show
from ..files.space import check_generation, load_search
from ..files.study import load_study
from .export import (
    closest_design_report,
    front_table,
    run_record,
    write_front,
    write_json,
)
from . import checkpoint as ckpt
from .nsga import Progress, collect, run_architecture
from .problem import StageProblem
from .runfolder import populations

PLOTS = ("objectives.png", "hypervolume.png", "parallel.png")


def _prepare(out: Path, resume: bool, overwrite: bool, meta: dict, inputs=()) -> dict:
    """Create or reopen the run folder; returns the settings the run goes on with."""
    meta_path = out / "checkpoint" / "meta.json"
    if resume:
        if not meta_path.exists():
            raise InputError(str(out), "has no checkpoint to resume from",
                             hint="start a new run without --resume")
        try:
            saved = load_json(meta_path)
            if not isinstance(saved, dict):
                raise InputError(str(meta_path), "holds no JSON object")
        except InputError as exc:
            raise InputError(str(meta_path), f"is not a readable checkpoint record ({exc.what})",
                             hint="start a new run folder") from None
        for key, low, high in (("seed", 0, None), ("population", 4, MAX_POPULATION),
                               ("generations", 1, MAX_GENERATIONS)):
            value = saved.get(key)
            if not isinstance(value, int) or isinstance(value, bool) or value < low or high and value > high:
                raise InputError(str(meta_path), f"{key!r} = {show(value)} is not usable",
                                 f"an integer >= {low}" + (f" and <= {high}" if high else ""),
                                 "start a new run folder")
        check_evaluations(str(meta_path), "the checkpoint record", saved["population"], saved["generations"])
        for key in ("seed", "population", "generations", "study_toml", "inputs_sha256"):
            if key in meta and meta[key] is not None and saved.get(key) != meta[key]:
                shown = {"study_toml": "the study file changed",
                         "inputs_sha256": "the study or technology file changed"}.get(
                    key, f"{key} {meta[key]} != {saved.get(key)}")
                raise InputError(str(out), f"cannot resume: {shown} since the run started",
                                 hint="resume with the original settings, or start a new run folder")
        return saved
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}", "exists and is not a folder", "a new folder or a run folder")
    if out.exists() and not is_empty(out):
        if not overwrite:
            raise InputError(str(out), "run folder exists and is not empty",
                             hint="choose another --out, continue it with --resume, or replace it with --overwrite")
        clear(out, "run", inputs)
    (out / "checkpoint").mkdir(parents=True, exist_ok=True)
    mark(out, "run")
    write_bytes(meta_path, json.dumps(meta).encode())
    return meta


def _plots(out: Path, table, objectives, hv) -> None:
    from . import plots

    for name, make in (("objectives.png", lambda: plots.objective_matrix(table, objectives)),
                       ("hypervolume.png", lambda: plots.hypervolume_curve(hv)),
                       ("parallel.png", lambda: plots.parallel_coordinates(
                           table, objectives, highlight=plots.best_per_objective(table, objectives)))):
        write_bytes(out / name, plots.png_bytes(make()))


def optimise_study(study_path, out=None, seed=None, population=None, generations=None, resume=False,
                   overwrite=False, stream=None) -> int:
    """Run the search and write the run folder. Returns the exit status (130 if interrupted).

    The run folder is locked for the whole run: a second writer gets InputError.
    """
    out = Path(out) if out else Path("runs") / component(Path(study_path).stem)
    with locked(out, "optimise"):
        return _optimise(study_path, out, seed, population, generations, resume, overwrite, stream)


def _optimise(study_path, out: Path, seed, population, generations, resume, overwrite, stream) -> int:
    stream = stream or sys.stdout
    study = load_study(study_path)
    settings = load_search(study)
    study_text = Path(study_path).read_text()
    digest = ckpt.text_hash(study_text, study.tech_path.read_text())
    meta = {"seed": seed, "population": population, "generations": generations,
            "study_toml": study_text, "inputs_sha256": digest}
    if not resume:
        meta = {"seed": study.seed if seed is None else seed,
                "population": settings.population if population is None else population,
                "generations": settings.generations if generations is None else generations,
                "study_toml": meta["study_toml"], "inputs_sha256": digest}
    if seed is not None and (not isinstance(seed, int) or seed < 0):
        raise InputError("--seed", f"{seed} is not allowed", "a non-negative integer")
    for key, value, low, high in (("population", population, 4, MAX_POPULATION),
                                  ("generations", generations, 1, MAX_GENERATIONS)):
        if value is not None:
            count(f"--{key}", "", value, low, high)
    if not resume:
        check_evaluations("--population/--generations", "the run", meta["population"], meta["generations"])
        check_generation("--population", "population", meta["population"], study)
    meta = _prepare(out, resume, overwrite, meta, (study_path, study.tech_path))
    settings = replace(settings, population=meta["population"], generations=meta["generations"])
    progress = Progress()
    runs, status, t0 = [], "finished", time.perf_counter()
    try:
        for arch in study.architectures:
            runs.append(run_architecture(study, settings, arch, meta["seed"], out / "checkpoint" / f"{arch}.npz",
                                         resume, progress, meta["population"], meta["generations"], digest))
    except KeyboardInterrupt:
        status = "interrupted"
        runs = []
        for arch in study.architectures:
            ck = out / "checkpoint" / f"{arch}.npz"
            if ck.exists():
                problem = StageProblem(study, settings.spaces[arch], settings.objectives)
                state = ckpt.load(ck, problem, meta["population"], meta["generations"], meta["seed"], digest)
                if state["hv"]:
                    runs.append(collect(arch, state))
    wall = time.perf_counter() - t0
    table, _ = front_table(study, settings, runs)
    blocked = {}
    for r in runs:
        if not r.feasible.any():
            blocked[r.architecture] = closest_design_report(study, settings, r)
    write_front(out / "front.csv", table)
    sizes = table["architecture"].value_counts().to_dict() if len(table) else {}
    record = run_record(study, settings, runs, meta["seed"], meta["population"], meta["generations"], status,
                        blocked, wall, sizes)
    warnings = length_warnings(study.tech, [d for _, d in populations(table)] if len(table) else [])
    if warnings:
        record["warnings"] = warnings
    write_json(out / "run.json", record)
    _plots(out, table, settings.objectives, {r.architecture: r.hypervolume for r in runs})

    p = lambda s="": print(s, file=stream)  # noqa: E731
    if status == "interrupted":
        p(f"interrupted: the front found so far is in {out / 'front.csv'}; continue with --resume")
    for r in runs:
        n = int((table["architecture"] == r.architecture).sum()) if len(table) else 0
        hv = r.hypervolume[-1] if r.hypervolume else 0.0
        p(f"{r.architecture:14s} {n:4d} front designs   {r.evaluations:6d} evaluations   "
          f"hypervolume {hv:.4f}   {r.wall_time_s:.1f} s")
        if r.architecture in blocked:
            b = blocked[r.architecture]
            p(f"  no feasible design: '{b['blocking_constraint']}' blocks the closest design "
              f"(worst margin {100 * b['closest_margin']:.3g} % of its limit):")
            for v in b["closest_violations"][:4]:
                p(f"    - {v}")
    for line in warnings:
        p(f"warning: {line}")
    p(f"front:  {out / 'front.csv'}")
    p(f"plots:  {', '.join(str(out / n) for n in PLOTS)}")
    p(f"record: {out / 'run.json'}")
    p(CAUTION)
    return 130 if status == "interrupted" else 0
