"""`stagefront verify`: the chosen designs of a run in ngspice, beside the model's figures.

For every chosen front.csv row and every PVT point of the study that the model cards
support (`testbench.ModelSource.corners`), ngspice gives Iq at rest, the peak source and
sink currents at mid-supply and the headroom to each rail at the peak load current, with the
driven gate at the model's drive-limit voltage and the output swept (`optimise.spice.testbench`).
Both sides use the definitions of `models.evaluate`.

Batching: one deck per corner and temperature holds up to `BATCH` designs, each at every
supply of the study (one ngspice process, one ``.op`` and one ``.dc``). When a batched deck
fails, its designs are run one per process, so a design that does not converge (or a model
ngspice cannot find) is reported with ngspice's message and the others still complete.

verify.csv (one row per design, PVT point and metric): id, architecture, corner, temp_c,
vdd_v, metric, model, simulator, error, error_unit, note. error is (simulator - model) /
model for the currents (error_unit "rel") and simulator - model in volts for the headrooms
(error_unit "V"); a failed point has empty simulator and error cells and ngspice's message
in note.
"""
from __future__ import annotations

import json

import csv
import io
import sys
import time
from dataclasses import dataclass, field

import numpy as np

from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner, ModelKind
from models.evaluate import Design, evaluate
from models.stages import get_stage

from .. import CAUTION
from ..files.atomic import write_text
from ..files.folders import locked
from ..files.errors import InputError
from ..search import runfolder
from . import ngspice, process
from . import testbench as tb
from .cards import check_names_apply
from .deck import load_run
from .ngspice import NgspiceError

BATCH = 16  # designs per ngspice process (each at every supply of the study)
# Time limit of one ngspice process, scaled to its deck: a start-up allowance plus a share per
# design x supply (a rest point and two 100-point drive sweeps). A BSIM3 deck measured here
# takes about 0.1 s per design x supply on a loaded 2-core machine; the limit allows ten
# times that, so only a run that is stuck (a card that does not converge) reaches it.
TIME_BASE_S = 10.0
TIME_PER_POINT_S = 1.0
PROGRESS_S = 10.0  # a progress line on stderr this often while one ngspice process runs


def time_limit(designs: int, supplies: int) -> float:
    """Wall-clock limit [s] of one verify deck of `designs` designs at `supplies` supplies."""
    return TIME_BASE_S + TIME_PER_POINT_S * designs * supplies
METRICS = ("iq_a", "headroom_high_v", "headroom_low_v", "iout_source_a", "iout_sink_a")
ABSOLUTE = ("headroom_high_v", "headroom_low_v", "phase_margin_deg")  # compared in volts (degrees); the rest relatively
AC_METRICS = ("ugf_hz", "phase_margin_deg")  # with an [amplifier] table: the AC bench (optimise.spice.acbench)
COLUMNS = ("id", "architecture", "corner", "temp_c", "vdd_v", "metric", "model", "simulator", "error",
           "error_unit", "note")


@dataclass
class Population:
    """Rows of one architecture (and one set of bulk ties) as one Design."""

    ids: list[str]
    design: Design
    result: object = None
    failures: dict = field(default_factory=dict)  # row id -> message


def populations(front, ids) -> list[Population]:
    """Group the chosen rows, in the order of `ids`, into populations that `models.evaluate`
    takes at once (`optimise.search.runfolder.populations`)."""
    at = {str(rid): k for k, rid in enumerate(front["id"])}
    return [Population([str(r) for r in rids], design)
            for rids, design in runfolder.populations(front.iloc[[at[rid] for rid in ids]])]


def choose_rows(front, rows: str | None, all_rows: bool) -> list[str]:
    """Row ids from --rows (comma or space separated) or --all; default: the overall front."""
    ids = [str(i) for i in front["id"]]
    if not ids:
        raise InputError("front.csv", "has no rows", hint="the run found no feasible design to verify")
    if rows and all_rows:
        raise InputError("--rows/--all", "both given", hint="give one of them")
    if all_rows:
        return ids
    if rows is not None:
        wanted = [r for r in rows.replace(",", " ").split() if r]
        if not wanted:
            raise InputError("--rows", f"{rows!r} names no row", "row ids, comma separated, e.g. fl-001,fl-003")
        unknown = [r for r in wanted if r not in ids]
        if unknown:
            shown = ", ".join(ids[:8]) + (f", ... ({len(ids)} rows)" if len(ids) > 8 else "")
            raise InputError("--rows", f"no row {', '.join(map(repr, unknown))} in front.csv", shown)
        return list(dict.fromkeys(wanted))
    if "overall_front" in front:
        chosen = [i for i, f in zip(ids, front["overall_front"]) if str(f).lower() in ("true", "1")]
        if chosen:
            return chosen
    return ids


# ---------------------------------------------------------------------------------------
# One deck
# ---------------------------------------------------------------------------------------
def simulate(pop: Population, members: list[int], study, models: tb.ModelSource, corner: Corner, temp: float,
             timeout: float | None = None, log=None) -> dict:
    """ngspice's figures for designs `members` of `pop` at every supply, one process.

    `timeout` defaults to `time_limit` of the deck; `log`, when given, gets a progress line
    every PROGRESS_S seconds while ngspice runs. Returns {(member, vdd): {metric: value,
    "note": str}}. Raises NgspiceError when the run fails as a whole.
    """
    mod = get_stage(pop.design.architecture)
    tech, targets = study.tech, study.targets
    supplies = study.conditions.supplies
    idx = np.repeat(np.array(members, dtype=int), len(supplies))
    vdd = np.tile(np.array(supplies, dtype=float), len(members))
    lim = tb.drive_limits(pop.design, tech, targets, corner, temp, vdd, idx)
    lines = tb.header(f"stagefront verify: {len(members)} {mod.NAME} designs, {corner.value}, "
                      f"{temp - ZERO_CELSIUS:g} degC", models, corner, temp)
    body, nodeset, saves, tags = [], [], [], []
    for k in members:
        cards, sub = tb.design_models(mod, pop.design, k, tech, models, corner, temp, f"d{k}",
                                      targets.mirrors.get(mod.NAME))
        if cards:
            lines.append(cards)
        lines.append(sub)
    for e, (k, v) in enumerate(zip(idx, vdd)):
        tag = f"{k}v{e % len(supplies)}"
        tags.append(tag)
        body += tb.supply_lines(tag, v)
        rest, ns = tb.feedback_block(mod, f"d{k}", "rest", tag, v)
        body += rest
        nodeset += ns
        saves += [tb.device_vector("rest", tag, mod.PULL_DOWN), tb.device_vector("rest", tag, mod.PULL_UP)]
        for direction in (+1, -1):
            node, value = lim.forced[direction]
            body += tb.drive_block(mod, f"d{k}", direction, tag, v, node, float(value[e]), batch=True)
    lines += body + ["V_SWEEP sweep 0 dc 0"]
    if nodeset:
        lines.append(".nodeset " + " ".join(nodeset))
    lines += [".save all " + " ".join(saves), ".op", f".dc V_SWEEP 0 1 {1.0 / tb.SWEEP_POINTS!r}", ".end"]
    timeout = time_limit(len(members), len(supplies)) if timeout is None else timeout
    what = f"{mod.NAME} {corner.value} {temp - ZERO_CELSIUS:g} C, {len(members)} design(s)"
    progress = (lambda t: log(f"    ... {what}: ngspice still running after {t:.0f} s (limit {timeout:.0f} s)")) \
        if log else None
    plots = ngspice.run_plots("\n".join(lines), timeout=timeout, progress=progress)
    op = next((p.vectors for p in plots if p.name.lower().startswith("operating")), None)
    dc = next((p.vectors for p in plots if p.name.lower().startswith("dc")), None)
    if op is None or dc is None:
        raise NgspiceError(f"ngspice wrote {', '.join(p.name for p in plots)}; expected an operating point and a "
                           "DC sweep")
    s = tb.vector(dc, "v(sweep)")
    out = {}
    for e, (k, v) in enumerate(zip(idx, vdd)):
        tag = tags[e]
        iq, _, v_out = tb.rest_current(op, mod, tag)
        vals = {"iq_a": iq, "note": ""}
        if abs(v_out - 0.5 * v) > tb.netlist.OUT_TOLERANCE:
            vals["note"] = f"rest block settled at V(out) = {v_out:.4g} V, not VDD/2"
        if not lim.ok[e]:
            vals["note"] = "the model found no drive limit here"
        for direction, (peak_name, hr_name) in ((+1, ("iout_source_a", "headroom_high_v")),
                                                (-1, ("iout_sink_a", "headroom_low_v"))):
            part = "src" if direction > 0 else "snk"
            cur = tb.vector(dc, f"i(v_out_{part}{tag})")
            vals[peak_name], vals[hr_name] = tb.drive_point(s, cur, v, direction, targets.i_load)
        out[(int(k), float(v))] = vals
    return out


def _first_lines(err: Exception, n: int = 4) -> str:
    lines = [ln.strip() for ln in str(err).splitlines() if ln.strip()]
    return " | ".join(lines[:n])


def simulate_all(pop: Population, study, models, corner, temp, log) -> dict:
    """Every design of `pop` at one corner and temperature: batched, then one by one on failure.

    After two designs in a row time out alone, the rest of their batch is recorded as not
    simulated (a card that does not converge would otherwise cost a time limit per design).
    """
    n = pop.design.size
    results = {}
    where = f"{pop.design.architecture} {corner.value} {temp - ZERO_CELSIUS:g} C"
    for start in range(0, n, BATCH):
        members = list(range(start, min(start + BATCH, n)))
        if n > BATCH:
            log(f"  {where}: designs {start + 1}-{members[-1] + 1} of {n}")
        try:
            results.update(simulate(pop, members, study, models, corner, temp, log=log))
            continue
        except NgspiceError as err:
            if len(members) == 1:
                pop.failures.setdefault(pop.ids[members[0]], {})[(corner, temp)] = _first_lines(err)
                continue
            log(f"  batch of {len(members)} failed ({_first_lines(err, 1)}); running its designs one by one")
        timeouts = 0
        for j, k in enumerate(members):
            if timeouts >= 2:
                pop.failures.setdefault(pop.ids[k], {})[(corner, temp)] = \
                    "not simulated: two designs before it in its batch timed out"
                continue
            log(f"  {where}: design {pop.ids[k]} ({j + 1} of {len(members)}) alone")
            try:
                results.update(simulate(pop, [k], study, models, corner, temp, log=log))
                timeouts = 0
            except NgspiceError as err:
                timeouts = timeouts + 1 if getattr(err, "timed_out", False) else 0
                pop.failures.setdefault(pop.ids[k], {})[(corner, temp)] = _first_lines(err)
        if timeouts >= 2:
            log(f"  {where}: two designs in a row timed out; the rest of the batch is left out")
    return results


# ---------------------------------------------------------------------------------------
# The command
# ---------------------------------------------------------------------------------------
def _error(metric: str, model: float, sim: float) -> float:
    if metric in ABSOLUTE:
        return sim - model
    return (sim - model) / model if model != 0 else (0.0 if sim == 0 else np.inf)


def verify_run(run, rows=None, all_rows=False, models_path=None, nmos="nch", pmos="pch", stream=None,
               err_stream=None, trust: bool = False) -> int:
    """`stagefront verify` (`trust`: accept a card with control lines, ``--trust-card``). Returns 0 when at least one point was verified, 1 when none was."""
    stream = stream or sys.stdout
    err_stream = err_stream or sys.stderr
    log = lambda s: print(s, file=err_stream, flush=True)  # noqa: E731
    check_names_apply(models_path, nmos, pmos)
    study, front, folder = load_run(run)
    with locked(folder, "verify"), process.terminate_as_interrupt():
        return _verify(study, front, folder, rows, all_rows, models_path, nmos, pmos, stream, log, trust)


def _verify(study, front, folder, rows, all_rows, models_path, nmos, pmos, stream, log, trust=False) -> int:
    """The body of `verify_run`, with the run folder locked."""
    ids = choose_rows(front, rows, all_rows)
    if not models_path and study.tech.card is not None:
        # A table technology records the card it tabulates: verify against that card.
        models_path, nmos, pmos = study.tech.card
        log(f"using the card {models_path} that {study.tech.name} tabulates")
    models = tb.load_models(models_path, nmos, pmos, trust=trust) if models_path else tb.ModelSource()
    tb.require_ngspice()
    cond = study.conditions
    corners = [c for c in cond.corners if c in models.corners(study.tech)]
    skipped = [c.value for c in cond.corners if c not in corners]
    if not corners:
        raise InputError("--models" if models_path else str(study.path),
                         f"none of the study's corners ({', '.join(c.value for c in cond.corners)}) is available "
                         f"from {models.describe()}",
                         hint="a plain card supports tt only; a .lib file supports the corners it has sections for")
    caveat = ""
    if not models_path and study.tech.model is not ModelKind.SQUARE_LAW:
        # Level-1 cards run the square law, not the EKV equations the study solves: the
        # comparison then measures the difference between the two device models.
        caveat = (f"note: {study.tech.name} is an {study.tech.model.value} technology and no --models was given; "
                  "the level-1 cards made from it run the square law, so these errors compare two device models "
                  "(EKV against level 1), not the tool against a simulator. Give the card the technology was "
                  "calibrated to (--models) to check the design.")
        log(caveat)
    log(f"verifying {len(ids)} designs at {len(corners)} corners x {len(cond.temps)} temperatures x "
        f"{len(cond.supplies)} supplies with {models.describe()}"
        + (f"; corners not in the model file, skipped: {', '.join(skipped)}" if skipped else ""))
    pops = populations(front, ids)
    records = []
    t0 = time.perf_counter()
    for pop in pops:
        pop.result = evaluate(pop.design, study.tech, cond, study.targets)
        for corner in corners:
            for temp in cond.temps:
                t1 = time.perf_counter()
                sim = simulate_all(pop, study, models, corner, temp, log)
                log(f"  {pop.design.architecture} {corner.value} {temp - ZERO_CELSIUS:g} C: {pop.design.size} designs "
                    f"in {time.perf_counter() - t1:.2f} s")
                records += _records(pop, corner, temp, sim)
                if study.targets.amplifier is not None:
                    records += _ac_records(pop, study, models, corner, temp, log)
    write_text(folder / "verify.csv", _csv(records))
    # What the report needs to word the figures: which models ngspice ran.
    write_text(folder / "verify.json", json.dumps({"models": str(models_path) if models_path else None,
                                                   "simulated_with": models.describe(), "caveat": caveat}, indent=1)
               + "\n")
    _summary(records, pops, stream, time.perf_counter() - t0)
    if caveat:
        print(caveat, file=stream)
    print(f"table: {folder / 'verify.csv'}", file=stream)
    print(CAUTION, file=stream)
    return 0 if any(r["simulator"] is not None for r in records) else 1


def _records(pop: Population, corner: Corner, temp: float, sim: dict) -> list[dict]:
    """verify.csv records of every design of `pop` at one corner and temperature: every
    supply and metric, the model's figure beside ngspice's (`simulate_all`'s `sim`)."""
    res = pop.result
    out = []
    for j in np.flatnonzero([c == corner and t == temp for c, t in zip(res.corners, res.temps)]):
        vdd = float(res.vdd[j])
        for k, rid in enumerate(pop.ids):
            got = sim.get((k, vdd))
            fail = pop.failures.get(rid, {}).get((corner, temp))
            for metric in METRICS:
                model = float(res.pvt[metric][k, j])
                rec = {"id": rid, "architecture": pop.design.architecture, "corner": corner.value,
                       "temp_c": round(float(temp) - ZERO_CELSIUS, 6), "vdd_v": vdd, "metric": metric,
                       "model": model, "simulator": None, "error": None,
                       "error_unit": "V" if metric in ABSOLUTE else "rel", "note": ""}
                if got is not None:
                    rec["simulator"] = float(got[metric])
                    rec["error"] = _error(metric, model, rec["simulator"]) if np.isfinite(model) else None
                    rec["note"] = got["note"] if np.isfinite(model) else \
                        "the model's stage cannot deliver the peak load here: no headroom to compare"
                    if not np.isfinite(model):
                        rec["model"] = None
                else:
                    rec["note"] = f"ngspice failed: {fail}" if fail else "not simulated"
                out.append(rec)
    return out


def _ac_records(pop: Population, study, models, corner: Corner, temp: float, log) -> list[dict]:
    """verify.csv records of the AC bench: unity-gain frequency and phase margin of every
    design of `pop` at every supply, the model beside ngspice."""
    from . import acbench

    res = pop.result
    sim = {}
    for start in range(0, pop.design.size, BATCH):
        members = list(range(start, min(start + BATCH, pop.design.size)))
        try:
            sim.update(acbench.simulate_ac(pop.design, members, study, models, corner, temp))
        except NgspiceError as err:
            log(f"  AC bench of {len(members)} designs failed: {_first_lines(err, 1)}")
    out = []
    for j in np.flatnonzero([c == corner and t == temp for c, t in zip(res.corners, res.temps)]):
        vdd = float(res.vdd[j])
        for k, rid in enumerate(pop.ids):
            got = sim.get((k, vdd))
            for metric in AC_METRICS:
                model = float(res.pvt[metric][k, j])
                rec = {"id": rid, "architecture": pop.design.architecture, "corner": corner.value,
                       "temp_c": round(float(temp) - ZERO_CELSIUS, 6), "vdd_v": vdd, "metric": metric,
                       "model": model, "simulator": None, "error": None,
                       "error_unit": "deg" if metric == "phase_margin_deg" else "rel", "note": "AC bench"}
                if got is not None:
                    rec["simulator"] = float(got[metric])
                    rec["error"] = _error(metric, model, rec["simulator"])
                else:
                    rec["note"] = "AC bench not simulated (ngspice failed)"
                out.append(rec)
    return out


def _csv(records) -> str:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=COLUMNS, lineterminator="\n")
    w.writeheader()
    for r in records:
        w.writerow({k: ("" if r[k] is None else repr(r[k]) if isinstance(r[k], float) else r[k]) for k in COLUMNS})
    return buf.getvalue()


def summarise(records) -> dict:
    """Per metric: points compared, median |error| and the worst error (signed) with its row.

    Errors are relative for currents and in volts for headrooms (see the module notes).
    """
    out = {}
    for metric in METRICS + tuple(m for m in AC_METRICS if any(r["metric"] == m for r in records)):
        rs = [r for r in records if r["metric"] == metric and r["error"] is not None and np.isfinite(r["error"])]
        if not rs:
            out[metric] = {"points": 0}
            continue
        err = np.array([r["error"] for r in rs])
        w = int(np.argmax(np.abs(err)))
        out[metric] = {"points": len(rs), "median_abs": float(np.median(np.abs(err))), "worst": float(err[w]),
                       "worst_at": rs[w]}
    return out


def _summary(records, pops, stream, wall) -> None:
    p = lambda s="": print(s, file=stream)  # noqa: E731
    failed = {rid: f for pop in pops for rid, f in pop.failures.items()}
    n_ok = len({(r["id"], r["corner"], r["temp_c"], r["vdd_v"]) for r in records if r["simulator"] is not None})
    n_all = len({(r["id"], r["corner"], r["temp_c"], r["vdd_v"]) for r in records})
    p(f"ngspice against the model: {n_ok} of {n_all} design x PVT points simulated in {wall:.1f} s")
    p(f"  {'metric':18s} {'points':>6s} {'median |error|':>15s} {'worst error':>12s}  worst at")
    for metric, s in summarise(records).items():
        if not s["points"]:
            p(f"  {metric:18s} {0:6d} {'-':>15s} {'-':>12s}")
            continue
        scale, unit = ((1.0, "deg") if metric == "phase_margin_deg" else (1e3, "mV")) if metric in ABSOLUTE \
            else (100.0, "%")
        r = s["worst_at"]
        p(f"  {metric:18s} {s['points']:6d} {s['median_abs'] * scale:12.2f} {unit:2s} "
          f"{s['worst'] * scale:+9.2f} {unit:2s}  {r['id']} {r['corner']} {r['temp_c']:g} C {r['vdd_v']:g} V")
    for rid, where in failed.items():
        for (corner, temp), msg in where.items():
            p(f"  {rid}: ngspice failed at {corner.value}, {temp - ZERO_CELSIUS:g} C: {msg}")
