"""Fidelity to the card: random floating-loop designs whose lengths vary per role, solved by
the table technology and by the single-length EKV calibration of the same card, both held
against ngspice running the card itself at every corner section, temperature and supply of
the 1.8 V demo study.

Prints, per technology, the error of Iq (median, 95th percentile, worst), of the headrooms
[mV] (all points, and again where the headroom is within the study's limit, away from the
ill-conditioned edge where the stage barely delivers the load), of the peak currents (relative to the larger of the model's value and
the load current) and of the supply sensitivity of Iq (relative, median). Every
design is random (log-uniform sizes and bias currents inside the study's bounds, every L in
[Lmin, 8 Lmin] independently per role); nothing is tuned to a design.

    python3 benchmarks/bench_table_verify.py [--designs 40] [--seed 5]
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from models.evaluate import Design, evaluate
from models.stages import get_stage
from optimise.files.study import load_study, study_from_dict
from optimise.files.tables import read_toml
from optimise.files.techfile import load_tech
from optimise.search.compiled import install as install_compiled
from optimise.spice import testbench as tb
from optimise.spice.verify import Population, simulate_all

STUDY = ROOT / "studies" / "sensor-buffer-180.toml"
CARD = ROOT / "studies" / "models" / "demo180-bsim3-invented.lib"
EKV = ROOT / "studies" / "tech" / "demo180-bsim3-calibrated.toml"
WIDTHS_UM = {"mn_out": (5, 300), "mp_out": (15, 900), "mn_d1": (1, 50), "mn_d2": (1, 50), "mn_ctl": (1, 50),
             "mp_d1": (1.5, 150), "mp_d2": (1.5, 150), "mp_ctl": (1.5, 150)}
BIAS_A = {"ib_n": (0.2e-6, 5e-6), "ib_p": (0.2e-6, 5e-6), "ib_ctl": (0.4e-6, 10e-6)}


def random_designs(n: int, rng, lmin: float) -> Design:
    stage = get_stage("floating-loop")
    logu = lambda lo, hi: np.exp(rng.uniform(np.log(lo), np.log(hi), n))
    w = {r: np.round(logu(*WIDTHS_UM[r]) * 1e-6 / 5e-9) * 5e-9 for r in stage.ROLES}
    l = {r: np.round(logu(lmin, 8 * lmin) / 5e-9) * 5e-9 for r in stage.ROLES}
    bias = {k: logu(*v) for k, v in BIAS_A.items()}
    return Design("floating-loop", w, l, bias, frozenset())


def compare(study, design: Design, models, label: str) -> None:
    t0 = time.perf_counter()
    cond = study.conditions
    result = evaluate(design, study.tech, cond, study.targets)
    corner, temp, vdd = cond.grid()
    pop = Population([f"d{k}" for k in range(design.size)], design)
    sim = {}
    for c in cond.corners:
        for t in cond.temps:
            for (k, v), vals in simulate_all(pop, study, models, c, t, lambda s: None).items():
                sim[(k, c, t, v)] = vals
    err = {m: [] for m in ("iq_a", "headroom_high_v", "headroom_low_v", "iout_source_a", "iout_sink_a")}
    # Headroom where it is within the study's limit (the points a front design can hold):
    # where the stage barely delivers the load, the output device is near saturation at the
    # load, dI/dV_out is small and a 0.2 % current error moves a large headroom by tens of mV.
    spare = {"headroom_high_v": [], "headroom_low_v": []}
    i_load = study.targets.i_load
    sens_model, sens_sim = {}, {}
    for k in range(design.size):
        for j in range(len(vdd)):
            key = (k, corner[j], temp[j], float(vdd[j]))
            if key not in sim or not result.converged[k, j] or sim[key].get("note"):
                continue
            for m in err:
                a, b = float(result.pvt[m][k, j]), float(sim[key][m])
                if not (np.isfinite(a) and np.isfinite(b)):
                    continue
                if m.startswith("headroom"):
                    err[m].append(b - a)
                    if a <= study.targets.headroom_max:
                        spare[m].append(b - a)
                elif m.startswith("iout"):
                    # Relative to the larger of the model's value and the load current: a
                    # peak near zero (a stage that cannot drive that way) has no relative error.
                    err[m].append((b - a) / max(abs(a), i_load))
                else:
                    err[m].append((b - a) / a if a else np.nan)
            sens_model.setdefault((k, corner[j], temp[j]), {})[float(vdd[j])] = float(result.pvt["iq_a"][k, j])
            sens_sim.setdefault((k, corner[j], temp[j]), {})[float(vdd[j])] = float(sim[key]["iq_a"])
    vnom, vmin, vmax = cond.vdd_nom, cond.vdd_min, cond.vdd_max
    rel = []
    for key, mod in sens_model.items():
        s = sens_sim[key]
        if len(mod) == len(cond.supplies) and len(s) == len(cond.supplies):
            sm = (mod[vmax] - mod[vmin]) / (mod[vnom] * (vmax - vmin))
            ss = (s[vmax] - s[vmin]) / (s[vnom] * (vmax - vmin))
            if ss != 0:
                rel.append(abs(sm / ss - 1.0))
    print(f"\n{label}: {design.size} designs x {len(vdd)} PVT points, {len(err['iq_a'])} compared "
          f"({time.perf_counter() - t0:.0f} s)")
    for m, e in err.items():
        e = np.abs(np.array([x for x in e if np.isfinite(x)]))
        if not len(e):
            continue
        scale, unit = (1e3, "mV") if m.startswith("headroom") else (100.0, "%")
        print(f"  {m:16s} median {np.median(e) * scale:7.3f} {unit}   95th {np.percentile(e, 95) * scale:7.3f} {unit}"
              f"   worst {e.max() * scale:7.3f} {unit}")
    for m, e in spare.items():
        e = np.abs(np.array(e))
        if len(e):
            print(f"  {m:16s} median {np.median(e) * 1e3:7.3f} mV   95th {np.percentile(e, 95) * 1e3:7.3f} mV"
                  f"   worst {e.max() * 1e3:7.3f} mV   (model headroom within the study's "
                  f"{study.targets.headroom_max * 1e3:g} mV: {len(e)} points)")
    if rel:
        print(f"  supply sensitivity of Iq: relative error median {100 * np.median(rel):.1f} %, "
              f"95th {100 * np.percentile(rel, 95):.1f} % ({len(rel)} design x corner x temperature)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--designs", type=int, default=40)
    ap.add_argument("--seed", type=int, default=5)
    args = ap.parse_args()
    tb.require_ngspice()
    install_compiled()  # as the stagefront command does
    study = load_study(STUDY)
    lmin = study.tech.nmos.l_min
    design = random_designs(args.designs, np.random.default_rng(args.seed), lmin)
    models = tb.load_models(CARD, "nch", "pch")
    compare(study, design, models, f"table technology ({study.tech.name})")
    ekv = study_from_dict(read_toml(STUDY), STUDY, load_tech(EKV))  # same study, single-length fit
    compare(ekv, design, models, f"single-length EKV calibration ({ekv.tech.name})")


if __name__ == "__main__":
    main()
