"""`stagefront calibrate`: fit a technology file to a SPICE model card through ngspice.

The sweeps and the fits of one condition are `optimise.calibrate.devicefit`. Here they run at the
nominal temperature (27 degC) on the typical section, at two more temperatures (-40 and
125 degC) and on every other corner section of a ``.lib`` file:

- typical: the Early voltage per length, then vt0, kp and n (EKV) and vt0, kp, gamma and
  phi (square law), every length and VSB;
- temperature: vt0 and kp refitted at each temperature (the other parameters held);
  tc_vt is minus the slope of vt0 against T, mu_exp the slope of ln kp against ln(T/Tnom);
- corners: vt0 and kp refitted per section: dvt = vt0(corner) - vt0(typical) and
  kp factor = kp(corner) / kp(typical).

`--kind` selects which fit the file's vt0 and kp (and its model line) come from; the other
fit's parameters are written too (gamma and phi, n) because every technology carries them.
The gate capacitances (cox, cov) come from an ngspice AC analysis of the card
(`devicefit.gate_capacitances`), and so do the source and drain junctions (cj, mj, pb,
cjsw, mjsw, pbsw: `junctions.junction_capacitances`, over the diffusions the netlists of
the written technology draw). Mismatch (a_vt, a_beta), minimum width, grid and, without
corner sections, the corners come from --base or are defaults marked as such in the file.
"""
from __future__ import annotations

import math
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from models.devices.constants import T_NOMINAL, ZERO_CELSIUS
from models.devices.tech import DIFFUSION_PER_LMIN, Corner, CornerShift, ModelKind

from ..files.atomic import write_text
from ..files.errors import InputError
from ..files.techfile import load_tech, tech_from_dict
from ..files.units import format_eng, parse_quantity
from ..spice import process
from ..spice import testbench as tb
from ..spice.cards import comment_safe
from .devicefit import (
    WIDTH,
    early_voltages,
    fit_ekv,
    fit_square,
    gate_capacitances,
    join,
    refit,
    region_errors,
    sweep,
    va_per_length,
)
from .junctions import describe, junction_capacitances, toml_lines

LENGTH_FACTORS = (1, 2, 4, 8)  # default lengths, multiples of lmin
MAX_LENGTHS = 16  # --lengths: each is a device per curve in every sweep deck ("common practice, no source")
TEMPS_C = (-40.0, 125.0)  # degC, the two more temperatures
# Defaults for what DC sweeps cannot measure; written into the file as "default, not calibrated".
# A technology name as calibrate writes it (between double quotes in the TOML file).
_NAME = re.compile(r"[^\x00-\x1f\x7f\x85\u2028\u2029\"\\]{1,80}")
DEFAULTS = {"a_vt": 5e-9, "a_beta": 1e-8, "cox": 8.5e-3, "cov": 3.5e-10}


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



@dataclass
class Calibration:
    """Everything `calibrate` found: per polarity (+1, -1) the fits, the corner shifts."""

    kind: ModelKind
    fits: dict
    corners: dict  # Corner -> CornerShift (fitted); empty without corner sections
    lengths: tuple
    vdd: float
    log: list = field(default_factory=list)
    caps: dict = field(default_factory=dict)  # +1/-1 -> (cox, cov) measured by ngspice AC; empty: not measured
    junctions: dict = field(default_factory=dict)  # +1/-1 -> junctions.Junctions measured by ngspice AC
    extension: float = 0.0  # m, the diffusion extension the junctions were measured with


def calibrate(models: tb.ModelSource, lengths, vdd: float, kind: ModelKind, typical: Corner = Corner.TT,
              log=lambda s: None, extension: float | None = None) -> Calibration:
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
    extension : float, optional
        Diffusion extension [m] of the technology written (`Tech.extension`), the geometry
        the junctions are measured with; default DIFFUSION_PER_LMIN x the shortest length.

    Returns
    -------
    Calibration
    """
    tnom_c = T_NOMINAL - ZERO_CELSIUS
    vsbs = (0.0, 0.25 * vdd, 0.5 * vdd)
    log(f"sweeping {models.describe()} at {typical.value}, {tnom_c:g} degC: lengths "
        f"{', '.join(format_eng(x, 'm') for x in lengths)}, VSB {', '.join(f'{v:g}' for v in vsbs)} V, up to {vdd:g} V")
    others = [c for c in models.corners(None) if c != typical] if models.sections else []
    total, done = 4 + len(TEMPS_C) + len(others), []

    def step(line):  # the progress line of the k-th of the command's ngspice runs
        if line.startswith("    ..."):  # still running: as it is
            log(line)
            return
        done.append(line)
        log(f"  [{len(done)}/{total}] {line.strip()}")

    transfer = sweep(models, typical, tnom_c, lengths, vdd, "transfer", vsbs, step)
    output = sweep(models, typical, tnom_c, lengths, vdd, "output", log=step)
    temps = {t: sweep(models, typical, t, lengths, vdd, "transfer", (0.0,), step) for t in TEMPS_C}
    fits = {}
    for pol in (1, -1):
        va = early_voltages(output[pol], vdd)
        vpl = va_per_length(va)
        data = join(transfer[pol], output[pol])
        ekv = fit_ekv(data, pol, vpl, T_NOMINAL)
        sq = fit_square(data, pol, vpl, T_NOMINAL, (ekv["vt0"], ekv["kp"], 0.5, 0.8))
        chosen = ekv if kind is ModelKind.EKV else sq
        fit = Fit(vt0=chosen["vt0"], kp=chosen["kp"], n=ekv["n"], gamma=sq["gamma"], phi=sq["phi"], va_per_l=vpl,
                  sq_vt0=sq["vt0"], sq_kp=sq["kp"], va=va)
        fit.regions = region_errors(kind, pol, chosen, data, T_NOMINAL, ekv)
        # Temperature: vt0 and kp at each temperature, then the laws of models.devices.mos.at_conditions.
        ts, vts, kps = [T_NOMINAL], [chosen["vt0"]], [chosen["kp"]]
        for t_c, curves in temps.items():
            t = t_c + ZERO_CELSIUS
            p = refit(kind, curves[pol], pol, {**chosen, "n": ekv["n"], "gamma": sq["gamma"], "phi": sq["phi"]}, t)
            ts.append(t)
            vts.append(p["vt0"])
            kps.append(p["kp"])
        ts, vts, kps = np.array(ts), np.array(vts), np.array(kps)
        fit.tc_vt = float(-np.polyfit(ts - T_NOMINAL, vts, 1)[0])
        fit.mu_exp = float(np.polyfit(np.log(ts / T_NOMINAL), np.log(kps), 1)[0])
        fits[pol] = fit
    corners = {}
    if others:
        log(f"corner sections: {', '.join(c.value for c in others)}")
    for corner in others:
        curves = sweep(models, corner, tnom_c, lengths, vdd, "transfer", (0.0,), step)
        shift = {}
        for pol, tag in ((1, "n"), (-1, "p")):
            f = fits[pol]
            base = {"vt0": f.vt0, "kp": f.kp, "n": f.n, "gamma": f.gamma, "phi": f.phi, "va_per_l": f.va_per_l}
            p = refit(kind, curves[pol], pol, base, T_NOMINAL)
            shift[f"dvt_{tag}"] = float(p["vt0"] - f.vt0)
            shift[f"kp_{tag}"] = float(p["kp"] / f.kp)
        corners[corner] = CornerShift(**shift)
    step(f"  gate capacitances: ngspice AC at {typical.value}, {tnom_c:g} degC, L = {format_eng(lengths[-1], 'm')}")
    caps = gate_capacitances(models, typical, tnom_c, lengths[-1], vdd, log=step)
    for pol in (1, -1):
        if pol not in caps:
            log(f"{'NMOS' if pol == 1 else 'PMOS'}: the card models no gate capacitance; cox and cov are not measured")
    extension = DIFFUSION_PER_LMIN * lengths[0] if extension is None else extension
    step(f"  junction capacitances: ngspice AC at {typical.value}, {tnom_c:g} degC, reverse bias 0 to {vdd:g} V, "
         f"diffusions reaching {format_eng(extension, 'm')} beyond the gate")
    junctions = junction_capacitances(models, typical, tnom_c, vdd, extension, lengths[-1], log=step)
    for pol, j in junctions.items():
        log(f"{'NMOS' if pol == 1 else 'PMOS'} junctions: {describe(j)}")
    return Calibration(kind, fits, corners, tuple(lengths), vdd, caps=caps, junctions=junctions, extension=extension)


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
        if pol in cal.junctions:
            p(f"  junctions: {describe(cal.junctions[pol])}")
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


def _capacitance_lines(caps: tuple, length: float) -> list:
    cox, cov = caps
    where = f"ngspice AC of a {format_eng(WIDTH, 'm')} x {format_eng(length, 'm')} device"
    return [f"cox = {_g(cox)}          # F/m^2, measured: {where} in strong inversion",
            f"cov = {_g(cov)}          # F/m, measured: {where}, gate-drain in saturation (overlap and fringe)"]


def tech_toml(cal: Calibration, name: str, models: tb.ModelSource, lmin: float, base, command: str) -> str:
    """The technology file text (the format of `optimise.files.techfile`), every value commented."""
    fitted = "fitted" if cal.kind is ModelKind.EKV else "fitted (EKV fit; unused by the square law)"
    title = _card_title(models.path)
    lines = [
        f"# {name}: technology calibrated by stagefront calibrate to the SPICE model card",
        f"# {models.path.name} (models {models.nmos} / {models.pmos}, section "
        f"{'tt' if models.sections else 'none'}) with ngspice DC sweeps of single devices,",
        f"# W = {format_eng(WIDTH, 'm')}, L = {', '.join(format_eng(x, 'm') for x in cal.lengths)}, "
        f"voltages up to {cal.vdd:g} V; least-squares fit of the {cal.kind.value} equations.",
        f"# Made with: {command}",
        *([f"# The card's own first line: {title}"] if title else []),
        "# Values marked 'from base' or 'default, not calibrated' are not measured by the sweeps.",
        "# A fit of a card, not the card: model estimates for early design only.",
        "",
        f'name = "{name}"',
        f'model = "{cal.kind.value}"',
        f"tnom = {_g(T_NOMINAL)}            # K, temperature of the fit",
        f'grid = {_g(base.grid) if base else _g(5e-9)}              # m, drawing grid: '
        f"{'from base' if base else 'default, not calibrated'}",
        *([f"diffusion_extension = {_g(base.diffusion_extension)}  # m, from base: source/drain length beyond the "
           "gate (netlists' AD/AS/PD/PS, junctions)"] if base and base.diffusion_extension else []),
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
            *(_capacitance_lines(cal.caps[pol], cal.lengths[-1]) if pol in cal.caps else [
                f"cox = {_g(mt.cox if mt else DEFAULTS['cox'])}          # F/m^2, {kept}",
                f"cov = {_g(mt.cov if mt else DEFAULTS['cov'])}          # F/m, {kept}"]),
            f"w_min = {_g(mt.w_min if mt else lmin)}        # m, {kept if mt else 'default (= l_min), not calibrated'}",
            f"l_min = {_g(lmin)}        # m, shortest length fitted",
            *(toml_lines(cal.junctions[pol], cal.extension, cal.vdd, _g) if pol in cal.junctions else []),
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
    lines += ["", "[calibration]            # where the fit holds: evaluate, optimise and report warn outside it",
              f"fitted_lengths_um = [{', '.join(_g(x * 1e6) for x in cal.lengths)}]"]
    return "\n".join(lines) + "\n"


def calibrate_command(args, stream=None, err_stream=None) -> int:
    """`stagefront calibrate` from parsed arguments. SIGTERM stops it as Ctrl-C does: the
    ngspice processes are killed and their temporary folders removed."""
    with process.terminate_as_interrupt():
        return _calibrate_command(args, stream, err_stream)


def _calibrate_command(args, stream=None, err_stream=None) -> int:
    import tomllib

    stream = stream or sys.stdout
    err_stream = err_stream or sys.stderr
    out = Path(args.out)
    if out.exists() and out.is_dir():
        raise InputError(f"--out {out}", "is a folder", "a technology file path, e.g. tech/mine.toml")
    if out.exists() and not args.overwrite:
        raise InputError(f"--out {out}", "exists", hint="choose another file or add --overwrite")
    if not out.resolve().parent.is_dir():
        raise InputError(f"--out {out}", f"its folder {out.parent} does not exist", hint="create it first")
    name = args.name or out.stem
    # Checked before the minutes of sweeps: the name is written between quotes into the file.
    if not _NAME.fullmatch(name):
        raise InputError("--name" if args.name else f"--out {out}", f"technology name {name!r} cannot be used",
                         "1 to 80 printable characters without quotes, backslashes or control characters",
                         "give a plain name with --name, e.g. --name mine-180")
    models = tb.load_models(args.models, args.nmos, args.pmos, trust=getattr(args, "trust_card", False))
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
    if not 1e-8 <= lmin <= 1e-4:  # also refuses nan
        raise InputError("--lmin", f"{format_eng(lmin, 'm')} is not allowed", "10 nm to 100 um")
    lengths = tuple(sorted(lengths)) if lengths else tuple(lmin * f for f in LENGTH_FACTORS)
    if len(lengths) > MAX_LENGTHS or len(set(lengths)) != len(lengths) \
            or not all(math.isfinite(x) and x <= 1e-4 for x in lengths):
        raise InputError("--lengths", f"{len(lengths)} lengths, {len(set(lengths))} distinct, longest "
                                      f"{format_eng(lengths[-1], 'm')}",
                         f"1 to {MAX_LENGTHS} distinct lengths from --lmin to 100 um")
    if lengths[0] < lmin * (1 - 1e-9):
        raise InputError("--lengths", f"{format_eng(lengths[0], 'm')} is below --lmin {format_eng(lmin, 'm')}")
    with_tables = getattr(args, "tables", False)
    if with_tables:
        from .tabletech import table_options

        if args.kind != "ekv":
            raise InputError("--kind", f"{args.kind} with --tables", "ekv (the summary fit of a table technology)")
        options = table_options(args, lmin, vdd)
    tb.require_ngspice()
    kind = ModelKind(args.kind)
    extension = (base.diffusion_extension if base else 0.0) or DIFFUSION_PER_LMIN * lmin  # as the file will read
    cal = calibrate(models, lengths, vdd, kind, Corner(corner), lambda s: print(s, file=err_stream, flush=True),
                    extension)
    report(cal, stream)
    command = ("stagefront calibrate --models " + str(args.models) + f" --nmos {args.nmos} --pmos {args.pmos}"
               f" --kind {args.kind} --corner {corner} --lmin {args.lmin or format_eng(lmin, 'm').replace(' ', '')}"
               + (f" --lengths {args.lengths}" if args.lengths else "") + f" --vdd {args.vdd}"
               + (f" --base {args.base}" if args.base else "") + (f" --name {args.name}" if args.name else "")
               + (" --tables" if with_tables else "") + f" --out {args.out}")
    text = tech_toml(cal, name, models, lmin, base, comment_safe(command))
    try:
        tech_from_dict(tomllib.loads(text), str(out))  # the file must load as it will be read
    except InputError as err:
        raise InputError(f"--out {out}", f"the fitted technology does not pass the technology checks: {err}",
                         hint="check the model card, --vdd and --lengths") from None
    if with_tables:
        from .tabletech import write_table_tech

        write_table_tech(text, out, models, options, vdd, err_stream)
        load_tech(out)  # the written pair must load as it will be read
        print(f"technology: {out} (tables: {out.with_suffix('.npz')})", file=stream)
        return 0
    write_text(out, text)
    print(f"technology: {out}", file=stream)
    return 0
