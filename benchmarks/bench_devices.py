"""Throughput of models.devices.mos.current_partials over a population of 10^6 devices.

Run by hand (not a test): ``python benchmarks/bench_devices.py``. Prints devices per
second for the EKV and the square-law equations, best of a few repeats, so the figure is
the cost of the arithmetic rather than of a cold cache. The biases cover weak inversion to
strong inversion, triode and saturation.
"""
from __future__ import annotations

import platform
import time

import numpy as np

from models.devices import mos
from models.devices.tech import ModelKind, MosTech, Polarity

N_DEVICES = 1_000_000
REPEATS = 5
SEED = 1


def main() -> None:
    # Generic 0.8 um NMOS (Allen and Holberg, CMOS Analog Circuit Design, 2nd ed., Table 3.1-2);
    # the values only set the operating region, not the cost.
    mt = MosTech(
        vt0=0.7, kp=110e-6, n=1.3, gamma=0.4, phi=0.7, va_per_l=2.5e7, tc_vt=2.3e-3, mu_exp=-1.5,
        a_vt=5e-9, a_beta=1e-8, cox=2.3e-3, cov=2e-10, w_min=1e-6, l_min=1e-6,
    )
    rng = np.random.default_rng(SEED)
    w = 10.0 ** rng.uniform(-6.0, -4.0, N_DEVICES)  # m
    l = 10.0 ** rng.uniform(-6.0, -5.0, N_DEVICES)  # m
    vg = rng.uniform(0.3, 3.0, N_DEVICES)  # V
    vd = rng.uniform(0.0, 3.0, N_DEVICES)  # V
    vs = rng.uniform(0.0, 0.5, N_DEVICES)  # V
    print(f"models.devices.mos.current_partials, {N_DEVICES:.0e} devices, best of {REPEATS}"
          f" (numpy {np.__version__}, Python {platform.python_version()}, {platform.machine()})")
    for kind in (ModelKind.EKV, ModelKind.SQUARE_LAW):
        m = mos.at_conditions(mt, Polarity.N, kind, 300.15, 300.15)
        best = float("inf")
        for _ in range(REPEATS):
            t0 = time.perf_counter()
            mos.current_partials(m, w, l, vg, vd, vs, 0.0)
            best = min(best, time.perf_counter() - t0)
        print(f"  {kind.value:<11s} {best * 1e3:7.1f} ms  {N_DEVICES / best:10.3e} devices/s")


if __name__ == "__main__":
    main()
