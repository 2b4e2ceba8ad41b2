"""The report's figures as PNG bytes: every front on the same axes with the picks marked, the
knee's Monte Carlo histogram against the linear estimate, and Iq against the supply.
"""
from __future__ import annotations

import numpy as np

from models.devices.constants import ZERO_CELSIUS

from ..search.plots import plain, png_bytes
from .data import ReportData


def fronts_figure(data: ReportData) -> bytes:
    """The objective matrix of every architecture's front; the knee as a star, other picks circled."""
    from ..search import plots

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
    return png_bytes(fig, dpi=100)


def parallel_figure(data: ReportData) -> bytes:
    """Every front design across the objectives, up is better; the picked designs bold."""
    from ..search import plots

    picks = dict(zip(data.picks["id"], data.picks["pick"]))
    return png_bytes(plots.parallel_coordinates(data.table, data.objectives, highlight=picks), dpi=100)


def mismatch_figure(data: ReportData) -> bytes:
    """Histogram of the knee's Monte Carlo Iq with the linear estimate's Gaussian and its +-1, +-3 sigma."""
    from ..search.plots import _plt

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
    ax.set_title(plain(f"Iq under mismatch: {data.picks['id'].iloc[0]}, {mc.corner.value}, "
                       f"{mc.temp - ZERO_CELSIUS:g} C, {mc.vdd:g} V"))
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return png_bytes(fig, dpi=100)


def supply_figure(data: ReportData) -> bytes:
    """Iq against VDD (left, with the targets' Iq window) and its change from nominal (right)."""
    from ..search.plots import _plt

    plt, t, c = _plt(), data.study.targets, data.study.conditions
    fig, (ax, rel) = plt.subplots(1, 2, figsize=(11, 4))
    for k, (rid, pick) in enumerate(zip(data.picks["id"], data.picks["pick"])):
        v, iq = data.sweep[rid]
        i_nom = iq[np.argmin(np.abs(v - c.vdd_nom))]
        style = dict(marker="o" if k == 0 else ".", lw=2.2 if k == 0 else 1.0, ms=4, zorder=3 if k == 0 else 2)
        ax.plot(v, iq * 1e6, label=plain(f"{rid} ({pick})"), **style)
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
    where = f"{c.typical.value}, {c.temps[0] - ZERO_CELSIUS:g} C"
    ax.set_title(f"Iq against supply ({where})")
    rel.set_title("Relative to Iq at the nominal supply")
    ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    return png_bytes(fig, dpi=100)


def bode_figure(data: ReportData) -> bytes:
    """The knee's loop gain inside the study's amplifier: magnitude and phase at the PVT point
    of its worst phase margin beside the typical one (typical corner, first temperature,
    nominal supply), with the unity-gain frequency and phase margin of each."""
    from models.evaluate import loop_gain_at

    from ..search.plots import _plt

    plt, res, s = _plt(), data.knee, data.study
    j_typ = s.conditions.nominal_index()
    j_worst = int(np.argmin(res.pvt["phase_margin_deg"][0]))
    f = np.logspace(-1, 10, 440)
    fig, (am, ph) = plt.subplots(2, 1, figsize=(8, 6), sharex=True)
    for j, label, style in ((j_typ, "typical", "-"), (j_worst, "worst phase margin", "--")):
        corner, temp, vdd = res.corners[j], float(res.temps[j]), float(res.vdd[j])
        mag, phase = loop_gain_at(data.knee_design, s.tech, corner, temp, vdd, s.targets, f)
        where = f"{corner.value}, {temp - ZERO_CELSIUS:g} C, {vdd:g} V"
        fu, pm = res.pvt["ugf_hz"][0, j], res.pvt["phase_margin_deg"][0, j]
        am.semilogx(f, mag, style, label=f"{label}: {where}; unity gain {fu / 1e6:.3g} MHz, margin {pm:.1f} deg")
        ph.semilogx(f, phase, style)
        ph.plot([fu], [pm - 180.0], "o", color=am.lines[-1].get_color())
    am.axhline(0.0, color="#777777", lw=0.8)
    ph.axhline(-180.0, color="#777777", lw=0.8)
    am.set_ylabel("|T| [dB]")
    ph.set_ylabel("phase of T [deg]")
    ph.set_xlabel("frequency [Hz]")
    am.set_title(f"Loop gain of {data.picks['id'].iloc[0]} inside its amplifier")
    am.legend(fontsize=7)
    for a in (am, ph):
        a.grid(alpha=0.3, which="both")
    am.set_ylim(max(am.get_ylim()[0], -80.0), am.get_ylim()[1])
    fig.tight_layout()
    return png_bytes(fig, dpi=100)
