"""Study and design files: TOML in, checked model objects out.

A study names the technology, the supply range, temperatures and corners, the load, the
driver and the targets, and optionally the [amplifier] the stage sits in (its keys in
AMPLIFIER_KEYS; the targets phase_margin_min, slew_min and gate_time_max need it); a design
file gives one candidate's sizes and bias. Every problem
is an InputError naming the file, the key, the value and what is allowed.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner, Tech
from models.evaluate import Conditions, Design, Targets
from models.records import Amplifier
from models.stages import STAGES, get_stage

from .errors import InputError
from .mirrorfile import load_mirrors
from .tables import build, check_keys, closest, micrometres, number, read_toml, show, sub_table
from .techfile import check_table_size, check_table_temperatures, load_tech

STUDY_KEYS = ("name", "description", "technology", "architectures", "seed", "supply", "conditions", "load",
              "driver", "targets", "objectives", "bounds", "ties", "search", "mirrors", "amplifier")
SUPPLY_KEYS = ("nominal", "min", "max")
CONDITION_KEYS = ("temperatures_c", "corners")
LOAD_KEYS = ("current", "capacitance")
DRIVER_KEYS = ("compliance", "drive")
TARGET_UNITS = {"iq_min": "A", "iq_max": "A", "iq_sigmas": "", "headroom_max": "V", "ab_min": "",
                "area_max_um2": "", "fp2_min": "Hz", "layout_factor": "",
                "power_max": "W", "iout_peak_max": "A"}
# Targets that need the [amplifier] table (the stage's surrounding amplifier).
AMPLIFIER_TARGET_UNITS = {"phase_margin_min": "deg", "slew_min": "V/s", "gate_time_max": "s"}
AMPLIFIER_TARGET_RANGE = {"phase_margin_min": (0.0, 180.0), "slew_min": (0.0, 1e12), "gate_time_max": (0.0, 1.0)}
# [amplifier] key -> (Amplifier field, unit, lowest, highest, default or None when required).
# The ranges refuse values no integrated amplifier has (common practice, no source).
AMPLIFIER_KEYS = {
    "unity_gain": ("ugf", "Hz", 1.0, 1e11, None),
    "compensation": ("cc", "F", 0.0, 1e-6, None),
    "r_out": ("r1", "ohm", 1.0, 1e15, None),
    "c_out": ("c1", "F", 0.0, 1e-6, 0.0),
    "current": ("i1", "A", 1e-12, 10.0, None),
    "feedback": ("beta", "", 1e-6, 1.0, 1.0),
    "transconductance": ("gm1", "S", 0.0, 100.0, 0.0),
    "load_resistance": ("r_load", "ohm", 1e-3, float("inf"), float("inf")),
}

# The lowest value each target may take, and whether it must lie strictly above it.
TARGET_FLOOR = {"iq_min": (0.0, False), "iq_max": (0.0, True), "iq_sigmas": (0.0, False),
                "headroom_max": (0.0, True), "ab_min": (0.0, False), "area_max_um2": (0.0, True),
                "fp2_min": (0.0, False), "layout_factor": (1.0, False),
                "power_max": (0.0, True), "iout_peak_max": (0.0, True)}
# The highest supply a study may name [V]: integrated class-AB output stages run from a few
# volts; anything far above is a typing or unit error ("common practice, no source").
SUPPLY_CEILING_V = 60.0
# The highest value of targets bounded above by their meaning: a mismatch window wider than
# 10 sigma is no window (6 sigma is the trade's widest, "common practice, no source"), and
# ab_ratio (idle-device current / Iq) is 1 when the idle device keeps all of Iq (class A):
# ab_min above 1 asks for more than a class-AB stage gives.
TARGET_CEILING = {"iq_sigmas": 10.0, "ab_min": 1.0}
# The largest bias value a design or a bound may hold, per unit: an integrated bias current
# above 1 A or a bias resistor above 1 Tohm is a typing or unit error ("common practice, no
# source").
BIAS_CEILING = {"A": 1.0, "ohm": 1e12}
# The most PVT points (corners x temperatures x supplies) of a study: every design is solved
# at each, so the memory of a search generation grows with them (about 1 kB per design and
# point, measured here: 2000 designs x 45 points took 88 MB); 5 corners x 3 supplies leave
# room for 66 temperatures ("common practice, no source").
MAX_PVT_POINTS = 1000
MAX_DESIGN_POINTS = 1_000_000  # population x PVT points of one search generation (about 1 GB)
MAX_NAME_CHARS = 200  # a study's name is shown in titles, figures and netlist comments


@dataclass(frozen=True)
class Study:
    """A checked study: where it came from, its technology and the evaluation settings."""

    path: Path
    name: str
    tech: Tech
    tech_path: Path
    conditions: Conditions
    targets: Targets
    architectures: tuple[str, ...]
    seed: int
    raw: dict = field(repr=False, default_factory=dict)


def _list(where, table, key, value, kind=str):
    prefix = f"[{table}] " if table else ""
    if not isinstance(value, list) or not value or not all(isinstance(v, kind) and not isinstance(v, bool)
                                                          for v in value):
        raise InputError(where, f"{prefix}{key} = {show(value)} is not a non-empty array of "
                                f"{'strings' if kind is str else 'numbers'}")
    for k, v in enumerate(value):
        if v in value[:k]:
            raise InputError(where, f"{prefix}{key} repeats {show(v)}", "each value once")
    return value


def bias_value(where: str, table: str, key: str, value, unit: str) -> float:
    """A bias current or resistance (SI): positive and at most BIAS_CEILING of its unit."""
    v = number(where, table, key, value, unit)
    ceiling = BIAS_CEILING.get(unit, float("inf"))
    if not v > 0:
        raise InputError(where, f"[{table}] {key} = {v:g} {unit} must be positive", f"> 0 {unit}")
    if v > ceiling:
        raise InputError(where, f"[{table}] {key} = {show(value)} is too large", f"> 0 and <= {ceiling:g} {unit}",
                         "currents in amperes ('4u' is 4 uA), resistances in ohms ('100k')")
    return v


def load_study(path) -> Study:
    """Read and check a study file (see studies/*.toml for the format)."""
    path = Path(path)
    return study_from_dict(read_toml(path), path)


def study_from_dict(data: dict, path, tech: Tech | None = None) -> Study:
    """Check and convert the parsed contents of a study file.

    Parameters
    ----------
    data : dict
        The table `tomllib` returns for a study file.
    path : str or Path
        The study file: error messages start with it, a relative technology path is taken
        relative to it, and the study's name defaults to its stem.
    tech : Tech, optional
        The technology to use instead of reading the file the study names (e.g. the copy a
        run folder keeps); the study must still name one.

    Returns
    -------
    Study

    Raises
    ------
    InputError
        Naming `path`, the key and the value.
    """
    path = Path(path)
    where = str(path)
    check_keys(where, "", data, STUDY_KEYS, ("technology", "supply", "load"))

    tech_ref = data["technology"]
    if not isinstance(tech_ref, str):
        raise InputError(where, f"technology = {show(tech_ref)} is not a file path",
                         "a path to a technology TOML file, relative to the study file")
    tech_path = (path.parent / tech_ref) if not Path(tech_ref).is_absolute() else Path(tech_ref)
    if tech is None:
        tech = load_tech(tech_path)

    supply = sub_table(where, "", "supply", data["supply"])
    check_keys(where, "supply", supply, SUPPLY_KEYS, ("nominal",))
    vnom = number(where, "supply", "nominal", supply["nominal"], "V")
    vmin = number(where, "supply", "min", supply.get("min", vnom), "V")
    vmax = number(where, "supply", "max", supply.get("max", vnom), "V")
    if not 0 < vmin:
        raise InputError(where, f"[supply] min = {vmin:g} V must be positive", f"0 < min <= nominal <= max <= "
                         f"{SUPPLY_CEILING_V:g} V")
    if vmax > SUPPLY_CEILING_V:
        raise InputError(where, f"[supply] max = {vmax:g} V is above {SUPPLY_CEILING_V:g} V",
                         f"0 < min <= nominal <= max <= {SUPPLY_CEILING_V:g} V",
                         "an integrated output stage of this tool's scope runs from a few volts")
    if not vmin <= vnom <= vmax:
        raise InputError(where, f"[supply] min = {vmin:g} V, nominal = {vnom:g} V, max = {vmax:g} V is not in order",
                         "min <= nominal <= max", "the supply range looks inverted")

    cond_table = sub_table(where, "", "conditions", data.get("conditions", {}))
    check_keys(where, "conditions", cond_table, CONDITION_KEYS)
    temps_c = _list(where, "conditions", "temperatures_c", cond_table.get("temperatures_c", [27]), (int, float))
    for t in temps_c:
        if not -273.15 < t <= 400.0:  # also refuses nan and inf
            raise InputError(where, f"[conditions] temperatures_c: {t!r} is not allowed",
                             "finite temperatures in degC above absolute zero, up to 400")
    corner_names = _list(where, "conditions", "corners", cond_table.get("corners", ["tt"]))
    n_points = len(corner_names) * len(temps_c) * len({vmin, vnom, vmax})
    if n_points > MAX_PVT_POINTS:
        raise InputError(where, f"[conditions] {len(corner_names)} corners x {len(temps_c)} temperatures x "
                                f"{len({vmin, vnom, vmax})} supplies = {n_points} PVT points is too many",
                         f"at most {MAX_PVT_POINTS}", "a few temperatures span the range: e.g. [27, -40, 125]")
    corners = []
    for name in corner_names:
        allowed = [c.value for c in Corner]
        if name not in allowed:
            raise InputError(where, f"[conditions] corners: {name!r} is not a corner", ", ".join(allowed),
                             closest(name, allowed))
        if Corner(name) not in tech.corners:
            raise InputError(where, f"[conditions] corners: {name!r} is not defined by the technology {tech_path}",
                             ", ".join(c.value for c in tech.corners))
        corners.append(Corner(name))
    try:
        conditions = Conditions(tuple(corners), tuple(t + ZERO_CELSIUS for t in temps_c), vnom, vmin, vmax)
    except ValueError as err:
        raise InputError(where, f"[supply]/[conditions] {err}") from None
    check_table_temperatures(where, [t + ZERO_CELSIUS for t in temps_c], tech)
    if tech.tables is not None:
        span = min(t.span for t in tech.tables.values())
        if vmax > span + 1e-9:
            raise InputError(where, f"[supply] max = {vmax:g} V is above the tabulated voltages of {tech.name} "
                                    f"(up to {span:g} V)", f"<= {span:g} V",
                             "tabulate higher voltages with stagefront calibrate --tables --vdd")

    load = sub_table(where, "", "load", data["load"])
    check_keys(where, "load", load, LOAD_KEYS, LOAD_KEYS)
    driver = sub_table(where, "", "driver", data.get("driver", {}))
    check_keys(where, "driver", driver, DRIVER_KEYS)
    targets_t = sub_table(where, "", "targets", data.get("targets", {}))
    check_keys(where, "targets", targets_t, tuple(TARGET_UNITS) + tuple(AMPLIFIER_TARGET_UNITS))
    amp_targets = {k: v for k, v in targets_t.items() if k in AMPLIFIER_TARGET_UNITS}
    targets_t = {k: v for k, v in targets_t.items() if k not in AMPLIFIER_TARGET_UNITS}
    kw = {k: number(where, "targets", k, v, TARGET_UNITS[k]) for k, v in targets_t.items()}
    for k, v in kw.items():
        low, strict = TARGET_FLOOR[k]
        unit = TARGET_UNITS[k] or "(no unit)"
        if v < low or (strict and v == low):
            raise InputError(where, f"[targets] {k} = {show(targets_t[k])} is not allowed",
                             f"{'>' if strict else '>='} {low:g} {unit}",
                             "a limit below zero reverses its check" if low == 0 else "")
        if v > TARGET_CEILING.get(k, float("inf")):
            raise InputError(where, f"[targets] {k} = {show(targets_t[k])} is not allowed",
                             f"{low:g} to {TARGET_CEILING[k]:g} {unit}",
                             "ab_min = 1 already keeps the idle device at Iq (class A)" if k == "ab_min" else "")
    if "area_max_um2" in kw:
        kw["area_max"] = kw.pop("area_max_um2") * 1e-12
    drive = driver.get("drive", "both")
    if drive not in ("both", "p", "n"):
        raise InputError(where, f"[driver] drive = {show(drive)} is not allowed", "both, p, n",
                         "both: the driver moves the active gate; p or n: one gate only")
    kw.update(
        i_load=number(where, "load", "current", load["current"], "A"),
        c_load=number(where, "load", "capacitance", load["capacitance"], "F"),
        vcomp=number(where, "driver", "compliance", driver.get("compliance", 0.2), "V"),
        drive=drive,
    )
    kw.update(_amplifier(where, data, amp_targets))
    targets = build(where, "targets", Targets, kw)

    archs = _list(where, "", "architectures", data.get("architectures", list(STAGES)))
    for a in archs:
        if a not in STAGES:
            raise InputError(where, f"architectures: {a!r} is not known", ", ".join(STAGES), closest(a, STAGES))
    if "mirrors" in data:
        targets = replace(targets, mirrors=load_mirrors(where, data, archs, tech))
    name = data.get("name", path.stem)
    if not isinstance(name, str) or not name.strip() or len(name) > MAX_NAME_CHARS:
        raise InputError(where, f"name = {show(name)} is not allowed",
                         f"a non-empty string of at most {MAX_NAME_CHARS} characters")
    if not isinstance(data.get("description", ""), str):
        raise InputError(where, f"description = {show(data['description'])} is not allowed", "a string")
    seed = data.get("seed", 1)
    if not isinstance(seed, int) or isinstance(seed, bool) or seed < 0:
        raise InputError(where, f"seed = {show(seed)} is not allowed", "a non-negative integer")
    return Study(path, name, tech, tech_path, conditions, targets, tuple(archs), seed, data)


def _amplifier(where, data, amp_targets) -> dict:
    """The optional [amplifier] table (the two-stage Miller amplifier this stage is the
    second stage of) and the targets that need it, as Targets keywords."""
    if "amplifier" not in data:
        if amp_targets:
            key = next(iter(amp_targets))
            raise InputError(where, f"[targets] {key} needs an [amplifier] table",
                             "the amplifier's unity_gain, compensation, r_out, current (and c_out, feedback)",
                             "describe the amplifier this stage sits in, or drop the target")
        return {}
    table = sub_table(where, "", "amplifier", data["amplifier"])
    required = tuple(k for k, spec in AMPLIFIER_KEYS.items() if spec[4] is None)
    check_keys(where, "amplifier", table, tuple(AMPLIFIER_KEYS), required)
    kw = {}
    for key, (name, unit, lo, hi, default) in AMPLIFIER_KEYS.items():
        if key == "compensation" and isinstance(table.get(key), list):
            # [lower, upper]: the search sizes Cc per design (log scale, like a bias).
            pair = table[key]
            if len(pair) != 2:
                raise InputError(where, f"[amplifier] compensation = {show(pair)} is not a value or a "
                                        "[lower, upper] pair", "e.g. \"3p\" or [\"1p\", \"10p\"] in F")
            c_lo, c_hi = (number(where, "amplifier", key, x, unit) for x in pair)
            if not 0 < c_lo <= c_hi <= hi:
                raise InputError(where, f"[amplifier] compensation = {show(pair)} is not allowed",
                                 f"0 < lower <= upper <= {hi:g} F")
            kw["cc_bounds"], kw[name] = (c_lo, c_hi), float(np.sqrt(c_lo * c_hi))
            continue
        value = number(where, "amplifier", key, table[key], unit, allow_inf=key == "load_resistance") \
            if key in table else default
        if not lo <= value <= hi:
            raise InputError(where, f"[amplifier] {key} = {show(table[key])} is not allowed",
                             f"{lo:g} to {hi:g} {unit}".rstrip())
        kw[name] = value
    if kw["gm1"] == 0.0 and kw["cc"] == 0.0:
        raise InputError(where, "[amplifier] compensation = 0 leaves the first stage without a transconductance",
                         "compensation > 0 F, or a transconductance in S",
                         "gm1 = 2 pi unity_gain compensation / feedback")
    out = {"amplifier": build(where, "amplifier", Amplifier, kw)}
    for key, value in amp_targets.items():
        v = number(where, "targets", key, value, AMPLIFIER_TARGET_UNITS[key])
        lo, hi = AMPLIFIER_TARGET_RANGE[key]
        if not lo <= v <= hi or (key == "gate_time_max" and v == 0):
            raise InputError(where, f"[targets] {key} = {show(value)} is not allowed",
                             f"{'>' if key == 'gate_time_max' else '>='} {lo:g} and <= {hi:g} "
                             f"{AMPLIFIER_TARGET_UNITS[key]}")
        out[key] = v
    return out


def design_from_tables(where: str, arch, devices, bias, tech: Tech, ties: dict | None = None) -> Design:
    """Check one design's tables (sizes in micrometres) and build a one-element Design.

    `ties` (role -> role it copies, resolved, e.g. `optimise.files.space.study_ties`): a
    tied role may be left out of [devices] and takes its root's table; given, it must
    match it."""
    if not isinstance(arch, str) or arch not in STAGES:
        raise InputError(where, f"architecture = {show(arch)} is not known", ", ".join(STAGES),
                         closest(arch, STAGES) if isinstance(arch, str) else "")
    stage = get_stage(arch)
    devices = dict(sub_table(where, "", "devices", devices))
    bias = sub_table(where, "", "bias", bias)
    for role, root in (ties or {}).items():
        if root in devices and role not in devices:
            devices[role] = devices[root]
        elif root in devices and devices[role] != devices[root]:
            raise InputError(where, f"[devices.{role}] differs from [devices.{root}], but the study ties "
                                    f"{role} to {root}", f"the same w, l and bulk as {root}, or leave {role} out",
                             "the study's [ties] make tied devices one size")
    for role in devices:
        if role not in stage.ROLES:
            raise InputError(where, f"[devices.{role}] is not a role of {arch}", ", ".join(stage.ROLES),
                             closest(role, stage.ROLES))
    missing = [r for r in stage.ROLES if r not in devices]
    if missing:
        raise InputError(where, f"[devices] {arch} needs every role; missing {', '.join(missing)}",
                         ", ".join(stage.ROLES))
    w, l, tied = {}, {}, set()
    for role in stage.ROLES:
        table = f"devices.{role}"
        dev = sub_table(where, "devices", role, devices[role])
        check_keys(where, table, dev, ("w", "l", "bulk"), ("w", "l"))
        polarity = stage.TOPOLOGY.spec(role).polarity
        mt = tech.mos(polarity)
        for key, store, minimum in (("w", w, mt.w_min), ("l", l, mt.l_min)):
            value = _micrometres(where, table, key, dev[key])
            if not value >= minimum * (1 - 1e-9):
                raise InputError(where, f"[{table}] {key} = {value * 1e6:g} um is below the technology minimum",
                                 f">= {minimum * 1e6:g} um ({tech.name})",
                                 'plain numbers are micrometres: 60 or "60u" for 60 um' if value > 0 else "")
            check_table_size(where, table, key, value, tech, polarity)
            store[role] = np.array([value])
        bulk = dev.get("bulk", "rail")
        if bulk not in ("rail", "source"):
            raise InputError(where, f"[{table}] bulk = {show(bulk)} is not allowed",
                             "\"rail\" (default) or \"source\" (own well, no body effect)")
        if bulk == "source":
            tied.add(role)
    for name in bias:
        if name not in stage.BIAS:
            raise InputError(where, f"[bias] {name} is not a bias of {arch}", ", ".join(stage.BIAS),
                             closest(name, stage.BIAS))
    values = {}
    for name, unit in stage.BIAS.items():
        if name not in bias:
            raise InputError(where, f"[bias] missing {name}", f"{arch} needs {', '.join(stage.BIAS)}")
        values[name] = np.array([bias_value(where, "bias", name, bias[name], unit)])
    return Design(arch, w, l, values, frozenset(tied))


def _micrometres(where, table, key, value) -> float:
    """A size: a plain number (also "60") is micrometres; a string with a scale letter is metres."""
    return micrometres(where, table, key, value)


def load_design(path, tech: Tech, ties_of=None) -> Design:
    """Read a design file (architecture, [devices.ROLE] w/l in um, [bias]).

    `ties_of`: architecture -> resolved ties (e.g. a study's, through
    `optimise.files.space.study_ties`); a tied role may then be left out of the file."""
    where = str(path)
    data = read_toml(path)
    check_keys(where, "", data, ("architecture", "devices", "bias", "name", "compensation"),
               ("architecture", "devices", "bias"))
    if not isinstance(data.get("name", ""), str):
        raise InputError(where, f"name = {show(data['name'])} is not allowed", "a string")
    ties = None
    if ties_of is not None and isinstance(data["architecture"], str) and data["architecture"] in STAGES:
        ties = ties_of(data["architecture"])
    design = design_from_tables(where, data["architecture"], data["devices"], data["bias"], tech, ties)
    if "compensation" in data:  # this design's Cc, for a study that sizes it
        cc = number(where, "", "compensation", data["compensation"], "F")
        if not 0 < cc <= 1e-6:
            raise InputError(where, f"compensation = {show(data['compensation'])} is not allowed", "0 < Cc <= 1u F")
        design = replace(design, cc=np.array([cc]))
    return design
