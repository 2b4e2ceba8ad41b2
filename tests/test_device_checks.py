"""Device-level figures against textbook closed forms, a finite difference and facts of the
trade: capacitances in the triode region, the EKV interpolation's derivative, the table
grid's edges and the default diffusion extension.

Meyer's level-1 gate capacitances in triode (J. E. Meyer, "MOS models and circuit
simulation", RCA Review 32, 1971; the same expressions in P. Antognetti, G. Massobrio,
Semiconductor Device Modeling with SPICE, 2nd ed., McGraw-Hill 1993, ch. 4; from memory):
cgs = 2/3 C0 (1 - (VGST - VDS)^2 / (2 VGST - VDS)^2), cgd = 2/3 C0 (1 - VGST^2 / (2 VGST - VDS)^2),
C0 = Cox W L. At VDS = VGST / 2 these are 16/27 C0 and 10/27 C0, a point where a sign error
in either square shows (at VDS = 0 it would not).
"""
from __future__ import annotations

import numpy as np
import pytest
from stage_helpers import T_TEST, mos_tech

from models.devices import ekv, square_law
from models.devices.conditions import at_conditions
from models.devices.tech import ModelKind, Polarity


def test_square_law_triode_capacitances_at_half_the_overdrive():
    mt = mos_tech(vt0=0.5, gamma=0.5, phi=0.8)
    m = at_conditions(mt, Polarity.N, ModelKind.SQUARE_LAW, T_TEST, T_TEST)
    w, l = 10e-6, 1e-6
    c0, cov = mt.cox * w * l, mt.cov * w
    vgst = 1.0  # V: gate at VT + 1 V, source and bulk at 0 (no body effect)
    cgs, cgd, cgb, _, _ = square_law.capacitances(m, mt, w, l, mt.vt0 + vgst, 0.5 * vgst, 0.0)
    # Closed forms on both sides: rounding only.
    assert cgs - cov == pytest.approx(16.0 / 27.0 * c0, rel=1e-12)
    assert cgd - cov == pytest.approx(10.0 / 27.0 * c0, rel=1e-12)
    assert cgb == 0.0


def test_ekv_interpolation_derivative_matches_a_finite_difference():
    # F(x) = ln^2(1 + exp(x/2)) (Enz, Krummenacher, Vittoz, Analog Integrated Circuits and
    # Signal Processing 8, 1995, eq. for the interpolation function); F'(x) by central
    # difference with step 1e-5: truncation ~1e-11 relative, rounding ~1e-11: 1e-8 is ample.
    x = np.array([-30.0, -5.0, -1.0, 0.0, 0.7, 4.0, 25.0, 200.0])
    h = 1e-5
    fd = (ekv.ekv_f(x + h) - ekv.ekv_f(x - h)) / (2.0 * h)
    assert ekv.ekv_f_prime(x) == pytest.approx(fd, rel=1e-8, abs=0.0)


def test_a_point_beyond_any_one_edge_of_the_tables_is_flagged():
    # The table kind must not extrapolate: a rest point beyond any single edge of the grid
    # (VGS above the top, |VDS| beyond the span, the source below the bulk or above the top
    # VSB) counts as outside, each edge on its own; a point inside counts as inside.
    from pathlib import Path

    from models.devices.table import outside_table
    from optimise.files.techfile import load_tech

    root = Path(__file__).resolve().parents[1]
    t = load_tech(root / "studies" / "tech" / "demo180-bsim3-tables.toml").tables[Polarity.N]
    vgs_top, span, vsb_top = float(t.vgs[-1]), float(t.span), float(t.vsb[-1])
    inside = (0.5 * vgs_top, 0.5 * span, 0.0)  # (vgb, vdb, vsb) in the frame
    cases = [inside,
             (vgs_top + 0.05, 0.5 * span, 0.0),  # gate above the grid
             (0.5 * vgs_top, span + 0.05, 0.0),  # drain beyond the span
             (0.5 * vgs_top, 0.5 * span, -0.05),  # source below the bulk
             (vsb_top + 0.5 * vgs_top, vsb_top + 0.06, vsb_top + 0.05)]  # source above the top VSB
    got = outside_table(t, *(np.array([c[k] for c in cases]) for k in range(3)))
    assert got.tolist() == [False, True, True, True, True]


def test_default_diffusion_extension_is_five_lambda():
    # Lambda design rules of the MOSIS SCMOS kind (from memory): a contacted source/drain
    # reaches 5 lambda beyond the gate (poly-to-contact 2, contact 2, active overlap 1) and
    # L_min = 2 lambda, so the extension is 2.5 L_min when the file gives none.
    from stage_helpers import make_tech

    from models.devices.tech import ModelKind

    tech = make_tech(ModelKind.SQUARE_LAW, mos_tech(l_min=0.35e-6), mos_tech(l_min=0.5e-6))
    for pol, l_min in ((Polarity.N, 0.35e-6), (Polarity.P, 0.5e-6)):
        lam = l_min / 2.0
        assert tech.extension(pol) == pytest.approx(5.0 * lam, rel=1e-15)


@pytest.mark.parametrize("vsb", [0.0, 0.4])
def test_table_gate_voltage_for_a_current_carries_that_current(vsb):
    # The inverse of the table current (used for the gate capacitance at Iq and the solves'
    # starts): the gate it returns, put back into the forward interpolation, must carry the
    # current asked for, with the source above the bulk too (the source's own offset kept).
    # Newton on log I to 1e-12 or so: 1e-9 relative.
    from pathlib import Path

    from models.devices import mos
    from models.devices.table_data import TableSelect
    from optimise.files.techfile import load_tech

    root = Path(__file__).resolve().parents[1]
    tech = load_tech(root / "studies" / "tech" / "demo180-bsim3-tables.toml")
    t = tech.tables[Polarity.N]
    i = np.array([1e-7, 3e-6, 1e-4])
    n = i.size
    m = mos.at_conditions(tech.nmos, Polarity.N, ModelKind.TABLE, np.full(n, tech.tnom), tech.tnom,
                          table=TableSelect(t, t.slots["tt"], np.full(n, tech.tnom)))
    w, l = np.full(n, 5e-6), np.full(n, 0.36e-6)
    vs = np.full(n, vsb)
    vds = 0.5 * float(t.span)
    vg = mos.gate_voltage_sat(m, w, l, i, vs, 0.0, vds)
    assert np.all(vg - vs > 0.0)
    assert mos.current(m, w, l, vg, vs + vds, vs, 0.0) == pytest.approx(i, rel=1e-9, abs=0.0)


def test_table_narrow_width_weight_is_one_at_the_narrow_width_and_zero_at_the_reference():
    # The narrow-width correction is linear in 1/W through the two tabulated widths: all of it
    # at w_narrow, none at the reference width w_ref, half-way at the harmonic mean, and on
    # past w_ref towards 1/W = 0 (negative) for wider devices. Closed form: rounding only.
    from pathlib import Path

    from models.devices import mos
    from models.devices.table_data import TableSelect, constants
    from optimise.files.techfile import load_tech

    root = Path(__file__).resolve().parents[1]
    tech = load_tech(root / "studies" / "tech" / "demo180-bsim3-tables.toml")
    t = tech.tables[Polarity.N]
    wn, wr = float(t.w_narrow), float(t.w_ref)
    w = np.array([wn, wr, 2.0 / (1.0 / wn + 1.0 / wr), 1e3 * wr])
    n = w.size
    m = mos.at_conditions(tech.nmos, Polarity.N, ModelKind.TABLE, np.full(n, tech.tnom), tech.tnom,
                          table=TableSelect(t, t.slots["tt"], np.full(n, tech.tnom)))
    f = constants(m, w, np.full(n, 0.36e-6)).narrow
    expect = [1.0, 0.0, 0.5, (1e-3 / wr - 1.0 / wr) / (1.0 / wn - 1.0 / wr)]
    assert f == pytest.approx(expect, rel=1e-12, abs=1e-12)
