"""The only pymoo Problem: decode X, evaluate the population in one vectorised call, stack
F (objectives, all minimised) and G (constraints, feasible when <= 0).

Only this adapter negates: a maximised objective is minimised as its negative here and
flipped back on export. supply_sens_pct_per_v is minimised in magnitude.
"""
from __future__ import annotations

import numpy as np
from pymoo.core.problem import Problem

from models.circuit.mirrors import checked
from models.evaluate import Result, evaluate

from ..files.space import Space
from ..files.study import Study
from .compiled import install as install_compiled


def constraint_names(study: Study) -> tuple[str, ...]:
    """The constraints that the study's targets switch on, in a fixed order."""
    t = study.targets
    names = ["converged", "load_current", "vdd_min"]
    if t.iq_min > 0:
        names.append("iq_low")
    if np.isfinite(t.iq_max):
        names.append("iq_high")
    if np.isfinite(t.headroom_max):
        names.append("headroom")
    if t.ab_min > 0:
        names.append("ab_ratio")
    if t.fp2_min > 0:
        names.append("fp2")
    if np.isfinite(t.area_max):
        names.append("area")
    if checked(t.mirrors):  # a bias source's mirror keeps its compliance voltage at rest
        names.append("mirror_compliance")
    if np.isfinite(t.power_max):
        names.append("power")
    if np.isfinite(t.iout_peak_max):
        names.append("iout_peak")
    if t.amplifier is not None:  # the surrounding amplifier's targets
        names += [n for n, on in (("phase_margin", t.phase_margin_min > 0), ("slew", t.slew_min > 0),
                                  ("gate_time", np.isfinite(t.gate_time_max))) if on]
    return tuple(names)


def objective_values(res: Result, objectives: dict) -> np.ndarray:
    """F (n, n_obj) to minimise, from a Result."""
    cols = []
    for name, sense in objectives.items():
        v = np.asarray(res.summary[name], dtype=float)
        if name == "supply_sens_pct_per_v":
            v = np.abs(v)
        v = -v if sense == "max" else v
        # nan only where a design cannot deliver the load (no swing exists): such a design
        # is infeasible, and the worst objective value keeps it behind every other.
        cols.append(np.where(np.isnan(v), 1e30, v))
    return np.stack(cols, axis=1)


def constraint_values(res: Result, names) -> np.ndarray:
    """G (n, n_constr), relative margins negated; a failed solve is a violation of 1 per
    failed PVT point share, never a NaN."""
    cols = []
    for name in names:
        if name == "converged":
            cols.append(1.0 - res.converged.mean(axis=1) - 1e-12)
        else:
            g = -np.asarray(res.margins[name], dtype=float)
            cols.append(np.nan_to_num(g, nan=1.0, posinf=1e6, neginf=-1e6))
    return np.stack(cols, axis=1)


class StageProblem(Problem):
    """One architecture's sizing problem over log10 variables."""

    def __init__(self, study: Study, space: Space, objectives: dict):
        self.study, self.space, self.objectives = study, space, objectives
        self.constraints = constraint_names(study)
        super().__init__(n_var=len(space.free), n_obj=len(objectives), n_ieq_constr=len(self.constraints),
                         xl=space.xl, xu=space.xu)

    def _evaluate(self, X, out, *args, **kwargs):
        install_compiled()  # in whichever process evaluates (workers too); idempotent
        res = evaluate(self.space.decode(X), self.study.tech, self.study.conditions, self.study.targets,
                       explain=False)
        out["F"] = objective_values(res, self.objectives)
        out["G"] = constraint_values(res, self.constraints)
