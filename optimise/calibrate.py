"""`stagefront calibrate`: fit a technology file to a SPICE model card through ngspice.

Sweeps (single devices of width `WIDTH`, one ngspice process per deck, both polarities):

- transfer: Id vs VGS from 0 to VDD in 10 mV steps, at every length and at VSB = 0, VDD/4,
  VDD/2, once with VDS = VDD/2 (saturation, where an output device sits at rest) and once
  diode-connected (VDS = VGS, as the loop's stacked diodes);
- output: Id vs VDS from 0 to VDD at VGS = 0.35, 0.5, 0.7 and 0.9 VDD, every length, VSB = 0;
- the saturated transfer curves again at two more temperatures (-40 and 125 degC), and at the
  nominal temperature for every other corner section of a ``.lib`` file.

Fits (scipy.optimize.least_squares, residuals ln(Id model / Id simulator), each length
and curve kind weighted equally):

1. Early voltage: the output curve at VGS = 0.35 VDD (moderate inversion, where the bias
   loop sits) is a line Id = a (1 + VDS / VA) from VDS = VGS to 0.75 VDD, the span between a
   diode-connected device and an output device at mid-supply; va_per_l is the least-squares
   slope of VA against L through the origin (relative residuals).
2. EKV (`models.mos` equations with that va_per_l): vt0, kp and n on the transfer curves
   from IC of about 0.01 up (weak, moderate and strong inversion), plus the output curves
   (saturation and triode), so that the on-resistance near the rail is fitted as well as the
   bias loop.
3. Square law (SPICE level 1, `models.mos`): vt0, kp, gamma and phi on the points at least
   100 mV above each curve's extrapolated threshold and on the output curves.
4. Temperature: vt0 and kp refitted at each temperature (the other parameters held);
   tc_vt is minus the slope of vt0 against T, mu_exp the slope of ln kp against ln(T/Tnom).
5. Corners: vt0 and kp refitted per section: dvt = vt0(corner) - vt0(typical) and
   kp factor = kp(corner) / kp(typical).

`--kind` selects which fit the file's vt0 and kp (and the model line) come from; the other
fit's parameters are written too (gamma and phi, n) because every technology carries them.
Mismatch (a_vt, a_beta), capacitances (cox, cov), minimum width, grid and, without corner
sections, the corners come from --base or are defaults marked as such in the file.
"""
from __future__ import annotations

import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.optimize import least_squares

from models.constants import T_NOMINAL, ZERO_CELSIUS, thermal_voltage
from models.mos import Mos, current, specific_current
from models.tech import Corner, CornerShift, ModelKind, MosTech, Polarity

from . import ngspice
from . import testbench as tb
from .atomic import write_text
from .errors import InputError
from .techfile import load_tech, tech_from_dict
from .units import format_eng, parse_quantity

WIDTH = 10e-6  # m, width of the swept devices (wide: narrow-width effects stay small)
STEP = 0.01  # V, sweep step
LENGTH_FACTORS = (1, 2, 4, 8)  # default lengths, multiples of lmin
TEMPS_C = (-40.0, 125.0)  # degC, the two more temperatures
OUTPUT_VGS = (0.35, 0.5, 0.7, 0.9)  # VGS of the output curves, fractions of VDD
IC_FLOOR = 0.01  # lowest inversion coefficient fitted (EKV)
SQUARE_MARGIN = 0.1  # V above the extrapolated threshold for the square-law fit
# Defaults for what DC sweeps cannot measure; written into the file as "default, not calibrated".
DEFAULTS = {"a_vt": 5e-9, "a_beta": 1e-8, "cox": 8.5e-3, "cov": 3.5e-10}


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


@dataclass
class Fit:
    """Fitted constants of one polarity at the nominal temperature, and the fit report."""

    vt0: float
    kp: float
    n: float
    gamma: float
    phi: float
    va_per_l: float
    sq_vt0: float = 0.0
    sq_kp: float = 0.0
    tc_vt: float = 0.0
    mu_exp: float = -1.5
    va: dict = field(default_factory=dict)  # length -> Early voltage
    regions: dict = field(default_factory=dict)  # region -> (points, rms %, max %)


# ---------------------------------------------------------------------------------------
# Sweeps in ngspice
# ---------------------------------------------------------------------------------------
def _sweep_deck(models: tb.ModelSource, corner: Corner, temp_c: float, lengths, vdd: float, kind: str,
                vsbs=None) -> tuple[str, list]:
    """A deck of single devices of both polarities; returns (deck, [(pol, l, vsb, kind, vgs_or_None, vector)])."""
    lines = [f"stagefront calibrate: {kind} sweeps, {corner.value}, {temp_c:g} degC",
             f".options {tb.spice.OPTIONS}", f".temp {temp_c!r}", models.reference(corner)]
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
          vsbs=None) -> dict[int, Curves]:
    """Run one sweep deck; returns polarity -> Curves (current magnitudes)."""
    deck, meta = _sweep_deck(models, corner, temp_c, lengths, vdd, kind, vsbs)
    res = ngspice.run(deck, timeout=300)
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
        parts[pol].append((np.full_like(x, l), vg, vd, np.full_like(x, vsb), i, np.full(x.shape, sub), np.full(x.shape, c)))
    return {pol: Curves(*(np.concatenate([p[f] for p in ps]) for f in range(7))) for pol, ps in parts.items()}


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
    """Least-squares EKV fit; returns the parameter dict. `fixed` holds the parameters not fitted."""
    fixed = dict(fixed or {})
    base = {"vt0": start[0], "kp": start[1], "n": start[2], **fixed, "va_per_l": va_per_l}
    x0 = np.array([base[k] if k != "kp" else math.log(base[k]) for k in free])
    lo = {"vt0": 0.05, "kp": math.log(1e-6), "n": 1.0}
    hi = {"vt0": 2.0, "kp": math.log(1e-2), "n": 3.0}

    def params(x):
        p = dict(base)
        for k, v in zip(free, x):
            p[k] = math.exp(v) if k == "kp" else v
        return p

    # Pass 1 on currents above a floor, pass 2 from IC_FLOOR up with the first fit's Ispec.
    mask = c.i > 1e-10 * WIDTH / c.l
    for _ in range(2):
        sub = c.take(mask)
        w = _weights(sub)
        sol = least_squares(lambda x: w * _log_residual(model_current(ModelKind.EKV, pol, params(x), sub, temp), sub.i),
                            x0, bounds=([lo[k] for k in free], [hi[k] for k in free]), x_scale="jac")
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
    """Least-squares square-law (level-1) fit; returns the parameter dict."""
    fixed = dict(fixed or {})
    base = {"vt0": start[0], "kp": start[1], "gamma": start[2], "phi": start[3], **fixed, "va_per_l": va_per_l}
    x0 = np.array([base[k] if k != "kp" else math.log(base[k]) for k in free])
    lo = {"vt0": 0.05, "kp": math.log(1e-6), "gamma": 0.0, "phi": 0.1}
    hi = {"vt0": 2.0, "kp": math.log(1e-2), "gamma": 3.0, "phi": 1.5}
    sub = c.take(_threshold_mask(c))
    w = _weights(sub)

    def params(x):
        p = dict(base)
        for k, v in zip(free, x):
            p[k] = math.exp(v) if k == "kp" else v
        return p

    def res(x):
        mdl = model_current(ModelKind.SQUARE_LAW, pol, params(x), sub, temp)
        return w * (mdl - sub.i) / sub.i

    sol = least_squares(res, np.clip(x0, [lo[k] for k in free], [hi[k] for k in free]),
                        bounds=([lo[k] for k in free], [hi[k] for k in free]), x_scale="jac")
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


# ---------------------------------------------------------------------------------------
# The whole calibration
# ---------------------------------------------------------------------------------------
def _join(*cs: Curves) -> Curves:
    offset, parts = 0, []
    for c in cs:
        parts.append(Curves(c.l, c.vgs, c.vds, c.vsb, c.i, c.kind, c.curve + offset))
        offset += int(c.curve.max()) + 1 if len(c.curve) else 0
    return Curves(*(np.concatenate([getattr(p, f) for p in parts]) for f in ("l", "vgs", "vds", "vsb", "i", "kind",
                                                                               "curve")))


def _refit(kind: ModelKind, c: Curves, pol: int, fit: dict, temp: float) -> dict:
    """vt0 and kp again (the other parameters held) on saturated transfer curves at VSB = 0."""
    c = c.take((c.kind == "sat") & (c.vsb == 0.0))
    if kind is ModelKind.EKV:
        return fit_ekv(c, pol, fit["va_per_l"], temp, (fit["vt0"], fit["kp"], fit["n"]), ("vt0", "kp"),
                       {"n": fit["n"]})
    return fit_square(c, pol, fit["va_per_l"], temp, (fit["vt0"], fit["kp"], fit["gamma"], fit["phi"]), ("vt0", "kp"),
                      {"gamma": fit["gamma"], "phi": fit["phi"]})


@dataclass
class Calibration:
    """Everything `calibrate` found: per polarity (+1, -1) the fits, the corner shifts."""

    kind: ModelKind
    fits: dict
    corners: dict  # Corner -> CornerShift (fitted); empty without corner sections
    lengths: tuple
    vdd: float
    log: list = field(default_factory=list)


def calibrate(models: tb.ModelSource, lengths, vdd: float, kind: ModelKind, typical: Corner = Corner.TT,
              log=lambda s: None) -> Calibration:
    """Sweep the card in ngspice and fit every parameter (see the module notes).

    Parameters
    ----------
    models : ModelSource
        The user's card.
    lengths : sequence of float
        Channel lengths swept [m].
    vdd : float
        Largest voltage swept [V].
    kind : ModelKind
        Which fit gives the file's vt0 and kp.
    typical : Corner
        The section fitted as the typical process.
    log : callable
        Receives progress lines.

    Returns
    -------
    Calibration
    """
    tnom_c = T_NOMINAL - ZERO_CELSIUS
    vsbs = (0.0, 0.25 * vdd, 0.5 * vdd)
    log(f"sweeping {models.describe()} at {typical.value}, {tnom_c:g} degC: lengths "
        f"{', '.join(format_eng(x, 'm') for x in lengths)}, VSB {', '.join(f'{v:g}' for v in vsbs)} V, up to {vdd:g} V")
    transfer = sweep(models, typical, tnom_c, lengths, vdd, "transfer", vsbs)
    output = sweep(models, typical, tnom_c, lengths, vdd, "output")
    temps = {t: sweep(models, typical, t, lengths, vdd, "transfer", (0.0,)) for t in TEMPS_C}
    fits = {}
    for pol in (1, -1):
        va = early_voltages(output[pol], vdd)
        vpl = va_per_length(va)
        data = _join(transfer[pol], output[pol])
        ekv = fit_ekv(data, pol, vpl, T_NOMINAL)
        sq = fit_square(data, pol, vpl, T_NOMINAL, (ekv["vt0"], ekv["kp"], 0.5, 0.8))
        chosen = ekv if kind is ModelKind.EKV else sq
        fit = Fit(vt0=chosen["vt0"], kp=chosen["kp"], n=ekv["n"], gamma=sq["gamma"], phi=sq["phi"], va_per_l=vpl,
                  sq_vt0=sq["vt0"], sq_kp=sq["kp"], va=va)
        fit.regions = region_errors(kind, pol, chosen, data, T_NOMINAL, ekv)
        # Temperature: vt0 and kp at each temperature, then the laws of models.mos.at_conditions.
        ts, vts, kps = [T_NOMINAL], [chosen["vt0"]], [chosen["kp"]]
        for t_c, curves in temps.items():
            t = t_c + ZERO_CELSIUS
            p = _refit(kind, curves[pol], pol, {**chosen, "n": ekv["n"], "gamma": sq["gamma"], "phi": sq["phi"]}, t)
            ts.append(t)
            vts.append(p["vt0"])
            kps.append(p["kp"])
        ts, vts, kps = np.array(ts), np.array(vts), np.array(kps)
        fit.tc_vt = float(-np.polyfit(ts - T_NOMINAL, vts, 1)[0])
        fit.mu_exp = float(np.polyfit(np.log(ts / T_NOMINAL), np.log(kps), 1)[0])
        fits[pol] = fit
    corners = {}
    others = [c for c in models.corners(None) if c != typical] if models.sections else []
    if others:
        log(f"corner sections: {', '.join(c.value for c in others)}")
    for corner in others:
        curves = sweep(models, corner, tnom_c, lengths, vdd, "transfer", (0.0,))
        shift = {}
        for pol, tag in ((1, "n"), (-1, "p")):
            f = fits[pol]
            base = {"vt0": f.vt0, "kp": f.kp, "n": f.n, "gamma": f.gamma, "phi": f.phi, "va_per_l": f.va_per_l}
            p = _refit(kind, curves[pol], pol, base, T_NOMINAL)
            shift[f"dvt_{tag}"] = float(p["vt0"] - f.vt0)
            shift[f"kp_{tag}"] = float(p["kp"] / f.kp)
        corners[corner] = CornerShift(**shift)
    return Calibration(kind, fits, corners, tuple(lengths), vdd)


# ---------------------------------------------------------------------------------------
# Report and technology file
# ---------------------------------------------------------------------------------------
def report(cal: Calibration, stream) -> None:
    """Fitted values and the fit error per region, per polarity."""
    p = lambda s="": print(s, file=stream)  # noqa: E731
    for pol, name in ((1, "NMOS"), (-1, "PMOS")):
        f = cal.fits[pol]
        p(f"{name}: vt0 {f.vt0:.4f} V, kp {format_eng(f.kp, 'A/V^2')}, n {f.n:.3f}, gamma {f.gamma:.3f} V^0.5, "
          f"phi {f.phi:.3f} V, va_per_l {f.va_per_l * 1e-6:.2f} V/um, tc_vt {f.tc_vt * 1e3:.3f} mV/K, "
          f"mu_exp {f.mu_exp:.3f}")
        p("  Early voltage per length: " + ", ".join(f"{format_eng(l, 'm')} {v:.2f} V" for l, v in f.va.items()))
        p(f"  {cal.kind.value} fit error |Id model / Id ngspice - 1|:  {'points':>7s} {'rms':>8s} {'max':>8s}")
        for region, (n, rms, mx) in f.regions.items():
            p(f"    {region:28s} {n:7d} {rms:7.1f}% {mx:7.1f}%")
    for corner, s in cal.corners.items():
        p(f"corner {corner.value}: NMOS vt0 {s.dvt_n * 1e3:+.1f} mV, kp x {s.kp_n:.3f}; "
          f"PMOS vt0 {s.dvt_p * 1e3:+.1f} mV, kp x {s.kp_p:.3f}")


def _card_title(path: Path) -> str:
    """The first comment line of a model file (its provenance, often), without the '*'."""
    try:
        for line in path.read_text().splitlines():
            if line.strip().startswith("*") and line.strip("* \t"):
                return line.strip().lstrip("*").strip()
    except (OSError, UnicodeDecodeError):
        pass
    return ""


def _g(x: float) -> str:
    return format(float(x), ".6g")


def tech_toml(cal: Calibration, name: str, models: tb.ModelSource, lmin: float, base, command: str) -> str:
    """The technology file text (the format of `optimise.techfile`), every value commented."""
    fitted = "fitted" if cal.kind is ModelKind.EKV else "fitted (EKV fit; unused by the square law)"
    lines = [
        f"# {name}: technology calibrated by stagefront calibrate to the SPICE model card",
        f"# {models.path.name} (models {models.nmos} / {models.pmos}, section "
        f"{'tt' if models.sections else 'none'}) with ngspice DC sweeps of single devices,",
        f"# W = {format_eng(WIDTH, 'm')}, L = {', '.join(format_eng(x, 'm') for x in cal.lengths)}, "
        f"voltages up to {cal.vdd:g} V; least-squares fit of the {cal.kind.value} equations.",
        f"# Made with: {command}",
        *([f"# The card's own first line: {_card_title(models.path)}"] if _card_title(models.path) else []),
        "# Values marked 'from base' or 'default, not calibrated' are not measured by DC sweeps.",
        "# A fit of a card, not the card: model estimates for early design only.",
        "",
        f'name = "{name}"',
        f'model = "{cal.kind.value}"',
        f"tnom = {_g(T_NOMINAL)}            # K, temperature of the fit",
        f'grid = {_g(base.grid) if base else _g(5e-9)}              # m, drawing grid: '
        f"{'from base' if base else 'default, not calibrated'}",
    ]
    for pol, table in ((1, "nmos"), (-1, "pmos")):
        f = cal.fits[pol]
        mt = (base.nmos if pol == 1 else base.pmos) if base else None
        kept = "from base" if base else "default, not calibrated"
        lines += [
            "",
            f"[{table}]",
            f"vt0 = {_g(f.vt0)}            # V, fitted ({cal.kind.value})",
            f"kp = {_g(f.kp)}           # A/V^2, fitted ({cal.kind.value})",
            f"n = {_g(f.n)}             # {fitted}",
            f"gamma = {_g(f.gamma)}         # V^0.5, fitted (square law, strong inversion)",
            f"phi = {_g(f.phi)}           # V, fitted (square law, strong inversion)",
            f"va_per_l = {_g(f.va_per_l)}     # V/m, fitted: Early voltage against length",
            f"tc_vt = {_g(f.tc_vt)}        # V/K, fitted: vt0 at {', '.join(f'{t:g}' for t in TEMPS_C)} and 27 degC",
            f"mu_exp = {_g(f.mu_exp)}         # fitted: kp at the same temperatures",
            f"a_vt = {_g(mt.a_vt if mt else DEFAULTS['a_vt'])}          # V*m, {kept}",
            f"a_beta = {_g(mt.a_beta if mt else DEFAULTS['a_beta'])}        # m, {kept}",
            f"cox = {_g(mt.cox if mt else DEFAULTS['cox'])}          # F/m^2, {kept}",
            f"cov = {_g(mt.cov if mt else DEFAULTS['cov'])}          # F/m, {kept}",
            f"w_min = {_g(mt.w_min if mt else lmin)}        # m, {kept if mt else 'default (= l_min), not calibrated'}",
            f"l_min = {_g(lmin)}        # m, shortest length fitted",
        ]
    if cal.corners:
        corners, origin = cal.corners, "fitted from the card's section"
    elif base:
        corners, origin = {c: s for c, s in base.corners.items() if c is not Corner.TT}, "from base"
    else:
        corners, origin = {}, ""
    for corner, s in corners.items():
        lines += ["", f"[corners.{corner.value}]                # {origin}",
                  f"dvt_n = {_g(s.dvt_n)}", f"kp_n = {_g(s.kp_n)}", f"dvt_p = {_g(s.dvt_p)}", f"kp_p = {_g(s.kp_p)}"]
    return "\n".join(lines) + "\n"


def calibrate_command(args, stream=None, err_stream=None) -> int:
    """`stagefront calibrate` from parsed arguments."""
    import tomllib

    stream = stream or sys.stdout
    err_stream = err_stream or sys.stderr
    out = Path(args.out)
    if out.exists() and not args.overwrite:
        raise InputError(f"--out {out}", "exists", hint="choose another file or add --overwrite")
    models = tb.load_models(args.models, args.nmos, args.pmos)
    corner = args.corner
    if corner not in tb.CORNERS:
        raise InputError("--corner", f"{corner!r} is not a corner", ", ".join(tb.CORNERS))
    if models.sections and corner not in models.sections:
        raise InputError("--corner", f"{models.path} has no section {corner}", ", ".join(models.sections))
    if not models.sections and corner != "tt":
        raise InputError("--corner", f"{models.path} has no sections; only tt applies")
    base = load_tech(args.base) if args.base else None
    try:
        vdd = parse_quantity(args.vdd, "V")
        lmin = parse_quantity(args.lmin, "m") if args.lmin else (base.nmos.l_min if base else None)
        lengths = ([parse_quantity(x, "m") for x in args.lengths.replace(",", " ").split()] if args.lengths
                   else None)
    except (TypeError, ValueError) as err:
        raise InputError("calibrate", str(err)) from None
    if lmin is None:
        raise InputError("--lmin", "not given", hint="give the shortest length to fit, e.g. --lmin 0.18u, or --base "
                                                     "TECH.toml to take its l_min")
    if not 0.2 <= vdd <= 20:
        raise InputError("--vdd", f"{vdd:g} V is outside [0.2, 20] V")
    lengths = tuple(sorted(lengths)) if lengths else tuple(lmin * f for f in LENGTH_FACTORS)
    if lengths[0] < lmin * (1 - 1e-9):
        raise InputError("--lengths", f"{format_eng(lengths[0], 'm')} is below --lmin {format_eng(lmin, 'm')}")
    tb.require_ngspice()
    kind = ModelKind(args.kind)
    cal = calibrate(models, lengths, vdd, kind, Corner(corner), lambda s: print(s, file=err_stream, flush=True))
    report(cal, stream)
    name = args.name or out.stem
    command = ("stagefront calibrate --models " + str(args.models) + f" --nmos {args.nmos} --pmos {args.pmos}"
               f" --kind {args.kind} --corner {corner} --lmin {args.lmin or format_eng(lmin, 'm').replace(' ', '')}"
               + (f" --lengths {args.lengths}" if args.lengths else "") + f" --vdd {args.vdd}"
               + (f" --base {args.base}" if args.base else "") + (f" --name {args.name}" if args.name else "")
               + f" --out {args.out}")
    text = tech_toml(cal, name, models, lmin, base, command)
    try:
        tech_from_dict(tomllib.loads(text), str(out))  # the file must load as it will be read
    except InputError as err:
        raise InputError(f"--out {out}", f"the fitted technology does not pass the technology checks: {err}",
                         hint="check the model card, --vdd and --lengths") from None
    write_text(out, text)
    print(f"technology: {out}", file=stream)
    return 0
