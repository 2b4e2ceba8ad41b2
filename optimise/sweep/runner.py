"""`stagefront sweep`: run every cell of a grid file as one Dask task and compare the fronts.

The sweep folder (``--out``, default ``runs/GRID-NAME``) holds:

- ``studies/CELL.toml``: each cell's complete study file (`optimise.sweep.grid`), runnable on its
  own with ``stagefront optimise``;
- ``cells/CELL/``: each cell's run folder as ``stagefront optimise`` writes it (front.csv,
  run.json, plots), or ``error.txt`` with the traceback of a cell that failed;
- ``summary.csv`` and ``summary.md``: one row per cell with the axis values (as written in
  the grid file), status, reason, front size, the final hypervolume (run.json; the best
  architecture's where a cell searches several), how many of its designs no other cell's
  design dominates, and the best design per objective (value and front.csv id); with
  Monte Carlo, the knee design's Monte Carlo Iq sigma beside the linear estimate;
- ``fronts.png``: every cell's front on the same pairwise objective axes, one colour per
  cell, one marker per architecture;
- ``sweep.json``: the grid file, the cluster, and each cell's status and wall time.

Scheduling: each cell is one task (``Client.submit(..., retries=1)``): a task that raises is
run once more, then reported with the cell's name and the reason (printed, and in
summary.csv), never dropped; the other cells go on, and the exit status is 1. Without a
scheduler address a local cluster of worker processes (one thread each) is started on this
machine and closed at the end; with one, the sweep connects to that cluster. Workers must
see the sweep folder and the technology files at the same paths (one machine, or a shared
file system) and have stagefront installed.

Re-runs: a cell whose run.json says ``"status": "finished"`` and records the same study
and technology file text as the cell's study file now is reused, not recomputed (printed
as "reused"); every other cell runs again (its folder replaced). A sweep folder is
refused when it holds something other than a sweep, unless ``overwrite``, which clears it.
"""
from __future__ import annotations

import contextlib
import io
import json
import logging
import sys
import time
import traceback
import uuid
from pathlib import Path

from ..files.atomic import write_text
from ..files.errors import InputError
from ..files.folders import clear, component, is_empty, locked, mark
from ..files.inputs import read_input_text
from ..files.tables import MAX_MONTECARLO, count
from ..search.frontfile import read_run_record
from ..search.runtime import keep_freed_memory
from .grid import Grid, load_grid
from .summary import CAUTION, cell_row, joint_front, knee_rows, write_summary

# The most worker processes of a local cluster: each holds a Python interpreter with numpy and
# pymoo (some 150 MB), so more than this exhausts a workstation ("common practice, no source").
MAX_WORKERS = 64


# ------------------------------------------------------------------------------ tasks
def run_cell(study_path: str, out: str) -> dict:
    """The task of one cell: `optimise_study` into `out` (replacing it), quietly.

    Runs on a Dask worker. Raises when the study is invalid or the search does not finish.
    Returns the task's wall time in seconds (what optimise prints is dropped: the sweep
    reads the run folder).
    """
    from ..search.runner import optimise_study

    keep_freed_memory()
    t0 = time.perf_counter()
    with contextlib.redirect_stderr(io.StringIO()):  # per-generation progress lines
        status = optimise_study(study_path, out, overwrite=True, stream=io.StringIO())
    if status != 0:
        raise RuntimeError(f"the search stopped with status {status} before it finished")
    return {"wall_time_s": time.perf_counter() - t0}


def montecarlo_task(study, row: dict, samples: int, seed: int) -> dict:
    """Monte Carlo Iq of one front.csv row against its linear (adjoint) sigma estimate.

    `optimise.review.montecarlo.confirm_sigma` (the study's tt corner, else its first; first
    temperature; nominal supply, as `stagefront evaluate --montecarlo`) under the sweep's
    column names. Runs on a Dask worker.

    Parameters
    ----------
    study : optimise.files.study.Study
    row : dict
        One front.csv row (sizes in micrometres, bias in amperes or ohms).
    samples : int
        Number of mismatch draws N.
    seed : int
        Seed of the draws (numpy default_rng).

    Returns
    -------
    dict
        mc_samples, mc_seed, mc_corner, mc_temp_c, mc_vdd_v, mc_iq_mean_a, mc_sigma_pct,
        linear_sigma_pct (percent of Iq), mc_failed (solves that did not converge).
    """
    from ..review.montecarlo import confirm_sigma
    from ..search.export import design_from_row

    mc = confirm_sigma(design_from_row(row), study, samples, seed)
    nan = lambda v: float("nan") if v is None else float(v)  # noqa: E731
    return {"mc_samples": mc["samples"], "mc_seed": mc["seed"], "mc_corner": mc["corner"],
            "mc_temp_c": float(mc["temp_c"]), "mc_vdd_v": float(mc["vdd_v"]), "mc_iq_mean_a": nan(mc["iq_mean_a"]),
            "mc_sigma_pct": nan(mc["iq_sigma_pct"]), "linear_sigma_pct": mc["linear_sigma_pct"],
            "mc_failed": mc["failed"]}


def _reason(future) -> str:
    """One line: the exception a failed task raised (or why it has none, e.g. cancelled)."""
    try:
        err = future.exception()
    except Exception as why:  # a cancelled or lost task has no exception to fetch
        return f"task {future.status}: {type(why).__name__}: {why}"
    return " ".join(f"{type(err).__name__}: {err}".split())


def montecarlo_on_cluster(client, jobs: dict, samples: int, seed: int = 1) -> dict:
    """Run `montecarlo_task` for every job on the cluster, each as one task (retried once).

    Parameters
    ----------
    client : distributed.Client
    jobs : dict
        label -> (study, front.csv row as a dict).
    samples, seed : int
        Draws per design and their seed (the same seed for every design).

    Returns
    -------
    dict
        label -> the task's result, or {"mc_error": reason} where it failed twice.
    """
    from distributed import as_completed

    futures = {client.submit(montecarlo_task, study, row, samples, seed, retries=1, pure=False,
                             key=f"stagefront-mc-{label}-{uuid.uuid4().hex[:8]}"): label
               for label, (study, row) in jobs.items()}
    out = {}
    for fut in as_completed(list(futures)):
        out[futures[fut]] = fut.result() if fut.status == "finished" else {"mc_error": _reason(fut)}
    return out


# ---------------------------------------------------------------------------- cluster
@contextlib.contextmanager
def cluster_client(scheduler: str | None = None, workers: int = 2):
    """A Dask client: connected to `scheduler`, or to a new local cluster of `workers`
    single-threaded worker processes (no dashboard, worker logs silenced: failures are
    reported by the sweep). Both are closed on exit."""
    from distributed import Client, LocalCluster

    cluster = client = None
    try:
        if scheduler:
            try:
                client = Client(scheduler, timeout="15s")
            except (OSError, TimeoutError, ValueError) as err:
                raise InputError(f"--scheduler {scheduler}", f"cannot reach a Dask scheduler there ({err})",
                                 hint="start one with `dask scheduler` and workers with `dask worker ADDRESS`, "
                                      "or leave out --scheduler to use a local cluster") from None
        else:
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                   dashboard_address=None, silence_logs=logging.CRITICAL)
            client = Client(cluster)
        yield client
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()


# ---------------------------------------------------------------------------- folder
def _prepare(out: Path, overwrite: bool, inputs=()) -> None:
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}", "exists and is not a folder", "a new folder or a sweep folder")
    if out.exists() and not is_empty(out):
        if overwrite:
            clear(out, "sweep", inputs)
        elif not (out / "sweep.json").is_file():
            raise InputError(f"--out {out}", "folder exists, is not empty and holds no sweep (no sweep.json)",
                             "a new folder, or the folder of an earlier sweep (its finished cells are reused)",
                             "choose another --out, or clear it with --overwrite")
    (out / "studies").mkdir(parents=True, exist_ok=True)
    (out / "cells").mkdir(exist_ok=True)
    mark(out, "sweep")


def _inputs(grid: Grid) -> list:
    """Every file the sweep reads: the grid, its base study and each cell's technology file
    (an axis may point into the sweep folder; `--overwrite` must never delete it)."""
    import tomllib

    files = [grid.path, grid.base]
    for cell in grid.cells:
        tech = tomllib.loads(cell.toml).get("technology")
        if isinstance(tech, str) and tech not in files:
            files.append(tech)
    return files


def _reusable(study_file: Path, run: Path) -> bool:
    """Whether `run` holds a finished run of exactly this study and technology text."""
    try:
        record = read_run_record(run / "run.json")
        tech = read_input_text(record["technology"])
        return (record.get("status") == "finished" and (run / "front.csv").is_file()
                and record.get("study_toml") == study_file.read_text() and record.get("technology_toml") == tech)
    except (InputError, OSError, ValueError, KeyError, TypeError):
        return False


# ------------------------------------------------------------------------------ main
def run_sweep(grid_path, out=None, scheduler: str | None = None, workers: int | None = None,
              overwrite: bool = False, montecarlo: int = 0, mc_seed: int = 1, stream=None) -> int:
    """Run every cell of a grid file on a Dask cluster and write the sweep folder.

    Parameters
    ----------
    grid_path : str or Path
        The grid file (`optimise.sweep.grid`).
    out : str or Path, optional
        The sweep folder (default ``runs/GRID-NAME``).
    scheduler : str, optional
        Address of a running Dask scheduler (e.g. ``tcp://10.0.0.5:8786``); default: start
        a local cluster.
    workers : int, optional
        Worker processes of the local cluster (default 2); not allowed with `scheduler`.
    overwrite : bool
        Clear `out` first (every cell runs again).
    montecarlo : int
        When >= 2: Monte Carlo draws of each cell's knee design, as cluster tasks, added
        to summary.csv beside the linear sigma.
    mc_seed : int
        Seed of the Monte Carlo draws.
    stream : file-like, optional
        Where progress and the summary go (default stdout).

    Returns
    -------
    int
        0 when every cell finished or was reused, 1 when any failed, 130 when interrupted.
    """
    stream = stream or sys.stdout
    p = lambda s="": print(s, file=stream, flush=True)  # noqa: E731
    if scheduler and workers is not None:
        raise InputError("--workers", "applies to the local cluster only", hint="leave it out with --scheduler; "
                                                                                "the cluster has its own workers")
    workers = 2 if workers is None else workers
    count("--workers", "", workers, 1, MAX_WORKERS, "one or two per core")
    if montecarlo:
        count("--montecarlo", "", montecarlo, 2, MAX_MONTECARLO, "10000 draws give the sigma to about 1 %")
    grid = load_grid(grid_path)
    out = Path(out) if out else Path("runs") / component(grid.name)
    with locked(out, "sweep"):
        return _sweep(grid, out, overwrite, scheduler, workers, montecarlo, mc_seed, p)


def _sweep(grid: Grid, out: Path, overwrite: bool, scheduler, workers: int, montecarlo: int, mc_seed: int,
           p) -> int:
    """The body of `run_sweep`, with the sweep folder locked."""
    _prepare(out, overwrite, _inputs(grid))
    t0 = time.perf_counter()
    record = {"grid": str(grid.path), "grid_toml": grid.path.read_text(), "name": grid.name, "base": str(grid.base),
              "cluster": scheduler or f"local: {workers} worker process(es), 1 thread each"}
    write_text(out / "sweep.json", json.dumps({**record, "status": "running"}, indent=1) + "\n")

    states, todo = {}, []
    for cell in grid.cells:
        study_file = out / "studies" / f"{cell.name}.toml"
        if not study_file.is_file() or study_file.read_text() != cell.toml:
            write_text(study_file, cell.toml)
        if _reusable(study_file, out / "cells" / cell.name):
            states[cell.name] = {"status": "reused"}
        else:
            states[cell.name] = {"status": "not run"}
            todo.append(cell)
    total = len(grid.cells)
    where = f"the cluster at {scheduler}" if scheduler else f"a local cluster of {workers} worker process(es)"
    p(f"sweep {grid.name}: {total} cells, {total - len(todo)} reused, {len(todo)} to run"
      + (f" on {where}" if todo or montecarlo else ""))
    done = 0
    for cell in grid.cells:
        if states[cell.name]["status"] == "reused":
            done += 1
            p(f"[{done}/{total}] {cell.name}: reused (finished run of the same study in {out / 'cells' / cell.name})")

    interrupted = False
    rows: list[dict] = []
    if todo or montecarlo:
        with cluster_client(scheduler, workers) as client:
            try:
                done = _run_cells(client, grid, out, todo, states, done, total, p)
            except KeyboardInterrupt:
                interrupted = True
                p("interrupted: cells not finished are marked 'not run'; run the sweep again to go on")
            rows = [cell_row(grid, c, states[c.name], out) for c in grid.cells]
            if montecarlo and not interrupted:
                jobs = knee_rows(grid, out, rows)
                p(f"Monte Carlo: {montecarlo} draws of the knee design of {len(jobs)} cell(s)")
                mc = montecarlo_on_cluster(client, jobs, montecarlo, mc_seed)
                for r in rows:
                    r.update(mc.get(r["cell"], {}))
    else:
        rows = [cell_row(grid, c, states[c.name], out) for c in grid.cells]

    comparison = joint_front(grid, out, rows)
    write_summary(grid, out, rows, comparison, montecarlo)
    import dask
    import distributed

    from ..search.export import versions

    record.update({"status": "interrupted" if interrupted else "done", "wall_time_s": time.perf_counter() - t0,
                   "versions": {**versions(), "dask": dask.__version__, "distributed": distributed.__version__},
                   "cells": [{"name": c.name, "values": c.values, **states[c.name]} for c in grid.cells]})
    write_text(out / "sweep.json", json.dumps(record, indent=1, default=str) + "\n")

    failed = [r for r in rows if r["status"] == "failed"]
    p(f"summary: {out / 'summary.csv'}, {out / 'summary.md'}" + (f", {out / 'fronts.png'}" if comparison else ""))
    for r in rows:
        if r.get("mc_error"):
            p(f"Monte Carlo of {r['cell']} failed: {r['mc_error']}")
    if failed:
        p(f"{len(failed)} of {total} cell(s) failed:")
        for r in failed:
            p(f"  - {r['cell']}: {r['reason']}")
    p(CAUTION)
    return 130 if interrupted else (1 if failed else 0)


def _run_cells(client, grid: Grid, out: Path, todo, states, done: int, total: int, p) -> int:
    """Submit one task per cell (retried once), report each as it completes; returns cells done."""
    from distributed import as_completed

    futures = {}
    for cell in todo:
        fut = client.submit(run_cell, str((out / "studies" / f"{cell.name}.toml").resolve()),
                            str((out / "cells" / cell.name).resolve()), retries=1, pure=False,
                            key=f"stagefront-cell-{cell.name}-{uuid.uuid4().hex[:8]}")
        futures[fut] = cell
    try:
        for fut in as_completed(list(futures)):
            cell = futures[fut]
            done += 1
            if fut.status == "finished":
                res = fut.result()
                states[cell.name] = {"status": "finished", "wall_time_s": res["wall_time_s"]}
                p(f"[{done}/{total}] {cell.name}: finished in {res['wall_time_s']:.1f} s")
            else:
                reason = _reason(fut)
                states[cell.name] = {"status": "failed", "reason": reason}
                tb = "".join(traceback.format_tb(fut.traceback())) if fut.status == "error" else ""
                write_text(out / "cells" / cell.name / "error.txt", f"{tb}{reason}\n")
                p(f"[{done}/{total}] {cell.name}: FAILED (after one retry): {reason}")
    except KeyboardInterrupt:
        client.cancel(list(futures))
        raise
    return done
