"""The 3.3 V demo with and without its [amplifier] table (run by hand): the two fronts side by
side, how many of the front found without the amplifier fail its targets, and where the
bias currents settle.

    python3 benchmarks/bench_amplifier_demo.py [--study studies/sensor-buffer.toml]
        [--out runs/amplifier-demo] [--generations N] [--population N] [--today FRONT_CSV]

"Before" is the study with its [amplifier] table and the targets that need it removed
(today's behaviour: no loop gain, phase margin or slew; fp2 with the gate capacitance);
"after" is the study as shipped. Both run with the study's seed; both run folders are kept
under --out. --today names a front.csv found by an earlier version of stagefront on the same
study (its rows are evaluated inside the amplifier instead of the "before" run's).
"""
from __future__ import annotations

import argparse
import io
import re
import tempfile
from contextlib import redirect_stdout
from pathlib import Path

import numpy as np

from models.evaluate import evaluate
from optimise.files.study import load_study
from optimise.search.export import read_front
from optimise.search.runfolder import populations
from optimise.search.runner import optimise_study

ROOT = Path(__file__).resolve().parent.parent
AMP_TARGETS = ("phase_margin_min", "slew_min", "gate_time_max")
BIAS = ("ib_n_a", "ib_p_a", "ib_ctl_a", "ib_a")


def without_amplifier(text: str) -> str:
    """The study text with its [amplifier] table and the amplifier targets removed."""
    out, skip = [], False
    for line in text.splitlines():
        if re.match(r"^\s*\[", line):
            skip = line.strip() == "[amplifier]"
        if skip or any(re.match(rf"^\s*{k}\s*=", line) for k in AMP_TARGETS):
            continue
        out.append(line)
    return "\n".join(out) + "\n"


def run(study_text: str, folder: Path, tech: Path, name: str, pop, gens) -> Path:
    path = folder / f"{name}.toml"
    path.write_text(re.sub(r'^technology = ".*"$', f'technology = "{tech.as_posix()}"', study_text, flags=re.M))
    with redirect_stdout(io.StringIO()):
        assert optimise_study(path, folder / name, population=pop, generations=gens, overwrite=True) == 0
    return folder / name


def bias_line(front) -> str:
    parts = []
    for col in BIAS:
        if col in front and front[col].notna().any():
            v = front[col].dropna().to_numpy()
            parts.append(f"{col[:-2]}: median {np.median(v) * 1e6:.3g} uA, {np.mean(v < 1e-6) * 100:.0f} % below 1 uA")
    return "; ".join(parts)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--study", default=str(ROOT / "studies" / "sensor-buffer.toml"))
    ap.add_argument("--out", default=None)
    ap.add_argument("--population", type=int, default=None)
    ap.add_argument("--generations", type=int, default=None)
    ap.add_argument("--today", default=None, help="front.csv of an earlier version, evaluated inside the amplifier")
    args = ap.parse_args()
    study = load_study(args.study)
    if study.targets.amplifier is None:
        raise SystemExit(f"{args.study} has no [amplifier] table")
    text = Path(args.study).read_text()
    folder = Path(args.out) if args.out else Path(tempfile.mkdtemp(prefix="stagefront-amp-"))
    folder.mkdir(parents=True, exist_ok=True)
    before = read_front(run(without_amplifier(text), folder, study.tech_path.resolve(), "before", args.population,
                            args.generations) / "front.csv")
    after = read_front(run(text, folder, study.tech_path.resolve(), "after", args.population,
                           args.generations) / "front.csv")
    print(f"run folders: {folder / 'before'}, {folder / 'after'}")
    for label, front in (("before (no amplifier)", before), ("after (with amplifier)", after)):
        counts = ", ".join(f"{a} {n}" for a, n in front["architecture"].value_counts(sort=False).items())
        print(f"{label:24s} {len(front):3d} front designs ({counts or 'none'})")
        print(f"{'':24s} {bias_line(front)}")
    if args.today:
        before = read_front(args.today)
        print(f"{'today (' + args.today + ')':24s} {len(before):3d} front designs")
        print(f"{'':24s} {bias_line(before)}")
    # Today's front inside the amplifier: every design at every PVT point with the new targets.
    fails = {k: 0 for k in ("phase_margin", "slew", "gate_time")}
    any_fail, n = 0, 0
    pm, fint_below, slew, gate = [], 0, [], []
    for ids, design in populations(before):
        res = evaluate(design, study.tech, study.conditions, study.targets)
        n += len(ids)
        bad = np.zeros(len(ids), dtype=bool)
        for k in fails:
            if k in res.margins:
                miss = np.asarray(res.margins[k]) < 0
                fails[k] += int(miss.sum())
                bad |= miss
        any_fail += int(bad.sum())
        pm += list(res.summary["phase_margin_deg"])
        slew += list(res.summary["slew_v_per_s"])
        gate += list(res.summary["gate_time_s"])
        fint_below += int(np.sum(res.summary["fint_hz"] < res.summary["fp2_hz"]))
    t = study.targets
    print(f"the {n} designs found without the amplifier{' (--today)' if args.today else ''}, inside it "
          f"(every PVT point):")
    print(f"  fail any amplifier target: {any_fail} ({100 * any_fail / max(n, 1):.0f} %)")
    print(f"  phase margin < {t.phase_margin_min:g} deg: {fails['phase_margin']}; slew < {t.slew_min * 1e-6:g} V/us: "
          f"{fails['slew']}; gate time > {t.gate_time_max:g} s: {fails['gate_time']}"
          + ("" if np.isfinite(t.gate_time_max) else " (no gate-time limit in the study)"))
    if pm:
        print(f"  worst phase margin: median {np.median(pm):.1f} deg, lowest {np.min(pm):.1f} deg; internal pole "
              f"below the output pole in {fint_below} of {n}")
        print(f"  slew: median {np.median(slew) * 1e-6:.3g} V/us, lowest {np.min(slew) * 1e-6:.3g} V/us; gate time: "
              f"median {np.median(gate) * 1e6:.3g} us, longest {np.max(gate) * 1e6:.3g} us")


if __name__ == "__main__":
    main()
