"""Where an analytic technology holds: lengths outside those it was calibrated at, and
replica devices whose length differs from the device they stand for.

The analytic models (EKV, square law) have one threshold and one current factor for every
length: no threshold roll-off or halo, no DIBL, no velocity saturation, no mobility
degradation, no narrow-width effect. A technology calibrated against a card at some
lengths (`Tech.fitted_lengths`) is therefore trusted only near them: within
LENGTH_MARGIN (25 %) of a fitted length. And the translinear loop's match of a replica
diode to its output device (stage `REPLICAS`) rests on both having the same threshold,
which in silicon holds only at equal lengths. Both findings are warnings, not violations:
the model's numbers stand, their silicon fidelity is what is in doubt.

Pure: returns readable lines, prints nothing.
"""
from __future__ import annotations

import numpy as np

from .stages import get_stage

# A length is covered by a fitted length Lf when |L / Lf - 1| <= LENGTH_MARGIN. 25 %: the
# threshold of a short-channel card moves by tens of millivolts between Lmin and 2 Lmin,
# and the fit is held to be fair a quarter of the way to the next octave ("common practice,
# no source").
LENGTH_MARGIN = 0.25
# Replica and device lengths count as equal to this relative difference (drawing-grid
# rounding of equal values leaves far less).
EQUAL_RTOL = 1e-6
ANALYTIC = ("ekv", "square-law")


def _um(x) -> str:
    return f"{x * 1e6:.3g} um"


def _span(values) -> str:
    lo, hi = float(np.min(values)), float(np.max(values))
    return _um(lo) if np.isclose(lo, hi, rtol=EQUAL_RTOL) else f"{_um(lo)} to {_um(hi)}"


def covered(lengths, fitted, margin: float = LENGTH_MARGIN) -> np.ndarray:
    """Whether each length [m] lies within `margin` of some fitted length [m]; shape of lengths."""
    x = np.asarray(lengths, dtype=float)[..., None]
    f = np.asarray(fitted, dtype=float)
    return np.any(np.abs(x / f - 1.0) <= margin * (1 + 1e-9), axis=-1)


def length_warnings(tech, designs) -> list[str]:
    """Warnings for designs on a calibrated analytic technology (none otherwise).

    Parameters
    ----------
    tech : Tech
        With `fitted_lengths` [m] when it is a calibration; a technology without them, or
        of another model kind, gives no warning.
    designs : iterable of Design
        Populations, e.g. every architecture's front.

    Returns
    -------
    list of str
        At most two lines: the roles whose lengths lie outside the fitted set (with the
        lengths used, the fitted ones and the margin, and how many designs), and the replica
        pairs whose lengths differ (with an example).
    """
    if tech.model.value not in ANALYTIC or not tech.fitted_lengths:
        return []
    designs = list(designs)
    total = sum(d.size for d in designs)
    outside, n_out, replicas, n_rep = {}, 0, {}, 0
    for d in designs:
        stage = get_stage(d.architecture)
        bad_any = np.zeros(d.size, dtype=bool)
        for role in stage.ROLES:
            ls = np.asarray(d.l[role], dtype=float).reshape(-1)
            bad = ~covered(ls, tech.fitted_lengths)
            if bad.any():
                outside.setdefault(role, []).append(ls[bad])
                bad_any |= bad
        n_out += int(bad_any.sum())
        rep_any = np.zeros(d.size, dtype=bool)
        for replica, device in getattr(stage, "REPLICAS", ()):
            lr = np.asarray(d.l[replica], dtype=float).reshape(-1)
            ld = np.asarray(d.l[device], dtype=float).reshape(-1)
            diff = ~np.isclose(lr, ld, rtol=EQUAL_RTOL, atol=0.0)
            if diff.any():
                k = int(np.flatnonzero(diff)[0])
                entry = replicas.setdefault((replica, device), [0, lr[k], ld[k]])
                entry[0] += int(diff.sum())
                rep_any |= diff
        n_rep += int(rep_any.sum())
    lines = []
    fitted = ", ".join(_um(x) for x in tech.fitted_lengths)
    if outside:
        roles = "; ".join(f"{role} {_span(np.concatenate(v))}" for role, v in outside.items())
        lines.append(f"{n_out} of {total} designs use lengths outside those {tech.name} was fitted at "
                     f"({fitted}, +-{LENGTH_MARGIN * 100:g} %): {roles}. The {tech.model.value} model has one "
                     f"threshold for every length (no roll-off, DIBL, velocity saturation or mobility "
                     f"degradation), so its Iq and peak currents there can be far from the card's; verify "
                     f"them, or use a table technology (stagefront calibrate --tables).")
    if replicas:
        pairs = "; ".join(f"{rep} vs {dev} in {count} (e.g. {_um(lr)} vs {_um(ld)})"
                          for (rep, dev), (count, lr, ld) in replicas.items())
        lines.append(f"{n_rep} of {total} designs give a replica a different length from the device it stands "
                     f"for: {pairs}. The loop's match then rests on a threshold the {tech.model.value} model holds "
                     f"equal at every length and silicon does not.")
    return lines
