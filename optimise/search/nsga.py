"""NSGA-II over each architecture of a study, with progress, checkpoints and resume.

Each architecture gets its own NSGA-II run (its own variables) with the same budget and the
same objectives, so the fronts land on the same axes. The algorithm object, which carries
its own seeded random generator, is written as arrays every few generations
(`checkpoint`, no pickle): a resumed run continues bit for bit where the stopped one was.

References
----------
K. Deb, A. Pratap, S. Agarwal, T. Meyarivan, "A fast and elitist multiobjective genetic
algorithm: NSGA-II", IEEE Trans. Evol. Comput. 6(2):182-197, 2002.
E. Zitzler, L. Thiele, "Multiobjective optimization using evolutionary algorithms - a
comparative case study", PPSN V, 1998 (hypervolume).
"""
from __future__ import annotations

import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import moocore
import numpy as np
from pymoo.indicators.hv import HV

from ..files.atomic import write_bytes
from ..files.space import SearchSettings
from ..files.study import Study
from . import checkpoint as ckpt
from .problem import StageProblem


@dataclass
class ArchRun:
    """What one architecture's search produced (X, F, G of its final non-dominated set)."""

    architecture: str
    X: np.ndarray
    F: np.ndarray
    G: np.ndarray
    feasible: np.ndarray
    evaluations: int
    generations: int
    wall_time_s: float
    hypervolume: list = field(default_factory=list)
    feasible_per_generation: list = field(default_factory=list)
    finished: bool = False


def normaliser(study: Study, settings: SearchSettings):
    """(ideal, ref) arrays in pymoo's minimised objective space, for the hypervolume.

    Defaults (override per objective in [search.reference], in the objective's own unit):
    power 2 x Iq max x VDD nominal (or VDD x load current), area the area cap (or 1e4 um^2),
    Iq sigma 10 %, supply sensitivity 100 %/V, swing from VDD (ideal) down to 0 (reference).
    """
    t, vnom = study.targets, study.conditions.vdd_nom
    default = {
        "power_w": vnom * (2 * t.iq_max if np.isfinite(t.iq_max) else t.i_load),
        "area_um2": t.area_max * 1e12 if np.isfinite(t.area_max) else 1e4,
        "iq_sigma_pct": 10.0,
        "supply_sens_pct_per_v": 100.0,
        "swing_v": 0.0,
    }
    best = {"swing_v": vnom}
    ideal, ref = [], []
    for name, sense in settings.objectives.items():
        r = settings.reference.get(name, default[name])
        if sense == "max":
            ideal.append(-best.get(name, 10 * max(r, 1e-30)))
            ref.append(-r)
        else:
            ideal.append(0.0)
            ref.append(r)
    return np.array(ideal), np.array(ref)


def hypervolume(F: np.ndarray, ideal: np.ndarray, ref: np.ndarray) -> float:
    """Hypervolume of the points F (n, m) in the unit box between ideal and ref."""
    if F.size == 0:
        return 0.0
    Fn = (F - ideal) / (ref - ideal)
    Fn = Fn[np.all(Fn < 1.0, axis=1)]
    if Fn.size == 0:
        return 0.0
    return float(HV(ref_point=np.ones(F.shape[1]))(np.maximum(Fn, 0.0)))


def non_dominated(F: np.ndarray) -> np.ndarray:
    """Mask of the rows of F (n, m) that no other row dominates (minimisation); equal
    rows do not dominate each other. moocore (a pymoo dependency) does it in C."""
    F = np.asarray(F, dtype=float)
    if len(F) == 0:
        return np.zeros(0, dtype=bool)
    return np.asarray(moocore.is_nondominated(F, keep_weakly=True), dtype=bool)


def _feasible(pop) -> np.ndarray:
    """Feasibility mask of a population: every inequality constraint <= 0."""
    G = pop.get("G")
    return np.all(G <= 0.0, axis=1) if G is not None and G.size else np.ones(len(pop), dtype=bool)


def update_archive(archive, pop):
    """Merge a population's feasible designs into the archive of every feasible
    non-dominated design seen so far (exact duplicates dropped). Returns (X, F, G)."""
    feas = _feasible(pop)
    X = np.concatenate([archive[0], pop.get("X")[feas]])
    F = np.concatenate([archive[1], pop.get("F")[feas]])
    G = np.concatenate([archive[2], pop.get("G")[feas]])
    _, first = np.unique(X, axis=0, return_index=True)
    first = np.sort(first)
    X, F, G = X[first], F[first], G[first]
    keep = non_dominated(F)
    return X[keep], F[keep], G[keep]


class Progress:
    """One status line per architecture on stderr: generation, evaluations, feasible, HV."""

    def __init__(self, stream=None):
        self.stream = stream or sys.stderr
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()

    def update(self, arch, gen, total, evals, feasible, hv, done=False):
        width = 24
        filled = int(width * gen / max(total, 1))
        line = (f"[{arch:13s}] [{'#' * filled}{'.' * (width - filled)}] gen {gen:3d}/{total}  evals {evals:6d}  "
                f"feasible {feasible:4d}  HV {hv:.4f}")
        if self.tty:
            self.stream.write("\r" + line + ("\n" if done else ""))
        elif done or gen in (1, total) or gen % 5 == 0:
            self.stream.write(line + "\n")
        self.stream.flush()


def run_search(problem, seed: int, population: int, generations: int, checkpoint: Path, resume: bool,
               progress: Progress, label: str, box, checkpoint_every: int, inputs_hash: str = "") -> dict:
    """NSGA-II on any pymoo problem, with an archive, hypervolume per generation and
    checkpoints. Returns the search state (algorithm, archive, hv, feasible, wall, finished).

    The state is snapshotted after every completed generation; the snapshot (never a
    half-done generation) goes to `checkpoint` every `checkpoint_every` generations and
    when the loop ends for any reason, KeyboardInterrupt included (which propagates).
    `inputs_hash` (of the study and technology text) is stored in the checkpoint, and a
    resume from a checkpoint with another hash is refused.
    """
    ideal, ref = box
    state = None
    if resume and checkpoint.exists():
        state = ckpt.load(checkpoint, problem, population, generations, seed, inputs_hash)
    if state is None:
        algorithm = ckpt.new_algorithm(problem, population, generations, seed)
        empty = (np.empty((0, problem.n_var)), np.empty((0, problem.n_obj)), np.empty((0, problem.n_ieq_constr)))
        state = {"algorithm": algorithm, "archive": empty, "hv": [], "feasible": [], "wall": 0.0,
                 "finished": False}
    snapshot = ckpt.encode(state, inputs_hash)
    t0 = time.perf_counter() - state["wall"]
    try:
        while not state["finished"]:
            algorithm = state["algorithm"]
            if not algorithm.has_next():
                state["finished"] = True
                snapshot = ckpt.encode(state, inputs_hash)
                break
            algorithm.next()
            state["archive"] = update_archive(state["archive"], algorithm.pop)
            feas = int(_feasible(algorithm.pop).sum())
            state["hv"].append(hypervolume(state["archive"][1], ideal, ref))
            state["feasible"].append(feas)
            state["wall"] = time.perf_counter() - t0
            snapshot = ckpt.encode(state, inputs_hash)
            gen = len(state["hv"])
            progress.update(label, gen, generations, algorithm.evaluator.n_eval, feas, state["hv"][-1])
            if gen % checkpoint_every == 0:
                write_bytes(checkpoint, snapshot)
    finally:
        write_bytes(checkpoint, snapshot)
    if progress.tty:
        progress.stream.write("\n")
    return state


def run_architecture(study: Study, settings: SearchSettings, arch: str, seed: int, checkpoint: Path,
                     resume: bool, progress: Progress, population: int, generations: int,
                     inputs_hash: str = "") -> ArchRun:
    """Search one architecture of a study (see `run_search`)."""
    problem = StageProblem(study, settings.spaces[arch], settings.objectives)
    state = run_search(problem, seed, population, generations, checkpoint, resume, progress, arch,
                       normaliser(study, settings), settings.checkpoint_every, inputs_hash)
    return collect(arch, state)


def collect(arch: str, state: dict) -> ArchRun:
    """The archive of a search state; when nothing feasible was found, the final
    population's least-violating designs stand in (marked infeasible)."""
    algorithm = state["algorithm"]
    X, F, G = state["archive"]
    feasible = np.ones(len(X), dtype=bool)
    if len(X) == 0 and algorithm.pop is not None:
        pop = algorithm.pop
        X, F, G = pop.get("X"), pop.get("F"), pop.get("G")
        feasible = np.zeros(len(X), dtype=bool)
    return ArchRun(arch, X, F, G, feasible, int(algorithm.evaluator.n_eval), len(state["hv"]),
                   float(state["wall"]), list(state["hv"]), list(state["feasible"]), bool(state["finished"]))
