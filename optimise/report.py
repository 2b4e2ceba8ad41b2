"""`stagefront report`: one self-contained HTML page (and a Markdown twin) for a run folder.

The page is meant to be read by a lead in a couple of minutes and opened from disk with no
network: figures are embedded as base64 PNG, the style sheet and the column-sorting script
are inline. The Markdown twin has the same sections, its tables as Markdown and its figures
as PNG files written beside it, for pasting into a design review.

Sections, in order (`SECTIONS`): the caution; the run at a glance; the job and the study;
every architecture's front on the same axes (and why an architecture has none); the picked
designs (the knee first, then the best design per objective, then the next designs by knee
distance); the knee design at every PVT point; its Monte Carlo mismatch spread against the
linear estimate; Iq against the supply for the picked designs; the simulator verification
(RUN/verify.csv, when `stagefront verify` has written it); the assumptions behind the
numbers.

Everything shown is recomputed from the run folder alone: the study and technology files
are read back from the copies run.json keeps, so a report can be made on another machine
or after the study file has changed.

The knee is `optimise.pick.knee_distance`: the design closest (Chebyshev distance) to the
ideal point of the objective box spanned by the front itself.
"""
from __future__ import annotations

import base64
import html
import io
import re
import sys
import tempfile
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from models.constants import ZERO_CELSIUS
from models.evaluate import Conditions, Design, Result, evaluate
from models.stages import get_stage

from . import CAUTION
from .atomic import write_bytes, write_text
from .compare import load_run
from .compare_render import markdown_table
from .errors import InputError
from .export import UNIT_SUFFIX, design_from_row
from .montecarlo import Confirmation, confirm, typical
from .pick import rank
from .space import OBJECTIVES
from .study import Study, load_study
from .units import format_eng

SECTIONS = (
    ("caution", "Caution"),
    ("glance", "At a glance"),
    ("job", "Job and study"),
    ("fronts", "Fronts by architecture"),
    ("picked", "Picked designs"),
    ("knee", "Knee design across PVT"),
    ("mismatch", "Mismatch spread of the knee"),
    ("supply", "Supply sensitivity"),
    ("verify", "Verification against a simulator"),
    ("assumptions", "Assumptions"),
)
MC_SAMPLES = 5000
SWEEP_POINTS = 13
# Margin tones: below TIGHT (relative margin) the cell is red, below CLOSE amber, else green.
TIGHT, CLOSE = 0.05, 0.20
TONES = {"tight": "#f2b8b2", "close": "#f7dc8f", "ample": "#bfe3c6", "off": "#e4e4e4"}
# Objective name -> (column label, unit shown, factor from SI).
OBJ_SHOW = {"power_w": ("power", "uW", 1e6), "swing_v": ("swing", "V", 1.0), "area_um2": ("area", "um^2", 1.0),
            "iq_sigma_pct": ("Iq sigma", "%", 1.0), "supply_sens_pct_per_v": ("supply sens.", "%/V", 1.0)}


# ---------------------------------------------------------------- blocks of a section
@dataclass
class Cell:
    """A table cell: shown text, value to sort by (number or text) and an optional tone."""

    text: str
    sort: object = None
    tone: str = ""


@dataclass
class Table:
    """A table with an HTML id; header is a list of (key, label); rows of Cells."""

    key: str
    header: list
    rows: list
    row_class: list = field(default_factory=list)
    sortable: bool = True


@dataclass
class Figure:
    key: str
    png: bytes
    caption: str


@dataclass
class Bullets:
    items: list


@dataclass
class Details:
    """A block shown folded in the HTML page (a long table), plainly in Markdown."""

    summary: str
    table: Table


@dataclass
class Legend:
    """The margin colour legend."""


def _g(v, digits: int = 4) -> str:
    v = float(v)
    return f"{v:.{digits}g}" if np.isfinite(v) else "n/a"


def _num(v, factor: float = 1.0, digits: int = 4) -> Cell:
    v = float(v)
    return Cell(_g(v * factor, digits), v * factor if np.isfinite(v) else None)


def _png(fig) -> bytes:
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    plt.close(fig)
    return buf.getvalue()


# ---------------------------------------------------------------- reading the run back
def study_of_run(run_path: Path, record: dict) -> Study:
    """The run's study, rebuilt from the study and technology text run.json keeps.

    Falls back to the study path run.json names when the copies are absent.
    """
    where = str(run_path / "run.json")
    study_text, tech_text = record.get("study_toml"), record.get("technology_toml")
    if not isinstance(study_text, str) or not isinstance(tech_text, str):
        path = Path(str(record.get("study", "")))
        if not path.is_file():
            raise InputError(where, f"keeps no copy of the study and its study file {str(path)!r} is not found",
                             hint="re-run `stagefront optimise` with this version")
        return load_study(path)
    rewritten, n = re.subn(r"(?m)^(\s*technology\s*=\s*)(\"[^\"\n]*\"|'[^'\n]*')", r'\1"technology.toml"',
                           study_text, count=1)
    try:
        ok = n == 1 and tomllib.loads(rewritten).get("technology") == "technology.toml"
    except tomllib.TOMLDecodeError:
        ok = False
    if not ok:
        raise InputError(where, "its copy of the study has no readable technology = \"...\" line")
    stem = Path(str(record.get("study", "study"))).stem or "study"
    with tempfile.TemporaryDirectory(prefix="stagefront-report-") as tmp:
        (Path(tmp) / "technology.toml").write_text(tech_text)
        (Path(tmp) / f"{stem}.toml").write_text(rewritten)
        try:
            return load_study(Path(tmp) / f"{stem}.toml")
        except InputError as err:
            raise InputError(where, f"its copy of the study cannot be read again: {err.what}", err.allowed,
                             err.hint) from None


def populations(rows: pd.DataFrame) -> list[tuple[list, Design]]:
    """Front rows as populations: (row ids, Design) per architecture and set of bulk ties."""
    groups: dict = {}
    for _, row in rows.iterrows():
        try:
            d = design_from_row(row)
        except KeyError as err:
            raise InputError("front.csv", f"has no column {err.args[0]!r} for the {row['architecture']} design "
                                          f"{row['id']}", hint="re-run the search with this version") from None
        groups.setdefault((d.architecture, d.tied), []).append((row["id"], d))
    out = []
    for (arch, tied), members in groups.items():
        ds = [d for _, d in members]
        cat = lambda attr: {k: np.concatenate([getattr(d, attr)[k] for d in ds]) for k in getattr(ds[0], attr)}  # noqa: E731
        out.append(([i for i, _ in members], Design(arch, cat("w"), cat("l"), cat("bias"), tied)))
    return out


def pick_rows(table: pd.DataFrame, objectives: dict, count: int) -> pd.DataFrame:
    """The knee, then the best design per objective, then the next designs by knee distance.

    Returns up to `count` rows in that order with a `pick` column (why each was picked) and
    a `knee_distance` column.
    """
    by_knee = rank(table, objectives, "knee")
    reasons: dict[str, list[str]] = {by_knee["id"].iloc[0]: ["knee"]}
    for name in objectives:
        best = rank(table, objectives, name)["id"].iloc[0]
        reasons.setdefault(best, []).append(f"best {OBJ_SHOW.get(name, (name,))[0]}")
    for k, rid in enumerate(by_knee["id"], start=1):
        if len(reasons) >= count:
            break
        reasons.setdefault(rid, [f"knee rank {k}"])
    ids = list(reasons)[:count]
    out = by_knee.set_index("id").loc[ids].reset_index()
    out.insert(0, "pick", ["; ".join(reasons[i]) for i in ids])
    return out


@dataclass
class ReportData:
    """What the report shows, computed once for both renderings."""

    path: Path
    record: dict
    study: Study
    objectives: dict
    table: pd.DataFrame
    picks: pd.DataFrame
    knee: Result | None = None
    mc: Confirmation | None = None
    sweep: dict = field(default_factory=dict)  # id -> (vdd (p,), iq (p,))
    verify: tuple = (None, "")  # (DataFrame or None, note)


def gather(run, count: int = 8) -> ReportData:
    """Read the run folder and compute every number the report shows.

    Parameters
    ----------
    run : str or Path
        Run folder with front.csv and run.json.
    count : int
        Picked designs to show (>= 1).

    Returns
    -------
    ReportData

    Raises
    ------
    InputError
        A missing or unreadable run folder, front.csv or run.json.
    """
    if count < 1:
        raise InputError("--count", f"{count} designs is too few", ">= 1")
    r = load_run(run)
    study = study_of_run(r.path, r.record)
    table = r.table
    picks = pick_rows(table, r.objectives, count) if len(table) else table.iloc[0:0]
    data = ReportData(r.path, r.record, study, r.objectives, table, picks, verify=read_verification(r.path))
    if not len(picks):
        return data
    cond, tech, targets = study.conditions, study.tech, study.targets
    [(_, knee_design)] = populations(picks.iloc[:1])
    data.knee = evaluate(knee_design, tech, cond, targets)
    data.mc = confirm(knee_design, study, MC_SAMPLES, int(r.record.get("seed", 1)), result=data.knee)
    corner, temp, vnom = typical(cond), cond.temps[0], cond.vdd_nom
    supplies = np.unique(np.r_[np.linspace(cond.vdd_min, cond.vdd_max, SWEEP_POINTS), vnom])
    for ids, design in populations(picks):
        iq_v = np.stack([evaluate(design, tech, Conditions((corner,), (temp,), v, v, v), targets).pvt["iq_a"][:, 0]
                         for v in supplies], axis=1)
        for k, rid in enumerate(ids):
            data.sweep[rid] = (supplies, iq_v[k])
    return data


# ---------------------------------------------------------------- verification file
_VERIFY_NAMES = {
    "id": ("id", "design", "design_id", "row"),
    "architecture": ("architecture", "arch"),
    "corner": ("corner", "process_corner"),
    "temp_c": ("temp_c", "temp", "temperature", "temperature_c", "t_c"),
    "vdd_v": ("vdd_v", "vdd", "supply", "supply_v"),
    "metric": ("metric", "quantity", "name", "what"),
    "model": ("model", "stagefront", "model_value", "predicted", "estimate"),
    "simulator": ("simulator", "sim", "simulated", "simulator_value", "spice", "ngspice"),
    "error": ("error", "err", "rel_error", "relative_error", "error_rel", "error_abs", "abs_error", "deviation",
              "difference", "diff"),
    "error_unit": ("error_unit", "unit", "error_kind", "kind"),
    "note": ("note", "notes", "message", "comment"),
}


def read_verification(run_path: Path) -> tuple:
    """RUN/verify.csv as (table with canonical column names where recognised, note).

    Column names are matched loosely (case, spaces and a few synonyms); unknown columns
    are kept as they are. Returns (None, note) when the file is absent or unreadable.
    """
    path = Path(run_path) / "verify.csv"
    if not path.is_file():
        return None, "Verification has not been run: this run folder has no verify.csv (`stagefront verify RUN`)."
    try:
        table = pd.read_csv(path, keep_default_na=False, na_values=[""])
    except (OSError, ValueError) as err:
        return None, f"verify.csv is present but cannot be read ({err}); it is left out."
    rename, taken = {}, set()
    for col in table.columns:
        norm = re.sub(r"[^a-z0-9]+", "_", str(col).strip().lower()).strip("_")
        for canon, names in _VERIFY_NAMES.items():
            if canon not in taken and norm in names:
                rename[col] = canon
                taken.add(canon)
                break
    table = table.rename(columns=rename)
    order = [c for c in _VERIFY_NAMES if c in table.columns] + [c for c in table.columns if c not in _VERIFY_NAMES]
    table = table[order]
    done = int(pd.to_numeric(table["error"], errors="coerce").notna().sum()) if "error" in table else len(table)
    return table, (f"From {path.name}: {len(table)} comparisons, {done} with a simulator result"
                   + (f", {len(table) - done} without (see the note column)." if done < len(table) else "."))


def _volts(row: dict) -> bool:
    """True when the row's error is an absolute voltage (headrooms), False when relative."""
    unit = str(row.get("error_unit", "")).strip().lower()
    if unit in ("v", "volt", "volts", "abs", "absolute"):
        return True
    if unit in ("rel", "relative", "1", "fraction"):
        return False
    metric = row.get("metric")
    return isinstance(metric, str) and (metric.endswith("_v") or "headroom" in metric)


def _show_error(v: float, volts: bool) -> str:
    return f"{v * 1e3:+.3g} mV" if volts else f"{100 * v:+.3g} %"


def _verify_cell(col: str, row: dict) -> Cell:
    value, metric = row[col], row.get("metric")
    if isinstance(value, (int, float, np.number)) and not isinstance(value, bool):
        v = float(value)
        if not np.isfinite(v):
            return Cell("", None)
        if col == "error":
            return Cell(_show_error(v, _volts(row)), abs(v))
        if col in ("model", "simulator") and isinstance(metric, str):
            unit = {"_a": "A", "_v": "V", "_w": "W", "_hz": "Hz", "_f": "F"}.get(metric[metric.rfind("_"):], "")
            return Cell(format_eng(v, unit) if unit else _g(v, 6), v)
        return Cell(_g(v, 6), v)
    return Cell("" if value is None else str(value))


# ---------------------------------------------------------------- figures
def fronts_figure(data: ReportData) -> bytes:
    """The objective matrix of every architecture's front; the knee as a star, other picks circled."""
    from . import plots

    fig = plots.objective_matrix(data.table, data.objectives)
    names = list(data.objectives)
    m = max(len(names), 2)
    for r in range(1, len(names)):
        for c in range(min(r, m - 1)):
            ax = fig.axes[(r - 1) * (m - 1) + c]
            others = data.picks.iloc[1:]
            ax.scatter(plots.scaled(others, names[c]), plots.scaled(others, names[r]), s=70, facecolors="none",
                       edgecolors="#222222", linewidths=0.9, zorder=3)
            knee = data.picks.iloc[:1]
            ax.scatter(plots.scaled(knee, names[c]), plots.scaled(knee, names[r]), s=160, marker="*",
                       color="#d1495b", edgecolors="black", linewidths=0.6, zorder=4)
    return _png(fig)


def mismatch_figure(data: ReportData) -> bytes:
    from .plots import _plt

    plt, mc = _plt(), data.mc
    fig, ax = plt.subplots(figsize=(7, 3.8))
    iq = mc.iq * 1e6
    counts, edges, _ = ax.hist(iq, bins=60, color="#7fa7c9", edgecolor="white", linewidth=0.4,
                               label=f"Monte Carlo, {len(iq)} samples")
    mu, s = mc.iq_nom * 1e6, mc.iq_nom * 1e6 * mc.linear_sigma_pct / 100.0
    if s > 0:
        x = np.linspace(min(edges[0], mu - 4 * s), max(edges[-1], mu + 4 * s), 300)
        ax.plot(x, len(iq) * (edges[1] - edges[0]) * np.exp(-0.5 * ((x - mu) / s) ** 2) / (s * np.sqrt(2 * np.pi)),
                color="#1d3557", lw=1.4, label=f"linear estimate, sigma {mc.linear_sigma_pct:.3g} %")
        for k, style in ((1, "--"), (3, ":")):
            for sign in (-1, 1):
                ax.axvline(mu + sign * k * s, color="#d1495b", ls=style, lw=1.1,
                           label=f"linear +-{k} sigma" if sign > 0 else None)
    ax.set_xlabel("Iq [uA]")
    ax.set_ylabel("samples per bin")
    ax.set_title(f"Iq under mismatch: {data.picks['id'].iloc[0]}, {mc.corner.value}, "
                 f"{mc.temp - ZERO_CELSIUS:g} C, {mc.vdd:g} V")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return _png(fig)


def supply_figure(data: ReportData) -> bytes:
    """Iq against VDD (left, with the targets' Iq window) and its change from nominal (right)."""
    from .plots import _plt

    plt, t, c = _plt(), data.study.targets, data.study.conditions
    fig, (ax, rel) = plt.subplots(1, 2, figsize=(11, 4))
    for k, (rid, pick) in enumerate(zip(data.picks["id"], data.picks["pick"])):
        v, iq = data.sweep[rid]
        i_nom = iq[np.argmin(np.abs(v - c.vdd_nom))]
        style = dict(marker="o" if k == 0 else ".", lw=2.2 if k == 0 else 1.0, ms=4, zorder=3 if k == 0 else 2)
        ax.plot(v, iq * 1e6, label=f"{rid} ({pick})", **style)
        if i_nom > 0:
            rel.plot(v, 100 * (iq / i_nom - 1), **style)
    for limit, name in ((t.iq_min, "Iq window min"), (t.iq_max, "Iq window max")):
        if 0 < limit < np.inf:
            ax.axhline(limit * 1e6, color="#555555", ls="--", lw=0.9)
            ax.text(0.01, limit * 1e6, name, transform=ax.get_yaxis_transform(), fontsize=7, va="bottom",
                    color="#555555")
    for a in (ax, rel):
        a.axvline(c.vdd_nom, color="#999999", ls=":", lw=0.9)
        a.set_xlabel("VDD [V]")
        a.grid(alpha=0.3)
    ax.set_ylabel("Iq [uA]")
    rel.set_ylabel("Iq change from nominal supply [%]")
    where = f"{typical(c).value}, {c.temps[0] - ZERO_CELSIUS:g} C"
    ax.set_title(f"Iq against supply ({where})")
    rel.set_title("Relative to Iq at the nominal supply")
    ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    return _png(fig)


# ---------------------------------------------------------------- sections
def _margin_cell(m: float) -> Cell:
    if not np.isfinite(m):
        return Cell("off", np.inf, "off")
    tone = "tight" if m < TIGHT else "close" if m < CLOSE else "ample"
    return Cell(f"{100 * m:.1f}", 100 * m, tone)


def _knee_line(data: ReportData) -> str:
    row = data.picks.iloc[0]
    parts = [f"{OBJ_SHOW[n][0]} {_g(float(row[n]) * OBJ_SHOW[n][2])} {OBJ_SHOW[n][1]}" for n in data.objectives]
    margins = {c[len("margin_"):]: float(row[c]) for c in data.picks.columns if c.startswith("margin_")}
    tight = min(margins, key=margins.get) if margins else None
    text = f"Knee design {row['id']} ({row['architecture']}): Iq {_g(float(row['iq_a']) * 1e6)} uA, " + ", ".join(parts)
    return text + (f"; tightest margin: {tight} at {100 * margins[tight]:.1f} %." if tight else ".")


def _job(data: ReportData) -> list:
    s, rec = data.study, data.record
    c, t = s.conditions, s.targets
    archs = rec.get("architectures", {})
    per = int(rec.get("population", 0)) * int(rec.get("generations", 0))
    rows = [
        ("study", f"{s.name} ({rec.get('study', '')})"),
        ("run folder", str(data.path)),
        ("process", f"{s.tech.name} ({rec.get('technology', '')})"),
        ("device model", "EKV, all regions" if s.tech.model.value == "ekv" else "square law (SPICE level 1)"),
        ("supply", f"{c.vdd_nom:g} V nominal, {c.vdd_min:g} V to {c.vdd_max:g} V"),
        ("corners", ", ".join(k.value for k in c.corners)),
        ("temperatures", ", ".join(f"{x - ZERO_CELSIUS:g} C" for x in c.temps) + " (first is nominal)"),
        ("load", f"{format_eng(t.i_load, 'A')} peak, sourced and sunk; {format_eng(t.c_load, 'F')}"),
        ("driver", f"gets within {t.vcomp:g} V of either rail; moves "
                   + ("both output gates" if t.drive == "both" else f"the {t.drive} gate only")),
        ("Iq window", f"{format_eng(t.iq_min, 'A')} to {format_eng(t.iq_max, 'A') if np.isfinite(t.iq_max) else 'no max'}"
                      f" at every PVT point" + (f", at +-{t.iq_sigmas:g} sigma of mismatch" if t.iq_sigmas else "")),
        ("other targets", "; ".join(x for x in (
            f"headroom <= {t.headroom_max:g} V" if np.isfinite(t.headroom_max) else "",
            f"ab_ratio >= {t.ab_min:g}" if t.ab_min > 0 else "",
            f"area <= {t.area_max * 1e12:g} um^2" if np.isfinite(t.area_max) else "",
            f"output pole >= {format_eng(t.fp2_min, 'Hz')}" if t.fp2_min > 0 else "",
            f"layout factor {t.layout_factor:g}") if x)),
        ("objectives", ", ".join(f"{n} ({'maximise' if v == 'max' else 'minimise'}, {OBJECTIVES[n][0]})"
                                 for n, v in data.objectives.items())),
        ("search budget", f"NSGA-II, population {rec.get('population')} x {rec.get('generations')} generations "
                          f"= {per} evaluations per architecture, {len(archs)} architecture(s)"),
        ("seed", str(rec.get("seed"))),
        ("evaluations", f"{rec.get('evaluations')} (status: {rec.get('status', 'unknown')})"),
        ("wall time", f"{float(rec.get('wall_time_s', float('nan'))):.1f} s"),
        ("versions", ", ".join(f"{k} {v}" for k, v in rec.get("versions", {}).items() if k != "platform")),
    ]
    return [Table("job-table", [("item", "item"), ("value", "value")],
                  [[Cell(a), Cell(b)] for a, b in rows], sortable=False)]


def _fronts(data: ReportData) -> list:
    rec = data.record.get("architectures", {})
    rows, blocked = [], []
    for arch, info in rec.items():
        n = int((data.table["architecture"] == arch).sum()) if len(data.table) else 0
        hv = info.get("hypervolume") or [float("nan")]
        b = info.get("blocked")
        rows.append([Cell(arch), Cell(str(n), n), Cell(str(info.get("evaluations")), info.get("evaluations")),
                     Cell(_g(hv[-1], 3), hv[-1]), Cell("yes" if n else "no feasible design")])
        if b:
            why = "; ".join(b.get("closest_violations", [])[:3])
            blocked.append(f"{arch}: no feasible design. The constraint '{b.get('blocking_constraint')}' blocks the "
                           f"closest design (worst relative margin {_g(b.get('closest_margin', float('nan')), 3)}); "
                           f"it misses: {why}.")
        elif not n:
            blocked.append(f"{arch}: no design in front.csv.")
    out = [Table("fronts-table", [("arch", "architecture"), ("n", "front designs"), ("evals", "evaluations"),
                                  ("hv", "final hypervolume"), ("feasible", "feasible")], rows)]
    if blocked:
        out.append(Bullets(blocked))
    if len(data.table):
        out.append(Figure("fronts", fronts_figure(data),
                          "Every architecture's feasible non-dominated designs on the same axes (pairs of objectives). "
                          "Star: the knee; open circles: the other picked designs."))
    else:
        out.append("No architecture found a feasible design: there is no front to plot.")
    return out


def _role_groups(rows: pd.DataFrame, roles: list) -> list:
    """Roles grouped where every shown row gives them the same W, L and bulk (tied devices)."""
    def sizes(r):
        return tuple(tuple(rows[f"{r}_{x}"].tolist()) if f"{r}_{x}" in rows else () for x in ("w_um", "l_um", "bulk"))

    groups: dict = {}
    for r in roles:
        groups.setdefault(sizes(r), []).append(r)
    return list(groups.values())


def _picked(data: ReportData) -> list:
    p = data.picks
    archs = list(dict.fromkeys(p["architecture"]))
    roles = _role_groups(p, list(dict.fromkeys(r for a in archs for r in get_stage(a).ROLES)))
    bias = list(dict.fromkeys((f"{b}_{UNIT_SUFFIX[u]}", b, u) for a in archs for b, u in get_stage(a).BIAS.items()))
    margins = [c for c in p.columns if c.startswith("margin_")]
    header = [("rank", "#"), ("pick", "picked as"), ("id", "id"), ("architecture", "architecture")]
    header += [(f"{group[0]}_w_um", f"{' = '.join(group)} W/L [um]") for group in roles]
    header += [(col, f"{b} [{'uA' if u == 'A' else 'kohm'}]") for col, b, u in bias]
    header += [("iq_a", "Iq [uA]")] + [(n, f"{OBJ_SHOW[n][0]} [{OBJ_SHOW[n][1]}]") for n in data.objectives]
    header += [("knee_distance", "knee distance")] + [(c, f"{c[len('margin_'):]} margin [%]") for c in margins]
    rows = []
    for k, row in enumerate(p.to_dict("records"), start=1):
        cells = [Cell(str(k), k), Cell(row["pick"]), Cell(row["id"]), Cell(row["architecture"])]
        for r, *_ in roles:
            w, l = float(row.get(f"{r}_w_um", np.nan)), float(row.get(f"{r}_l_um", np.nan))
            own = " (own well)" if row.get(f"{r}_bulk") == "source" else ""
            cells.append(Cell(f"{_g(w)} / {_g(l)}{own}", w) if np.isfinite(w) else Cell("", None))
        for col, _, u in bias:
            v = float(row.get(col, np.nan))
            cells.append(_num(v, 1e6 if u == "A" else 1e-3) if np.isfinite(v) else Cell("", None))
        cells.append(_num(row["iq_a"], 1e6))
        cells += [_num(row[n], OBJ_SHOW[n][2]) for n in data.objectives]
        cells.append(Cell(f"{row['knee_distance']:.3f}", float(row["knee_distance"])))
        cells += [_margin_cell(float(row[c])) for c in margins]
        rows.append(cells)
    return [f"{len(p)} of {len(data.table)} front designs: the knee first (the design nearest the ideal point of the "
            f"box the front spans, every objective scaled to the front's own range), then the best design per "
            f"objective, then the next designs by knee distance. Sizes W / L in um (devices of equal size in every row "
            f"share a column); bias currents in uA, resistors "
            f"in kohm; margins are each constraint's worst relative margin over PVT. Click a column header to sort.",
            Table("picked", header, rows), Legend()]


def _knee_pvt(data: ReportData) -> list:
    from .cli import result_to_dict

    res = result_to_dict(data.knee)
    cond = data.study.conditions
    header = [("corner", "corner"), ("temp_c", "temp [C]"), ("vdd_v", "vdd [V]"), ("iq_a", "Iq [uA]"),
              ("iq_sigma_pct", "sigma [%]"), ("headroom_high_v", "headroom high [mV]"),
              ("headroom_low_v", "headroom low [mV]"), ("ab_ratio", "ab_ratio"), ("vdd_min_v", "vdd_min [V]"),
              ("iout_source_a", "peak source [mA]"), ("limit_source", "source limit"),
              ("iout_sink_a", "peak sink [mA]"), ("limit_sink", "sink limit")]
    scale = {"iq_a": 1e6, "headroom_high_v": 1e3, "headroom_low_v": 1e3, "iout_source_a": 1e3, "iout_sink_a": 1e3}
    rows, classes = [], []
    for pt in res["pvt"]:
        nominal = (pt["corner"] == typical(cond).value and pt["vdd_v"] == cond.vdd_nom
                   and abs(pt["temp_c"] - (cond.temps[0] - ZERO_CELSIUS)) < 1e-6)
        cells = [Cell(pt["corner"] + (" (nominal)" if nominal else "") + ("" if pt["converged"] else " NOT CONVERGED"),
                      pt["corner"]), _num(pt["temp_c"]), _num(pt["vdd_v"])]
        for key, _ in header[3:]:
            v = pt[key]
            cells.append(Cell(v, v) if isinstance(v, str) else _num(np.nan if v is None else v, scale.get(key, 1.0)))
        rows.append(cells)
        classes.append("nominal" if nominal else "")
    viol = res["violations"]
    return [f"{data.picks['id'].iloc[0]} solved by evaluate() at all {len(rows)} PVT points (corner x temperature x "
            f"supply). Headrooms are at the peak load current; limits name what stops the drive "
            f"(driver compliance or the control device leaving saturation). "
            + ("Every target is met at every point." if not viol else "Missed: " + "; ".join(viol)),
            Table("knee-pvt", header, rows, classes)]


def _mismatch(data: ReportData) -> list:
    mc = data.mc
    nan = lambda v: float("nan") if v is None else v  # noqa: E731
    return [f"{MC_SAMPLES} Monte Carlo samples of Pelgrom mismatch on every device (seed {data.record.get('seed')}), "
            f"each solved exactly at {mc.corner.value}, {mc.temp - ZERO_CELSIUS:g} C, {mc.vdd:g} V: "
            f"mean Iq {format_eng(nan(mc.iq_mean), 'A')}, sigma {nan(mc.sigma_pct):.3g} % against the linear "
            f"estimate {mc.linear_sigma_pct:.3g} % (Iq {format_eng(mc.iq_nom, 'A')} without mismatch); "
            f"{mc.failed} sample(s) did not solve.",
            Figure("mismatch", mismatch_figure(data), "Histogram of Iq under random mismatch; the curve and the "
                   "red lines are the linear (adjoint) estimate at +-1 and +-3 sigma.")]


def _supply(data: ReportData) -> list:
    c = data.study.conditions
    rows = []
    for rid, pick in zip(data.picks["id"], data.picks["pick"]):
        v, iq = data.sweep[rid]
        i_nom = iq[np.argmin(np.abs(v - c.vdd_nom))]
        span = v[-1] - v[0]
        sens = 100 * (iq[-1] - iq[0]) / i_nom / span if i_nom > 0 and span > 0 else float("nan")
        rows.append([Cell(rid), Cell(pick), _num(iq[0], 1e6), _num(i_nom, 1e6), _num(iq[-1], 1e6), _num(sens, digits=3)])
    return [f"Iq of each picked design at {len(data.sweep[data.picks['id'].iloc[0]][0])} supplies from "
            f"{c.vdd_min:g} V to {c.vdd_max:g} V, {typical(c).value} corner, {c.temps[0] - ZERO_CELSIUS:g} C.",
            Figure("supply", supply_figure(data), "Iq against VDD (left) and its change from the value at the "
                   "nominal supply (right); the knee is the thick line, dashed lines the Iq window of the targets, "
                   "dotted the nominal supply."),
            Table("supply-table", [("id", "id"), ("pick", "picked as"), ("lo", f"Iq at {c.vdd_min:g} V [uA]"),
                                   ("nom", f"Iq at {c.vdd_nom:g} V [uA]"), ("hi", f"Iq at {c.vdd_max:g} V [uA]"),
                                   ("sens", "sensitivity [%/V]")], rows)]


def _verify(data: ReportData) -> list:
    table, note = data.verify
    if table is None:
        return [note]
    records = table.to_dict("records")
    out = [note + " Errors are simulator minus model: relative for currents (%), in millivolts for voltages "
                  "(headrooms)."]
    if {"metric", "error"} <= set(table.columns) and len(table):
        rows = []
        for metric in dict.fromkeys(table["metric"]):
            rs = [r for r in records if r["metric"] == metric and isinstance(r["error"], (int, float))
                  and np.isfinite(r["error"])]
            if not rs:
                rows.append([Cell(str(metric)), Cell("0", 0), Cell("", None), Cell("", None), Cell("")])
                continue
            err = np.array([float(r["error"]) for r in rs])
            w = rs[int(np.argmax(np.abs(err)))]
            at = " ".join(str(w[c]) for c in ("id", "corner") if c in w)
            at += "".join(f" {_g(w[c])} {u}" for c, u in (("temp_c", "C"), ("vdd_v", "V")) if c in w)
            rows.append([Cell(str(metric)), Cell(str(len(rs)), len(rs)),
                         Cell(_show_error(float(np.median(np.abs(err))), _volts(w)).lstrip("+"),
                              float(np.median(np.abs(err)))),
                         Cell(_show_error(float(w["error"]), _volts(w)), abs(float(w["error"]))), Cell(at)])
        out.append(Table("verification-summary", [("metric", "metric"), ("points", "points"),
                                                  ("median", "median |error|"), ("worst", "worst error"),
                                                  ("at", "worst at")], rows))
    shown = [c for c in table.columns if c != "error_unit"]
    header = [(c, {"temp_c": "temp [C]", "vdd_v": "vdd [V]"}.get(c, c)) for c in shown]
    out.append(Details(f"All {len(records)} comparisons",
                       Table("verification", header, [[_verify_cell(c, r) for c in shown] for r in records])))
    return out


def _assumptions(data: ReportData) -> list:
    s, t = data.study, data.study.targets
    kind = ("the EKV charge-based model, valid from weak to strong inversion" if s.tech.model.value == "ekv"
            else "the square-law (SPICE level 1) model")
    return [Bullets([
        f"Devices: {kind}, with the parameters of {s.tech.name}; body effect and channel-length modulation are "
        f"included, temperature enters through kT/q, a threshold drift and a mobility exponent (textbook values). "
        f"Corners shift only the threshold and the current factor of each polarity.",
        "Bias sources are ideal: every bias current (ib_*) and bias resistor is exact, with infinite output "
        "resistance, no compliance limit, no drift with supply or temperature and no mismatch of its own. Any "
        "supply or temperature dependence shown comes from the stage alone.",
        f"Rest point: no load, the output held at half the supply by the amplifier's feedback. Drive: the driving "
        f"stage moves {'both gates' if t.drive == 'both' else 'the ' + t.drive + ' gate'} until it is {t.vcomp:g} V "
        f"from a rail or the control device leaves saturation, whichever comes first.",
        "Iq: current through the output pair at rest. Power: nominal supply times Iq plus every bias branch "
        "(typical corner, nominal temperature).",
        "Headroom: distance from a rail at which the stage still delivers the peak load current; swing is the "
        "supply less both headrooms. Peak source/sink: the largest output current at mid-supply with a gate at its "
        "drive limit.",
        "ab_ratio: current left in the idle output device at peak load, as a fraction of Iq (class-AB keeps it "
        "above zero).",
        "Iq sigma: 1-sigma Iq spread from device mismatch (Pelgrom), propagated linearly through the solved "
        "operating point; the Monte Carlo section checks it. Supply sensitivity: Iq change from the lowest to "
        "the highest supply per volt, relative to Iq at the nominal supply.",
        f"vdd_min: lowest supply at which every device keeps its region at rest. Output pole: gm of the output "
        f"devices over 2 pi times the load capacitance. Area: sum of W L times the layout factor {t.layout_factor:g}.",
        "A design is feasible only if it meets every target at every corner, temperature and supply. Not "
        "modelled: layout parasitics, noise, frequency response beyond the output pole, leakage, self-heating.",
    ])]


def sections(data: ReportData) -> list:
    """(key, title, blocks) for every section of SECTIONS."""
    n = len(data.table)
    glance = [f"{n} Pareto designs in front.csv: " + ", ".join(
        f"{a} {c}" for a, c in data.table["architecture"].value_counts(sort=False).items()) + "."
              if n else "No Pareto design in front.csv."]
    none = [a for a, info in data.record.get("architectures", {}).items()
            if not (len(data.table) and (data.table["architecture"] == a).any())]
    if none:
        glance.append(f"No feasible design: {', '.join(none)} (see {SECTIONS[3][1]}).")
    if n:
        glance.append(_knee_line(data))
    glance.append(data.verify[1] if data.verify[0] is None else f"Verification: {data.verify[1]}")
    blocks = {"caution": [CAUTION], "glance": [Bullets(glance)], "job": _job(data), "fronts": _fronts(data),
              "verify": _verify(data), "assumptions": _assumptions(data)}
    empty = ["No feasible design in this run: nothing to show."]
    for key, make in (("picked", _picked), ("knee", _knee_pvt), ("mismatch", _mismatch), ("supply", _supply)):
        blocks[key] = make(data) if n else empty
    return [(key, title, blocks[key]) for key, title in SECTIONS]


# ---------------------------------------------------------------- rendering
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:0 auto;max-width:1240px;padding:0 18px 40px;
color:#1e2328;line-height:1.45}
h1{font-size:1.6em;margin:18px 0 6px}h2{font-size:1.2em;margin:28px 0 8px;border-bottom:2px solid #2f5d7c;
padding-bottom:3px}
nav{font-size:.9em;margin:6px 0 10px}nav a{margin-right:12px;color:#2f5d7c}
.caution{border:3px solid #b3261e;background:#fdecea;padding:10px 14px;font-weight:600;font-size:1.05em}
.scroll{overflow-x:auto}
table{border-collapse:collapse;font-size:.85em;margin:8px 0}
th,td{border:1px solid #c9d1d9;padding:3px 7px;text-align:right;white-space:nowrap}
th{background:#e8eef3;position:sticky;top:0}
table.sortable th{cursor:pointer;user-select:none}
table.sortable th[aria-sort=ascending]::after{content:" \\25B2";font-size:.75em}
table.sortable th[aria-sort=descending]::after{content:" \\25BC";font-size:.75em}
td.text,th.text{text-align:left}
tr.nominal td{font-weight:700}
#job-table td{text-align:left;white-space:normal}
td.tight,.sw.tight{background:%(tight)s}td.close,.sw.close{background:%(close)s}
td.ample,.sw.ample{background:%(ample)s}td.off,.sw.off{background:%(off)s}
.legend{font-size:.85em}.sw{display:inline-block;width:1.1em;height:.9em;border:1px solid #999;
vertical-align:middle;margin:0 4px 0 12px}
details summary{cursor:pointer;color:#2f5d7c;margin:6px 0}
figure{margin:10px 0}figure img{max-width:100%%;border:1px solid #dde}#fig-fronts img{max-width:980px}figcaption{font-size:.85em;color:#444}
""" % TONES

_JS = """
(function () {
  // Sort key of a cell: its data-sort value (else its text) as a number when it reads as
  // one, else as lower-case text; empty cells give null and always sort last.
  function key(cell) {
    var raw = cell.getAttribute("data-sort");
    if (raw === null) { raw = cell.textContent; }
    if (raw === "") { return null; }
    var x = Number(raw);
    return isNaN(x) ? raw.toLowerCase() : x;
  }
  function compare(a, b) {
    var na = typeof a === "number", nb = typeof b === "number";
    if (na !== nb) { return na ? -1 : 1; }
    return a < b ? -1 : (a > b ? 1 : 0);
  }
  function sortBy(table, col, th) {
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    var dir = th.getAttribute("aria-sort") === "ascending" ? -1 : 1;
    rows.sort(function (r1, r2) {
      var a = key(r1.cells[col]), b = key(r2.cells[col]);
      if (a === null || b === null) { return (a === null) - (b === null); }
      return dir * compare(a, b);
    });
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (h) { h.removeAttribute("aria-sort"); });
    th.setAttribute("aria-sort", dir === 1 ? "ascending" : "descending");
    rows.forEach(function (r) { body.appendChild(r); });
  }
  Array.prototype.forEach.call(document.querySelectorAll("table.sortable"), function (table) {
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th, col) {
      th.title = "click to sort";
      th.tabIndex = 0;
      th.addEventListener("click", function () { sortBy(table, col, th); });
      th.addEventListener("keydown", function (e) { if (e.key === "Enter") { sortBy(table, col, th); } });
    });
  });
})();
"""


def _legend_text(md: bool) -> str:
    if md:
        return (f"Margins: `!!` below {100 * TIGHT:g} % of the limit, `!` below {100 * CLOSE:g} %, unmarked above; "
                f"`off` where the target is not set.")
    sw = lambda tone, text: f'<span class="sw {tone}"></span>{text}'  # noqa: E731
    return ('<p class="legend">Margin colours:' + sw("tight", f"below {100 * TIGHT:g} % of the limit")
            + sw("close", f"{100 * TIGHT:g} to {100 * CLOSE:g} %") + sw("ample", f"{100 * CLOSE:g} % or more")
            + sw("off", "target not set") + "</p>")


def _is_text_column(rows, k) -> bool:
    return any(isinstance(r[k].sort, str) or (r[k].sort is None and r[k].text) for r in rows)


def _sort_text(v) -> str:
    """A data-sort attribute value: text as is, numbers as JavaScript's Number() reads them."""
    if isinstance(v, str):
        return v
    v = float(v)
    return repr(v) if np.isfinite(v) else ("" if np.isnan(v) else "Infinity" if v > 0 else "-Infinity")


def _html_table(b: Table) -> str:
    e = html.escape
    text_cols = [_is_text_column(b.rows, k) for k in range(len(b.header))]
    text_attr = ' class="text"'
    head = "".join(f'<th data-key="{e(k)}"{text_attr if text_cols[i] else ""}>{e(lab)}</th>'
                   for i, (k, lab) in enumerate(b.header))
    body = []
    for i, row in enumerate(b.rows):
        rc = b.row_class[i] if i < len(b.row_class) else ""
        tds = []
        for k, c in enumerate(row):
            classes = " ".join(x for x in ("text" if text_cols[k] else "", c.tone) if x)
            attr = (f' class="{classes}"' if classes else "") + (
                "" if c.sort is None else f' data-sort="{e(_sort_text(c.sort))}"')
            tds.append(f"<td{attr}>{e(c.text)}</td>")
        body.append((f'<tr class="{rc}">' if rc else "<tr>") + "".join(tds) + "</tr>")
    cls = ' class="sortable"' if b.sortable else ""
    return (f'<div class="scroll"><table id="{b.key}"{cls}><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(body)}</tbody></table></div>")


def render_html(title: str, secs: list) -> str:
    """The self-contained page: inline CSS and JS, figures as data URIs, no external resource."""
    e = html.escape
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">', f"<title>{e(title)}</title>",
           f"<style>{_CSS}</style></head><body>", f"<h1>{e(title)}</h1>",
           "<nav>" + "".join(f'<a href="#{k}">{e(t)}</a>' for k, t, _ in secs) + "</nav>"]
    for key, name, blocks in secs:
        out.append(f'<section id="{key}"><h2>{e(name)}</h2>')
        for b in blocks:
            if isinstance(b, str):
                out.append(f'<p class="caution">{e(b)}</p>' if key == "caution" else f"<p>{e(b)}</p>")
            elif isinstance(b, Bullets):
                out.append("<ul>" + "".join(f"<li>{e(x)}</li>" for x in b.items) + "</ul>")
            elif isinstance(b, Legend):
                out.append(_legend_text(False))
            elif isinstance(b, Figure):
                src = base64.b64encode(b.png).decode("ascii")
                out.append(f'<figure id="fig-{b.key}"><img alt="{e(b.caption)}" src="data:image/png;base64,{src}">'
                           f"<figcaption>{e(b.caption)}</figcaption></figure>")
            elif isinstance(b, Table):
                out.append(_html_table(b))
            elif isinstance(b, Details):
                out.append(f"<details><summary>{e(b.summary)}</summary>{_html_table(b.table)}</details>")
        out.append("</section>")
    out.append(f'<p class="caution">{e(CAUTION)}</p>')
    out.append(f"<script>{_JS}</script></body></html>")
    return "\n".join(out) + "\n"


def render_markdown(title: str, secs: list, figure_files: dict) -> str:
    """The Markdown twin: same sections, Markdown tables, figures as PNG files beside it."""
    mark = {"tight": " !!", "close": " !"}
    esc = lambda s: str(s).replace("|", "\\|")  # noqa: E731
    out = [f"# {title}", ""]
    for key, name, blocks in secs:
        out += [f"## {name}", ""]
        for b in blocks:
            if isinstance(b, str):
                out += [f"> **{b}**" if key == "caution" else b, ""]
            elif isinstance(b, Bullets):
                out += [f"- {x}" for x in b.items] + [""]
            elif isinstance(b, Legend):
                out += [_legend_text(True), ""]
            elif isinstance(b, Figure):
                out += [f"![{b.caption}]({figure_files[b.key]})", "", f"*{b.caption}*", ""]
            elif isinstance(b, (Table, Details)):
                t = b if isinstance(b, Table) else b.table
                if isinstance(b, Details):
                    out += [f"{b.summary}:", ""]
                rows = [[esc(c.text + mark.get(c.tone, "")) for c in r] for r in t.rows]
                out += [markdown_table([esc(lab) for _, lab in t.header], rows), ""]
    out += [f"> **{CAUTION}**", ""]
    return "\n".join(out)


def write_report(run, out=None, count: int = 8, stream=None) -> int:
    """`stagefront report`: write RUN/report.html and its Markdown twin RUN/report.md.

    Parameters
    ----------
    run : str or Path
        Run folder (front.csv, run.json; verify.csv when verification has been run).
    out : str or Path, optional
        The HTML file (default RUN/report.html); the Markdown twin and its PNG figures go
        beside it, named after it (report.md, report-fronts.png, ...).
    count : int
        Picked designs to show (default 8).
    stream : file-like, optional
        Where the written paths are printed (default stdout).

    Returns
    -------
    int
        0.
    """
    stream = stream or sys.stdout
    out = Path(out) if out else Path(run) / "report.html"
    if out.suffix.lower() not in (".html", ".htm"):
        raise InputError("--out", f"{str(out)!r} is not an HTML file name", "a path ending in .html",
                         "the Markdown twin is written beside it with the same name and .md")
    if out.is_dir():
        raise InputError("--out", f"{str(out)!r} is a folder", "a file path ending in .html")
    data = gather(run, count)
    title = f"stagefront report: {data.study.name}"
    secs = sections(data)
    figures = {b.key: b for _, _, blocks in secs for b in blocks if isinstance(b, Figure)}
    files = {k: f"{out.stem}-{k}.png" for k in figures}
    for k, fig in figures.items():
        write_bytes(out.parent / files[k], fig.png)
    md = out.with_suffix(".md")
    write_text(md, render_markdown(title, secs, files))
    write_text(out, render_html(title, secs))
    print(f"report:   {out}", file=stream)
    print(f"markdown: {md} (figures: {', '.join(files.values()) or 'none'})", file=stream)
    print(CAUTION, file=stream)
    return 0
