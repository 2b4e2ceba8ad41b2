"""The `stagefront` command line.

Each subcommand is a small function; user input problems raise InputError, which main()
prints to stderr before exiting with status 2.
"""
from __future__ import annotations

import argparse
import json
import sys

from models.evaluate import evaluate
from models.validity import length_warnings

from . import CAUTION, __version__
from .files.errors import InputError
from .files.space import study_ties
from .files.study import load_design, load_study
from .files.tables import MAX_MONTECARLO, count
from .files.units import format_eng
from .review.evaluation import amplifier_dict, json_safe, result_to_dict
from .review.montecarlo import confirm_sigma
from .search.compiled import install as install_compiled
from .search.runtime import keep_freed_memory


SUMMARY_UNITS = {
    "iq_a": "A", "iq_min_a": "A", "iq_max_a": "A", "power_w": "W", "power_max_w": "W", "headroom_high_v": "V",
    "headroom_low_v": "V", "swing_v": "V", "iout_source_a": "A", "iout_sink_a": "A", "iout_peak_a": "A",
    "ab_ratio": "", "area_um2": "um^2", "iq_sigma_pct": "%", "supply_sens_pct_per_v": "%/V", "vdd_min_v": "V",
    "fp2_hz": "Hz", "c_drive_f": "F", "ugf_hz": "Hz", "phase_margin_deg": "deg", "p1_hz": "Hz",
    "fint_hz": "Hz", "fz_hz": "Hz", "slew_v_per_s": "V/s", "gate_time_s": "s",
}
SUMMARY_MEANING = {
    "iq_a": "quiescent current (tt, nominal supply and temperature)",
    "iq_min_a": "lowest Iq over PVT", "iq_max_a": "highest Iq over PVT",
    "power_w": "supply x (Iq + bias branches), typical (tt, nominal)",
    "power_max_w": "supply x (Iq + bias branches), worst over PVT",
    "headroom_high_v": "worst distance from VDD at the peak load",
    "headroom_low_v": "worst distance from ground at the peak load",
    "swing_v": "worst VDD minus both headrooms",
    "delivers_load": "the stage delivers the peak load both ways at every PVT point",
    "iout_source_a": "lowest peak source current at mid-supply",
    "iout_sink_a": "lowest peak sink current at mid-supply",
    "iout_peak_a": "highest peak output current at full drive (short circuit)",
    "ab_ratio": "smallest idle-device current over the output range / Iq",
    "area_um2": "sum of W L (times the layout factor)",
    "iq_sigma_pct": "worst 1-sigma Iq spread from mismatch",
    "supply_sens_pct_per_v": "worst Iq change per volt of supply",
    "vdd_min_v": "lowest supply keeping every device in its region",
    "fp2_hz": "lowest output pole (gm_out / (2 pi (C_load + C_gates)) without an amplifier)",
    "c_drive_f": "gate capacitance the stage loads its driver with",
    "ugf_hz": "lowest unity-gain frequency of the loop gain",
    "phase_margin_deg": "worst phase margin of the loop gain",
    "p1_hz": "lowest dominant pole",
    "fint_hz": "lowest internal pole (the control path)",
    "fz_hz": "lowest right-half-plane zero",
    "slew_v_per_s": "lowest output slew rate",
    "gate_time_s": "longest time to move the gates to the drive limit",
}
LIMIT_WORDS = ("limits: what stops the drive on each side (source/sink). compliance: the driver got within "
               "its compliance of the rail; control-saturation: the bias loop's control device left saturation "
               "first, so the loop, not the driver, caps the drive.")


def _shown(name: str, value, unit: str) -> str:
    if name == "delivers_load":
        return "yes" if value else "CANNOT DELIVER"
    if value is None:
        return "cannot deliver" if name in ("headroom_high_v", "headroom_low_v", "swing_v") else "n/a"
    if unit == "V/s":
        return f"{value * 1e-6:.4g} V/us"
    return f"{value:.4g} {unit}".rstrip() if unit in ("", "%", "%/V", "um^2", "deg") else format_eng(value, unit)


def _print_table(out: dict, mc: dict | None) -> None:
    print(f"architecture: {out['architecture']}    feasible: {'yes' if out['feasible'] else 'no'}")
    amp = out.get("amplifier")
    if amp is None:
        print("amplifier: none described (no [amplifier] table): no loop gain, phase margin or slew; fp2_hz is "
              "gm_out / (2 pi (C_load + C_gates))")
    else:
        print(f"amplifier: two-stage Miller, target unity gain {format_eng(amp['unity_gain_hz'], 'Hz')}, "
              f"Cc {format_eng(amp['compensation_f'], 'F')}, gm1 {format_eng(amp['transconductance_s'], 'S')}, "
              f"feedback {amp['feedback']:g}, first-stage current {format_eng(amp['current_a'], 'A')}")
    print()
    for name, value in out["summary"].items():
        print(f"  {name:24s} {_shown(name, value, SUMMARY_UNITS.get(name, '')):>14s}   {SUMMARY_MEANING.get(name, '')}")
    print()
    print(f"  {'corner':6s} {'temp[C]':>7s} {'vdd[V]':>6s} {'Iq':>10s} {'sigma[%]':>8s} {'hr_high[mV]':>11s} "
          f"{'hr_low[mV]':>10s} {'ab[1]':>6s} {'vdd_min[V]':>10s} {'power':>9s}  limits (source/sink)")
    for row in out["pvt"]:
        def f(key, fmt, scale=1.0):
            if row[key] is None:
                return "cannot" if key.startswith("headroom") else "n/a"
            return fmt.format(row[key] * scale)
        print(f"  {row['corner']:6s} {row['temp_c']:7.0f} {row['vdd_v']:6.2f} "
              f"{format_eng(row['iq_a'], 'A') if row['iq_a'] is not None else 'n/a':>10s} "
              f"{f('iq_sigma_pct', '{:.2f}'):>8s} {f('headroom_high_v', '{:.1f}', 1e3):>11s} "
              f"{f('headroom_low_v', '{:.1f}', 1e3):>10s} {f('ab_ratio', '{:.3f}'):>6s} "
              f"{f('vdd_min_v', '{:.3f}'):>10s} "
              f"{format_eng(row['power_w'], 'W', 3) if row['power_w'] is not None else 'n/a':>9s}"
              f"  {row['limit_source']}/{row['limit_sink']}{'' if row['converged'] else '  NOT CONVERGED'}")
    print(f"  {LIMIT_WORDS} cannot: the stage cannot deliver the peak load that way (no headroom exists).")
    print()
    if out["violations"]:
        print("violations:")
        for v in out["violations"]:
            print(f"  - {v}")
    else:
        print("violations: none (every target met at every PVT point)")
    if mc:
        print()
        print(f"Monte Carlo ({mc['samples']} samples, {mc['corner']}, {mc['temp_c']:g} C, {mc['vdd_v']:g} V): "
              f"Iq mean {'n/a' if mc['iq_mean_a'] is None else format_eng(mc['iq_mean_a'], 'A')}, sigma "
              f"{'n/a' if mc['iq_sigma_pct'] is None else format(mc['iq_sigma_pct'], '.3f') + ' %'} "
              f"(linear estimate {mc['linear_sigma_pct']:.3f} %), failed solves {mc['failed']}")
        if mc["iq_sigma_pct"] is None:
            print(f"  sigma n/a: {_no_sigma(mc)}")
    print()
    print(CAUTION)


def _no_sigma(mc: dict) -> str:
    """Why the Monte Carlo sigma is missing."""
    if mc["samples"] - mc["failed"] < 2:
        return f"fewer than two of the {mc['samples']} draws solved"
    return "Iq is zero in every solved draw (the stage is cut off), so a spread in percent of Iq is undefined"


def cmd_evaluate(args) -> int:
    if args.seed < 0:  # numpy's generator takes any non-negative integer
        raise InputError("--seed", f"{args.seed} is not allowed", "a non-negative integer")
    study = load_study(args.study)
    design = load_design(args.design, study.tech, lambda arch: study_ties(study, arch))
    res = evaluate(design, study.tech, study.conditions, study.targets)
    for line in length_warnings(study.tech, [design]):
        print(f"warning: {line}", file=sys.stderr)
    out = result_to_dict(res)
    out["amplifier"] = amplifier_dict(study.targets, design)
    mc = None
    if args.montecarlo:
        count("--montecarlo", "", args.montecarlo, 2, MAX_MONTECARLO, "10000 samples give the sigma to about 1 %")
        mc = confirm_sigma(design, study, args.montecarlo, args.seed, result=res)
        out["montecarlo"] = mc
    if args.json:
        notes: list = []
        out = json_safe(out, notes=notes)
        if mc is not None and mc["iq_sigma_pct"] is None:
            notes.append(f"montecarlo.iq_sigma_pct is null: {_no_sigma(mc)}")
        if notes:  # the reason beside the null, where a reader of violations looks
            out["violations"] = out["violations"] + [f"Monte Carlo: {n}" if n.startswith("montecarlo") else n
                                                     for n in notes]
        json.dump(out, sys.stdout, indent=1, allow_nan=False)
        print()
    else:
        _print_table(out, mc)
    return 0


def cmd_optimise(args) -> int:
    from .search.runner import optimise_study

    return optimise_study(args.study, args.out, args.seed, args.population, args.generations, args.resume,
                          args.overwrite)


def cmd_compare(args) -> int:
    from .review.compare_render import compare_runs

    return compare_runs(args.runs, args.out, args.overwrite)


def cmd_pick(args) -> int:
    from .review.pick import pick_designs

    return pick_designs(args.run, args.where, args.by, args.count, "csv" if args.csv else args.format,
                        wide=args.wide)


def cmd_export_design(args) -> int:
    from .review.designfile import export_design

    return export_design(args.run, args.id, args.out, args.overwrite)


def cmd_sweep(args) -> int:
    from .sweep.runner import run_sweep

    return run_sweep(args.grid, args.out, args.scheduler, args.workers, args.overwrite, args.montecarlo)


def cmd_report(args) -> int:
    from .report.build import write_report

    return write_report(args.run, args.out, args.count)


# --- SPICE hand-off: netlist, verify, calibrate -----------------------------------------
def _ngspice_guard(run):
    """Run a hand-off command; ngspice failures print its message and give exit status 1."""
    from .spice.ngspice import NgspiceError

    try:
        return run()
    except NgspiceError as err:
        print(f"stagefront: ngspice: {err}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:  # Ctrl-C or SIGTERM: ngspice is stopped, its temporary folder removed
        print("stagefront: interrupted; nothing more was written", file=sys.stderr)
        return 130


def cmd_netlist(args) -> int:
    from .spice.deck import write_netlist

    return _ngspice_guard(lambda: write_netlist(args.run, args.row, args.models, args.nmos, args.pmos, args.out,
                                                args.corner, trust=args.trust_card))


def cmd_verify(args) -> int:
    from .spice.verify import verify_run

    return _ngspice_guard(lambda: verify_run(args.run, args.rows, args.all, args.models, args.nmos, args.pmos,
                                             trust=args.trust_card))


def cmd_calibrate(args) -> int:
    from .calibrate.calibrate import calibrate_command

    return _ngspice_guard(lambda: calibrate_command(args))


def add_handoff_commands(sub) -> None:
    """Subparsers of the SPICE hand-off: netlist, verify, calibrate."""
    models = argparse.ArgumentParser(add_help=False)
    models.add_argument("--nmos", default="nch", metavar="NAME", help="NMOS model name in the card (default nch)")
    models.add_argument("--pmos", default="pch", metavar="NAME", help="PMOS model name in the card (default pch)")
    models.add_argument("--trust-card", action="store_true",
                        help="accept a model card holding .control blocks or shell commands (they run in ngspice); "
                             "only for cards you wrote or whose author you trust")
    p = sub.add_parser(
        "netlist", parents=[models], help="write one front.csv row as a SPICE netlist with its test bench",
        description="One subcircuit from the architecture's topology (devices named by role, W/L on the "
                    "drawing grid) and a test bench: the rest point (.op, output held at VDD/2 by feedback), "
                    "a load-current sweep at mid-supply and the two drive-limit sweeps (driven gate at the "
                    "model's limit, output swept).")
    p.add_argument("run", metavar="RUN", help="run folder (front.csv and run.json)")
    p.add_argument("--row", required=True, metavar="ID", help="front.csv row id, e.g. fl-003")
    p.add_argument("--models", metavar="FILE", help="your model card (.lib with corner sections, or a plain card); "
                                                      "default: level-1 cards from the study's technology")
    p.add_argument("--corner", default="tt", help="process corner of the test bench (default tt)")
    p.add_argument("--out", metavar="FILE", help="write here (atomically) instead of to stdout")
    p.set_defaults(func=cmd_netlist)

    p = sub.add_parser(
        "verify", parents=[models], help="simulate chosen designs in ngspice and compare with the model",
        description="Run ngspice on each chosen design at the study's PVT points the model file supports; "
                    "compare Iq, headrooms and peak currents with the model; write RUN/verify.csv and print "
                    "the median and worst error per metric. Exit status 1 when nothing could be verified.")
    p.add_argument("run", metavar="RUN", help="run folder (front.csv and run.json)")
    p.add_argument("--rows", metavar="IDS", help="row ids, comma separated (default: the overall front)")
    p.add_argument("--all", action="store_true", help="every row of front.csv")
    p.add_argument("--models", metavar="FILE", help="your model card; default: level-1 cards from the technology")
    p.set_defaults(func=cmd_verify)

    p = sub.add_parser(
        "calibrate", parents=[models], help="fit a technology file to a SPICE model card (ngspice DC sweeps)",
        description="Sweep single NMOS and PMOS devices of the card in ngspice (Id-VGS from weak to strong "
                    "inversion at several L and VSB, Id-VDS for the Early voltage, two more temperatures, every "
                    "corner section), fit the technology parameters by least squares, print the fit error per "
                    "region and write a technology TOML.")
    p.add_argument("--models", required=True, metavar="FILE", help="the model card (.lib with sections, or plain)")
    p.add_argument("--out", required=True, metavar="TECH.toml", help="technology file to write")
    p.add_argument("--kind", choices=("ekv", "square-law"), default="ekv", help="model kind to fit (default ekv)")
    p.add_argument("--corner", default="tt", help="section fitted as the typical process (default tt)")
    p.add_argument("--lmin", metavar="VALUE", help="shortest length fitted and written as l_min, e.g. 0.18u "
                                                   "(default: l_min of --base)")
    p.add_argument("--lengths", metavar="L,...", help="lengths swept (default: lmin x 1, 2, 4, 8)")
    p.add_argument("--vdd", default="1.8", metavar="VALUE", help="largest voltage swept (default 1.8)")
    p.add_argument("--base", metavar="TECH.toml", help="technology to keep mismatch, capacitance, minimum "
                                                       "sizes, grid and (without corner sections) corners from")
    p.add_argument("--name", help="technology name (default: the --out file's stem)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing --out file")
    p.add_argument("--tables", action="store_true",
                   help="write a table technology (model = \"table\"): the card tabulated by ngspice at every "
                        "length, corner section and temperature, arrays in TECH.npz beside --out (recommended "
                        "when a card is available: lengths may then differ per role)")
    p.add_argument("--lmax", metavar="VALUE", help="with --tables: longest length tabulated (default 10 x lmin)")
    p.add_argument("--table-lengths", metavar="L,...",
                   help="with --tables: the lengths tabulated (default 12 log-spaced from lmin to lmax)")
    p.add_argument("--temps", metavar="C,...", help="with --tables: temperatures in degC (default -40,27,125)")
    p.add_argument("--wref", default="10u", metavar="VALUE",
                   help="with --tables: reference width (default 10u); a narrow width (--wnarrow, default 1u) "
                        "gives the narrow-width correction")
    p.add_argument("--wnarrow", default="1u", metavar="VALUE", help="with --tables: the narrow width (default 1u)")
    p.set_defaults(func=cmd_calibrate)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="stagefront",
        description="Size class-AB CMOS output stages with analytic all-region models. " + CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"stagefront {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    p = sub.add_parser(
        "evaluate", help="solve one design at every PVT point of a study and print all metrics",
        description="Solve one design exactly (rest point, both drive limits, mismatch sigma) at every "
                    "corner x temperature x supply of the study, and print every metric and every "
                    "violated target.")
    p.add_argument("study", help="study file (TOML), e.g. studies/sensor-buffer.toml")
    p.add_argument("--design", required=True, help="design file (TOML): architecture, [devices.ROLE] w/l in um, [bias]")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of the table")
    p.add_argument("--montecarlo", type=int, default=0, metavar="N",
                   help="also run N Monte Carlo mismatch samples at tt, nominal supply and temperature")
    p.add_argument("--seed", type=int, default=1, help="seed of the Monte Carlo draws (default 1)")
    p.set_defaults(func=cmd_evaluate)

    p = sub.add_parser(
        "optimise", help="search sizes and bias of every architecture of a study (NSGA-II) and write a run folder",
        description="Search every architecture of the study with NSGA-II on the same objectives and "
                    "constraints; write front.csv, run.json and plots into the run folder.")
    p.add_argument("study", help="study file (TOML) with [objectives], [bounds.ARCH], [ties.ARCH], [search]")
    p.add_argument("--out", help="run folder (default runs/STUDY-NAME); never overwritten unless --overwrite")
    p.add_argument("--seed", type=int, help="random seed (default: the study's)")
    p.add_argument("--population", type=int, help="population size (default: the study's [search])")
    p.add_argument("--generations", type=int, help="generations (default: the study's [search])")
    p.add_argument("--resume", action="store_true", help="continue a stopped run from its checkpoints")
    p.add_argument("--overwrite", action="store_true", help="replace an existing run folder")
    p.set_defaults(func=cmd_optimise)

    p = sub.add_parser(
        "compare", help="put the fronts of several run folders on the same axes: who dominates where",
        description="Load run folders made with the same objectives; for every pair of (run, architecture) "
                    "groups report the share of one group's designs that a design of the other dominates, "
                    "and the best value each group reaches per objective.")
    p.add_argument("runs", nargs="+", metavar="RUN", help="run folders (each with front.csv and run.json)")
    p.add_argument("--out", help="folder for compare.csv, compare.md and compare.png")
    p.add_argument("--overwrite", action="store_true", help="write into an --out folder that is not empty")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser(
        "pick", help="filter a run's front by budgets and rank it (knee or one objective) for hand-off",
        description="Keep the front designs that meet every --where budget, rank them by the knee of the "
                    "front or by one objective, and print sizes (um), bias currents (uA), r_bias (kohm), "
                    "objectives and constraint margins (%). Exit status 1 when no design is left.")
    p.add_argument("run", metavar="RUN", help="run folder (front.csv and run.json)")
    p.add_argument("--where", action="append", default=[], metavar="BUDGET",
                   help="NAME OP VALUE, e.g. \"power_w<=200u\"; OP one of <= >= < > ==; NAME a front.csv "
                        "column; repeat for several budgets (all must hold)")
    p.add_argument("--by", default="knee", metavar="knee|OBJECTIVE",
                   help="rank by the knee (default) or by one of the run's objectives, best first")
    p.add_argument("--count", type=int, default=10, metavar="N", help="designs to show (default 10)")
    p.add_argument("--format", choices=("md", "csv"), default="md", help="Markdown tables (default) or CSV")
    p.add_argument("--wide", action="store_true", help="one Markdown table with every column (wider than 100 "
                                                       "characters) instead of the compact tables")
    p.add_argument("--csv", action="store_true", help="every front.csv column of the rows shown, as CSV "
                                                      "(same as --format csv)")
    p.set_defaults(func=cmd_pick)

    p = sub.add_parser(
        "export-design", help="write one front.csv row as a design file for evaluate (or for editing)",
        description="Write the row's architecture, every device's W/L (um) and bias as a design file; "
                    "`stagefront evaluate STUDY --design FILE` then shows its full PVT table and gives the "
                    "row's metrics.")
    p.add_argument("run", metavar="RUN", help="run folder (front.csv and run.json)")
    p.add_argument("id", metavar="ID", help="front.csv row id, e.g. fl-003")
    p.add_argument("--out", metavar="FILE.toml", help="write here (atomically) instead of to stdout")
    p.add_argument("--overwrite", action="store_true", help="replace an existing --out file")
    p.set_defaults(func=cmd_export_design)

    p = sub.add_parser(
        "sweep", help="run every cell of a grid file (a base study and axes to vary) on a Dask cluster",
        description="Expand a grid file into one study per cell, run each as a Dask task (local worker "
                    "processes, or the cluster at --scheduler), reuse cells already finished, and write "
                    "summary.csv, summary.md and fronts.png across the cells. Exit status 1 when a cell "
                    "failed.")
    p.add_argument("grid", help="grid file (TOML): base = STUDY, [axes], optional [search]")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler to use, e.g. tcp://10.0.0.5:8786 "
                                                           "(default: start a local cluster)")
    p.add_argument("--workers", type=int, metavar="N", help="worker processes of the local cluster (default 2)")
    p.add_argument("--out", help="sweep folder (default runs/GRID-NAME); finished cells in it are reused")
    p.add_argument("--overwrite", action="store_true", help="clear the sweep folder and run every cell again")
    p.add_argument("--montecarlo", type=int, default=0, metavar="N",
                   help="also run N Monte Carlo mismatch draws of each cell's knee design on the cluster")
    p.set_defaults(func=cmd_sweep)

    p = sub.add_parser(
        "report", help="write a self-contained HTML report of a run folder (and a Markdown twin) for a lead",
        description="One HTML page (figures embedded, no network needed) and a Markdown twin with the study, "
                    "every architecture's front, the picked designs (knee first), the knee at every PVT point, "
                    "its mismatch spread, Iq against supply, the simulator verification when verify.csv "
                    "exists, and the assumptions.")
    p.add_argument("run", metavar="RUN", help="run folder (front.csv and run.json)")
    p.add_argument("--out", metavar="FILE", help="HTML file (default RUN/report.html); the Markdown twin and "
                                                 "its PNG figures go beside it (report.md, report-*.png)")
    p.add_argument("--count", type=int, default=8, metavar="N", help="picked designs to show (default 8)")
    p.set_defaults(func=cmd_report)
    add_handoff_commands(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    keep_freed_memory()
    install_compiled()
    try:
        for key in ("out", "models", "base", "design", "scheduler"):  # "" would mean the current folder
            if isinstance(getattr(args, key, None), str) and not getattr(args, key).strip():
                raise InputError(f"--{key}", "is empty", "a path" if key != "scheduler" else "an address")
        return args.func(args)
    except InputError as err:
        print(f"stagefront: error: {err}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # output piped into a pager or head that closed early
        sys.stderr.close()
        return 0


if __name__ == "__main__":
    sys.exit(main())
