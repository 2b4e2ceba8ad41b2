"""Device sweeps in ngspice and least-squares fits of the `models.mos` equations to them.

The measuring half of `stagefront calibrate` (see optimise.calibrate for the whole).

Sweeps (single devices of width `WIDTH`, both polarities in one deck, one ngspice process
per deck, the source at 0 V and the bulk at -VSB so every curve shares the gate sweep):

- transfer: Id vs VGS from 0 to VDD in 10 mV steps, at every length and VSB, once with
  VDS = VDD/2 (saturation, where an output device sits at rest) and once diode-connected
  (VDS = VGS, as the loop's stacked diodes);
- output: Id vs VDS from 0 to VDD at VGS = 0.35, 0.5, 0.7 and 0.9 VDD, every length, VSB = 0.

Fits (scipy.optimize.least_squares; each length and curve kind weighted equally):

1. Early voltage: the output curve at VGS = 0.35 VDD (moderate inversion, where the bias
   loop sits) is a line Id = a (1 + VDS / VA) from VDS = VGS to 0.75 VDD, the span between a
   diode-connected device and an output device at mid-supply; va_per_l is the least-squares
   slope of VA against L through the origin (relative residuals).
2. EKV: vt0, kp and n, residuals ln(Id model / Id simulator), on the transfer curves from IC
   of about 0.01 up (weak, moderate and strong inversion) and on the output curves
   (saturation and triode), so that the on-resistance near a rail is fitted as well as the
   bias loop.
3. Square law (SPICE level 1): vt0, kp, gamma and phi, relative residuals, on the points at
   least 100 mV above each curve's extrapolated threshold and on the output curves.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from models.devices.constants import thermal_voltage
from models.devices.mos import Mos, current, specific_current
from models.devices.tech import Corner, ModelKind

from ..files.errors import InputError
from ..spice import ngspice, process
from ..spice import testbench as tb

WIDTH = 10e-6  # m, width of the swept devices (wide: narrow-width effects stay small)
STEP = 0.01  # V, sweep step
OUTPUT_VGS = (0.35, 0.5, 0.7, 0.9)  # VGS of the output curves, fractions of VDD
# Time limit of one sweep deck per device x swept point [s]: the transfer sweeps of the
# invented BSIM3 card (48 devices x 181 points, three VSB) measured here take 0.26 ms per
# device-point on a loaded 2-core machine, the output sweeps 0.05 ms; ten times the slower
# one, so that only a card that does not converge reaches the limit (plus process.START_S:
# 32 s for that deck, not the 300 s of a fixed limit).
SWEEP_S_PER_POINT = 2.5e-3
IC_FLOOR = 0.01  # lowest inversion coefficient fitted (EKV)
SQUARE_MARGIN = 0.1  # V above the extrapolated threshold for the square-law fit
# Bounds of the fitted parameters: vt0 [V], kp [A/V^2], n [1], gamma [V^0.5], phi [V].
LIMITS = {"vt0": (0.05, 2.0), "kp": (1e-6, 1e-2), "n": (1.0, 3.0), "gamma": (0.0, 3.0), "phi": (0.1, 1.5)}


@dataclass
class Curves:
    """Swept points of one polarity, magnitudes in the device's own frame (SI).

    Each array has shape (k,); `kind` is "sat" (VDS = VDD/2), "diode" (VDS = VGS) or
    "out" (output curve); `curve` numbers the curves.
    """

    l: np.ndarray
    vgs: np.ndarray
    vds: np.ndarray
    vsb: np.ndarray
    i: np.ndarray
    kind: np.ndarray
    curve: np.ndarray

    def take(self, mask) -> "Curves":
        return Curves(*(getattr(self, f)[mask] for f in ("l", "vgs", "vds", "vsb", "i", "kind", "curve")))


# ---------------------------------------------------------------------------------------
# Sweeps in ngspice
# ---------------------------------------------------------------------------------------
def _sweep_deck(models: tb.ModelSource, corner: Corner, temp_c: float, lengths, vdd: float, kind: str,
                vsbs=None) -> tuple[str, list]:
    """A deck of single devices of both polarities; returns (deck, [(pol, l, vsb, kind, vgs_or_None, vector)])."""
    lines = [f"stagefront calibrate: {kind} sweeps, {corner.value}, {temp_c:g} degC",
             f".options {tb.netlist.OPTIONS}", f".temp {temp_c!r}", models.reference(corner)]
    meta = []
    vsbs = (0.0,) if vsbs is None else vsbs
    k = 0
    for pol, name in ((1, models.nmos), (-1, models.pmos)):
        tag = "n" if pol == 1 else "p"
        # Every sweep node follows the one swept source: +V(ctl) for NMOS, -V(ctl) for PMOS.
        lines.append(f"E_SW{tag} sw{tag} 0 ctl 0 {float(pol)!r}")
        for j, vsb in enumerate(vsbs):
            lines.append(f"V_B{tag}{j} b{tag}{j} 0 dc {-pol * vsb!r}")
        if kind == "transfer":
            lines.append(f"V_D{tag} d{tag} 0 dc {pol * 0.5 * vdd!r}")
            for l in lengths:
                for j, vsb in enumerate(vsbs):
                    for sub in ("sat", "diode"):
                        drain = f"d{tag}" if sub == "sat" else f"sw{tag}"
                        lines.append(f"V_M{k} m{k} {drain} dc 0")
                        lines.append(f"M{k} m{k} sw{tag} 0 b{tag}{j} {name} w={WIDTH!r} l={l!r}")
                        meta.append((pol, l, vsb, sub, None, f"i(v_m{k})"))
                        k += 1
        else:
            for g, frac in enumerate(OUTPUT_VGS):
                lines.append(f"V_G{tag}{g} g{tag}{g} 0 dc {pol * frac * vdd!r}")
                for l in lengths:
                    lines.append(f"V_M{k} m{k} sw{tag} dc 0")
                    lines.append(f"M{k} m{k} g{tag}{g} 0 b{tag}0 {name} w={WIDTH!r} l={l!r}")
                    meta.append((pol, l, 0.0, "out", frac * vdd, f"i(v_m{k})"))
                    k += 1
    lines += ["V_CTL ctl 0 dc 0", f".dc V_CTL 0 {vdd!r} {STEP!r}", ".end"]
    return "\n".join(lines), meta


def sweep(models: tb.ModelSource, corner: Corner, temp_c: float, lengths, vdd: float, kind: str,
          vsbs=None, log=None) -> dict[int, Curves]:
    """Sweep single devices of both polarities in one ngspice run.

    Parameters
    ----------
    models : ModelSource
        The user's card and model names.
    corner : Corner
        Section of the card (``.lib FILE CORNER``).
    temp_c : float
        Temperature [degC] (``.temp``).
    lengths : sequence of float
        Channel lengths [m].
    vdd : float
        Largest voltage swept [V].
    kind : str
        "transfer" (Id-VGS, saturated and diode-connected, at every VSB) or "output" (Id-VDS).
    vsbs : sequence of float, optional
        Source-bulk voltages [V] of the transfer curves (default 0 only).
    log : callable, optional
        Receives a line when the sweep starts and one every 10 s while ngspice runs.

    Returns
    -------
    dict
        Polarity (+1, -1) -> Curves, current magnitudes [A].

    Raises
    ------
    NgspiceError
        When ngspice fails (missing model, unparsable card, no convergence).
    """
    deck, meta = _sweep_deck(models, corner, temp_c, lengths, vdd, kind, vsbs)
    points = int(round(vdd / STEP)) + 1
    limit = process.time_limit(len(meta) * points, SWEEP_S_PER_POINT)
    what = f"{kind} sweep, {corner.value}, {temp_c:g} degC"
    if log:
        log(f"  {what}: {len(meta)} devices x {points} points (time limit {limit:.0f} s)")
    res = ngspice.run(deck, timeout=limit, progress=_still_running(log, what, limit))
    x = tb.vector(res, "v(ctl)")
    parts = {1: [], -1: []}
    for c, (pol, l, vsb, sub, vgs, vec) in enumerate(meta):
        i = np.abs(tb.vector(res, vec))
        if sub == "out":
            vg, vd = np.full_like(x, vgs), x
        elif sub == "sat":
            vg, vd = x, np.full_like(x, 0.5 * vdd)
        else:
            vg, vd = x, x
        parts[pol].append((np.full_like(x, l), vg, vd, np.full_like(x, vsb), i, np.full(x.shape, sub),
                           np.full(x.shape, c)))
    return {pol: Curves(*(np.concatenate([p[f] for p in ps]) for f in range(7))) for pol, ps in parts.items()}


def _still_running(log, what: str, limit: float):
    """The `progress` callback of one ngspice run: a line naming it, its time and its limit."""
    if log is None:
        return None
    return lambda t: log(f"    ... {what}: ngspice still running after {t:.0f} s (limit {limit:.0f} s)")


def gate_capacitances(models: tb.ModelSource, corner: Corner, temp_c: float, length: float, vdd: float,
                      timeout: float | None = None, log=None) -> dict[int, tuple[float, float]]:
    """Gate-oxide and overlap capacitance of the card per polarity: +1/-1 -> (cox [F/m^2],
    cov [F/m]), from an ngspice AC analysis at 1 kHz of two W = WIDTH, L = `length` devices.

    - Overlap: VGS = 0.8 VDD, VDS = VDD (saturation, where the channel's own gate-drain
      capacitance is near zero) with the AC volt on the drain; the gate current over omega is
      the gate-drain capacitance, the card's overlap and fringe: cov = Cgd / W (the source
      side taken equal).
    - Oxide: VGS = VDD, VDS = 0 (strong inversion, no pinch-off) with the AC volt on the gate;
      the whole gate capacitance is Cox W L + 2 cov W, so cox = (Cgg - 2 cov W) / (W L).

    A long `length` keeps the drawn length close to the electrical one. The DC sweeps cannot
    see either value; the small-signal model of the stage inside its amplifier uses both.
    A polarity whose card models no gate charge (a level-1 card without TOX) is left out.
    """
    f = 1e3
    lines = ["stagefront calibrate: gate capacitances", f".options {tb.netlist.OPTIONS}", f".temp {temp_c!r}",
             models.reference(corner)]
    for pol, name in ((1, models.nmos), (-1, models.pmos)):
        tag = "n" if pol == 1 else "p"
        lines += [f"V_GO{tag} go{tag} 0 dc {pol * 0.8 * vdd!r}", f"V_DO{tag} do{tag} 0 dc {pol * vdd!r} ac 1",
                  f"M_O{tag} do{tag} go{tag} 0 0 {name} w={WIDTH!r} l={float(length)!r}",
                  f"V_GX{tag} gx{tag} 0 dc {pol * vdd!r} ac 1",
                  f"M_X{tag} 0 gx{tag} 0 0 {name} w={WIDTH!r} l={float(length)!r}"]
    lines += [f".ac lin 1 {f!r} {f!r}", ".end"]
    timeout = process.time_limit(4, SWEEP_S_PER_POINT) if timeout is None else timeout  # 4 devices, 1 point
    res = ngspice.run("\n".join(lines), timeout=timeout, progress=_still_running(log, "gate capacitances", timeout))
    out = {}
    for pol in (1, -1):
        tag = "n" if pol == 1 else "p"
        c_gd = abs(float(np.imag(tb.vector(res, f"i(v_go{tag})")[0]))) / (2 * math.pi * f)
        c_gg = abs(float(np.imag(tb.vector(res, f"i(v_gx{tag})")[0]))) / (2 * math.pi * f)
        cov = c_gd / WIDTH
        cox = (c_gg - 2.0 * c_gd) / (WIDTH * length)
        if np.isfinite(cox) and np.isfinite(cov) and cox > 0 and cov >= 0:
            out[pol] = (cox, cov)
    return out


# ---------------------------------------------------------------------------------------
# Model currents
# ---------------------------------------------------------------------------------------
def model_current(kind: ModelKind, pol: int, p: dict, c: Curves, temp: float):
    """Frame current of the `models.mos` equations at the swept points (source at 0)."""
    m = Mos(pol, kind, p["vt0"], p["kp"], p.get("n", 1.3), p.get("gamma", 0.0), p.get("phi", 0.7),
            thermal_voltage(temp), p["va_per_l"])
    return current(m, WIDTH, c.l, pol * c.vgs, pol * c.vds, 0.0, -pol * c.vsb)


def _weights(c: Curves) -> np.ndarray:
    """Equal weight per (length, curve kind): sqrt(1 / points of its group)."""
    w = np.ones(len(c.i))
    for l in np.unique(c.l):
        for kind in np.unique(c.kind):
            m = (c.l == l) & (c.kind == kind)
            if m.any():
                w[m] = 1.0 / math.sqrt(m.sum())
    return w


def _free(base: dict, free):
    """The `free` parameters as least_squares sees them: kp as ln kp, the others as they are.

    Returns (x0, bounds, params): the start vector from `base`, the (lower, upper) bounds
    from `LIMITS`, and the function that turns a vector back into `base` with the free
    parameters replaced.
    """
    to_x = lambda k, v: math.log(v) if k == "kp" else v  # noqa: E731
    x0 = np.array([to_x(k, base[k]) for k in free])
    bounds = ([to_x(k, LIMITS[k][0]) for k in free], [to_x(k, LIMITS[k][1]) for k in free])

    def params(x):
        return {**base, **{k: math.exp(v) if k == "kp" else v for k, v in zip(free, x)}}

    return x0, bounds, params


def _log_residual(model, sim):
    return np.log(np.maximum(model, 1e-30) / sim)


def early_voltages(out: Curves, vdd: float) -> dict[float, float]:
    """VA per length from the output conductance where the bias loop works.

    The output curve at the lowest VGS level (0.35 VDD: moderate inversion in a process made
    for that supply) is a line Id = a (1 + VDS / VA) between VDS = VGS (a diode-connected
    device) and VDS = 0.75 VDD (an output device at mid-supply, with margin): VA = a / b.
    Short-channel devices have a much lower output resistance there (drain-induced barrier
    lowering) than at high VDS or in strong inversion, and this is the span that sets Iq.
    """
    va = {}
    level = min(OUTPUT_VGS) * vdd
    for l in np.unique(out.l):
        m = (out.l == l) & np.isclose(out.vgs, level) & (out.vds >= out.vgs) & (out.vds <= 0.75 * vdd)
        if m.sum() < 5:
            continue
        b, a = np.polyfit(out.vds[m], out.i[m], 1)
        if b > 0 and a > 0:
            va[float(l)] = float(a / b)
    if not va:
        raise InputError("--models", "no output curve has a positive output conductance in saturation",
                         hint="check the model card and --vdd")
    return va


def va_per_length(va: dict) -> float:
    """Slope of VA against L through the origin, relative residuals."""
    l = np.array(list(va))
    v = np.array(list(va.values()))
    return float(np.sum(l / v) / np.sum(l**2 / v**2))


def fit_ekv(c: Curves, pol: int, va_per_l: float, temp: float, start=(0.45, 2e-4, 1.3), free=("vt0", "kp", "n"),
            fixed=None):
    """Least-squares fit of the EKV equations of `models.mos` to swept points.

    Parameters
    ----------
    c : Curves
        Points of one polarity.
    pol : int
        +1 NMOS, -1 PMOS.
    va_per_l : float
        Early voltage per length [V/m], held.
    temp : float
        Temperature of the points [K].
    start : (vt0 [V], kp [A/V^2], n)
        Starting values.
    free : tuple of str
        Parameters fitted (of vt0, kp, n); `fixed` gives the others.

    Returns
    -------
    dict
        vt0, kp, n and va_per_l. Residuals are ln(Id model / Id simulator), each length and
        curve kind weighted equally; a second pass keeps the points from IC = IC_FLOOR up
        (IC from the first pass's Ispec) and every output-curve point.
    """
    base = {"vt0": start[0], "kp": start[1], "n": start[2], **(fixed or {}), "va_per_l": va_per_l}
    x0, bounds, params = _free(base, free)

    # Pass 1 on currents above a floor, pass 2 from IC_FLOOR up with the first fit's Ispec.
    mask = c.i > 1e-10 * WIDTH / c.l
    for _ in range(2):
        sub = c.take(mask)
        w = _weights(sub)
        sol = least_squares(lambda x: w * _log_residual(model_current(ModelKind.EKV, pol, params(x), sub, temp), sub.i),
                            x0, bounds=bounds, x_scale="jac")
        x0 = sol.x
        p = params(sol.x)
        m = Mos(pol, ModelKind.EKV, p["vt0"], p["kp"], p["n"], 0.0, 0.7, thermal_voltage(temp), va_per_l)
        ic = c.i / specific_current(m, WIDTH, c.l)
        mask = (ic >= IC_FLOOR) | (c.kind == "out") & (c.i > 0)
    return params(x0)


def _threshold_mask(c: Curves) -> np.ndarray:
    """Points at least SQUARE_MARGIN above their curve's extrapolated threshold (output curves: all on)."""
    keep = np.zeros(len(c.i), dtype=bool)
    for cv in np.unique(c.curve):
        m = np.flatnonzero(c.curve == cv)
        if c.kind[m[0]] == "out":
            keep[m] = c.i[m] > 0
            continue
        s = np.sqrt(c.i[m])
        slope = np.gradient(s, c.vgs[m])
        k = int(np.argmax(slope))
        vt = c.vgs[m][k] - s[k] / slope[k] if slope[k] > 0 else np.inf
        keep[m] = c.vgs[m] >= vt + SQUARE_MARGIN
    return keep & (c.i > 0)


def fit_square(c: Curves, pol: int, va_per_l: float, temp: float, start=(0.45, 2e-4, 0.5, 0.8),
               free=("vt0", "kp", "gamma", "phi"), fixed=None):
    """Least-squares fit of the square law (SPICE level 1) of `models.mos` to swept points.

    Arguments as in `fit_ekv`, with `start` = (vt0, kp, gamma, phi) and `free` from those.
    Residuals are relative current errors on the points at least SQUARE_MARGIN above their
    curve's extrapolated threshold and on the output curves. Returns vt0, kp, gamma, phi
    and va_per_l.
    """
    base = {"vt0": start[0], "kp": start[1], "gamma": start[2], "phi": start[3], **(fixed or {}), "va_per_l": va_per_l}
    x0, bounds, params = _free(base, free)
    sub = c.take(_threshold_mask(c))
    w = _weights(sub)

    def res(x):
        mdl = model_current(ModelKind.SQUARE_LAW, pol, params(x), sub, temp)
        return w * (mdl - sub.i) / sub.i

    sol = least_squares(res, np.clip(x0, *bounds), bounds=bounds, x_scale="jac")
    return params(sol.x)


def region_errors(kind: ModelKind, pol: int, p: dict, c: Curves, temp: float, ekv: dict) -> dict:
    """(points, RMS %, max %) of |Id model / Id simulator - 1| per region.

    Transfer curves in saturation by inversion coefficient (IC from the EKV fit's Ispec):
    weak < 0.1 <= moderate < 10 <= strong, from IC_FLOOR up; output curves split at
    VDSsat = UT (2 sqrt(IC) + 4) into saturation and triode.
    """
    m = Mos(pol, ModelKind.EKV, ekv["vt0"], ekv["kp"], ekv["n"], 0.0, 0.7, thermal_voltage(temp), ekv["va_per_l"])
    ic = c.i / specific_current(m, WIDTH, c.l)
    with np.errstate(divide="ignore", invalid="ignore"):
        err = model_current(kind, pol, p, c, temp) / c.i - 1.0
    vdsat = m.ut * (2.0 * np.sqrt(ic) + 4.0)
    sat = c.kind != "out"
    regions = {
        "weak inversion": sat & (ic >= IC_FLOOR) & (ic < 0.1),
        "moderate inversion": sat & (ic >= 0.1) & (ic < 10),
        "strong inversion": sat & (ic >= 10),
        "saturation (output curves)": (c.kind == "out") & (c.vds >= vdsat) & (c.i > 0),
        "triode (output curves)": (c.kind == "out") & (c.vds < vdsat) & (c.vds > 0) & (c.i > 0),
    }
    out = {}
    for name, mask in regions.items():
        e = np.abs(err[mask]) * 100.0
        out[name] = (int(mask.sum()), float(np.sqrt(np.mean(e**2))) if e.size else float("nan"),
                     float(e.max()) if e.size else float("nan"))
    return out


def join(*cs: Curves) -> Curves:
    offset, parts = 0, []
    for c in cs:
        parts.append(Curves(c.l, c.vgs, c.vds, c.vsb, c.i, c.kind, c.curve + offset))
        offset += int(c.curve.max()) + 1 if len(c.curve) else 0
    return Curves(*(np.concatenate([getattr(p, f) for p in parts]) for f in ("l", "vgs", "vds", "vsb", "i", "kind",
                                                                               "curve")))


def refit(kind: ModelKind, c: Curves, pol: int, fit: dict, temp: float) -> dict:
    """vt0 and kp again (the other parameters held) on saturated transfer curves at VSB = 0."""
    c = c.take((c.kind == "sat") & (c.vsb == 0.0))
    if kind is ModelKind.EKV:
        return fit_ekv(c, pol, fit["va_per_l"], temp, (fit["vt0"], fit["kp"], fit["n"]), ("vt0", "kp"),
                       {"n": fit["n"]})
    return fit_square(c, pol, fit["va_per_l"], temp, (fit["vt0"], fit["kp"], fit["gamma"], fit["phi"]), ("vt0", "kp"),
                      {"gamma": fit["gamma"], "phi": fit["phi"]})
