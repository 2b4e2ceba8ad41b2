"""Search benchmark (run by hand): evaluation speed, time to a front, hypervolume reached.

Prints
- full design evaluations per second through the pymoo problem (all PVT points of the study),
- wall time of the demo study (every architecture) at its default budget,
- the final hypervolume as a fraction of a reference front from a run with ten times the
  generations (same population, same seed, same normalised objective box).

    python3 benchmarks/bench_search.py [--study studies/sensor-buffer.toml] [--factor 10]
"""
from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

from optimise.files.space import load_search
from optimise.files.study import load_study
from optimise.search.nsga import Progress, hypervolume, normaliser, run_search
from optimise.search.problem import StageProblem
from optimise.search.runtime import keep_freed_memory

ROOT = Path(__file__).resolve().parent.parent


class Silent(Progress):
    def update(self, *args, **kwargs):
        pass


def search(study, settings, arch, generations, tmp):
    problem = StageProblem(study, settings.spaces[arch], settings.objectives)
    t0 = time.perf_counter()
    state = run_search(problem, study.seed, settings.population, generations, tmp / f"{arch}-{generations}.pkl",
                       False, Silent(), arch, normaliser(study, settings), 10**9)
    return state, time.perf_counter() - t0


def main() -> None:
    import tempfile

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--study", default=str(ROOT / "studies" / "sensor-buffer.toml"))
    ap.add_argument("--factor", type=int, default=10)
    args = ap.parse_args()
    keep_freed_memory()  # as the stagefront command does
    study = load_study(args.study)
    settings = load_search(study)
    box = normaliser(study, settings)
    print(f"study {study.name}: {len(study.conditions.grid()[2])} PVT points, population {settings.population}, "
          f"{settings.generations} generations, seed {study.seed}")

    # Evaluation speed through the problem adapter (one vectorised call per population).
    for arch in study.architectures:
        problem = StageProblem(study, settings.spaces[arch], settings.objectives)
        X = np.random.default_rng(0).uniform(problem.xl, problem.xu, (4000, problem.n_var))
        t0 = time.perf_counter()
        problem.evaluate(X)
        dt = time.perf_counter() - t0
        print(f"  {arch:14s} {len(X) / dt:8.0f} full design evaluations/s")

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        total, fronts, refs = 0.0, {}, {}
        for arch in study.architectures:
            state, dt = search(study, settings, arch, settings.generations, tmp)
            total += dt
            fronts[arch] = state["archive"][1]
        print(f"demo study, default budget: {total:.1f} s wall for {len(study.architectures)} architectures")
        for arch in study.architectures:
            state, dt = search(study, settings, arch, settings.generations * args.factor, tmp)
            refs[arch] = state["archive"][1]
            hv, hv_ref = hypervolume(fronts[arch], *box), hypervolume(refs[arch], *box)
            frac = f"{100 * hv / hv_ref:.1f} %" if hv_ref > 0 else "n/a (no feasible design)"
            print(f"  {arch:14s} HV {hv:.4f}  reference ({args.factor}x generations, {dt:.1f} s) {hv_ref:.4f}  -> {frac}")
        all_f = np.concatenate([f for f in fronts.values() if len(f)]) if any(len(f) for f in fronts.values()) else np.empty((0, 1))
        all_r = np.concatenate([f for f in refs.values() if len(f)]) if any(len(f) for f in refs.values()) else np.empty((0, 1))
        if len(all_r):
            print(f"all architectures: HV {hypervolume(all_f, *box):.4f} of reference {hypervolume(all_r, *box):.4f}"
                  f" -> {100 * hypervolume(all_f, *box) / hypervolume(all_r, *box):.1f} %")


if __name__ == "__main__":
    main()
