"""`stagefront compare`: the fronts of several run folders on the same axes.

Every front.csv row is labelled by its run folder's name and its architecture; the rows of
one label form a *group*. For each pair of groups (A, B) the comparison reports the share
of A's designs that some design of B dominates and the other way round, and for each
objective the best value each group reaches. With ``--out`` it writes compare.csv (the
pairwise table), compare.md (all tables) and compare.png (pairwise objective scatter).

Dominance is Pareto dominance in the run's objectives as the search minimised them
(maximised ones negated, supply sensitivity in magnitude, as in `optimise.search.problem`):
b dominates a when b is no worse in every objective and better in at least one.

References
----------
E. Zitzler, L. Thiele, "Multiobjective evolutionary algorithms: a comparative case study
and the strength Pareto approach", IEEE Trans. Evol. Comput. 3(4):257-271, 1999 (the set
coverage C(A, B); ours counts strict dominance, so a design equal to one of the other group
is not counted as dominated).
E. Zitzler, L. Thiele, M. Laumanns, C. M. Fonseca, V. Grunert da Fonseca, "Performance
assessment of multiobjective optimizers: an analysis and review", IEEE Trans. Evol.
Comput. 7(2):117-132, 2003 (set relations: A dominates B when every design of B is
dominated by at least one design of A).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..files.errors import InputError
from ..search.runfolder import RunFolder, load_run


@dataclass(frozen=True)
class Group:
    """The front.csv rows of one (run, architecture): `F` (n, n_obj) as minimised."""

    label: str
    run: str
    architecture: str
    table: pd.DataFrame
    F: np.ndarray


def minimised(table: pd.DataFrame, objectives: dict) -> np.ndarray:
    """Objective values as the search minimised them, shape (n, n_obj).

    Mirrors `optimise.search.problem.objective_values` on front.csv columns: a maximised objective
    is negated and supply_sens_pct_per_v is taken in magnitude.
    """
    cols = []
    for name, sense in objectives.items():
        v = table[name].to_numpy(dtype=float)
        if name == "supply_sens_pct_per_v":
            v = np.abs(v)
        cols.append(-v if sense == "max" else v)
    return np.stack(cols, axis=1) if cols else np.empty((len(table), 0))


def dominated_by(FA: np.ndarray, FB: np.ndarray) -> np.ndarray:
    """Mask (n_a,): which rows of FA (n_a, m) some row of FB (n_b, m) dominates (minimisation)."""
    if len(FA) == 0 or len(FB) == 0:
        return np.zeros(len(FA), dtype=bool)
    le = np.all(FB[None, :, :] <= FA[:, None, :], axis=2)
    lt = np.any(FB[None, :, :] < FA[:, None, :], axis=2)
    return np.any(le & lt, axis=1)


def _unique_labels(paths: list[Path]) -> list[str]:
    """Folder names, lengthened with parent folders only where two runs share a name."""
    parts = [p.resolve().parts for p in paths]
    depth = [1] * len(paths)
    while True:
        labels = ["/".join(pp[-d:]) for pp, d in zip(parts, depth)]
        clash = {lab for lab in labels if labels.count(lab) > 1}
        if not clash:
            return labels
        for k, lab in enumerate(labels):
            if lab in clash and depth[k] < len(parts[k]):
                depth[k] += 1


def load_runs(paths) -> list[RunFolder]:
    """Read the run folders, label them uniquely and check that their objectives match."""
    paths = [Path(p) for p in paths]
    seen = {}
    for p in paths:
        key = p.resolve()
        if key in seen:
            raise InputError(str(p), f"is given twice (also as {seen[key]})", "each run folder once")
        seen[key] = str(p)
    runs = [load_run(p) for p in paths]
    runs = [RunFolder(r.path, lab, r.objectives, r.table, r.record)
            for r, lab in zip(runs, _unique_labels(paths))]
    first = runs[0]
    for r in runs[1:]:
        if r.objectives != first.objectives:
            show = lambda o: ", ".join(f"{n} ({s})" for n, s in o.items())  # noqa: E731
            raise InputError(str(r.path), f"objectives [{show(r.objectives)}] differ from those of {first.path} "
                                          f"[{show(first.objectives)}]",
                             "runs searched on the same objectives with the same senses",
                             "compare runs of studies with the same [objectives] table")
    return runs


def groups_of(runs: list[RunFolder]) -> tuple[list[Group], list[str]]:
    """Non-empty (run, architecture) groups in run order, and notes on the empty ones."""
    groups, notes = [], []
    objectives = runs[0].objectives
    for r in runs:
        archs = list(dict.fromkeys(list(r.record.get("architectures", {})) + list(r.table["architecture"])))
        for arch in archs:
            sub = r.table[r.table["architecture"] == arch].reset_index(drop=True)
            label = f"{r.label}/{arch}"
            if len(sub) == 0:
                blocked = (r.record.get("architectures", {}).get(arch) or {}).get("blocked") or {}
                why = f" ('{blocked['blocking_constraint']}' blocks the closest design)" \
                    if "blocking_constraint" in blocked else ""
                notes.append(f"{label}: no feasible design{why}")
                continue
            groups.append(Group(label, r.label, arch, sub, minimised(sub, objectives)))
    return groups, notes


def _verdict(share_ab: float, share_ba: float) -> str:
    """Relation of groups a and b from the share of a dominated by b and of b dominated by a."""
    if share_ab == 1.0 and share_ba == 0.0:
        return "b dominates"
    if share_ba == 1.0 and share_ab == 0.0:
        return "a dominates"
    if share_ab == share_ba:
        return "mutually non-dominated" if share_ab == 0.0 else "even"
    return "b ahead" if share_ab > share_ba else "a ahead"


def pairwise(groups: list[Group]) -> pd.DataFrame:
    """One row per unordered pair of groups: sizes, both dominated shares (0..1) and the verdict.

    The verdict is "a dominates" / "b dominates" when every design of the other group is
    dominated and none of its own is, "a ahead" / "b ahead" when only the shares say so,
    "even" for equal non-zero shares and "mutually non-dominated" when neither group
    dominates any design of the other.
    """
    rows = []
    for i, a in enumerate(groups):
        for b in groups[i + 1:]:
            s_ab = float(dominated_by(a.F, b.F).mean())
            s_ba = float(dominated_by(b.F, a.F).mean())
            rows.append({"group_a": a.label, "group_b": b.label, "run_a": a.run, "architecture_a": a.architecture,
                         "run_b": b.run, "architecture_b": b.architecture, "designs_a": len(a.F),
                         "designs_b": len(b.F), "share_a_dominated_by_b": s_ab, "share_b_dominated_by_a": s_ba,
                         "verdict": _verdict(s_ab, s_ba)})
    cols = ["group_a", "group_b", "run_a", "architecture_a", "run_b", "architecture_b", "designs_a", "designs_b",
            "share_a_dominated_by_b", "share_b_dominated_by_a", "verdict"]
    return pd.DataFrame(rows, columns=cols)


def best_values(groups: list[Group], objectives: dict) -> pd.DataFrame:
    """Per group (index) and objective (columns): the front.csv value of the group's best
    design in that objective's sense (raw SI floats, signed as in front.csv)."""
    out = {}
    for g in groups:
        out[g.label] = {n: float(g.table[n].iloc[int(np.argmin(g.F[:, k]))]) for k, n in enumerate(objectives)}
    return pd.DataFrame.from_dict(out, orient="index", columns=list(objectives))


def union_front_counts(groups: list[Group]) -> list[int]:
    """Per group, how many of its designs no design of any group dominates."""
    from ..search.nsga import (
        non_dominated,  # pymoo's import cost only where it is needed (not for pick)
    )

    if not groups:
        return []
    keep = non_dominated(np.concatenate([g.F for g in groups]))
    return [int(k.sum()) for k in np.split(keep, np.cumsum([len(g.F) for g in groups])[:-1])]


@dataclass(frozen=True)
class Comparison:
    """Everything compare reports: runs, groups, their notes and the three tables."""

    runs: list
    groups: list
    notes: list
    pairs: pd.DataFrame
    best: pd.DataFrame
    on_union: list

    @property
    def objectives(self) -> dict:
        return self.runs[0].objectives


def compare(paths) -> Comparison:
    """Load the run folders and build the comparison (no output)."""
    runs = load_runs(paths)
    groups, notes = groups_of(runs)
    if len({r.record.get("study_toml") for r in runs}) > 1:
        notes.append("the runs come from different study files: check that their targets and conditions "
                     "match before reading one front as better")
    return Comparison(runs, groups, notes, pairwise(groups), best_values(groups, runs[0].objectives),
                      union_front_counts(groups))


def group_table(c: Comparison, column: str) -> pd.DataFrame:
    """Every group's front.csv rows, one table, with the group's label in `column`."""
    frames = [g.table.assign(**{column: g.label}) for g in c.groups]
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=[column] + list(c.objectives))


