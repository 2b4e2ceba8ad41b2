"""The compiled loop of the table kind (`optimise.search.compiled`) against the numpy
reference it replaces (`models.devices.table_data._forward_numpy`), over every branch of
the interpolation: both polarities, every corner slot, temperatures on and between the
tabulated ones, lengths across the range, narrow and wide devices, threshold deviations,
voltages inside the grid and beyond each of its edges (where the reference continues
linearly). Then whole evaluations with and without it.

The two compute the same expressions in the same order, except that the compiled loop
multiplies by the reciprocals of the cell widths where the reference divides: one rounding
apart per operation, so 1e-12 relative on the current and its derivatives leaves room
for a few hundred roundings and none for a wrong term.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from models.devices import table_data
from models.devices.mos import at_conditions
from models.devices.table_data import TableSelect, constants
from models.devices.tech import ModelKind, Polarity
from optimise.files.techfile import load_tech
from optimise.search import compiled

ROOT = Path(__file__).resolve().parents[1]
TECH = ROOT / "studies" / "tech" / "demo180-bsim3-tables.toml"
RTOL = 1e-12

pytestmark = pytest.mark.skipif(compiled.numba is None, reason="numba is not installed")


@pytest.fixture(scope="module")
def tech():
    return load_tech(TECH)


def _inputs(tech, pol, rng, n, temps):
    t = tech.tables[Polarity(pol)]
    mt = tech.mos(Polarity(pol))
    slots = rng.choice(sorted(set(t.slots.values())), n)
    m = at_conditions(mt, pol, ModelKind.TABLE, temps, tech.tnom, table=TableSelect(t, slots, temps))
    l = np.exp(rng.uniform(np.log(t.lengths[0]), np.log(t.lengths[-1]), n))
    l[:8] = t.lengths[rng.integers(0, len(t.lengths), 8)]  # on tabulated lengths too
    w = np.exp(rng.uniform(np.log(t.w_narrow), np.log(200e-6), n))
    c = constants(m, w, l, dvt=rng.normal(0.0, 0.01, n), dbeta=rng.normal(0.0, 0.01, n))
    # Inside the grid, and beyond each edge: VGS below and above, VDS past the span, VSB
    # below zero and above the top node.
    vgs = rng.uniform(t.vgs[0] - 0.3, t.vgs[-1] + 0.3, n)
    vds = rng.uniform(-0.05, t.span * 1.1, n)
    vsb = rng.uniform(-0.05, t.vsb[-1] * 1.1, n)
    vds[:20] = 0.0
    vsb[20:60] = 0.0
    return c, vgs, vds, vsb


@pytest.mark.parametrize("pol", [1, -1])
@pytest.mark.parametrize("between", [False, True], ids=["on-temperatures", "between-temperatures"])
def test_compiled_loop_matches_the_numpy_reference(tech, pol, between):
    rng = np.random.default_rng(11 if between else 7)
    n = 3000
    t = tech.tables[Polarity(pol)]
    temps = (rng.uniform(t.temps[0], t.temps[-1], n) if between
             else t.temps[rng.integers(0, len(t.temps), n)].astype(float))
    c, vgs, vds, vsb = _inputs(tech, pol, rng, n, temps)
    assert c.base.shape[1] == (4 if between else 2)  # both blends exercised
    ref = table_data._forward_numpy(c, vgs, vds, vsb)
    out = compiled.forward(c, vgs, vds, vsb)
    for name, a, b in zip(("i", "di/dvgs", "di/dvds", "di/dvsb"), out, ref):
        # Relative to the element's largest term, so that a derivative crossing zero is held
        # to the same rounding as its neighbours.
        scale = np.maximum(np.abs(b), 1e-6 * np.abs(ref[0]) + 1e-300)
        assert np.max(np.abs(a - b) / scale) < RTOL, name


def test_evaluations_agree_with_and_without_the_compiled_loop(tech):
    from models.devices.constants import ZERO_CELSIUS
    from models.devices.tech import Corner
    from models.evaluate import Conditions, Design, evaluate
    from optimise.files.study import load_design, load_study

    study = load_study(ROOT / "studies" / "sensor-buffer-180.toml")
    base = load_design(ROOT / "studies" / "sensor-buffer-floating-loop.toml", study.tech)
    rng = np.random.default_rng(5)
    n = 20

    def spread(a, lo=0.0, hi=np.inf):  # log-uniform over a factor of 2 around the demo
        return np.clip(np.repeat(a, n) * np.exp(rng.uniform(-0.7, 0.7, n)), lo, hi)

    design = Design(base.architecture, {k: spread(v, 1e-6) for k, v in base.w.items()},
                    {k: spread(v, 0.2e-6, 1.6e-6) for k, v in base.l.items()},
                    {k: spread(v) for k, v in base.bias.items()}, base.tied)
    cond = Conditions((Corner.TT, Corner.SS), (27 + ZERO_CELSIUS, 80 + ZERO_CELSIUS), 1.8, 1.62, 1.98)
    previous = table_data._KERNEL
    try:
        table_data.set_kernel(None)
        ref = evaluate(design, study.tech, cond, study.targets)
        table_data.set_kernel(compiled.forward)
        out = evaluate(design, study.tech, cond, study.targets)
    finally:
        table_data.set_kernel(previous)
    assert np.array_equal(ref.converged, out.converged) and ref.converged.mean() > 0.5
    for key in ("iq_a", "headroom_high_v", "iout_source_a", "iq_sigma_pct", "supply_sens_pct_per_v"):
        a, b = np.asarray(out.pvt[key], float), np.asarray(ref.pvt[key], float)
        ok = ref.converged & np.isfinite(b)
        # Solves to 1e-10 and below on both sides: the answers agree to that, not to 1e-12.
        assert np.allclose(a[ok], b[ok], rtol=1e-8, atol=1e-15), key


def test_the_environment_switch_keeps_the_numpy_reference(monkeypatch):
    monkeypatch.setenv("STAGEFRONT_NO_COMPILED", "1")
    monkeypatch.setattr(compiled, "_installed", False)
    monkeypatch.setattr(table_data, "_KERNEL", None)
    assert compiled.install() is False and table_data._KERNEL is None
    monkeypatch.delenv("STAGEFRONT_NO_COMPILED")
    assert compiled.install() is True and table_data._KERNEL is compiled.forward
