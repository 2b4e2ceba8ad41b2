"""Per-design figures from the per-PVT metrics: supply sensitivity, the summary over the
PVT grid, and the check against the targets (relative margins and worded violations).

Used by `models.evaluate`; pure numpy, no solving here.
"""
from __future__ import annotations

import operator
from collections.abc import Sequence

import numpy as np

from .wording import eng


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


def supply_power(pvt, design, stage, vdd):
    """Supply power at every PVT point, VDD x (Iq + every bias branch) [W], into pvt."""
    bias = {k: np.asarray(v, dtype=float) for k, v in design.bias.items()}
    pvt["power_w"] = vdd[None, :] * (pvt["iq_a"] + np.asarray(stage.bias_total(bias), dtype=float)[:, None])


def summarise(pvt, design, stage, cond, corner, temp, vdd, targets):
    """The per-design summary: the typical Iq and power, every other figure its worst case
    over PVT. A headroom (and the swing) is nan where the stage cannot deliver the load
    at some PVT point; `delivers_load` says whether it delivers it at all of them."""
    j = cond.nominal_index()
    area = sum(np.asarray(design.w[r]) * np.asarray(design.l[r]) for r in stage.ROLES) * targets.layout_factor
    sens = pvt["supply_sens_pct_per_v"]
    out = {
        "iq_a": pvt["iq_a"][:, j],
        "iq_min_a": pvt["iq_a"].min(axis=1),
        "iq_max_a": pvt["iq_a"].max(axis=1),
        "power_w": pvt["power_w"][:, j],
        "power_max_w": pvt["power_w"].max(axis=1),
        "headroom_high_v": pvt["headroom_high_v"].max(axis=1),
        "headroom_low_v": pvt["headroom_low_v"].max(axis=1),
        "swing_v": pvt["swing_v"].min(axis=1),
        "delivers_load": (pvt["delivers_source"] & pvt["delivers_sink"]).all(axis=1),
        "iout_source_a": pvt["iout_source_a"].min(axis=1),
        "iout_sink_a": pvt["iout_sink_a"].min(axis=1),
        "iout_peak_a": np.maximum(pvt["iout_source_a"], pvt["iout_sink_a"]).max(axis=1),
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

    Margins are relative to their limit, so the search can use them as constraints. Each
    violation states the value the check compared (Iq with its mismatch allowance, the
    larger headroom, the smaller peak current, ...), the limit, the PVT point and the unit.
    """
    n, k = pvt["iq_a"].shape
    iq = pvt["iq_a"]
    spread = targets.iq_sigmas * pvt["iq_sigma_pct"] / 100.0
    inf = np.inf
    iq_lo, iq_hi = iq * (1 - spread), iq * (1 + spread)
    hr = np.maximum(pvt["headroom_high_v"], pvt["headroom_low_v"])
    peak_lo = np.minimum(pvt["iout_source_a"], pvt["iout_sink_a"])
    peak_hi = np.maximum(pvt["iout_source_a"], pvt["iout_sink_a"])
    m = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        m["iq_low"] = (iq_lo - targets.iq_min) / max(targets.iq_min, 1e-12) if targets.iq_min > 0 \
            else np.full((n, k), inf)
        m["iq_high"] = (targets.iq_max - iq_hi) / targets.iq_max if np.isfinite(targets.iq_max) \
            else np.full((n, k), inf)
        # Where the stage cannot deliver the load (headroom nan) the margin counts the whole
        # supply as headroom: worse than any delivering point (whose headroom is at most half
        # its supply), still a number for the search.
        hr_checked = np.where(np.isnan(hr), vdd[None, :], hr)
        m["headroom"] = (targets.headroom_max - hr_checked) / targets.headroom_max \
            if np.isfinite(targets.headroom_max) else np.full((n, k), inf)
        m["load_current"] = (peak_lo - targets.i_load) / targets.i_load
        m["ab_ratio"] = (pvt["ab_ratio"] - targets.ab_min) / targets.ab_min if targets.ab_min > 0 \
            else np.full((n, k), inf)
        m["fp2"] = (pvt["fp2_hz"] - targets.fp2_min) / targets.fp2_min if targets.fp2_min > 0 \
            else np.full((n, k), inf)
        m["vdd_min"] = (vdd[None, :] - pvt["vdd_min_v"]) / vdd[None, :]
        m["power"] = (targets.power_max - pvt["power_w"]) / targets.power_max if np.isfinite(targets.power_max) \
            else np.full((n, k), inf)
        m["iout_peak"] = (targets.iout_peak_max - peak_hi) / targets.iout_peak_max \
            if np.isfinite(targets.iout_peak_max) else np.full((n, k), inf)
        if targets.amplifier is not None:  # the amplifier's targets, only when one is described
            m["phase_margin"] = (pvt["phase_margin_deg"] - targets.phase_margin_min) / targets.phase_margin_min \
                if targets.phase_margin_min > 0 else np.full((n, k), inf)
            m["slew"] = (pvt["slew_v_per_s"] - targets.slew_min) / targets.slew_min if targets.slew_min > 0 \
                else np.full((n, k), inf)
            m["gate_time"] = (targets.gate_time_max - pvt["gate_time_s"]) / targets.gate_time_max \
                if np.isfinite(targets.gate_time_max) else np.full((n, k), inf)
    sig = f" {{}} {targets.iq_sigmas:g} sigma" if targets.iq_sigmas else ""

    def at(j):
        return f"at {where(corner, temp, vdd, j)}"

    def headroom(i, j):
        if not np.isfinite(hr[i, j]):
            side = "source" if not pvt["delivers_source"][i, j] else "sink"
            return f"headroom: cannot deliver the {eng(targets.i_load, 'A')} load ({side}) {at(j)}"
        side = "VDD" if pvt["headroom_high_v"][i, j] >= pvt["headroom_low_v"][i, j] else "ground"
        return f"headroom to {side} = {eng(hr[i, j], 'V')} > {eng(targets.headroom_max, 'V')} {at(j)}"

    def load(i, j):
        side = "source" if pvt["iout_source_a"][i, j] <= pvt["iout_sink_a"][i, j] else "sink"
        wrong = " (flows the wrong way)" if peak_lo[i, j] < 0 else ""
        return (f"peak {side} current at full drive = {eng(peak_lo[i, j], 'A')}{wrong} < load "
                f"{eng(targets.i_load, 'A')} {at(j)}")

    def ab(i, j):
        return (f"ab_ratio (smallest idle-device current / Iq) = {pvt['ab_ratio'][i, j]:.3g} "
                f"({eng(pvt['ab_ratio'][i, j] * iq[i, j], 'A')} of {eng(iq[i, j], 'A')}) < {targets.ab_min:.3g} "
                f"{at(j)}")

    labels = {
        "iq_low": lambda i, j: f"Iq{sig.format('-')} = {eng(iq_lo[i, j], 'A')} < {eng(targets.iq_min, 'A')} {at(j)}",
        "iq_high": lambda i, j: f"Iq{sig.format('+')} = {eng(iq_hi[i, j], 'A')} > {eng(targets.iq_max, 'A')} {at(j)}",
        "headroom": headroom,
        "load_current": load,
        "ab_ratio": ab,
        "fp2": lambda i, j: f"output pole = {eng(pvt['fp2_hz'][i, j], 'Hz')} < {eng(targets.fp2_min, 'Hz')} {at(j)}",
        "vdd_min": lambda i, j: f"vdd_min = {eng(pvt['vdd_min_v'][i, j], 'V')} > supply {eng(vdd[j], 'V')} "
                                f"{at(j)} (set by: {req_names[pvt['vdd_min_what'][i, j]]})",
        "power": lambda i, j: f"power = {eng(pvt['power_w'][i, j], 'W')} > {eng(targets.power_max, 'W')} {at(j)}",
        "iout_peak": lambda i, j: f"peak output current at full drive = {eng(peak_hi[i, j], 'A')} > cap "
                                  f"{eng(targets.iout_peak_max, 'A')} {at(j)}",
        "phase_margin": lambda i, j: f"phase margin = {pvt['phase_margin_deg'][i, j]:.3g} deg < "
                                     f"{targets.phase_margin_min:.3g} deg {at(j)} "
                                     f"(unity gain at {eng(pvt['ugf_hz'][i, j], 'Hz')})",
        "slew": lambda i, j: f"slew rate = {pvt['slew_v_per_s'][i, j] * 1e-6:.4g} V/us < "
                             f"{targets.slew_min * 1e-6:.4g} V/us {at(j)}",
        "gate_time": lambda i, j: f"time to move the gates to the drive limit = {eng(pvt['gate_time_s'][i, j], 's')}"
                                  f" > {eng(targets.gate_time_max, 's')} {at(j)}",
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
            out.append(f"area = {summary['area_um2'][i]:.4g} um^2 > {targets.area_max * 1e12:.4g} um^2")
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
