"""`stagefront netlist`: one front.csv row as a SPICE netlist with its test bench.

The netlist holds the design's subcircuit (written from the architecture's topology by
`optimise.spice`: devices named by role, W and L on the technology's drawing grid), the model
cards (the user's card by reference, or level-1 cards from the study's technology), and the
four blocks of `optimise.spice.testbench`: the rest point (``.op``), a load-current sweep at
mid-supply and the two drive-limit sweeps. Comment lines give what the model predicts at the
same conditions, so the simulator's answer can be compared line by line.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner
from models.evaluate import Conditions, Design, evaluate
from models.stages import get_stage

from .. import CAUTION
from ..files.atomic import write_text
from ..files.errors import InputError
from ..files.study import Study, load_study
from ..search import runfolder
from ..search.export import design_from_row
from . import testbench as tb
from .cards import check_names_apply, comment_safe


def load_run(run) -> tuple[Study, "object", Path]:
    """(study, front table, run folder) of a run folder made by `stagefront optimise`.

    The folder, front.csv and run.json are read by `optimise.search.runfolder.load_run`; the study is
    the file run.json names, as it is now (with a warning when it changed since the run).

    Raises InputError when the folder, its front.csv or run.json, or the study it names is
    missing or unreadable.
    """
    r = runfolder.load_run(run)
    folder, record = r.path, r.record
    if not isinstance(record.get("study"), str):
        raise InputError(str(folder / "run.json"), "names no study file", hint="re-run `stagefront optimise`")
    study_path = Path(record["study"])
    if not study_path.is_absolute() and not study_path.exists():
        study_path = folder / study_path
    if not study_path.exists():
        raise InputError(str(folder / "run.json"), f"names the study {record['study']}, which is not there",
                         hint="run from the folder the run was made in, or restore the study file")
    study = load_study(study_path)
    if "study_toml" in record and record["study_toml"] != study_path.read_text():
        print(f"stagefront: warning: {study_path} changed since the run was made; its current version is used",
              file=sys.stderr)
    return study, r.table, folder


def row_design(front, row_id: str, where: str = "--row") -> tuple[dict, Design]:
    """(row as a dict, one-element Design) of the front.csv row with this id."""
    ids = [str(i) for i in front["id"]] if "id" in front else []
    if row_id not in ids:
        shown = ", ".join(ids[:8]) + (f", ... ({len(ids)} rows)" if len(ids) > 8 else "")
        raise InputError(where, f"no row {row_id!r} in front.csv", shown or "none: the front is empty",
                         "ids look like fl-001 (floating-loop), fb-001 (fixed-bias), fo-001 (follower)")
    row = front.iloc[ids.index(row_id)].to_dict()
    return row, design_from_row(row)


def _eng(x: float, unit: str) -> str:
    from ..files.units import format_eng

    return format_eng(float(x), unit) if np.isfinite(x) else "n/a"


def netlist_text(study: Study, row_id: str, design: Design, models: tb.ModelSource,
                 corner: Corner = Corner.TT) -> str:
    """The readable netlist of one design at `corner`, the study's nominal temperature and supply.

    Parameters
    ----------
    study : Study
    row_id : str
        The front.csv id, for the title.
    design : Design
        One design (arrays of shape (1,)).
    models : ModelSource
    corner : Corner

    Returns
    -------
    str
        A complete ngspice deck: ``.op`` (rest and drive-limit blocks at VDD/2), ``.dc
        I_LOAD`` (the load sweep), ``.dc V_OUT_SRC`` and ``.dc V_OUT_SNK`` (the drive-limit
        sweeps).
    """
    mod = get_stage(design.architecture)
    tech, targets = study.tech, study.targets
    temp, vdd = study.conditions.temps[0], study.conditions.vdd_nom
    res = evaluate(design, tech, Conditions((corner,), (temp,), vdd, vdd, vdd), targets)
    lim = tb.drive_limits(design, tech, targets, corner, temp, np.array([vdd]), np.array([0]))
    sub = tb.netlist.subcircuit_name(mod)
    cards, subckt = tb.design_models(mod, design, 0, tech, models, corner, temp, sub, targets.mirrors.get(mod.NAME))
    pv = {k: float(v[0, 0]) for k, v in res.pvt.items()}
    t_c = temp - ZERO_CELSIUS
    half = 0.5 * vdd
    i_load = targets.i_load
    (n_src, v_src), (n_snk, v_snk) = ((lim.forced[d][0], float(lim.forced[d][1][0])) for d in (+1, -1))
    lim_names = ("driver compliance", "control device at its saturation edge")
    step = half / tb.SWEEP_POINTS
    lines = tb.header(f"stagefront netlist: design {row_id} ({mod.NAME}), {corner.value}, {t_c:g} degC, "
                      f"VDD = {vdd:g} V", models, corner, temp)
    lines[1:1] = [
        comment_safe(f"* Study {study.name} ({study.path}); technology {tech.name}; models: {models.describe()}."),
        f"* {CAUTION}",
        "*",
        f"* What stagefront's {tech.model.value} model predicts at these conditions:",
        f"*   Iq (rest block, pull-down {mod.PULL_DOWN})         {_eng(pv['iq_a'], 'A')}",
        f"*   peak source current (src block, V(out) = VDD/2)   {_eng(pv['iout_source_a'], 'A')}",
        f"*   peak sink current (snk block, V(out) = VDD/2)     {_eng(pv['iout_sink_a'], 'A')}",
        f"*   headroom to VDD at {_eng(i_load, 'A')} sourced          {pv['headroom_high_v']:.4f} V "
        f"(V(src_out) = {vdd - pv['headroom_high_v']:.4f} V)",
        f"*   headroom to ground at {_eng(i_load, 'A')} sunk         {pv['headroom_low_v']:.4f} V",
        f"*   drive limit when sourcing: {n_src} = {v_src:.6f} V "
        f"({lim_names[int(pv['limit_source'])]})",
        f"*   drive limit when sinking:  {n_snk} = {v_snk:.6f} V ({lim_names[int(pv['limit_sink'])]})",
        "*",
        "* Blocks (each its own instance of the subcircuit on the same supply):",
        "*   X_REST  output held at VDD/2 by the amplifier's feedback (emulated); .op gives Iq.",
        "*   X_LOAD  the same feedback with I_LOAD drawing current from the output, swept from",
        "*           -i_load (sinking) to +i_load (sourcing): the output stays at VDD/2 and the",
        "*           output devices share the load (feedback left ideal here: a design that",
        "*           meets its peak-current target never needs its gates beyond the drive",
        "*           limit at mid-supply).",
        f"*   X_SRC   {n_src} forced to its drive-limit voltage; V_OUT_SRC sweeps the output from",
        "*           VDD/2 to VDD; I(V_OUT_SRC) is the current pushed into the load: its value at",
        "*           VDD/2 is the peak, and where it falls to i_load, VDD - V(src_out) is the headroom.",
        f"*   X_SNK   {n_snk} forced likewise; V_OUT_SNK sweeps from VDD/2 to 0; -I(V_OUT_SNK)",
        "*           is the current sunk; where it falls to i_load, V(snk_out) is the headroom.",
    ]
    if cards:
        lines.append(cards)
    lines.append(subckt)
    lines += tb.supply_lines("", vdd)
    rest, nodeset = tb.feedback_block(mod, sub, "rest", "", vdd)
    load, nodeset_l = tb.feedback_block(mod, sub, "load", "", vdd)
    lines += ["* rest point"] + rest + ["* load sweep"] + load
    lines.append(f"I_LOAD {tb.block_node('load', '', 'out')} 0 dc 0")
    lines.append("* drive limits")
    lines += tb.drive_block(mod, sub, +1, "", vdd, n_src, v_src, batch=False)
    lines += tb.drive_block(mod, sub, -1, "", vdd, n_snk, v_snk, batch=False)
    if nodeset + nodeset_l:
        lines.append(".nodeset " + " ".join(nodeset + nodeset_l))
    if targets.amplifier is not None:
        from .acbench import netlist_block

        lines += netlist_block(design, study, models, corner, temp, vdd, pv)
    vectors = " ".join(tb.device_vector(part, "", role) for part in ("rest", "load", "src", "snk")
                       for role in (mod.PULL_DOWN, mod.PULL_UP))
    lines += [
        f".save all {vectors}",
        ".op",
        f".dc I_LOAD {-i_load!r} {i_load!r} {2 * i_load / tb.LOAD_POINTS!r}",
        f".dc V_OUT_SRC {half!r} {vdd!r} {step!r}",
        f".dc V_OUT_SNK {half!r} 0 {-step!r}",
        ".end",
    ]
    return "\n".join(lines) + "\n"


def write_netlist(run, row_id: str, models_path=None, nmos: str = "nch", pmos: str = "pch", out=None,
                  corner: str = "tt", stream=None, trust: bool = False) -> int:
    """`stagefront netlist`: write the netlist of one row to `out` (atomically) or `stream`."""
    check_names_apply(models_path, nmos, pmos)
    study, front, _ = load_run(run)
    _, design = row_design(front, row_id)
    if not models_path and study.tech.card is not None:  # a table technology names its card
        models_path, nmos, pmos = study.tech.card
    models = tb.load_models(models_path, nmos, pmos, trust=trust) if models_path else tb.ModelSource()
    try:
        c = Corner(corner)
    except ValueError:
        raise InputError("--corner", f"{corner!r} is not a corner", ", ".join(tb.CORNERS)) from None
    if c not in models.corners(study.tech):
        raise InputError("--corner", f"{corner} is not available from {models.describe()}",
                         ", ".join(x.value for x in models.corners(study.tech)))
    text = netlist_text(study, row_id, design, models, c)
    if out:
        write_text(Path(out), text)
        print(f"netlist of {row_id}: {out}", file=sys.stderr)
    else:
        (stream or sys.stdout).write(text)
    return 0
