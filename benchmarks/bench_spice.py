"""Cost of one design evaluation in ngspice beside stagefront's own, in the same run (by hand).

One ngspice design evaluation is what `stagefront verify` simulates per design and PVT
point: the rest point (.op with the feedback emulation) and both drive-limit sweeps (driven
gate at the model's limit, output swept from VDD/2 to the rail, 100 points each). It is
timed two ways: one ngspice process per design, and `optimise.spice.verify.BATCH` designs per
process (one deck, one .op and one .dc). stagefront's full evaluation is `models.evaluate`
(rest point, mismatch sigma, both drive limits, headroom, peak currents, supply
requirements, output pole) of the same designs at the same PVT point, timed on the designs
repeated to a population large enough to time; the ratio is ngspice time over stagefront
time per design.

Designs: random floating-loop designs inside the 1.8 V demo study's bounds (on the drawing
grid), at tt, 27 degC, 1.8 V. Models: the shipped invented BSIM3v3 card by default, or the
technology's level-1 cards (--level1).

    python3 benchmarks/bench_spice.py [--designs 32] [--level1] [--arch floating-loop] [--seed 0]
"""
from __future__ import annotations

import argparse
import dataclasses
import time
from pathlib import Path

import numpy as np

from models.devices.tech import Corner
from models.evaluate import Conditions, Design, evaluate
from optimise.files.space import load_search
from optimise.files.study import load_study
from optimise.search.runtime import keep_freed_memory
from optimise.spice import ngspice, verify
from optimise.spice import testbench as tb

ROOT = Path(__file__).resolve().parent.parent


def population(study, arch: str, n: int, rng: np.random.Generator) -> Design:
    """n random designs inside the study's bounds for `arch`, decoded as the search does."""
    space = load_search(study).spaces[arch]
    X = rng.uniform(space.xl, space.xu, (n, len(space.free)))
    return space.decode(X)


def repeat(design: Design, times: int) -> Design:
    rep = lambda d: {k: np.tile(v, times) for k, v in d.items()}  # noqa: E731
    return Design(design.architecture, rep(design.w), rep(design.l), rep(design.bias), design.tied)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--designs", type=int, default=32, help="designs simulated (default 32)")
    ap.add_argument("--arch", default="floating-loop")
    ap.add_argument("--level1", action="store_true", help="level-1 cards from the technology instead of the card")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    keep_freed_memory()  # as the stagefront command does
    tb.require_ngspice()
    study = load_study(ROOT / "studies" / "sensor-buffer-180.toml")
    vdd, temp = study.conditions.vdd_nom, study.conditions.temps[0]
    point = Conditions((Corner.TT,), (temp,), vdd, vdd, vdd)
    study1 = dataclasses.replace(study, conditions=point)
    models = tb.ModelSource() if args.level1 else tb.load_models(ROOT / "studies" / "models" /
                                                                 "demo180-bsim3-invented.lib")
    design = population(study, args.arch, args.designs, np.random.default_rng(args.seed))
    pop = verify.Population([f"d{k}" for k in range(design.size)], design)
    print(f"{args.designs} random {args.arch} designs of {study.name}, tt, {temp - 273.15:g} degC, {vdd:g} V; "
          f"ngspice models: {models.describe()}")
    log = lambda s: None  # noqa: E731

    # ngspice, one process per design.
    t0 = time.perf_counter()
    single = {}
    for k in range(design.size):
        one = verify.Population([pop.ids[k]], Design(design.architecture, {r: v[k:k + 1] for r, v in design.w.items()},
                                                      {r: v[k:k + 1] for r, v in design.l.items()},
                                                      {b: v[k:k + 1] for b, v in design.bias.items()}, design.tied))
        single.update({(k, key[1]): val for key, val in verify.simulate_all(one, study1, models, Corner.TT, temp,
                                                                             log).items()})
    t_single = (time.perf_counter() - t0) / design.size
    # ngspice, verify's batches.
    t0 = time.perf_counter()
    batched = verify.simulate_all(pop, study1, models, Corner.TT, temp, log)
    t_batch = (time.perf_counter() - t0) / design.size
    failed = design.size - len(batched)

    # stagefront, the same designs at the same point, repeated to time it well.
    times = max(1, 4096 // design.size)
    big = repeat(design, times)
    evaluate(design, study.tech, point, study.targets)  # warm-up
    best = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        evaluate(big, study.tech, point, study.targets)
        best = min(best, time.perf_counter() - t0)
    t_model = best / big.size
    exe = ngspice.find_executable()
    print(f"ngspice ({exe}), one process per design:   {t_single * 1e3:8.2f} ms per design evaluation")
    print(f"ngspice, {verify.BATCH} designs per process:         {t_batch * 1e3:8.2f} ms per design evaluation"
          + (f"  ({failed} designs failed)" if failed else ""))
    print(f"stagefront full evaluation ({big.size} designs): {t_model * 1e6:8.1f} us per design evaluation")
    print(f"ratio ngspice / stagefront: {t_single / t_model:,.0f}x (one process each), "
          f"{t_batch / t_model:,.0f}x (batched)")


if __name__ == "__main__":
    main()
