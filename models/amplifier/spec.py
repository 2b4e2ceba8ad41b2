"""The two-stage Miller-compensated amplifier an output stage sits in, as a study
describes it: the first stage as a transconductor with its output resistance, parasitic
capacitance and available current, the compensation capacitor from the output to the
driven node, the feedback factor and an optional resistive load. All SI.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..devices.tech import check_range


@dataclass(frozen=True, slots=True)
class Amplifier:
    """The surrounding amplifier (a two-stage Miller op-amp whose second stage is the
    output stage). All fields SI.

    The first stage is a transconductor gm1 into the driven node: gm1 = 2 pi ugf Cc / beta,
    so that the loop gain beta gm1 / (2 pi f Cc) of a Miller-compensated amplifier is 1 at
    the target unity-gain frequency ugf; an explicit `gm1` overrides it.
    """

    ugf: float  # Hz     target unity-gain frequency of the loop gain
    cc: float  # F       compensation capacitor, output to driven node
    r1: float  # ohm     first stage's output resistance at the driven node
    c1: float  # F       first stage's parasitic capacitance at the driven node
    i1: float  # A       largest current the first stage can deliver (slew)
    beta: float = 1.0  # 1  feedback factor (1: unity-gain follower)
    gm1: float = 0.0  # S   first-stage transconductance; 0: from ugf, cc and beta
    r_load: float = math.inf  # ohm  resistive load at the output (inf: none)
    cc_bounds: tuple | None = None  # F  (lower, upper) when the search sizes Cc per design (`Design.cc`)

    def __post_init__(self) -> None:
        check_range("ugf", self.ugf, 1.0, 1e11, "Hz")
        check_range("cc", self.cc, 0.0, 1e-6, "F")
        check_range("r1", self.r1, 1.0, 1e15, "ohm")
        check_range("c1", self.c1, 0.0, 1e-6, "F")
        check_range("i1", self.i1, 1e-12, 10.0, "A")
        check_range("beta", self.beta, 1e-6, 1.0, "")
        check_range("gm1", self.gm1, 0.0, 100.0, "S")
        check_range("r_load", self.r_load, 1e-3, math.inf, "ohm")
        if self.cc_bounds is not None:
            lo, hi = self.cc_bounds
            if not 0.0 < lo <= hi <= 1e-6:
                raise ValueError(f"cc bounds = ({lo!r}, {hi!r}) F must satisfy 0 < lower <= upper <= 1e-06 F")
        if self.gm1 == 0.0 and self.cc == 0.0:
            raise ValueError("cc = 0 F leaves gm1 = 2 pi ugf cc / beta at zero; give cc > 0 or gm1 > 0")

    @property
    def transconductance(self) -> float:
        """gm1 [S]: the explicit value, else 2 pi ugf Cc / beta."""
        return self.gm1 if self.gm1 > 0 else 2.0 * math.pi * self.ugf * self.cc / self.beta

    def gm1_for(self, cc):
        """gm1 [S] for compensation capacitances cc [F] (any shape): the explicit value, else
        2 pi ugf cc / beta."""
        return np.full(np.shape(cc), self.gm1) if self.gm1 > 0 else 2.0 * np.pi * self.ugf * np.asarray(cc) / self.beta

    def compensation(self, design_cc, idx):
        """Cc [F] per element: the design's own (`Design.cc`, at design indices idx) when the
        search sizes it, else the amplifier's value. Raises ValueError when the amplifier
        has bounds and the design no value."""
        if design_cc is not None:
            return np.asarray(design_cc, dtype=float)[idx]
        if self.cc_bounds is not None:
            raise ValueError("the study sizes the compensation capacitor (bounds in [amplifier] compensation): "
                             "the design needs its own value (a design file's compensation key)")
        return np.full(np.shape(idx), float(self.cc))
