"""Figures of a run: pairwise objective scatter, hypervolume per generation, parallel
coordinates of the front. Each function takes its data (and `ax=` where one axes
suffices), returns the figure or axes and never shows anything; matplotlib is imported
lazily with the Agg backend so plotting works on a machine with no screen.
"""
from __future__ import annotations

import io

import numpy as np
import pandas as pd

LABELS = {
    "power_w": ("power", "µW", 1e6),
    "swing_v": ("swing", "V", 1.0),
    "area_um2": ("area", "µm²", 1.0),
    "iq_sigma_pct": ("Iq sigma (mismatch)", "%", 1.0),
    "supply_sens_pct_per_v": ("|Iq supply sensitivity|", "%/V", 1.0),
}
# The sense each objective is usually searched in (a run's own objectives say it exactly).
SENSE = {"power_w": "min", "swing_v": "max", "area_um2": "min", "iq_sigma_pct": "min", "supply_sens_pct_per_v": "min"}
HIGHLIGHT = ("#d1495b", "#1d3557", "#2a9d8f", "#e9a03b", "#6a4c93", "#3a3a3a", "#8ab17d", "#b56576")
STYLE = {"floating-loop": ("o", "tab:blue"), "fixed-bias": ("s", "tab:orange"), "follower": ("^", "tab:green")}


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plain(text) -> str:
    """`text` shown as it is: every ``$`` escaped, so that matplotlib never reads a run
    folder's name or a row id holding two of them as mathtext (which may fail to parse)."""
    return str(text).replace("$", r"\$")


def label(name: str, sense: str | None = None) -> str:
    """Axis label with its unit and, given the sense ("min"/"max"), which way is better."""
    text, unit, _ = LABELS.get(name, (name, "", 1.0))
    out = f"{text} [{unit}]" if unit else text
    if sense:
        out += "  (lower is better)" if sense == "min" else "  (higher is better)"
    return out


def _senses(objectives) -> dict:
    """name -> "min"/"max" from a run's objectives dict, or the usual sense of each name."""
    return {n: (objectives[n] if isinstance(objectives, dict) else SENSE.get(n, "min")) for n in objectives}


def scaled(table: pd.DataFrame, name: str) -> np.ndarray:
    _, _, k = LABELS.get(name, (name, "", 1.0))
    v = table[name].to_numpy(dtype=float) * k
    return np.abs(v) if name == "supply_sens_pct_per_v" else v


def objective_matrix(table: pd.DataFrame, objectives, title: str = "", group: str = "architecture",
                     style: dict | None = None):
    """Lower-triangle matrix of pairwise objective scatter, one series per value of `group`.

    Parameters
    ----------
    table : DataFrame
        Rows to plot: front.csv columns (raw SI floats) and the `group` column.
    objectives : iterable of str
        Objective columns, in axis order.
    title : str
        Figure title (default: a title for Pareto fronts).
    group : str
        Column whose values label the series; also the legend's title.
    style : dict, optional
        Series label -> (marker, colour); default `STYLE` (by architecture). A label it
        does not name is drawn as a black "x".

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = _plt()
    style = STYLE if style is None else style
    names = list(objectives)
    sense = _senses(objectives)
    m = max(len(names), 2)
    fig, axes = plt.subplots(m - 1, m - 1, figsize=(3.2 * (m - 1) + 1, 3.0 * (m - 1) + 0.6), squeeze=False)
    for r in range(1, m):
        for c in range(m - 1):
            ax = axes[r - 1][c]
            if c >= r or r >= len(names):
                ax.set_visible(False)
                continue
            for lab, sub in table.groupby(group, sort=False):
                marker, colour = style.get(lab, ("x", "black"))
                ax.scatter(scaled(sub, names[c]), scaled(sub, names[r]), s=14, marker=marker, color=colour,
                           label=plain(lab), alpha=0.8)
            if r == m - 1:
                ax.set_xlabel(label(names[c], sense[names[c]]), fontsize=8)
            if c == 0:
                ax.set_ylabel(label(names[r], sense[names[r]]), fontsize=8)
            ax.grid(alpha=0.3)
    handles, labels = [], []
    for ax in axes.ravel():
        if ax.get_visible():
            h, lab = ax.get_legend_handles_labels()
            for hh, ll in zip(h, lab):
                if ll not in labels:
                    handles.append(hh)
                    labels.append(ll)
    if handles:  # the legend sits in the right margin: labels longer than an architecture's name in 7 pt
        long = max(len(str(lab)) for lab in labels) > max(len(a) for a in STYLE)
        fig.legend(handles, labels, loc="upper right", title=plain(group), fontsize=7 if long else None)
    fig.suptitle(plain(title) if title else "Pareto fronts (feasible, non-dominated designs)")
    fig.tight_layout(rect=(0, 0, 0.85 if m > 2 else 0.75, 0.95))
    return fig


def hypervolume_curve(hv: dict, ax=None):
    """Hypervolume (normalised box) against generation, one line per architecture."""
    plt = _plt()
    if ax is None:
        _, ax = plt.subplots(figsize=(6, 4))
    for arch, values in hv.items():
        marker, colour = STYLE.get(arch, ("x", "black"))
        ax.plot(np.arange(1, len(values) + 1), values, marker=marker, markersize=3, color=colour, label=plain(arch))
    ax.set_xlabel("generation")
    ax.set_ylabel("hypervolume [normalised objective box]")
    ax.set_title("Search progress")
    ax.grid(alpha=0.3)
    ax.legend(title="architecture")
    return ax


def parallel_coordinates(table: pd.DataFrame, objectives, ax=None, highlight: dict | None = None):
    """Each front design as a line across the objectives, each axis scaled to the front's
    range and turned so that up is better on every axis (the best value at the top).

    Lines are thin and translucent (the more designs, the fainter), one colour per
    architecture; `highlight` (row id -> label, e.g. {"fl-012": "knee"}) draws those
    designs bold on top, labelled in the legend. Tick labels give each axis's best and
    worst value in its unit.
    """
    plt = _plt()
    names = list(objectives)
    sense = _senses(objectives)
    if ax is None:
        _, ax = plt.subplots(figsize=(2.1 * len(names) + 2.5, 4.6))
    data = np.stack([scaled(table, n) for n in names], axis=1) if len(table) else np.empty((0, len(names)))
    lo = data.min(axis=0) if len(data) else np.zeros(len(names))
    hi = data.max(axis=0) if len(data) else np.ones(len(names))
    span = np.where(hi > lo, hi - lo, 1.0)
    up = np.array([1.0 if sense[n] == "max" else -1.0 for n in names])
    pos = np.where(up > 0, (data - lo) / span, (hi - data) / span) if len(data) else data
    alpha = float(np.clip(12.0 / max(len(table), 1), 0.06, 0.6))
    seen = set()
    for arch, row in zip(table["architecture"], pos):
        _, colour = STYLE.get(arch, ("x", "black"))
        ax.plot(range(len(names)), row, color=colour, alpha=alpha, lw=0.8,
                label=None if arch in seen else plain(arch))
        seen.add(arch)
    ids = list(table["id"]) if "id" in table else []
    for k, (rid, text) in enumerate((highlight or {}).items()):
        if rid in ids:
            row = pos[ids.index(rid)]
            ax.plot(range(len(names)), row, color=HIGHLIGHT[k % len(HIGHLIGHT)], lw=2.4, alpha=0.95, zorder=5,
                    marker="o", ms=4, label=plain(f"{rid}: {text}"))
    best = np.where(up > 0, hi, lo)
    worst = np.where(up > 0, lo, hi)
    ax.set_xticks(range(len(names)))
    ax.set_xticklabels([f"{label(n)}\nbest {best[k]:.3g}\nworst {worst[k]:.3g}" for k, n in enumerate(names)],
                       fontsize=8)
    ax.set_yticks([0.0, 1.0])
    ax.set_yticklabels(["worst", "best"])
    ax.set_ylabel("within the front's range (up is better)")
    ax.set_ylim(-0.05, 1.05)
    ax.annotate("", xy=(-0.32, 1.0), xytext=(-0.32, 0.0), xycoords=("data", "data"),
                arrowprops=dict(arrowstyle="->", color="#555555", lw=1.2), annotation_clip=False)
    ax.set_title(f"Front designs across the objectives ({len(table)} designs)")
    ax.grid(alpha=0.3, axis="x")
    if seen:
        leg = ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
        for line in leg.get_lines():
            line.set_alpha(1.0)
    ax.figure.tight_layout()
    return ax


def best_per_objective(table: pd.DataFrame, objectives) -> dict:
    """row id -> "best NAME" of the design that is best in each objective (one label per
    design; ties to the first row), for `parallel_coordinates`' highlight."""
    out: dict = {}
    for name, s in _senses(objectives).items():
        if not len(table):
            break
        v = scaled(table, name)
        rid = table["id"].iloc[int(np.argmax(v) if s == "max" else np.argmin(v))]
        out[rid] = (out[rid] + ", " if rid in out else "best ") + LABELS.get(name, (name,))[0]
    return out


def png_bytes(fig_or_ax, dpi: int = 110) -> bytes:
    """A figure (or an axes' figure) as PNG bytes, for `optimise.files.atomic.write_bytes` or a
    data URI; the figure is closed."""
    plt = _plt()
    fig = fig_or_ax if hasattr(fig_or_ax, "savefig") else fig_or_ax.figure
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    plt.close(fig)
    return buf.getvalue()
