"""Monte Carlo confirmation of the linear mismatch estimate of Iq.

`models.evaluate.evaluate` reports Iq's 1-sigma spread from device mismatch by linear
(adjoint) propagation. It is confirmed here by drawing Pelgrom mismatch on every device and
solving each draw exactly, at one PVT point: the study's typical corner (tt when it has it,
else its first corner), its first (nominal) temperature and its nominal supply.

`stagefront evaluate --montecarlo`, the sweep's Monte Carlo of each cell's knee design and
the report's mismatch section all confirm through `confirm`, so they agree on the point, the
draws and the statistics.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner
from models.evaluate import Design, Result, evaluate, monte_carlo_iq


@dataclass(frozen=True)
class Confirmation:
    """Monte Carlo Iq of one design beside its linear estimate, at one PVT point.

    iq holds the draws that solved, shape (m,) [A] (m = samples - failed); temp [K];
    vdd [V]; iq_nom [A] is Iq without mismatch; linear_sigma_pct is the linear estimate.
    """

    samples: int
    seed: int
    corner: Corner
    temp: float
    vdd: float
    iq: np.ndarray
    failed: int
    iq_nom: float
    linear_sigma_pct: float

    @property
    def iq_mean(self) -> float | None:
        """Mean Iq of the solved draws [A]; None when none solved."""
        return float(self.iq.mean()) if self.iq.size else None

    @property
    def sigma_pct(self) -> float | None:
        """Sample 1-sigma of Iq in percent of its mean; None with fewer than two solved draws
        or a zero mean (a stage cut off in every draw)."""
        if self.iq.size < 2 or self.iq.mean() == 0:
            return None
        return float(100 * self.iq.std(ddof=1) / self.iq.mean())

    def as_dict(self) -> dict:
        """The keys `stagefront evaluate --montecarlo` prints (JSON-safe)."""
        return {"samples": self.samples, "corner": self.corner.value, "temp_c": self.temp - ZERO_CELSIUS,
                "vdd_v": self.vdd, "seed": self.seed, "failed": self.failed, "iq_mean_a": self.iq_mean,
                "iq_sigma_pct": self.sigma_pct, "linear_sigma_pct": self.linear_sigma_pct}


def confirm(design: Design, study, samples: int, seed: int, result: Result | None = None) -> Confirmation:
    """Draw mismatch `samples` times, solve each draw and set the spread beside the linear estimate.

    Parameters
    ----------
    design : models.evaluate.Design
        One design (arrays of shape (1,)).
    study : optimise.files.study.Study
        Technology, conditions (which fix the PVT point) and targets.
    samples : int
        Number of draws N (>= 2 for a sample sigma; callers check their own input).
    seed : int
        Seed of the draws (numpy default_rng).
    result : models.evaluate.Result, optional
        evaluate() of this design over the study, when the caller has it already;
        otherwise it is solved here.

    Returns
    -------
    Confirmation
    """
    cond = study.conditions
    corner = cond.typical
    res = result if result is not None else evaluate(design, study.tech, cond, study.targets)
    iq, ok = monte_carlo_iq(design, study.tech, corner, cond.temps[0], cond.vdd_nom, samples,
                            np.random.default_rng(seed), mirrors=study.targets.mirrors.get(design.architecture))
    j = cond.nominal_index()
    return Confirmation(int(samples), int(seed), corner, cond.temps[0], cond.vdd_nom, iq[ok], int((~ok).sum()),
                        float(res.pvt["iq_a"][0, j]), float(res.pvt["iq_sigma_pct"][0, j]))


def confirm_sigma(design: Design, study, samples: int, seed: int, result: Result | None = None) -> dict:
    """`confirm` as the dict `stagefront evaluate --montecarlo` prints.

    Keys: samples, corner, temp_c [C], vdd_v [V], seed, failed, iq_mean_a [A],
    iq_sigma_pct and linear_sigma_pct [% of Iq]; iq_mean_a and iq_sigma_pct are None when
    too few draws solved to give them.
    """
    return confirm(design, study, samples, seed, result).as_dict()
