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
    "power_w": ("power", "uW", 1e6),
    "swing_v": ("swing", "V", 1.0),
    "area_um2": ("area", "um^2", 1.0),
    "iq_sigma_pct": ("Iq sigma (mismatch)", "%", 1.0),
    "supply_sens_pct_per_v": ("Iq supply sensitivity", "%/V", 1.0),
}
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


def label(name: str) -> str:
    text, unit, _ = LABELS.get(name, (name, "", 1.0))
    return f"{text} [{unit}]" if unit else text


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
                ax.set_xlabel(label(names[c]))
            if c == 0:
                ax.set_ylabel(label(names[r]))
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


def parallel_coordinates(table: pd.DataFrame, objectives, ax=None):
    """Each front design as a line across the objectives, each axis scaled to its range."""
    plt = _plt()
    names = list(objectives)
    if ax is None:
        _, ax = plt.subplots(figsize=(1.9 * len(names) + 2, 4.2))
    data = np.stack([scaled(table, n) for n in names], axis=1) if len(table) else np.empty((0, len(names)))
    lo = data.min(axis=0) if len(data) else np.zeros(len(names))
    hi = data.max(axis=0) if len(data) else np.ones(len(names))
    span = np.where(hi > lo, hi - lo, 1.0)
    seen = set()
    for arch, row in zip(table["architecture"], data):
        marker, colour = STYLE.get(arch, ("x", "black"))
        ax.plot(range(len(names)), (row - lo) / span, color=colour, alpha=0.5, lw=1,
                label=None if arch in seen else plain(arch))
        seen.add(arch)
    ax.set_xticks(range(len(names)))
    ax.set_xticklabels([f"{label(n)}\n{lo[k]:.3g} .. {hi[k]:.3g}" for k, n in enumerate(names)], fontsize=8)
    ax.set_ylabel("position within the front's range")
    ax.set_ylim(-0.05, 1.05)
    ax.set_title("Front designs across the objectives")
    ax.grid(alpha=0.3, axis="x")
    if seen:
        ax.legend(title="architecture", fontsize=8)
    return ax


def png_bytes(fig_or_ax, dpi: int = 110) -> bytes:
    """A figure (or an axes' figure) as PNG bytes, for `optimise.files.atomic.write_bytes` or a
    data URI; the figure is closed."""
    plt = _plt()
    fig = fig_or_ax if hasattr(fig_or_ax, "savefig") else fig_or_ax.figure
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    plt.close(fig)
    return buf.getvalue()
