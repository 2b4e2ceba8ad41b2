"""The search parts of a study: objectives, bounds per role and bias, ties, settings.

Study tables (sizes in micrometres, currents in amperes; suffixed strings allowed):

    [objectives]
    power_w = "min"
    swing_v = "max"
    [bounds.floating-loop]
    mn_out = { w = [10, 400], l = [0.35, 1.4] }      # a role; bulk = "source" optional
    ib_n = ["0.5u", "20u"]                            # a bias
    [ties.floating-loop]
    mn_d2 = "mn_d1"                                   # mn_d2 matches mn_d1 (same W and L)
    [search]
    population = 40
    generations = 30
    checkpoint_every = 5
    [search.reference]                                # optional hypervolume reference point
    power_w = "500u"

Widths, lengths and bias values are searched on a log10 scale; equal bounds fix a value.
Every decoded width and length lies on the technology's drawing grid.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from models.evaluate import Design
from models.stages import get_stage

from .errors import InputError
from .techfile import check_table_size
from .study import BIAS_CEILING, MAX_DESIGN_POINTS, Study
from .tables import (MAX_GENERATIONS, MAX_POPULATION, check_evaluations, check_keys, closest, count, micrometres,
                     number, show, sub_table)

# Objective name -> (unit, default sense). swing_v is maximised; supply sensitivity is
# minimised in magnitude.
OBJECTIVES = {
    "power_w": ("W", "min"),
    "swing_v": ("V", "max"),
    "area_um2": ("um^2", "min"),
    "iq_sigma_pct": ("%", "min"),
    "supply_sens_pct_per_v": ("%/V", "min"),
}
SEARCH_KEYS = ("population", "generations", "checkpoint_every", "reference")


@dataclass(frozen=True)
class Variable:
    """One searched (or fixed) quantity: kind is "w", "l", "bias" or "cc" (the amplifier's
    compensation capacitor, when the study gives it bounds); SI bounds."""

    name: str
    kind: str
    target: str  # role or bias name
    lo: float
    hi: float

    @property
    def fixed(self) -> bool:
        return self.lo == self.hi


@dataclass(frozen=True)
class Space:
    """The variables of one architecture and how they decode into a Design."""

    architecture: str
    variables: tuple[Variable, ...]
    ties: dict  # role -> role it copies (resolved to the root)
    tied_bulk: frozenset
    grid: float

    @property
    def free(self) -> tuple[Variable, ...]:
        return tuple(v for v in self.variables if not v.fixed)

    @property
    def xl(self) -> np.ndarray:
        return np.log10([v.lo for v in self.free])

    @property
    def xu(self) -> np.ndarray:
        return np.log10([v.hi for v in self.free])

    def decode(self, X) -> Design:
        """Design population from X (n, n_free), log10 of SI values; sizes snapped to grid."""
        X = np.atleast_2d(np.asarray(X, dtype=float))
        n = X.shape[0]
        values, k = {}, 0
        for v in self.variables:
            if v.fixed:
                values[v.name] = np.full(n, v.lo)
            else:
                values[v.name] = np.clip(10.0 ** X[:, k], v.lo, v.hi)
                k += 1
        stage = get_stage(self.architecture)
        w, l = {}, {}
        for role in stage.ROLES:
            src = self.ties.get(role, role)
            w[role] = _snap(values[f"{src}.w"], self.grid)
            l[role] = _snap(values[f"{src}.l"], self.grid)
        bias = {b: values[b] for b in stage.BIAS}
        return Design(self.architecture, w, l, bias, self.tied_bulk, values.get("cc"))

    def encode(self, design: Design) -> np.ndarray:
        """X (n, n_free) of a Design (inverse of decode up to grid snapping)."""
        cols = []
        for v in self.free:
            if v.kind == "cc":
                val = design.cc
            elif v.kind == "bias":
                val = design.bias[v.target]
            else:
                val = (design.w if v.kind == "w" else design.l)[v.target]
            cols.append(np.log10(np.clip(np.asarray(val, dtype=float), v.lo, v.hi)))
        return np.stack(cols, axis=1)


def _snap(x, grid):
    return np.maximum(np.round(x / grid), 1.0) * grid


@dataclass(frozen=True)
class SearchSettings:
    """Objectives (name -> sense), spaces per architecture, budget, reference point."""

    objectives: dict
    spaces: dict
    population: int
    generations: int
    checkpoint_every: int
    reference: dict


def _pair(where, table, key, value, unit, sizes=False):
    """A [lower, upper] bound pair, SI; `sizes` reads plain numbers as micrometres."""
    if not isinstance(value, list) or len(value) != 2:
        raise InputError(where, f"[{table}] {key} = {show(value)} is not a [lower, upper] pair",
                         f"two numbers in {unit}, e.g. [1, 100]")
    lo, hi = (_size(where, table, key, x) if sizes else number(where, table, key, x, unit) for x in value)
    if not (lo > 0 and hi > 0):
        raise InputError(where, f"[{table}] {key} = {show(value)} must be positive", f"0 < lower <= upper ({unit})")
    if not sizes and hi > BIAS_CEILING.get(unit, float("inf")):
        raise InputError(where, f"[{table}] {key} = {show(value)}: upper bound {hi:g} {unit} is too large",
                         f"<= {BIAS_CEILING[unit]:g} {unit}", "currents in amperes ('10u' is 10 uA), resistances "
                                                              "in ohms ('2meg')")
    if lo > hi:
        raise InputError(where, f"[{table}] {key} = {show(value)}: lower bound above upper bound",
                         "lower <= upper", "the two ends look swapped")
    return lo, hi


def _size(where, table, key, value) -> float:
    return micrometres(where, table, key, value)


def check_generation(where: str, name: str, population: int, study: Study) -> None:
    """Population x the study's PVT points at most MAX_DESIGN_POINTS (the memory of one
    generation), else InputError naming `name`."""
    cond = study.conditions
    points = len(cond.corners) * len(cond.temps) * len(cond.supplies)
    if population * points > MAX_DESIGN_POINTS:
        raise InputError(where, f"{name} = {population} at the study's {points} PVT points is "
                                f"{population * points:.3g} design-points per generation, too many",
                         f"population x PVT points <= {MAX_DESIGN_POINTS:.0e} "
                         f"(here: population <= {MAX_DESIGN_POINTS // points})",
                         "a smaller population, or fewer corners, temperatures or supplies")


def load_search(study: Study) -> SearchSettings:
    """Read and check the search tables of a study (objectives, bounds, ties, search)."""
    where, data, tech = str(study.path), study.raw, study.tech
    obj_t = sub_table(where, "", "objectives", data.get("objectives", {"power_w": "min", "swing_v": "max"}))
    check_keys(where, "objectives", obj_t, tuple(OBJECTIVES))
    if not obj_t:
        raise InputError(where, "[objectives] is empty", ", ".join(OBJECTIVES), "name at least one objective")
    objectives = {}
    for name, sense in obj_t.items():
        if sense not in ("min", "max"):
            raise InputError(where, f"[objectives] {name} = {show(sense)} is not a sense", "\"min\" or \"max\"")
        objectives[name] = sense

    bounds_t = sub_table(where, "", "bounds", data.get("bounds", {}))
    ties_t = sub_table(where, "", "ties", data.get("ties", {}))
    for table, t in (("bounds", bounds_t), ("ties", ties_t)):
        for arch in t:
            if arch not in study.architectures:
                raise InputError(where, f"[{table}.{arch}] names an architecture the study does not search",
                                 ", ".join(study.architectures), closest(arch, study.architectures))
    spaces = {}
    for arch in study.architectures:
        spaces[arch] = _space(where, arch, sub_table(where, "bounds", arch, bounds_t.get(arch, {})),
                              sub_table(where, "ties", arch, ties_t.get(arch, {})), tech)
        amp = study.targets.amplifier
        if amp is not None and amp.cc_bounds is not None:  # [amplifier] compensation = [lower, upper]
            sp = spaces[arch]
            spaces[arch] = Space(arch, sp.variables + (Variable("cc", "cc", "cc", *amp.cc_bounds),), sp.ties,
                                 sp.tied_bulk, sp.grid)

    search_t = sub_table(where, "", "search", data.get("search", {}))
    check_keys(where, "search", search_t, SEARCH_KEYS)
    ints = {}
    for key, default, lo, hi in (("population", 40, 4, MAX_POPULATION), ("generations", 30, 1, MAX_GENERATIONS),
                                 ("checkpoint_every", 5, 1, MAX_GENERATIONS)):
        ints[key] = count(where, f"[search] {key}", search_t.get(key, default), lo, hi)
    check_evaluations(where, "[search]", ints["population"], ints["generations"])
    check_generation(where, "[search] population", ints["population"], study)
    ref_t = sub_table(where, "search", "reference", search_t.get("reference", {}))
    check_keys(where, "search.reference", ref_t, tuple(objectives))
    reference = {k: number(where, "search.reference", k, v, "") for k, v in ref_t.items()}
    for k, v in reference.items():
        if not v > 0:
            raise InputError(where, f"[search.reference] {k} = {v:g} must be positive", "> 0")
    return SearchSettings(objectives, spaces, ints["population"], ints["generations"], ints["checkpoint_every"],
                          reference)


def resolve_ties(where: str, arch: str, ties: dict) -> dict:
    """A [ties.ARCH] table checked and resolved: role -> the untied role it copies.

    Roles must exist and share polarity; chains are followed to their root; a loop is an
    InputError naming it."""
    stage = get_stage(arch)
    # Ties: role -> role, resolved to a root; no cycles, roles must exist and share polarity.
    pol = {s.role: s.polarity for s in stage.TOPOLOGY.devices}
    resolved = {}
    for role, src in ties.items():
        if role not in stage.ROLES:
            raise InputError(where, f"[ties.{arch}] {role} is not a role of {arch}", ", ".join(stage.ROLES),
                             closest(role, stage.ROLES))
        if not isinstance(src, str) or src not in stage.ROLES:
            raise InputError(where, f"[ties.{arch}] {role} = {show(src)} ties to a missing role",
                             ", ".join(r for r in stage.ROLES if r != role), closest(str(src), stage.ROLES))
        if pol[src] != pol[role]:
            raise InputError(where, f"[ties.{arch}] {role} = {src!r} ties devices of opposite polarity",
                             "a role of the same polarity")
    for role in ties:
        seen, cur = [role], ties[role]
        while cur in ties:
            if cur in seen:
                raise InputError(where, f"[ties.{arch}] ties form a loop: {' -> '.join(seen + [cur])}",
                                 "each chain of ties must end at an untied role")
            seen.append(cur)
            cur = ties[cur]
        resolved[role] = cur
    return resolved


def study_ties(study: Study, arch: str) -> dict:
    """The study's ties for one architecture, resolved (empty when it has none)."""
    where = str(study.path)
    ties_t = sub_table(where, "", "ties", study.raw.get("ties", {}))
    return resolve_ties(where, arch, sub_table(where, "ties", arch, ties_t.get(arch, {})))


def _space(where, arch, bounds, ties, tech) -> Space:
    stage = get_stage(arch)
    table = f"bounds.{arch}"
    check_keys(where, table, bounds, stage.ROLES + tuple(stage.BIAS))
    resolved = resolve_ties(where, arch, ties)
    pol = {s.role: s.polarity for s in stage.TOPOLOGY.devices}
    variables, bulk = [], set()
    for role in stage.ROLES:
        if role in resolved:
            if role in bounds:
                raise InputError(where, f"[{table}] {role} has bounds but is tied to {resolved[role]}",
                                 "bounds on the untied role only")
            continue
        spec = bounds.get(role, {})
        spec = sub_table(where, table, role, spec)
        check_keys(where, f"{table}.{role}", spec, ("w", "l", "bulk"))
        mt = tech.mos(pol[role])
        w = _pair(where, f"{table}.{role}", "w", spec["w"], "um", sizes=True) if "w" in spec else (mt.w_min, 1000 * mt.w_min)
        l = _pair(where, f"{table}.{role}", "l", spec["l"], "um", sizes=True) if "l" in spec else (mt.l_min, 8 * mt.l_min)
        for key, (lo, _), minimum in (("w", w, mt.w_min), ("l", l, mt.l_min)):
            if lo < minimum * (1 - 1e-9):
                raise InputError(where, f"[{table}.{role}] {key} lower bound {lo * 1e6:g} um is below the "
                                        f"technology minimum", f">= {minimum * 1e6:g} um ({tech.name})")
        check_table_size(where, f"{table}.{role}", "w", w[0], tech, pol[role])
        check_table_size(where, f"{table}.{role}", "l", list(l), tech, pol[role])
        variables += [Variable(f"{role}.w", "w", role, *w), Variable(f"{role}.l", "l", role, *l)]
        bulk_v = spec.get("bulk", "rail")
        if bulk_v not in ("rail", "source"):
            raise InputError(where, f"[{table}.{role}] bulk = {show(bulk_v)} is not allowed", "\"rail\" or \"source\"")
        if bulk_v == "source":
            bulk.add(role)
    for role, src in resolved.items():
        if src in bulk:
            bulk.add(role)
    for name, unit in stage.BIAS.items():
        if name not in bounds:
            raise InputError(where, f"[{table}] has no bounds for the bias {name}",
                             f"{name} = [lower, upper] in {unit}")
        variables.append(Variable(name, "bias", name, *_pair(where, table, name, bounds[name], unit)))
    return Space(arch, tuple(variables), resolved, frozenset(bulk), tech.grid)
