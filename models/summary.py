"""Per-design figures from the per-PVT metrics: supply sensitivity, the summary over the
PVT grid, and the check against the targets (relative margins and worded violations).

Used by `models.evaluate`; pure numpy, no solving here.
"""
from __future__ import annotations

import operator
from collections.abc import Sequence

import numpy as np


def supply_sensitivity(pvt, cond, corner, temp, vdd):
    """(Iq(VDD max) - Iq(VDD min)) / Iq(nominal) / (VDD max - VDD min), percent per volt,
    per corner and temperature; stored at each of the group's PVT points."""
    iq = pvt["iq_a"]
    sens = np.zeros_like(iq)
    span = cond.vdd_max - cond.vdd_min
    ns = len(cond.supplies)
    for g in range(len(vdd) // ns):
        cols = np.arange(g * ns, (g + 1) * ns)
        v = vdd[cols]
        i_nom = iq[:, cols[np.argmin(np.abs(v - cond.vdd_nom))]]
        i_lo = iq[:, cols[np.argmin(v)]]
        i_hi = iq[:, cols[np.argmax(v)]]
        # When Iq is zero at the nominal supply (a stage that cuts off there), the largest
        # Iq of the group stands in for it, so a stage that only conducts at some supplies
        # never looks supply-stable.
        ref = np.where(i_nom > 0, i_nom, np.maximum(i_lo, i_hi))
        with np.errstate(divide="ignore", invalid="ignore"):
            val = np.where((ref > 0) & (span > 0), 100.0 * (i_hi - i_lo) / ref / max(span, 1e-300), 0.0)
        sens[:, cols] = val[:, None]
    pvt["supply_sens_pct_per_v"] = sens


def summarise(pvt, design, stage, cond, corner, temp, vdd, targets):
    j = cond.nominal_index()
    bias = {k: np.asarray(v, dtype=float) for k, v in design.bias.items()}
    area = sum(np.asarray(design.w[r]) * np.asarray(design.l[r]) for r in stage.ROLES) * targets.layout_factor
    sens = pvt["supply_sens_pct_per_v"]
    out = {
        "iq_a": pvt["iq_a"][:, j],
        "iq_min_a": pvt["iq_a"].min(axis=1),
        "iq_max_a": pvt["iq_a"].max(axis=1),
        "power_w": cond.vdd_nom * (pvt["iq_a"][:, j] + stage.bias_total(bias)),
        "headroom_high_v": pvt["headroom_high_v"].max(axis=1),
        "headroom_low_v": pvt["headroom_low_v"].max(axis=1),
        "swing_v": pvt["swing_v"].min(axis=1),
        "iout_source_a": pvt["iout_source_a"].min(axis=1),
        "iout_sink_a": pvt["iout_sink_a"].min(axis=1),
        "ab_ratio": pvt["ab_ratio"].min(axis=1),
        "area_um2": area * 1e12,
        "iq_sigma_pct": pvt["iq_sigma_pct"].max(axis=1),
        "supply_sens_pct_per_v": sens[np.arange(len(sens)), np.argmax(np.abs(sens), axis=1)],
        "vdd_min_v": pvt["vdd_min_v"].max(axis=1),
        "fp2_hz": pvt["fp2_hz"].min(axis=1),
        "c_drive_f": pvt["c_drive_f"].max(axis=1),
    }
    if "phase_margin_deg" in pvt:  # an amplifier is described: the worst case over PVT
        for name, worst in (("ugf_hz", np.min), ("phase_margin_deg", np.min), ("p1_hz", np.min), ("fint_hz", np.min),
                            ("fz_hz", np.min), ("slew_v_per_s", np.min), ("gate_time_s", np.max)):
            out[name] = worst(pvt[name], axis=1)
    return out


def where(corner, temp, vdd, j):
    return f"{corner[j].value}, {temp[j] - 273.15:g} C, {vdd[j]:g} V"


def check(pvt, summary, converged, cond, corner, temp, vdd, targets, req_names, explain=True):
    """Violations (readable, per design) and worst margins (per design, >= 0 when met).

    Margins are relative to their limit, so the search can use them as constraints."""
    n, k = pvt["iq_a"].shape
    iq = pvt["iq_a"]
    spread = targets.iq_sigmas * pvt["iq_sigma_pct"] / 100.0
    inf = np.inf
    m = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        m["iq_low"] = (iq * (1 - spread) - targets.iq_min) / max(targets.iq_min, 1e-12) if targets.iq_min > 0 \
            else np.full((n, k), inf)
        m["iq_high"] = (targets.iq_max - iq * (1 + spread)) / targets.iq_max if np.isfinite(targets.iq_max) \
            else np.full((n, k), inf)
        hr = np.maximum(pvt["headroom_high_v"], pvt["headroom_low_v"])
        m["headroom"] = (targets.headroom_max - hr) / targets.headroom_max if np.isfinite(targets.headroom_max) \
            else np.full((n, k), inf)
        m["load_current"] = (np.minimum(pvt["iout_source_a"], pvt["iout_sink_a"]) - targets.i_load) / targets.i_load
        m["ab_ratio"] = (pvt["ab_ratio"] - targets.ab_min) / targets.ab_min if targets.ab_min > 0 \
            else np.full((n, k), inf)
        m["fp2"] = (pvt["fp2_hz"] - targets.fp2_min) / targets.fp2_min if targets.fp2_min > 0 \
            else np.full((n, k), inf)
        m["vdd_min"] = (vdd[None, :] - pvt["vdd_min_v"]) / vdd[None, :]
        if targets.amplifier is not None:  # the amplifier's targets, only when one is described
            m["phase_margin"] = (pvt["phase_margin_deg"] - targets.phase_margin_min) / targets.phase_margin_min \
                if targets.phase_margin_min > 0 else np.full((n, k), inf)
            m["slew"] = (pvt["slew_v_per_s"] - targets.slew_min) / targets.slew_min if targets.slew_min > 0 \
                else np.full((n, k), inf)
            m["gate_time"] = (targets.gate_time_max - pvt["gate_time_s"]) / targets.gate_time_max \
                if np.isfinite(targets.gate_time_max) else np.full((n, k), inf)
    labels = {
        "iq_low": lambda i, j: f"Iq {iq[i, j]:.4g} A{' (at -%g sigma)' % targets.iq_sigmas if targets.iq_sigmas else ''}"
                               f" below the window minimum {targets.iq_min:.4g} A at {where(corner, temp, vdd, j)}",
        "iq_high": lambda i, j: f"Iq {iq[i, j]:.4g} A{' (at +%g sigma)' % targets.iq_sigmas if targets.iq_sigmas else ''}"
                                f" above the window maximum {targets.iq_max:.4g} A at {where(corner, temp, vdd, j)}",
        "headroom": lambda i, j: f"headroom {hr[i, j]:.4g} V exceeds {targets.headroom_max:.4g} V at "
                                 f"{where(corner, temp, vdd, j)}",
        "load_current": lambda i, j: f"peak output current {min(pvt['iout_source_a'][i, j], pvt['iout_sink_a'][i, j]):.4g}"
                                     f" A is below the load current {targets.i_load:.4g} A at {where(corner, temp, vdd, j)}",
        "ab_ratio": lambda i, j: f"ab_ratio {pvt['ab_ratio'][i, j]:.4g} is below {targets.ab_min:.4g} at "
                                 f"{where(corner, temp, vdd, j)}",
        "fp2": lambda i, j: f"output pole {pvt['fp2_hz'][i, j]:.4g} Hz is below {targets.fp2_min:.4g} Hz at "
                            f"{where(corner, temp, vdd, j)}",
        "vdd_min": lambda i, j: f"at {where(corner, temp, vdd, j)}: {req_names[pvt['vdd_min_what'][i, j]]} "
                                f"by {pvt['vdd_min_v'][i, j] - vdd[j]:.3g} V (needs {pvt['vdd_min_v'][i, j]:.3g} V)",
        "phase_margin": lambda i, j: f"phase margin {pvt['phase_margin_deg'][i, j]:.3g} deg is below "
                                     f"{targets.phase_margin_min:.3g} deg at {where(corner, temp, vdd, j)} "
                                     f"(unity gain at {pvt['ugf_hz'][i, j]:.4g} Hz)",
        "slew": lambda i, j: f"slew rate {pvt['slew_v_per_s'][i, j] * 1e-6:.4g} V/us is below "
                             f"{targets.slew_min * 1e-6:.4g} V/us at {where(corner, temp, vdd, j)}",
        "gate_time": lambda i, j: f"the gates need {pvt['gate_time_s'][i, j] * 1e6:.4g} us to reach the drive limit, "
                                  f"more than {targets.gate_time_max * 1e6:.4g} us at {where(corner, temp, vdd, j)}",
    }
    margins, worst = {}, {}
    for key, arr in m.items():
        arr = np.where(converged, np.nan_to_num(arr, nan=-1.0), inf)
        worst[key] = arr.argmin(axis=1)
        margins[key] = arr[np.arange(n), worst[key]]
    margins["area"] = np.full(n, inf) if not np.isfinite(targets.area_max) else \
        (targets.area_max * 1e12 - summary["area_um2"]) / (targets.area_max * 1e12)
    if not explain:
        return [[] for _ in range(n)], margins

    def word(i):
        out = [labels[key](i, worst[key][i]) for key in m if margins[key][i] < 0]
        if margins["area"][i] < 0:
            out.append(f"area {summary['area_um2'][i]:.4g} um^2 exceeds {targets.area_max * 1e12:.4g} um^2")
        if not converged[i].all():
            bad = np.flatnonzero(~converged[i])
            out.insert(0, f"operating point did not converge at {len(bad)} of {k} PVT points "
                          f"(first: {where(corner, temp, vdd, bad[0])})")
        return out

    return Violations(n, word), margins


class Violations(Sequence):
    """The worded violations of n designs, one list of strings per design, worded when a
    design's entry is first read (a search population has thousands of violating designs
    whose text nobody reads)."""

    def __init__(self, n, word):
        self._n, self._word, self._cache = n, word, {}

    def __len__(self) -> int:
        return self._n

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(self._n))]
        i = operator.index(i)
        if i < 0:
            i += self._n
        if not 0 <= i < self._n:
            raise IndexError(f"design {i} of {self._n}")
        if i not in self._cache:
            self._cache[i] = self._word(i)
        return self._cache[i]
