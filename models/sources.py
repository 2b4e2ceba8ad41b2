"""The bias sources' own check: a mirror source must keep its compliance voltage (the
output device's saturation voltage, or the study's `v_min`) across it at rest, at every
PVT point. Adds a margin and worded violations to those of `summary.check`; used by
`models.evaluate` only when the study describes mirrors. Pure numpy, no solving here.
"""
from __future__ import annotations

import numpy as np

from .circuit.mirrors import source_keys
from .summary import Violations, where


def compliance(stage, pvt, converged, corner, temp, vdd, violations, margins, explain=True):
    """Violations and margins with the mirror compliance check added.

    The margin "mirror_compliance" is (V_across - V_min) / V_min at the worst source and
    PVT point (>= 0 when met); it is added only when some source has a compliance voltage.
    pvt holds, per mirror source NAME, "mirror_v_NAME" (voltage across at rest) and
    "mirror_vmin_NAME" (its compliance voltage, 0 where unchecked), shapes (n, k).
    """
    keys = source_keys(stage.TOPOLOGY)
    names = [n for n in keys if f"mirror_vmin_{n}" in pvt and np.any(pvt[f"mirror_vmin_{n}"] > 0)]
    if not names:
        return violations, margins
    per = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        for name in names:
            v, lim = pvt[f"mirror_v_{name}"], pvt[f"mirror_vmin_{name}"]
            rel = np.where(lim > 0, (v - lim) / lim, np.inf)
            per[name] = np.where(converged, np.nan_to_num(rel, nan=-1.0), np.inf)
    stack = np.stack([per[name] for name in names])  # (sources, n, k)
    n = stack.shape[1]
    margins = {**margins, "mirror_compliance": stack.min(axis=(0, 2))}
    if not explain:
        return violations, margins

    def word(i):
        out = list(violations[i])
        for name in names:
            j = int(np.argmin(per[name][i]))
            if per[name][i, j] < 0:
                out.append(f"bias source {keys[name]}: {pvt[f'mirror_v_{name}'][i, j]:.3g} V across its mirror is "
                           f"below the mirror's compliance voltage {pvt[f'mirror_vmin_{name}'][i, j]:.3g} V "
                           f"at {where(corner, temp, vdd, j)}")
        return out

    return Violations(n, word), margins
