"""The evaluate JSON object of one design (DESIGN contract keys), for `stagefront evaluate
--json` and the report.
"""
from __future__ import annotations

import math

import numpy as np

from models.devices.constants import ZERO_CELSIUS
from models.evaluate import LIMIT_NAMES, PVT_METRICS, Result
from models.records import AMPLIFIER_METRICS


def _finite(x):
    """JSON-safe number: finite floats as they are, anything else as null."""
    x = float(x)
    return x if math.isfinite(x) else None


def result_to_dict(res: Result, i: int = 0) -> dict:
    """The evaluate JSON object of design i (DESIGN contract keys)."""
    pvt = []
    for j in range(len(res.vdd)):
        row = {"corner": res.corners[j].value, "temp_c": round(float(res.temps[j]) - ZERO_CELSIUS, 6),
               "vdd_v": float(res.vdd[j]), "converged": bool(res.converged[i, j])}
        for name in PVT_METRICS + tuple(n for n in AMPLIFIER_METRICS if n in res.pvt):
            row[name] = _finite(res.pvt[name][i, j])
        # A headroom is null where the stage cannot deliver the peak load; these say so.
        row["delivers_source"] = bool(res.pvt["delivers_source"][i, j])
        row["delivers_sink"] = bool(res.pvt["delivers_sink"][i, j])
        row["limit_source"] = LIMIT_NAMES[int(res.pvt["limit_source"][i, j])]
        row["limit_sink"] = LIMIT_NAMES[int(res.pvt["limit_sink"][i, j])]
        row["vdd_min_set_by"] = res.requirement_names[int(res.pvt["vdd_min_what"][i, j])]
        pvt.append(row)
    return {
        "architecture": res.architecture,
        "feasible": bool(res.feasible[i]),
        "violations": list(res.violations[i]),
        "summary": {name: bool(v[i]) if np.asarray(v).dtype == bool else _finite(v[i])
                    for name, v in res.summary.items()},
        "pvt": pvt,
    }


def amplifier_dict(targets, design=None, i: int = 0) -> dict | None:
    """The study's amplifier as the evaluate JSON's "amplifier" object (SI), with design i's
    own compensation capacitor when the study sizes it; None when the study describes none."""
    amp = targets.amplifier
    if amp is None:
        return None
    cc = float(design.cc[i]) if design is not None and design.cc is not None else amp.cc
    out = {"unity_gain_hz": amp.ugf, "compensation_f": cc, "r_out_ohm": amp.r1, "c_out_f": amp.c1,
           "current_a": amp.i1, "feedback": amp.beta, "transconductance_s": float(amp.gm1_for(cc)),
           "load_resistance_ohm": _finite(amp.r_load)}
    if amp.cc_bounds is not None:
        out["compensation_bounds_f"] = list(amp.cc_bounds)
    return out


def json_safe(obj, path: str = "", notes: list | None = None):
    """A copy of `obj` with every nan or inf float replaced by null (JSON has neither),
    each replacement listed in `notes` as "KEY is not a number (VALUE)"."""
    if isinstance(obj, dict):
        return {k: json_safe(v, f"{path}.{k}" if path else str(k), notes) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v, f"{path}[{i}]", notes) for i, v in enumerate(obj)]
    if isinstance(obj, float) and not math.isfinite(obj):
        if notes is not None:
            notes.append(f"{path} is not a number ({obj}): written as null")
        return None
    return obj
