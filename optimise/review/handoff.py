"""The hand-off table of `stagefront pick`: compact (fits a 100-column terminal), wide (one
Markdown row per design with every column) or CSV.

Compact layout: the columns are grouped (performance, margins, sizes and bias) and packed
into as many Markdown tables as needed to keep every line within `WIDTH` characters, each
table keyed by the design id. Devices that have the same size in every row shown (tied
devices, the matched diodes of a loop) share one column, named after the first of them,
with a footnote naming the others. Architectures are shown by their id prefix (fl-, fb-,
fo-) with a legend. Every unit is named once, in the header; margins are in percent of
their limit, as in front.csv.
"""
from __future__ import annotations

import io

import numpy as np
import pandas as pd

from ..files.space import OBJECTIVES
from .text import markdown_table

WIDTH = 100
# Objective -> (short header text, unit shown, factor from SI).
SHOW = {"power_w": ("power typ", "uW", 1e6), "swing_v": ("swing", "V", 1.0), "area_um2": ("area", "um²", 1.0),
        "iq_sigma_pct": ("Iq sigma", "%", 1.0), "supply_sens_pct_per_v": ("supply sens", "%/V", 1.0)}
PREFIXES = {"fl": "floating-loop", "fb": "fixed-bias", "fo": "follower"}
# Amplifier column -> (header with unit, factor from SI), worst case over PVT as in front.csv.
AMPLIFIER_SHOWN = (("ugf_hz", "UGF [MHz]", 1e-6), ("phase_margin_deg", "PM [deg]", 1.0),
                   ("slew_v_per_s", "slew [V/us]", 1e-6), ("gate_time_s", "gate time [us]", 1e6))


def _g(v, digits=4) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return ""
    return "" if not np.isfinite(v) else f"{v:.{digits}g}"


def role_groups(rows: pd.DataFrame) -> list[list[str]]:
    """Roles with a value in some row, grouped where every row gives them the same W, L and
    bulk (tied devices), in front.csv order."""
    roles = [c[:-len("_w_um")] for c in rows.columns if c.endswith("_w_um") and rows[c].notna().any()]
    groups: dict = {}
    for r in roles:
        key = tuple(tuple(rows[f"{r}_{x}"].astype(str).tolist()) for x in ("w_um", "l_um", "bulk")
                    if f"{r}_{x}" in rows)
        groups.setdefault(key, []).append(r)
    return list(groups.values())


def _bias_columns(rows: pd.DataFrame) -> list[str]:
    skip = ("iq_a", "iq_min_a", "iq_max_a", "iout_peak_a")
    return [c for c in rows.columns if (c.endswith("_a") and c not in skip and not c.startswith("iout_")
                                        or c.endswith("_ohm")) and rows[c].notna().any()]


def columns(rows: pd.DataFrame, objectives: dict) -> tuple[list[tuple[str, str, list]], list[str]]:
    """(group, header, cells) per column of the compact and wide tables, and footnotes."""
    recs = rows.to_dict("records")
    cols: list[tuple[str, str, list]] = []
    notes: list[str] = []

    def add(group, header, cells):
        cols.append((group, header, list(cells)))

    add("perf", "#", [str(k) for k in range(1, len(recs) + 1)])
    add("perf", "id", [r["id"] + ("" if bool(r.get("overall_front", True)) else "°") for r in recs])
    add("perf", "Iq [uA]", [_g(float(r["iq_a"]) * 1e6) for r in recs])
    for name in objectives:
        text, unit, k = SHOW.get(name, (name, OBJECTIVES.get(name, ("",))[0], 1.0))
        add("perf", f"{text} [{unit}]", [_g(float(r[name]) * k) for r in recs])
        if name == "power_w" and "power_max_w" in rows:
            add("perf", "power max [uW]", [_g(float(r["power_max_w"]) * 1e6) for r in recs])
    if "power_w" not in objectives and "power_max_w" in rows:
        add("perf", "power typ [uW]", [_g(float(r["power_w"]) * 1e6) for r in recs])
        add("perf", "power max [uW]", [_g(float(r["power_max_w"]) * 1e6) for r in recs])
    if "iout_peak_a" in rows:
        add("perf", "peak out [mA]", [_g(float(r["iout_peak_a"]) * 1e3, 3) for r in recs])
    # The stage inside its amplifier (front.csv has these columns when the study describes one).
    for name, header, k in AMPLIFIER_SHOWN:
        if name in rows:
            add("perf", header, [_g(float(r[name]) * k, 4) for r in recs])
    add("perf", "knee dist", [f"{float(r['knee_distance']):.3f}" for r in recs])
    margins = [c for c in rows.columns if c.startswith("margin_")]
    for c in margins:
        short = c[len("margin_"):].removesuffix("_pct")
        add("margin", f"{short} [%]", [_g(r[c], 3) for r in recs])
    for group in role_groups(rows):
        first = group[0]
        head = first + (f"+{len(group) - 1}" if len(group) > 1 else "")
        if len(group) > 1:
            notes.append(f"{head} = {', '.join(group)} (same W/L in every row shown)")
        cells = []
        for r in recs:
            w, l = r.get(f"{first}_w_um"), r.get(f"{first}_l_um")
            own = " own well" if r.get(f"{first}_bulk") == "source" else ""
            cells.append(f"{_g(w, 6)}/{_g(l, 6)}{own}" if _g(w) else "")
        add("size", f"{head} W/L [um]", cells)
    if "cc_f" in rows and rows["cc_f"].notna().any():  # a searched compensation capacitor
        add("size", "Cc [pF]", [_g(float(r["cc_f"]) * 1e12, 4) for r in recs])
    for c in _bias_columns(rows):
        if c.endswith("_ohm"):
            add("size", f"{c[:-4]} [kohm]", [_g(float(r[c]) * 1e-3, 5) for r in recs])
        else:
            add("size", f"{c[:-2]} [uA]", [_g(float(r[c]) * 1e6, 5) for r in recs])
    return cols, notes


def _width(cols) -> int:
    """Characters of one Markdown line holding these columns."""
    return 1 + sum(max([len(h)] + [len(c) for c in cells]) + 3 for _, h, cells in cols)


def compact(rows: pd.DataFrame, objectives: dict, width: int = WIDTH) -> str:
    """Markdown tables of at most `width` characters per line, keyed by id, with notes."""
    cols, notes = columns(rows, objectives)
    out = []
    for group, title in (("perf", "Performance"), ("margin", "Worst margin over PVT, % of the limit (>= 0 met)"),
                         ("size", "Sizes and bias")):
        lead = [c for c in cols if c[1] in (("#", "id") if group == "perf" else ("id",))]
        members = [c for c in cols if c[0] == group and c[1] not in ("#", "id")]
        part_title = title
        while members:
            part = lead + [members.pop(0)]
            while members and _width(part + [members[0]]) <= width:
                part.append(members.pop(0))
            out.append(f"{part_title}:\n\n" + markdown_table([h for _, h, _ in part],
                                                              [list(r) for r in zip(*[c for _, _, c in part])]))
            part_title = f"{title} (continued)"
    prefixes = sorted({str(i).split("-")[0] for i in rows["id"]})
    foot = ["ids: " + ", ".join(f"{p}- {PREFIXES.get(p, p)}" for p in prefixes)
            + ("; ° not on the overall front (a design of another architecture dominates it)"
               if "overall_front" in rows and not rows["overall_front"].astype(bool).all() else "")]
    return "\n\n".join(out) + "\n\n" + "\n".join(foot + notes) + "\n"


def wide(rows: pd.DataFrame, objectives: dict, fmt: str = "md") -> str:
    """Every column in one table: Markdown ("md"), or CSV ("csv": rank, then every front.csv
    column under its contract name and in its SI unit, then knee_distance; shortest exact
    numbers, for a spreadsheet or a script)."""
    cols, notes = columns(rows, objectives)
    if fmt == "md":
        text = markdown_table([h for _, h, _ in cols], [list(r) for r in zip(*[c for _, _, c in cols])])
        return text + "\n\n" + "\n".join(notes) + ("\n" if notes else "")
    frame = rows.copy()
    frame.insert(0, "rank", np.arange(1, len(frame) + 1))
    keep = ["rank", "id", "architecture", "overall_front"] + [c for c in frame.columns if c not in
                                                              ("rank", "id", "architecture", "overall_front")]
    buf = io.StringIO()
    frame[[c for c in keep if c in frame.columns]].to_csv(buf, index=False)
    return buf.getvalue()
