"""`stagefront report`: one self-contained HTML page (and a Markdown twin) for a run folder.

The page is meant to be read by a lead in a couple of minutes and opened from disk with no
network: figures are embedded as base64 PNG, the style sheet and the column-sorting script
are inline. The Markdown twin has the same sections, its tables as Markdown and its figures
as PNG files written beside it, for pasting into a design review.

Sections, in order (`SECTIONS`): the caution; the run at a glance; the job and the study;
every architecture's front on the same axes (and why an architecture has none); the picked
designs (the knee first, then the best design per objective, then the next designs by knee
distance); the knee design at every PVT point; its Monte Carlo mismatch spread against the
linear estimate; Iq against the supply for the picked designs; the simulator verification
(RUN/verify.csv, when `stagefront verify` has written it); the assumptions behind the
numbers.

Everything shown is recomputed from the run folder alone: the study and technology files
are read back from the copies run.json keeps, so a report can be made on another machine
or after the study file has changed.

The knee is `optimise.review.pick.knee_distance`: the design closest (Chebyshev distance) to the
ideal point of the objective box spanned by the front itself.

This module holds the command and builds each section's blocks. The numbers are gathered
in `optimise.report.data`, the figures drawn in `optimise.report.figures`, verify.csv read
and shown in `optimise.report.verification`, and both pages rendered in `optimise.report.render`.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from models.devices.constants import ZERO_CELSIUS
from models.stages import get_stage

from .. import CAUTION
from ..files.atomic import write_bytes, write_text
from ..files.errors import InputError
from ..files.space import OBJECTIVES
from ..files.units import format_eng
from ..search.export import UNIT_SUFFIX
from .data import MC_SAMPLES, OBJ_SHOW, ReportData, gather
from .fidelity import bias_sources, device_limits, length_lines
from .figures import fronts_figure, mismatch_figure, parallel_figure, supply_figure
from .render import (
    CLOSE,
    TIGHT,
    Bullets,
    Cell,
    Figure,
    Legend,
    Table,
    num_cell,
    render_html,
    render_markdown,
    short,
)
from .verification import verification_blocks

__all__ = ["CAUTION", "CLOSE", "SECTIONS", "TIGHT", "gather", "sections", "write_report"]

SECTIONS = (
    ("caution", "Caution"),
    ("glance", "At a glance"),
    ("job", "Job and study"),
    ("fronts", "Fronts by architecture"),
    ("picked", "Picked designs"),
    ("knee", "Knee design across PVT"),
    ("mismatch", "Mismatch spread of the knee"),
    ("supply", "Supply sensitivity"),
    ("verify", "Verification against a simulator"),
    ("assumptions", "Assumptions"),
)


# ---------------------------------------------------------------- sections
def _margin_cell(pct: float) -> Cell:
    """A margin in percent of its limit (front.csv's margin_*_pct), coloured by TIGHT/CLOSE."""
    if not np.isfinite(pct):
        return Cell("off", np.inf, "off")
    m = pct / 100.0
    tone = "tight" if m < TIGHT else "close" if m < CLOSE else "ample"
    return Cell(f"{pct:.1f}", pct, tone)


def _knee_line(data: ReportData) -> str:
    row = data.picks.iloc[0]
    parts = [f"{OBJ_SHOW[n][0]} {short(float(row[n]) * OBJ_SHOW[n][2])} {OBJ_SHOW[n][1]}" for n in data.objectives]
    margins = {c[len("margin_"):].removesuffix("_pct"): float(row[c]) for c in data.picks.columns
               if c.startswith("margin_")}
    tight = min(margins, key=margins.get) if margins else None
    text = (f"Knee design {row['id']} ({row['architecture']}): Iq {short(float(row['iq_a']) * 1e6)} uA, "
            + ", ".join(parts))
    power = f"; power worst over PVT {short(float(row['power_max_w']) * 1e6)} uW" if "power_max_w" in row else ""
    peak = f"; peak output current {short(float(row['iout_peak_a']) * 1e3, 3)} mA" if "iout_peak_a" in row else ""
    return text + power + peak + (f"; tightest margin: {tight} at {margins[tight]:.1f} % of its limit."
                                  if tight else ".")


def _job(data: ReportData) -> list:
    s, rec = data.study, data.record
    c, t = s.conditions, s.targets
    archs = rec.get("architectures", {})
    per = int(rec.get("population", 0)) * int(rec.get("generations", 0))
    rows = [
        ("study", f"{s.name} ({rec.get('study', '')})"),
        ("run folder", str(data.path)),
        ("process", f"{s.tech.name} ({rec.get('technology', '')})"),
        ("device model", "EKV, all regions" if s.tech.model.value == "ekv" else "square law (SPICE level 1)"),
        ("supply", f"{c.vdd_nom:g} V nominal, {c.vdd_min:g} V to {c.vdd_max:g} V"),
        ("corners", ", ".join(k.value for k in c.corners)),
        ("temperatures", ", ".join(f"{x - ZERO_CELSIUS:g} C" for x in c.temps) + " (first is nominal)"),
        ("load", f"{format_eng(t.i_load, 'A')} peak, sourced and sunk; {format_eng(t.c_load, 'F')}"),
        ("driver", f"gets within {t.vcomp:g} V of either rail; moves "
                   + ("both output gates" if t.drive == "both" else f"the {t.drive} gate only")),
        ("Iq window", f"{format_eng(t.iq_min, 'A')} to {format_eng(t.iq_max, 'A') if np.isfinite(t.iq_max) else 'no max'}"
                      f" at every PVT point" + (f", at +-{t.iq_sigmas:g} sigma of mismatch" if t.iq_sigmas else "")),
        ("other targets", "; ".join(x for x in (
            f"headroom <= {t.headroom_max:g} V" if np.isfinite(t.headroom_max) else "",
            f"ab_ratio >= {t.ab_min:g}" if t.ab_min > 0 else "",
            f"area <= {t.area_max * 1e12:g} um^2" if np.isfinite(t.area_max) else "",
            f"output pole >= {format_eng(t.fp2_min, 'Hz')}" if t.fp2_min > 0 else "",
            f"power <= {format_eng(t.power_max, 'W')} at every PVT point" if np.isfinite(t.power_max) else "",
            f"peak output current <= {format_eng(t.iout_peak_max, 'A')}" if np.isfinite(t.iout_peak_max) else "",
            f"layout factor {t.layout_factor:g}",
            f"phase margin >= {t.phase_margin_min:g} deg" if t.phase_margin_min > 0 else "",
            f"slew rate >= {t.slew_min * 1e-6:g} V/us" if t.slew_min > 0 else "",
            f"gate time <= {format_eng(t.gate_time_max, 's')}" if np.isfinite(t.gate_time_max) else "") if x)),
        ("amplifier", "none described: no loop gain, phase margin or slew; the output pole is "
                      "gm_out / (2 pi (C_load + C_gates))" if t.amplifier is None else
         f"two-stage Miller, this stage second: target unity gain {format_eng(t.amplifier.ugf, 'Hz')} at feedback "
         f"{t.amplifier.beta:g}, "
         + (f"Cc {format_eng(t.amplifier.cc, 'F')}, gm1 {format_eng(t.amplifier.transconductance, 'S')}"
            if t.amplifier.cc_bounds is None else
            f"Cc searched from {format_eng(t.amplifier.cc_bounds[0], 'F')} to "
            f"{format_eng(t.amplifier.cc_bounds[1], 'F')} (gm1 = 2 pi f_u Cc / beta; column cc_f)")
         + f", first stage {format_eng(t.amplifier.r1, 'ohm')} "
         f"and {format_eng(t.amplifier.c1, 'F')}, {format_eng(t.amplifier.i1, 'A')} available"),
        ("objectives", ", ".join(f"{n} ({'maximise' if v == 'max' else 'minimise'}, {OBJECTIVES[n][0]})"
                                 for n, v in data.objectives.items())),
        ("search budget", f"NSGA-II, population {rec.get('population')} x {rec.get('generations')} generations "
                          f"= {per} evaluations per architecture, {len(archs)} architecture(s)"),
        ("seed", str(rec.get("seed"))),
        ("evaluations", f"{rec.get('evaluations')} (status: {rec.get('status', 'unknown')})"),
        ("wall time", f"{float(rec.get('wall_time_s', float('nan'))):.1f} s"),
        ("versions", ", ".join(f"{k} {v}" for k, v in rec.get("versions", {}).items() if k != "platform")),
    ]
    return [Table("job-table", [("item", "item"), ("value", "value")],
                  [[Cell(a), Cell(b)] for a, b in rows], sortable=False)]


def _fronts(data: ReportData) -> list:
    rec = data.record.get("architectures", {})
    rows, blocked = [], []
    for arch, info in rec.items():
        n = int((data.table["architecture"] == arch).sum()) if len(data.table) else 0
        hv = info.get("hypervolume") or [float("nan")]
        b = info.get("blocked")
        rows.append([Cell(arch), Cell(str(n), n), Cell(str(info.get("evaluations")), info.get("evaluations")),
                     Cell(short(hv[-1], 3), hv[-1]), Cell("yes" if n else "no feasible design")])
        if b:
            why = "; ".join(b.get("closest_violations", [])[:3])
            blocked.append(f"{arch}: no feasible design. The constraint '{b.get('blocking_constraint')}' blocks the "
                           f"closest design (worst margin {short(100 * b.get('closest_margin', float('nan')), 3)} % "
                           f"of its limit); "
                           f"it misses: {why}.")
        elif not n:
            blocked.append(f"{arch}: no design in front.csv.")
    out = [Table("fronts-table", [("arch", "architecture"), ("n", "front designs"), ("evals", "evaluations"),
                                  ("hv", "final hypervolume"), ("feasible", "feasible")], rows)]
    if blocked:
        out.append(Bullets(blocked))
    if len(data.table):
        out.append(Figure("fronts", fronts_figure(data),
                          "Every architecture's feasible non-dominated designs on the same axes (pairs of objectives). "
                          "Star: the knee; open circles: the other picked designs."))
    else:
        out.append("No architecture found a feasible design: there is no front to plot.")
    return out


def _role_groups(rows: pd.DataFrame, roles: list) -> list:
    """Roles grouped where every shown row gives them the same W, L and bulk (tied devices)."""
    def sizes(r):
        return tuple(tuple(rows[f"{r}_{x}"].tolist()) if f"{r}_{x}" in rows else () for x in ("w_um", "l_um", "bulk"))

    groups: dict = {}
    for r in roles:
        groups.setdefault(sizes(r), []).append(r)
    return list(groups.values())


def _picked(data: ReportData) -> list:
    p = data.picks
    archs = list(dict.fromkeys(p["architecture"]))
    roles = _role_groups(p, list(dict.fromkeys(r for a in archs for r in get_stage(a).ROLES)))
    bias = list(dict.fromkeys((f"{b}_{UNIT_SUFFIX[u]}", b, u) for a in archs for b, u in get_stage(a).BIAS.items()))
    margins = [c for c in p.columns if c.startswith("margin_")]
    header = [("rank", "#"), ("pick", "picked as"), ("id", "id"), ("architecture", "architecture")]
    header += [(f"{group[0]}_w_um", f"{' = '.join(group)} W/L [um]") for group in roles]
    header += [(col, f"{b} [{'uA' if u == 'A' else 'kohm'}]") for col, b, u in bias]
    extra = [c for c in ("power_max_w", "iout_peak_a") if c in p.columns]
    header += [("iq_a", "Iq [uA]")] + [(n, f"{OBJ_SHOW[n][0]} [{OBJ_SHOW[n][1]}]") for n in data.objectives]
    header += [(c, {"power_max_w": "power worst [uW]", "iout_peak_a": "peak out [mA]"}[c]) for c in extra]
    header += [("knee_distance", "knee distance")]
    header += [(c, f"{c[len('margin_'):].removesuffix('_pct')} margin [%]") for c in margins]
    rows = []
    for k, row in enumerate(p.to_dict("records"), start=1):
        cells = [Cell(str(k), k), Cell(row["pick"]), Cell(row["id"]), Cell(row["architecture"])]
        for r, *_ in roles:
            w, l = float(row.get(f"{r}_w_um", np.nan)), float(row.get(f"{r}_l_um", np.nan))
            own = " (own well)" if row.get(f"{r}_bulk") == "source" else ""
            cells.append(Cell(f"{short(w)} / {short(l)}{own}", w) if np.isfinite(w) else Cell("", None))
        for col, _, u in bias:
            v = float(row.get(col, np.nan))
            cells.append(num_cell(v, 1e6 if u == "A" else 1e-3) if np.isfinite(v) else Cell("", None))
        cells.append(num_cell(row["iq_a"], 1e6))
        cells += [num_cell(row[n], OBJ_SHOW[n][2]) for n in data.objectives]
        cells += [num_cell(row[c], {"power_max_w": 1e6, "iout_peak_a": 1e3}[c]) for c in extra]
        cells.append(Cell(f"{row['knee_distance']:.3f}", float(row["knee_distance"])))
        cells += [_margin_cell(float(row[c])) for c in margins]
        rows.append(cells)
    return [f"{len(p)} of {len(data.table)} front designs: the knee first (the design nearest the ideal point of the "
            f"box the front spans, every objective scaled to the front's own range), then the best design per "
            f"objective, then the next designs by knee distance (the same knee as `stagefront pick`). "
            f"Sizes W / L in um "
            f"(devices of equal size in every row share a column); bias currents in uA, resistors in kohm; power is "
            f"typical (the objective) and worst over PVT; margins are each constraint's worst margin over PVT in % "
            f"of its limit, as in front.csv. Click a column header to sort.",
            Table("picked", header, rows), Legend(),
            Figure("parallel", parallel_figure(data), "Every front design across the objectives, each axis turned so "
                   "that up is better and scaled to the front's range; the picked designs are drawn bold.")]


def _knee_pvt(data: ReportData) -> list:
    from ..review.evaluation import result_to_dict

    res = result_to_dict(data.knee)
    cond = data.study.conditions
    header = [("corner", "corner"), ("temp_c", "temp [C]"), ("vdd_v", "vdd [V]"), ("iq_a", "Iq [uA]"),
              ("iq_sigma_pct", "sigma [%]"), ("headroom_high_v", "headroom high [mV]"),
              ("headroom_low_v", "headroom low [mV]"), ("ab_ratio", "ab_ratio"), ("vdd_min_v", "vdd_min [V]"),
              ("iout_source_a", "peak source [mA]"), ("limit_source", "source limit"),
              ("iout_sink_a", "peak sink [mA]"), ("limit_sink", "sink limit"), ("power_w", "power [uW]")]
    scale = {"iq_a": 1e6, "headroom_high_v": 1e3, "headroom_low_v": 1e3, "iout_source_a": 1e3, "iout_sink_a": 1e3,
             "power_w": 1e6}
    rows, classes = [], []
    for pt in res["pvt"]:
        nominal = (pt["corner"] == cond.typical.value and pt["vdd_v"] == cond.vdd_nom
                   and abs(pt["temp_c"] - (cond.temps[0] - ZERO_CELSIUS)) < 1e-6)
        cells = [Cell(pt["corner"] + (" (nominal)" if nominal else "") + ("" if pt["converged"] else " NOT CONVERGED"),
                      pt["corner"]), num_cell(pt["temp_c"]), num_cell(pt["vdd_v"])]
        for key, _ in header[3:]:
            v = pt[key]
            if v is None and key.startswith("headroom"):
                cells.append(Cell("cannot deliver", None, "tight"))
            else:
                cells.append(Cell(v, v) if isinstance(v, str)
                             else num_cell(np.nan if v is None else v, scale.get(key, 1.0)))
        rows.append(cells)
        classes.append("nominal" if nominal else "")
    viol = res["violations"]
    return [f"{data.picks['id'].iloc[0]} at all {len(rows)} PVT points (corner x temperature x supply), its operating "
            f"point solved exactly at each. Headrooms are at the peak load current; the limits name what stops the "
            f"drive on each side: compliance (the driver got within its compliance of the rail) or "
            f"control-saturation (the bias loop's control device left saturation first, so the loop caps the drive). "
            + ("Every target is met at every point." if not viol else "Missed: " + "; ".join(viol)),
            Table("knee-pvt", header, rows, classes)] + _knee_amplifier(data, res)


def _knee_amplifier(data: ReportData, res: dict) -> list:
    """The knee inside its amplifier: loop gain, poles and slew per PVT point, and its Bode plot."""
    from .figures import bode_figure

    if data.study.targets.amplifier is None:
        return ["No amplifier described in the study: no loop gain, phase margin or slew is computed."]
    keys = [("ugf_hz", "unity gain [MHz]", 1e-6), ("phase_margin_deg", "phase margin [deg]", 1.0),
            ("p1_hz", "dominant pole [Hz]", 1.0), ("fp2_hz", "output pole [MHz]", 1e-6),
            ("fint_hz", "internal pole [MHz]", 1e-6), ("fz_hz", "RHP zero [MHz]", 1e-6),
            ("slew_v_per_s", "slew [V/us]", 1e-6), ("gate_time_s", "gate time [us]", 1e6)]
    header = [("corner", "corner"), ("temp_c", "temp [C]"), ("vdd_v", "vdd [V]")] + [(k, t) for k, t, _ in keys]
    rows = [[Cell(pt["corner"], pt["corner"]), num_cell(pt["temp_c"]), num_cell(pt["vdd_v"])]
            + [num_cell(np.nan if pt[k] is None else pt[k], sc) for k, _, sc in keys] for pt in res["pvt"]]
    return ["The knee inside its amplifier at every PVT point: the loop gain's unity-gain frequency and phase margin, "
            "the poles and the right-half-plane zero of the full small-signal model, slew rate and gate time.",
            Table("knee-amplifier", header, rows),
            Figure("bode", bode_figure(data), "Loop gain of the knee at the PVT point of its worst phase margin "
                   "beside the typical one; dots mark the unity-gain crossing.")]


def _mismatch(data: ReportData) -> list:
    mc = data.mc
    nan = lambda v: float("nan") if v is None else v  # noqa: E731
    return [f"{MC_SAMPLES} Monte Carlo samples of Pelgrom mismatch on every device (seed {data.record.get('seed')}), "
            f"each solved exactly at {mc.corner.value}, {mc.temp - ZERO_CELSIUS:g} C, {mc.vdd:g} V: "
            f"mean Iq {format_eng(nan(mc.iq_mean), 'A')}, sigma {nan(mc.sigma_pct):.3g} % against the linear "
            f"estimate {mc.linear_sigma_pct:.3g} % (Iq {format_eng(mc.iq_nom, 'A')} without mismatch); "
            f"{mc.failed} sample(s) did not solve.",
            Figure("mismatch", mismatch_figure(data), "Histogram of Iq under random mismatch; the curve and the "
                   "red lines are the linear (adjoint) estimate at +-1 and +-3 sigma.")]


def _supply(data: ReportData) -> list:
    c = data.study.conditions
    rows = []
    for rid, pick in zip(data.picks["id"], data.picks["pick"]):
        v, iq = data.sweep[rid]
        i_nom = iq[np.argmin(np.abs(v - c.vdd_nom))]
        span = v[-1] - v[0]
        sens = 100 * (iq[-1] - iq[0]) / i_nom / span if i_nom > 0 and span > 0 else float("nan")
        rows.append([Cell(rid), Cell(pick), num_cell(iq[0], 1e6), num_cell(i_nom, 1e6), num_cell(iq[-1], 1e6),
                     num_cell(sens, digits=3)])
    return [f"Iq of each picked design at {len(data.sweep[data.picks['id'].iloc[0]][0])} supplies from "
            f"{c.vdd_min:g} V to {c.vdd_max:g} V, {c.typical.value} corner, {c.temps[0] - ZERO_CELSIUS:g} C.",
            Figure("supply", supply_figure(data), "Iq against VDD (left) and its change from the value at the "
                   "nominal supply (right); the knee is the thick line, dashed lines the Iq window of the targets, "
                   "dotted the nominal supply."),
            Table("supply-table", [("id", "id"), ("pick", "picked as"), ("lo", f"Iq at {c.vdd_min:g} V [uA]"),
                                   ("nom", f"Iq at {c.vdd_nom:g} V [uA]"), ("hi", f"Iq at {c.vdd_max:g} V [uA]"),
                                   ("sens", "sensitivity [%/V]")], rows)]


def _pole_line(study) -> str:
    """How the output pole and the frequency response are computed, for the assumptions."""
    mos = (study.tech.nmos, study.tech.pmos)
    has = any(m.cj > 0 or m.cjsw > 0 for m in mos)
    junctions = ("the source and drain junctions of the technology (cj, cjsw) over the netlists' diffusion "
                 "areas and perimeters" if has else "no junction capacitance (the technology gives no cj or cjsw)")
    if study.targets.amplifier is None:
        return ("Output pole: gm of the output devices over 2 pi times the load, the output devices' gates"
                + (" and their drain junctions" if has else "") + " (the pole-splitting limit of a large "
                "compensation capacitor).")
    return (f"Poles, zeros and phase margin: the nodal model of the stage at rest inside the study's amplifier, "
            f"with every device's gm, gmb, gds, gate capacitances and {junctions}.")


def _assumptions(data: ReportData) -> list:
    s, t = data.study, data.study.targets
    kind = ("the EKV charge-based model, valid from weak to strong inversion" if s.tech.model.value == "ekv"
            else "the square-law (SPICE level 1) model")
    return [Bullets([
        f"Devices: {kind}, with the parameters of {s.tech.name}; body effect and channel-length modulation are "
        f"included, temperature enters through kT/q, a threshold drift and a mobility exponent (textbook values). "
        f"Corners shift only the threshold and the current factor of each polarity.",
        bias_sources(s),
        *device_limits(s),
        *(f"Warning: {line}" for line in length_lines(s, data.table)),
        f"Rest point: no load, the output held at half the supply by the amplifier's feedback. Drive: the driving "
        f"stage moves {'both gates' if t.drive == 'both' else 'the ' + t.drive + ' gate'} until it is {t.vcomp:g} V "
        f"from a rail or the control device leaves saturation, whichever comes first.",
        "Iq: current through the output pair at rest. Power: supply times Iq plus every bias branch, typical "
        "(tt, nominal supply and temperature: the objective) and worst over PVT (power_max_w, the power budget's "
        "check).",
        "Headroom: distance from a rail at which the stage still delivers the peak load current; swing is the "
        "supply less both headrooms. Peak source/sink: the largest output current at mid-supply with a gate at its "
        "drive limit.",
        "ab_ratio: the smallest current left in the idle output device at full drive over the output range "
        "(mid-supply to the peak-load point), as a fraction of Iq (class-AB keeps it above zero). Peak output "
        "current: the largest current at full drive into a short at mid-supply (iout_peak_a).",
        "Iq sigma: 1-sigma Iq spread from device mismatch (Pelgrom), propagated linearly through the solved "
        "operating point; the Monte Carlo section checks it. Supply sensitivity: Iq change from the lowest to "
        "the highest supply per volt, relative to Iq at the nominal supply.",
        f"vdd_min: lowest supply at which every device keeps its region at rest. {_pole_line(s)} Area: sum of "
        f"W L times the layout factor {t.layout_factor:g}.",
        "A design is feasible only if it meets every target at every corner, temperature and supply. Not "
        "modelled: layout parasitics beyond the source and drain junctions, noise, leakage, self-heating"
        + ("." if t.amplifier is not None else ", the frequency response beyond the output pole."),
    ])]


def sections(data: ReportData) -> list:
    """(key, title, blocks) for every section of SECTIONS."""
    n = len(data.table)
    glance = [f"{n} Pareto designs in front.csv: " + ", ".join(
        f"{a} {c}" for a, c in data.table["architecture"].value_counts(sort=False).items()) + "."
              if n else "No Pareto design in front.csv."]
    none = [a for a, info in data.record.get("architectures", {}).items()
            if not (len(data.table) and (data.table["architecture"] == a).any())]
    if none:
        glance.append(f"No feasible design: {', '.join(none)} (see {SECTIONS[3][1]}).")
    if n:
        glance.append(_knee_line(data))
    glance.append(data.verify[1] if data.verify[0] is None else f"Verification: {data.verify[1]}"
                  + (f" {data.verify_caveat}" if data.verify_caveat else ""))
    glance += [f"Warning: {line}" for line in length_lines(data.study, data.table)]
    blocks = {"caution": [CAUTION], "glance": [Bullets(glance)], "job": _job(data), "fronts": _fronts(data),
              "verify": verification_blocks(data.verify, data.verify_href, data.verify_caveat),
              "assumptions": _assumptions(data)}
    empty = ["No feasible design in this run: nothing to show."]
    for key, make in (("picked", _picked), ("knee", _knee_pvt), ("mismatch", _mismatch), ("supply", _supply)):
        blocks[key] = make(data) if n else empty
    return [(key, title, blocks[key]) for key, title in SECTIONS]


def write_report(run, out=None, count: int = 8, stream=None) -> int:
    """`stagefront report`: write RUN/report.html and its Markdown twin RUN/report.md.

    Parameters
    ----------
    run : str or Path
        Run folder (front.csv, run.json; verify.csv when verification has been run).
    out : str or Path, optional
        The HTML file (default RUN/report.html); the Markdown twin and its PNG figures go
        beside it, named after it (report.md, report-fronts.png, ...).
    count : int
        Picked designs to show (default 8).
    stream : file-like, optional
        Where the written paths are printed (default stdout).

    Returns
    -------
    int
        0.
    """
    stream = stream or sys.stdout
    out = Path(out) if out else Path(run) / "report.html"
    if out.suffix.lower() not in (".html", ".htm"):
        raise InputError("--out", f"{str(out)!r} is not an HTML file name", "a path ending in .html",
                         "the Markdown twin is written beside it with the same name and .md")
    if out.is_dir():
        raise InputError("--out", f"{str(out)!r} is a folder", "a file path ending in .html")
    data = gather(run, count)
    data.verify_href = Path(os.path.relpath(Path(run) / "verify.csv", out.parent)).as_posix()
    title = f"stagefront report: {data.study.name}"
    secs = sections(data)
    figures = {b.key: b for _, _, blocks in secs for b in blocks if isinstance(b, Figure)}
    files = {k: f"{out.stem}-{k}.png" for k in figures}
    for k, fig in figures.items():
        write_bytes(out.parent / files[k], fig.png)
    md = out.with_suffix(".md")
    write_text(md, render_markdown(title, secs, files))
    write_text(out, render_html(title, secs))
    print(f"report:   {out}", file=stream)
    print(f"markdown: {md} (figures: {', '.join(files.values()) or 'none'})", file=stream)
    print(CAUTION, file=stream)
    return 0
