"""Source and drain junction capacitances of a SPICE model card, measured in ngspice.

The junction half of `stagefront calibrate`'s AC measurements (the gate half is
`devicefit.gate_capacitances`). Card-agnostic: the card's parameter names are never read;
ngspice runs the card and the technology's constants `cj`, `mj`, `pb`, `cjsw`, `mjsw`,
`pbsw` (`models.devices.tech.MosTech`) are fitted to what it reports.

Measurement (one ngspice AC analysis at 1 kHz, both polarities in one deck): per polarity,
devices in cut-off (gate, source and bulk at 0 V) at `WIDTHS`, each once with the netlists'
own diffusions (AD = AS = W E, PD = PS = 2 (W + E), `models.devices.tech.Tech.diffusion`)
and once as a reference without any (AD = AS = PD = PS = 0), at `N_BIAS` drain reverse
biases from 0 to VDD. ngspice reports its junction capacitances only in AC and transient
work, so every bias point is its own device with its own drain source carrying the AC
volt; the drain current's imaginary part over omega is the drain's whole capacitance. The
device less its reference is the drain junction alone: overlap, fringe and intrinsic parts
are the same in both and cancel.

Separation and fit: the netlists' geometry gives C(W, V) = a(V) W + b(V) with
a = cj E + 2 cjsw and b = 2 E cjsw (the depletion formula of `models.devices.mos`
evaluated at each bias), so the two widths give, per bias, cjsw_eff = b / (2 E) and
cj_eff = (a - 2 cjsw_eff) / E. Each is fitted by c0 / (1 + V / pb)^m (scipy least squares,
relative residuals, m and pb within what `MosTech` allows). When the perimeter part at the
narrower width is below `SEPARABLE` of the whole (or negative), the whole capacitance is
fitted as a bottom junction over the area (an effective cj, cjsw = 0); when the area part
is, as a sidewall over the perimeter (cj = 0). A card whose devices show no junction
capacitance gives none (cj = cjsw = 0). Where the card does not follow the formula exactly
(BSIM's gate-edge sidewall CJSWG, a different PB for the sidewall in a level-1 reading) the
fit is an effective one; `worst` is its largest relative error over the measured points.

A card that keeps a junction in the reference device (BSIM4's gate-edge sidewall,
CJSWG x Weff, which it draws whatever PD says) has that part in both and so does not
measure it; BSIM3 and level 1 draw none without AD and PD.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from models.devices.mos import junction_capacitance
from models.devices.tech import Corner

from ..files.units import format_eng
from ..spice import ngspice, process
from ..spice import testbench as tb

WIDTHS = (10e-6, 40e-6)  # m, the two widths that separate the area and perimeter parts
N_BIAS = 8  # drain reverse biases from 0 to VDD
F_AC = 1e3  # Hz
SEPARABLE = 0.01  # smallest share of either part at the narrower width that is fitted apart
# No junction: the device and its reference differ by less than this share of the device
# (numerical noise of the AC solution is about 1e-10 of it) or by less than 1e-21 F.
NONE_SHARE, NONE_ABS = 1e-6, 1e-21
M_LIMITS, PB_LIMITS = (0.01, 0.9), (0.1, 2.0)  # as MosTech's checks allow
# Time limit of the deck per device [s]: 64 devices, one AC point, take well under 1 s.
S_PER_DEVICE = 0.05


@dataclass
class Junctions:
    """Fitted junction constants of one polarity (MosTech's fields) and the measurement.

    `how` is "separated" (bottom and sidewall fitted apart), "bottom only" (the perimeter
    part too small to separate: an effective cj over the area, cjsw = 0), "sidewall only"
    (the area part too small: cj = 0), "none" (no junction capacitance measured) or "not
    measured" (the device with diffusions shows less capacitance than its reference at
    some bias, which no junction does: cj = cjsw = 0);
    `worst` the largest |C fit / C ngspice - 1| over the measured points.
    """

    cj: float = 0.0
    mj: float = 0.5
    pb: float = 0.8
    cjsw: float = 0.0
    mjsw: float = 0.33
    pbsw: float = 0.8
    how: str = "none"
    worst: float = 0.0
    v: np.ndarray = field(default_factory=lambda: np.zeros(0))  # reverse biases [V]
    c: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))  # (width, bias) junction [F]

    def values(self) -> dict:
        """The MosTech fields."""
        return {k: getattr(self, k) for k in ("cj", "mj", "pb", "cjsw", "mjsw", "pbsw")}


def _deck(models: tb.ModelSource, corner: Corner, temp_c: float, vdd: float, extension: float, length: float):
    """The AC deck; returns (deck, {(pol, width index, with diffusions, bias index): vector})."""
    lines = ["stagefront calibrate: junction capacitances", f".options {tb.netlist.OPTIONS}", f".temp {temp_c!r}",
             models.reference(corner)]
    meta, k = {}, 0
    v = np.linspace(0.0, vdd, N_BIAS)
    for pol, name in ((1, models.nmos), (-1, models.pmos)):
        for iw, w in enumerate(WIDTHS):
            area, perimeter = w * extension, 2.0 * (w + extension)
            for own in (True, False):
                geometry = (f"ad={area!r} as={area!r} pd={perimeter!r} ps={perimeter!r}" if own
                            else "ad=0 as=0 pd=0 ps=0")
                for j, vj in enumerate(v):
                    lines += [f"V_J{k} dj{k} 0 dc {pol * float(vj)!r} ac 1",
                              f"M_J{k} dj{k} 0 0 0 {name} w={w!r} l={float(length)!r} {geometry}"]
                    meta[(pol, iw, own, j)] = f"i(v_j{k})"
                    k += 1
    lines += [f".ac lin 1 {F_AC!r} {F_AC!r}", ".end"]
    return "\n".join(lines), meta


def measure(models: tb.ModelSource, corner: Corner, temp_c: float, vdd: float, extension: float, length: float,
            timeout: float | None = None, log=None) -> dict:
    """ngspice's drain capacitances: polarity -> (v (N_BIAS,), device (2, N_BIAS), reference (2, N_BIAS)) [V], [F]."""
    deck, meta = _deck(models, corner, temp_c, vdd, extension, length)
    timeout = process.time_limit(len(meta), S_PER_DEVICE) if timeout is None else timeout
    progress = (lambda t: log(f"    ... junction capacitances: ngspice still running after {t:.0f} s "
                              f"(limit {timeout:.0f} s)")) if log else None
    res = ngspice.run(deck, timeout=timeout, progress=progress)
    omega = 2.0 * math.pi * F_AC
    out = {}
    for pol in (1, -1):
        c = {own: np.array([[abs(float(np.imag(tb.vector(res, meta[(pol, iw, own, j)])[0]))) / omega
                             for j in range(N_BIAS)] for iw in range(len(WIDTHS))]) for own in (True, False)}
        out[pol] = (np.linspace(0.0, vdd, N_BIAS), c[True], c[False])
    return out


def fit_depletion(v, c) -> tuple[float, float, float]:
    """(c0, m, pb) of c0 / (1 + v / pb)^m through points c(v) > 0, relative residuals."""
    v, c = np.asarray(v, dtype=float), np.asarray(c, dtype=float)
    scale = float(c[np.argmin(v)])

    def res(x):
        return junction_capacitance(x[0] * scale, x[1], x[2], v) / c - 1.0

    lo, hi = (1e-3, M_LIMITS[0], PB_LIMITS[0]), (1e3, M_LIMITS[1], PB_LIMITS[1])
    # From a few starts (m, pb): the grading exponent and the potential trade against each
    # other over a short bias range, and least_squares keeps the best of them.
    best = None
    for m0, pb0 in ((0.4, 0.8), (0.3, 0.5), (0.5, 1.5)):
        sol = least_squares(res, (1.0, m0, pb0), bounds=(lo, hi), x_scale="jac", xtol=1e-14, ftol=1e-14, gtol=1e-14)
        if best is None or sol.cost < best.cost:
            best = sol
    return float(best.x[0] * scale), float(best.x[1]), float(best.x[2])


def fit_junctions(v, c, extension: float) -> Junctions:
    """Fit the junction constants to measured drain junctions c (len(WIDTHS), len(v)) [F]
    of devices of WIDTHS with the netlists' diffusions of extension E [m] (module notes);
    c > 0 everywhere."""
    v, c = np.asarray(v, dtype=float), np.asarray(c, dtype=float)
    widths = np.asarray(WIDTHS)
    area, perimeter = widths * extension, 2.0 * (widths + extension)
    a = (c[1] - c[0]) / (widths[1] - widths[0])
    b = c[0] - a * widths[0]
    cjsw = b / (2.0 * extension)
    cj = (a - 2.0 * cjsw) / extension
    # Each part's share of the narrower device's junction at every bias (the sidewall's is
    # b (W + E) / (E C): it holds the 2 cjsw W inside a W too).
    side = np.all(cjsw * perimeter[0] / c[0] >= SEPARABLE)
    bottom = np.all(cj * area[0] / c[0] >= SEPARABLE)
    j = Junctions(v=v, c=c)
    if side and bottom:
        j.how = "separated"
        j.cj, j.mj, j.pb = fit_depletion(v, cj)
        j.cjsw, j.mjsw, j.pbsw = fit_depletion(v, cjsw)
    elif side:
        j.how = "sidewall only"
        j.cjsw, j.mjsw, j.pbsw = fit_depletion(np.tile(v, len(widths)), (c / perimeter[:, None]).ravel())
    else:
        j.how = "bottom only"
        j.cj, j.mj, j.pb = fit_depletion(np.tile(v, len(widths)), (c / area[:, None]).ravel())
    fit = (junction_capacitance(j.cj * area[:, None], j.mj, j.pb, v)
           + junction_capacitance(j.cjsw * perimeter[:, None], j.mjsw, j.pbsw, v))
    j.worst = float(np.max(np.abs(fit / c - 1.0)))
    return j


def junction_capacitances(models: tb.ModelSource, corner: Corner, temp_c: float, vdd: float, extension: float,
                          length: float, timeout: float | None = None, log=None) -> dict[int, Junctions]:
    """Junction constants of the card per polarity: +1/-1 -> Junctions (module notes).

    Parameters
    ----------
    models : ModelSource
        The user's card.
    corner : Corner
        Section of the card.
    temp_c : float
        Temperature [degC].
    vdd : float
        Largest reverse bias [V].
    extension : float
        Diffusion extension E beyond the gate [m] of the technology written
        (`Tech.extension`), as the netlists draw the diffusions.
    length : float
        Drawn length of the measured devices [m] (the junctions do not depend on it).
    timeout : float, optional
        Wall-clock limit of the ngspice run [s].
    log : callable, optional
        Receives a line every 10 s while ngspice runs.
    """
    out = {}
    for pol, (v, dev, ref) in measure(models, corner, temp_c, vdd, extension, length, timeout, log).items():
        c = dev - ref
        if np.all(np.abs(c) <= np.maximum(NONE_SHARE * dev, NONE_ABS)):
            out[pol] = Junctions(v=v, c=c)
        elif not np.all(c > 0):
            out[pol] = Junctions(how="not measured", v=v, c=c)
        else:
            out[pol] = fit_junctions(v, c, extension)
    return out


def describe(j: Junctions) -> str:
    """One line of the fitted values for the calibrate log."""
    if j.how == "none":
        return "no junction capacitance (the device with diffusions and without them alike): cj = cjsw = 0"
    if j.how == "not measured":
        return ("not measured: the device with diffusions shows less capacitance than without them at some bias; "
                "cj = cjsw = 0")
    return (f"cj {format_eng(j.cj, 'F/m^2')}, mj {j.mj:.3f}, pb {j.pb:.3f} V, cjsw {format_eng(j.cjsw, 'F/m')}, "
            f"mjsw {j.mjsw:.3f}, pbsw {j.pbsw:.3f} V ({j.how}); worst fit error {100 * j.worst:.2f} %")


def toml_lines(j: Junctions, extension: float, vdd: float, fmt) -> list[str]:
    """The junction lines of one [nmos]/[pmos] table, each with where it comes from; `fmt`
    formats a number."""
    widths = " and ".join(format_eng(w, "m") for w in WIDTHS)
    e = format_eng(extension, "m")
    where = f"ngspice AC of {widths} devices in cut-off (junction, reverse bias 0..{vdd:g} V)"
    head = (f"# junctions: {widths} devices with AD = W x {e}, PD = 2 (W + {e}), less the same devices "
            f"without diffusions")
    if j.how == "none":
        return [head, f"# cj = cjsw = 0 (none): {where} shows no junction capacitance"]
    if j.how == "not measured":
        return [head, (f"# cj = cjsw = 0 (not measured): {where} shows less capacitance with the diffusions "
                       "than without them at some bias")]
    err = f"worst fit error {100 * j.worst:.2f} %"
    note = {"separated": "bottom and sidewall separated by the two widths",
            "bottom only": "the perimeter part too small to separate: the whole junction as an effective bottom "
                           "over the area, cjsw = 0",
            "sidewall only": "the area part too small to separate: the whole junction as an effective sidewall "
                             "over the perimeter, cj = 0"}[j.how]
    lines = [f"{head}; {note}"]
    if j.how != "sidewall only":
        lines += [f"cj = {fmt(j.cj)}           # F/m^2, measured: {where}, {err}",
                  f"mj = {fmt(j.mj)}           # measured with cj: grading exponent",
                  f"pb = {fmt(j.pb)}           # V, measured with cj: built-in potential"]
    if j.how != "bottom only":
        lines += [f"cjsw = {fmt(j.cjsw)}         # F/m, measured: {where}, {err}",
                  f"mjsw = {fmt(j.mjsw)}         # measured with cjsw: grading exponent",
                  f"pbsw = {fmt(j.pbsw)}         # V, measured with cjsw: built-in potential"]
    return lines
