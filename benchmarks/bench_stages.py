"""Full design evaluations per second and peak memory of models.evaluate (run by hand).

A full evaluation is one design at every PVT point of the grid: rest point, Iq sigma by
the adjoint sensitivities, both driven points (drive limit, headroom, peak current, idle
current), supply requirements and the output pole; with the amplifier on, also the
small-signal model inside the study's amplifier (poles, zeros, loop gain, unity-gain
frequency, phase margin, slew, gate time). Each architecture is measured with the
amplifier table off and on (when the study has one), back to back in the same run. Default grid: 5 corners x 1 temperature
x 3 supplies = 15 PVT points, on the invented demo350 process. Population sizes are random
around the demo designs (log-uniform factors), so the solver sees varied operating points.

    python3 benchmarks/bench_stages.py [--designs 10000] [--arch floating-loop] [--chunk 8192]
                                       [--glibc-default] [--table] [--mirrors sized|sigma]

--table runs the 1.8 V demo study instead: its table technology (the BSIM3v3 card
tabulated) beside the card's single-length EKV calibration, on the same designs in the same
run; the table kind twice, with the compiled loop the stagefront command installs
(optimise.search.compiled) and with the numpy reference alone (lengths 0.36-1.8 um, inside the tables and from the EKV fit's length; widths from 1 um),
with the 3.3 V demo's [amplifier] table off and on (the 1.8 V study describes none).
--mirrors makes every bias source a mirror (sized: W = 4 um, L = 2 um; sigma: 1 % and
10 Mohm), to measure what the voltage-dependent sources cost the rest point.

Like the stagefront command, the benchmark asks glibc to keep freed memory for reuse
(optimise.search.runtime); --glibc-default measures without that.
"""
from __future__ import annotations

import argparse
import dataclasses
import resource
import time
import tracemalloc
from dataclasses import replace
from pathlib import Path

import numpy as np

from models.circuit.mirrors import Mirror, source_keys
from models.devices import table_data
from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner
from models.evaluate import Conditions, Design, evaluate
from models.stages import get_stage
from optimise.files.study import load_design, load_study
from optimise.files.techfile import load_tech
from optimise.search.compiled import forward as compiled_forward
from optimise.search.compiled import install as install_compiled
from optimise.search.runtime import keep_freed_memory

ROOT = Path(__file__).resolve().parent.parent


def population(base: Design, n: int, rng: np.random.Generator, lmin=0.35e-6, lmax=np.inf, wmin=0.0) -> Design:
    """n designs spread log-uniformly over a factor of 2 around `base`."""
    def spread(a):
        return np.repeat(a, n) * np.exp(rng.uniform(-0.7, 0.7, n))
    return Design(base.architecture, {k: np.maximum(spread(v), wmin) for k, v in base.w.items()},
                  {k: np.clip(spread(v), lmin, lmax) for k, v in base.l.items()},
                  {k: spread(v) for k, v in base.bias.items()}, base.tied)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--designs", type=int, default=10000)
    ap.add_argument("--arch", default="all")
    ap.add_argument("--chunk", type=int, default=16384)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--mirrors", choices=("ideal", "sized", "sigma"), default="ideal")
    ap.add_argument("--glibc-default", action="store_true",
                    help="leave glibc's memory trimming as it is (the stagefront command changes it)")
    ap.add_argument("--table", action="store_true", help="table technology beside EKV on the 1.8 V study")
    args = ap.parse_args()
    if not args.glibc_default:
        keep_freed_memory()
    if args.table:
        study = load_study(ROOT / "studies" / "sensor-buffer-180.toml")
        techs = [("ekv", load_tech(ROOT / "studies" / "tech" / "demo180-bsim3-calibrated.toml")),
                 ("table", study.tech), ("table numpy", study.tech)]
        cond = Conditions(tuple(Corner), (27 + ZERO_CELSIUS,), 1.8, 1.62, 1.98)
        # From 0.36 um, the shortest length of the single-length EKV calibration.
        limits = {"lmin": 0.36e-6, "lmax": 1.8e-6, "wmin": 1e-6}
    else:
        study = load_study(ROOT / "studies" / "sensor-buffer.toml")
        techs = [("", study.tech)]
        cond = Conditions(tuple(Corner), (27 + ZERO_CELSIUS,), 3.3, 2.7, 3.6)
        limits = {}
    archs = study.architectures if args.arch == "all" else (args.arch,)
    design_tech = load_study(ROOT / "studies" / "sensor-buffer.toml").tech if args.table else study.tech
    if args.mirrors != "ideal":
        form = {"w": 4e-6, "l": 2e-6} if args.mirrors == "sized" else {"sigma_pct": 1.0, "r_out": 1e7}
        mirrors = {a: {k: Mirror(**form) for k in source_keys(get_stage(a).TOPOLOGY).values()} for a in archs}
        study = replace(study, targets=replace(study.targets, mirrors=mirrors))
    print(f"grid: {len(cond.corners)} corners x {len(cond.temps)} temperature x {len(cond.supplies)} supplies "
          f"= {len(cond.grid()[2])} PVT points; {args.designs} designs; chunk {args.chunk}; bias sources "
          f"{args.mirrors}")
    on = study.targets
    if args.table and on.amplifier is None:
        # The 1.8 V study describes no amplifier: the 3.3 V demo's [amplifier] table is
        # borrowed, so that the table technology is measured with it on and off too.
        demo = load_study(ROOT / "studies" / "sensor-buffer.toml").targets
        on = replace(on, amplifier=demo.amplifier, phase_margin_min=demo.phase_margin_min, slew_min=demo.slew_min,
                     gate_time_max=demo.gate_time_max)
        print("amplifier: the 3.3 V demo study's [amplifier] table (the 1.8 V study has none)")
    cases = [("", on)]
    if on.amplifier is not None:
        off = dataclasses.replace(on, amplifier=None, phase_margin_min=0.0, slew_min=0.0, gate_time_max=np.inf)
        cases = [("amplifier off", off), ("amplifier on", on)]
    for arch, (label, tech) in ((a, t) for a in archs for t in techs):
        table_data.set_kernel(None if label == "table numpy" or not install_compiled() else compiled_forward)
        # The demo designs are drawn for the 3.3 V process (0.35 um lengths); with --table the
        # population's lengths are clipped into the tables' range below.
        base = load_design(ROOT / "studies" / f"sensor-buffer-{arch}.toml", design_tech)
        pop = population(base, args.designs, np.random.default_rng(0), **limits)
        for case, targets in cases:
            evaluate(population(base, 64, np.random.default_rng(1), **limits), tech, cond, targets)  # warm-up
            best, cpu = np.inf, 0.0
            for _ in range(args.repeat):
                t0, c0 = time.perf_counter(), time.process_time()
                res = evaluate(pop, tech, cond, targets, chunk=args.chunk)
                if time.perf_counter() - t0 < best:
                    best, cpu = time.perf_counter() - t0, time.process_time() - c0
            tracemalloc.start()
            evaluate(pop, tech, cond, targets, chunk=args.chunk)
            _, peak = tracemalloc.get_traced_memory()
            tracemalloc.stop()
            name = " ".join(x for x in (arch, label, case) if x)
            print(f"{name:34s} {args.designs / best:10.0f} designs/s  ({best:.3f} s best of {args.repeat}, "
                  f"CPU/wall {cpu / best:.2f}; {res.converged.mean() * 100:.2f} % of points converged; "
                  f"peak numpy memory {peak / 2**20:.0f} MiB)")
    print(f"process max RSS {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB")


if __name__ == "__main__":
    main()
