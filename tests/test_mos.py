"""Device equations of models.devices.mos against published values, hand calculations and themselves.

References: [AH02] P. E. Allen, D. R. Holberg, CMOS Analog Circuit Design, 2nd ed., Oxford
University Press, 2002 (Table 3.1-2, Example 3.1-1, Sec. 2.5 Eqs. (8), (9)); [EKV95] C. C. Enz,
F. Krummenacher, E. A. Vittoz, "An analytical MOS transistor model valid in all regions of
operation and dedicated to low-voltage and low-current applications", Analog Integrated
Circuits and Signal Processing 8(1):83-114, 1995 (equations from memory); [Bin08] D. M. Binkley,
Tradeoffs and Optimization in Analog CMOS Design, Wiley, 2008 (from memory). Values taken from a
published table or derived from its equations by hand are asserted as equalities; rules of
thumb remembered from the literature only bound sanity bands.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from models.devices import mos
from models.devices.constants import T_NOMINAL, ZERO_CELSIUS, thermal_voltage
from models.devices.tech import ModelKind, MosTech, Polarity

EKV = ModelKind.EKV
SQ = ModelKind.SQUARE_LAW
T300 = 300.0  # K, the temperature of the hand derivations below


def ah02_tech(polarity: Polarity, va_per_l: float | None = None) -> MosTech:
    """Generic 0.8 um process of [AH02] Table 3.1-2: VT0, K', gamma, lambda at L = 1 um, 2|phiF|.

    n = 1.3 is not in that table; it is the slope factor the EKV checks below are written for.
    tc_vt = 2.3 mV/K and mu_exp = -1.5 are [AH02] Sec. 2.5 Eqs. (9) and (8).
    The mismatch and capacitance fields are not used here.
    """
    if polarity == Polarity.N:
        # [AH02] Table 3.1-2: lambda = 0.04 /V at L = 1 um -> VA/L = 1 / (0.04 * 1e-6) V/m
        vt0, kp, gamma, phi, vapl = 0.7, 110e-6, 0.4, 0.7, 1.0 / (0.04 * 1e-6)
    else:
        # [AH02] Table 3.1-2: lambda = 0.05 /V at L = 1 um
        vt0, kp, gamma, phi, vapl = 0.7, 50e-6, 0.57, 0.8, 1.0 / (0.05 * 1e-6)
    return MosTech(
        vt0=vt0, kp=kp, n=1.3, gamma=gamma, phi=phi,
        va_per_l=vapl if va_per_l is None else va_per_l,
        tc_vt=2.3e-3, mu_exp=-1.5, a_vt=5e-9, a_beta=1e-8, cox=2.3e-3, cov=2e-10,
        w_min=1e-6, l_min=1e-6,
    )


def device(kind: ModelKind, polarity: Polarity = Polarity.N, temp: float = T300, va_per_l: float | None = None):
    """A Mos of one polarity at `temp` with the tech constants holding at `temp` (no shift)."""
    return mos.at_conditions(ah02_tech(polarity, va_per_l), polarity, kind, temp, temp)


W, L = 5e-6, 1e-6


# ---------------------------------------------------------------------------------------
# EKV interpolation function
# ---------------------------------------------------------------------------------------
def test_ekv_f_inverse_round_trip():
    ic = np.logspace(-3, 3, 121)
    # Exact inverse pair; rtol 1e-9 leaves room for the log/exp rounding over six decades.
    np.testing.assert_allclose(mos.ekv_f(mos.ekv_f_inverse(ic)), ic, rtol=1e-9)


@pytest.mark.parametrize(
    "ic, v",
    [
        # [EKV95] inverse of F: v = 2 ln(exp(sqrt(IC)) - 1), evaluated by hand to 4 decimals
        (0.01, -4.5043),
        (0.1, -1.9780),
        (1.0, 1.0826),
        (10.0, 6.2381),
        (100.0, 19.9999),
    ],
)
def test_ekv_f_inverse_table_values(ic, v):
    # Table quotes 4 decimals: half a unit of the last digit.
    assert mos.ekv_f_inverse(ic) == pytest.approx(v, abs=5e-5)


@pytest.mark.parametrize(
    "ic, ratio",
    [
        # [EKV95] gm n UT / ID = (1 - exp(-sqrt(IC))) / sqrt(IC), evaluated by hand to 4 decimals
        (0.1, 0.8573),
        (1.0, 0.6321),
        (10.0, 0.3028),
    ],
)
def test_gm_over_id_matches_classic_ekv(ic, ratio):
    m = device(EKV, va_per_l=math.inf)
    i_target = ic * mos.specific_current(m, W, L)
    # VD = 3 V: the reverse term is below exp(-100) of the forward one (deep saturation).
    vg = mos.gate_voltage_sat(m, W, L, i_target, vs=0.0)
    i, gg, _, _ = mos.current_partials(m, W, L, vg, 3.0, 0.0)
    assert i == pytest.approx(i_target, rel=1e-12)
    normalised = gg * m.n * m.ut / i
    # Exact derivative of the ln^2 form, so only rounding separates the two.
    assert normalised == pytest.approx((1.0 - math.exp(-math.sqrt(ic))) / math.sqrt(ic), rel=1e-9)
    # Table quotes 4 decimals.
    assert normalised == pytest.approx(ratio, abs=5e-5)


def test_weak_inversion_slope_is_n_ut_ln10_per_decade():
    m = device(EKV, va_per_l=math.inf)
    ispec = mos.specific_current(m, W, L)
    vg = mos.gate_voltage_sat(m, W, L, np.array([1e-9, 1e-8]) * ispec, vs=0.0)
    slope = vg[1] - vg[0]
    # Hand calc: n UT ln 10 = 1.3 * 25.852 mV * 2.302585 = 77.384 mV/dec at 300 K (UT = kT/q, SI 2019 k and q).
    # Tolerance: F(x) = exp(x) (1 + O(sqrt(IC))) and sqrt(IC) <= 1e-4 here.
    assert slope == pytest.approx(77.384e-3, rel=1e-3)
    assert slope == pytest.approx(m.n * m.ut * math.log(10.0), rel=1e-3)


def test_nominal_temperature_is_the_spice_default():
    # SI Brochure, 9th ed.: 0 degC = 273.15 K; the SPICE default TNOM is 27 degC (ngspice manual,
    # .options TNOM), the temperature technology files hold at unless they say otherwise.
    assert ZERO_CELSIUS == 273.15
    assert T_NOMINAL - ZERO_CELSIUS == pytest.approx(27.0, abs=1e-12)


@pytest.mark.parametrize(
    "temp, ut",
    [
        # UT = kT/q with the exact k and q of the SI Brochure, 9th ed. (BIPM 2019), by hand
        (300.0, 25.852e-3),
        (300.15, 25.865e-3),
        (298.15, 25.693e-3),
    ],
)
def test_thermal_voltage(temp, ut):
    # Quoted to 1 uV: half a unit of the last digit.
    assert thermal_voltage(temp) == pytest.approx(ut, abs=0.5e-6)


def test_ekv_absolute_current_from_the_specific_current():
    m = device(EKV, va_per_l=math.inf)
    # [EKV95] (from memory; also C. Enz, E. Vittoz, Charge-Based MOS Transistor Modeling, Wiley
    # 2006, ch. 3): Ispec = 2 n beta UT^2 with beta = KP W/L. Hand calc with [AH02] Table 3.1-2
    # K' = 110 uA/V^2, n = 1.3, W/L = 5, UT = 25.852 mV at 300 K:
    # 2 * 1.3 * 110e-6 * 5 * 0.025852^2 = 0.95571 uA.
    assert mos.specific_current(m, W, L) == pytest.approx(0.95571e-6, rel=2e-5)  # 5 digits
    # At pinch-off equal to the source potential (VP = VS, so VG = VT0 + n VS; here VS = 0)
    # the forward interpolation function is F(0) = ln^2(2) = 0.480453 ([EKV95] F(v) = ln^2(1 + e^(v/2))),
    # so the saturated current is 0.480453 * 0.95571 uA = 0.45917 uA.
    i = mos.current(m, W, L, vg=m.vt0, vd=3.0, vs=0.0)
    assert i == pytest.approx(0.45917e-6, rel=2e-5)
    # IC = 1 lies 1.0826 UT of VP - VS above that ([EKV95] inverse, the table above): the
    # current there is Ispec itself.
    vg = m.vt0 + m.n * m.ut * 1.0826
    assert mos.current(m, W, L, vg=vg, vd=3.0, vs=0.0) == pytest.approx(0.95571e-6, rel=1e-4)



# ---------------------------------------------------------------------------------------
# Square law against the textbook
# ---------------------------------------------------------------------------------------
def test_square_law_nmos_allen_holberg_example():
    m = device(SQ, Polarity.N)
    i = mos.current(m, 5e-6, 1e-6, vg=2.0, vd=3.0, vs=0.0, vb=0.0)
    # Hand calc: 0.5 * 110u * 5 * (2 - 0.7)^2 * (1 + 0.04 * 3) = 520.52 uA; only rounding differs.
    assert i == pytest.approx(520.52e-6, rel=1e-12)
    # [AH02] Example 3.1-1 (the book quotes 520 uA; recomputed by hand 520.5 uA); half a unit of the last digit.
    assert i == pytest.approx(520.5e-6, abs=0.05e-6)


def test_square_law_pmos_allen_holberg_example():
    m = device(SQ, Polarity.P)
    # Source and bulk on a 5 V rail: |VGS| = 2 V, |VDS| = 3 V, VBS = 0.
    i = mos.current(m, 5e-6, 1e-6, vg=3.0, vd=2.0, vs=5.0, vb=5.0)
    # Hand calc: 0.5 * 50u * 5 * (2 - 0.7)^2 * (1 + 0.05 * 3) = 242.9375 uA.
    assert i == pytest.approx(242.9375e-6, rel=1e-12)
    # [AH02] Example 3.1-1 (the book quotes 243 uA; recomputed by hand 242.9 uA); half a unit of the last digit.
    assert i == pytest.approx(242.9e-6, abs=0.05e-6)


@pytest.mark.parametrize("polarity", [Polarity.N, Polarity.P])
def test_slow_corner_of_the_textbook_spread(polarity):
    # [AH02] Table 3.1-2 spreads: VT0 0.7 +- 0.15 V, K' +- 10 %. The slow corner (threshold
    # magnitude 0.85 V, K' x 0.9) as a corner shift. Hand calc at |VGS| = 2 V, |VDS| = 3 V:
    # NMOS 0.5 * 99u * 5 * 1.15^2 * (1 + 0.04 * 3) = 366.597 uA; PMOS 0.5 * 45u * 5 * 1.15^2 * 1.15 = 171.098 uA.
    m = mos.at_conditions(ah02_tech(polarity), polarity, SQ, T300, T300, dvt=0.15, kp_scale=0.9)
    vg, vd, vs, vb = physical(polarity, (2.0, 3.0, 0.0, 0.0))
    expected = 366.597e-6 if polarity == Polarity.N else 171.0984e-6
    assert mos.current(m, W, L, vg, vd, vs, vb) == pytest.approx(expected, rel=1e-6)  # 7 digits by hand


# ---------------------------------------------------------------------------------------
# One code path for both polarities; partials against finite differences
# ---------------------------------------------------------------------------------------
# Frame voltages (gate, drain, source, bulk) of an NMOS with VT0 = 0.7 V; a PMOS gets the
# same frame voltages below a 3 V rail.
REGIONS = {
    "weak": (0.50, 1.0, 0.0, 0.0),
    "near-threshold": (0.72, 1.0, 0.0, 0.0),
    "strong-saturation": (1.5, 2.0, 0.0, 0.0),
    "triode": (2.0, 0.2, 0.0, 0.0),
    "reversed-vds": (1.8, 0.0, 0.3, 0.0),
    "reversed-saturation": (1.0, 0.0, 1.0, 0.0),
    "lifted-source": (2.2, 2.5, 0.5, 0.0),
    "forward-body": (1.2, 1.5, 0.0, 0.2),
}
RAIL = 3.0


def physical(polarity: Polarity, frame):
    return tuple(np.asarray(frame, dtype=float)) if polarity == Polarity.N else tuple(RAIL - np.asarray(frame))


@pytest.mark.parametrize("kind", [EKV, SQ])
def test_pmos_mirrors_nmos(kind):
    mt = ah02_tech(Polarity.N)
    mn = mos.at_conditions(mt, Polarity.N, kind, T300, T300)
    mp = mos.at_conditions(mt, Polarity.P, kind, T300, T300)  # same magnitudes, other polarity
    frame = np.array(list(REGIONS.values())).T  # (4, n_regions)
    out_n = mos.current_partials(mn, W, L, *frame)
    out_p = mos.current_partials(mp, W, L, *(-frame))
    # Frame current and the partials of the physical drain current agree; -x is exact in
    # floating point, so only the last bit can differ.
    for a, b in zip(out_n, out_p):
        np.testing.assert_allclose(b, a, rtol=1e-14, atol=0.0)


def _central(fun, v, k, h=1e-6):
    up, dn = list(v), list(v)
    up[k] += h
    dn[k] -= h
    return (fun(*up) - fun(*dn)) / (2.0 * h)


@pytest.mark.parametrize("region", list(REGIONS))
@pytest.mark.parametrize("polarity", [Polarity.N, Polarity.P])
@pytest.mark.parametrize("kind", [EKV, SQ])
def test_partials_match_central_differences(kind, polarity, region):
    m = device(kind, polarity)
    v = physical(polarity, REGIONS[region])

    def drain_current(vg, vd, vs, vb):  # physical current into the drain
        return polarity * mos.current(m, W, L, vg, vd, vs, vb)

    _, gg, gd, gs = mos.current_partials(m, W, L, *v)
    analytic = np.array([gg, gd, gs, -(gg + gd + gs)], dtype=float)
    numeric = np.array([_central(drain_current, v, k) for k in range(4)])
    # h = 1 uV: truncation ~ (h / UT)^2 / 6 < 1e-9 relative, rounding ~ eps I / h; the
    # absolute floor only matters for partials that are zero or nearly so.
    scale = np.max(np.abs(analytic))
    np.testing.assert_allclose(numeric, analytic, rtol=1e-6, atol=1e-9 * scale + 1e-30)


@pytest.mark.parametrize("i", [1e-9, 1e-6, 1e-4])
@pytest.mark.parametrize("polarity", [Polarity.N, Polarity.P])
@pytest.mark.parametrize("kind", [EKV, SQ])
def test_diode_voltage_is_exact(kind, polarity, i):
    m = device(kind, polarity)  # length modulation on
    vs, vb = physical(polarity, (0.0, 0.0, 0.3, 0.0))[2:]  # source lifted 0.3 V above the bulk
    vg = mos.diode_voltage(m, W, L, i, vs, vb)
    # Newton stops once its step is below 1e-8 V (models.devices.mos.refine_diode): quadratic
    # convergence leaves far less than that in the voltage, up to 2e-12 of the current (measured,
    # square law at 1 nA); 1e-11 bounds it.
    assert mos.current(m, W, L, vg, vg, vs, vb) == pytest.approx(i, rel=1e-11)


@pytest.mark.parametrize("tied", [False, True])
@pytest.mark.parametrize("i", [1e-8, 1e-6, 1e-4])
@pytest.mark.parametrize("polarity", [Polarity.N, Polarity.P])
@pytest.mark.parametrize("kind", [EKV, SQ])
def test_source_voltage_is_exact_in_saturation(kind, polarity, i, tied):
    # The inverse for the source (a follower, or a control device whose source is the unknown):
    # the device with its gate 2 V from the bulk, its source where the function puts it and its
    # drain 3 V beyond (deep saturation: the EKV reverse term is below e^-100) must carry i.
    m = device(kind, polarity)  # length modulation on, with |VDS| = 3 V in its factor
    vb = 0.0 if polarity == Polarity.N else RAIL
    vg = vb + polarity * 2.0
    # With a mismatch deviation of the instance (10 mV, +5 %), which both calls must honour.
    dev = dict(dvt=0.01, dbeta=0.05)
    vs = mos.source_voltage_sat(m, W, L, i, vg, vb, vds=3.0, tied=tied, **dev)
    vd = vs + polarity * 3.0
    assert mos.current(m, W, L, vg, vd, vs, vs if tied else vb, **dev) == pytest.approx(i, rel=1e-9)


# ---------------------------------------------------------------------------------------
# Body effect
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("lift", [0.3, 1.0])
def test_body_effect_ekv_is_n_times_the_lift(lift):
    m = device(EKV)
    i0 = 10e-6
    vg0 = mos.gate_voltage_sat(m, W, L, i0, vs=0.0, vds=2.0)
    # [EKV95]: VP = (VG - VT0)/n, so VP - VS is unchanged when
    # VG rises by n * VS; drain lifted too so VDS (and the CLM factor) stays the same.
    i_lifted = mos.current(m, W, L, vg0 + m.n * lift, 2.0 + lift, lift, 0.0)
    i_ref = mos.current(m, W, L, vg0, 2.0, 0.0, 0.0)
    assert i_ref == pytest.approx(i0, rel=1e-9)
    assert i_lifted == pytest.approx(i_ref, rel=1e-12)


@pytest.mark.parametrize("vsb", [0.5, 1.0])
def test_body_effect_square_law_level1(vsb):
    m = device(SQ)
    vg0 = 1.5
    # SPICE level-1 threshold (ngspice mos1load.c: von = VTO + gamma (sqrt(phi - vbs) - sqrt(phi))):
    # the gate must rise by the lift plus gamma (sqrt(phi + VSB) - sqrt(phi)).
    dvg = vsb + m.gamma * (math.sqrt(m.phi + vsb) - math.sqrt(m.phi))
    i_lifted = mos.current(m, W, L, vg0 + dvg, 2.0 + vsb, vsb, 0.0)
    i_ref = mos.current(m, W, L, vg0, 2.0, 0.0, 0.0)
    assert i_lifted == pytest.approx(i_ref, rel=1e-12)


def test_body_effect_square_law_hand_value():
    m = device(SQ)
    i_ref = mos.current(m, W, L, 1.5, 2.0, 0.0, 0.0)
    # Hand calc with [AH02] Table 3.1-2 (gamma = 0.4 V^0.5, 2|phiF| = 0.7 V), VSB = 1 V:
    # 0.4 * (sqrt(1.7) - sqrt(0.7)) = 0.186872 V of extra threshold.
    vg = mos.gate_voltage_sat(m, W, L, i_ref, vs=1.0, vds=2.0)
    assert vg - 1.5 - 1.0 == pytest.approx(0.186872, abs=5e-7)


# ---------------------------------------------------------------------------------------
# Temperature
# ---------------------------------------------------------------------------------------
def test_weak_inversion_current_rises_with_temperature():
    mt = ah02_tech(Polarity.N)
    temps = np.array([250.0, 300.0, 350.0, 400.0])
    m = mos.at_conditions(mt, Polarity.N, EKV, temps, T300)
    # VGS = 0.5 V, 0.2 V below VT0: weak inversion, where the falling threshold and the
    # rising UT both raise the current (mobility loss is a power, not an exponential).
    i = mos.current(m, W, L, 0.5, 1.0, 0.0)
    assert np.all(np.diff(i) > 0.0)


@pytest.mark.parametrize("kind", [EKV, SQ])
def test_both_polarities_gain_current_as_the_threshold_falls(kind):
    # [AH02] Sec. 2.5 Eq. (9): the threshold magnitude falls with temperature for NMOS and PMOS
    # alike. With mobility held (mu_exp = 0) and VGS 1.3 V above VT0 (strong inversion, where
    # UT hardly matters), the physical current of both polarities must rise with temperature; a
    # sign slip in either polarity's threshold law makes one of them fall. The law's size is
    # checked against ngspice's own temperature handling in test_mos_ngspice.py.
    for pol in (Polarity.N, Polarity.P):
        mt = dataclasses.replace(ah02_tech(pol, math.inf), mu_exp=0.0)
        m = mos.at_conditions(mt, pol, kind, np.array([250.0, 300.0, 350.0]), T300)
        vg, vd, vs, vb = physical(pol, (2.0, 3.0, 0.0, 0.0))
        i = mos.current(m, W, L, vg, vd, vs, vb)
        assert np.all(np.diff(i) > 0.0), pol
        # Linear in T: the second difference of the threshold vanishes to rounding.
        assert abs(m.vt0[0] - 2 * m.vt0[1] + m.vt0[2]) < 1e-15


@pytest.mark.parametrize(
    "temp, ratio",
    [
        # mu ~ T^-1.5 ([AH02] Sec. 2.5 Eq. (8)) at T0 = 300 K, (T/T0)^-1.5 by hand
        (400.0, 0.6495),
        (350.0, 0.7936),
        (250.0, 1.3145),
    ],
)
def test_kp_temperature_ratio(temp, ratio):
    mt = ah02_tech(Polarity.N)
    m = mos.at_conditions(mt, Polarity.N, SQ, temp, T300)
    # Quoted to 4 decimals.
    assert m.kp / mt.kp == pytest.approx(ratio, abs=5e-5)


# ---------------------------------------------------------------------------------------
# Saturation voltage
# ---------------------------------------------------------------------------------------
def test_saturation_voltage_weak_inversion_limit():
    m = device(EKV, va_per_l=math.inf)
    ispec = mos.specific_current(m, W, L)
    i_sat = 1e-6 * ispec
    vg = mos.gate_voltage_sat(m, W, L, i_sat, vs=0.0)
    vdsat = mos.saturation_voltage(m, W, L, i_sat)
    # Weak inversion: Id = Isat (1 - exp(-VDS / UT)) (the forward minus reverse exponential of
    # [EKV95] eq. for IC << 1; E. Vittoz, J. Fellrath, "CMOS analog integrated circuits based on
    # weak inversion operation", IEEE JSSC 12(3), 1977), so at the saturation voltage the device
    # must carry all but exp(-VDSsat/UT) of its saturated current: 1 - e^-4 = 0.98168 for the
    # 4 UT onset of [EKV95] (from memory). The sqrt(IC) corrections are 1e-3 here.
    i = mos.current(m, W, L, vg, vdsat, 0.0)
    assert i / i_sat == pytest.approx(1.0 - math.exp(-4.0), rel=2e-3)
    # [Bin08]: "4 UT, about 0.10 V, in weak inversion"; a band, from memory.
    assert 0.09 < vdsat < 0.11


def test_saturation_voltage_strong_inversion_is_the_pinch_off():
    m = device(EKV, va_per_l=math.inf)
    ispec = mos.specific_current(m, W, L)
    i_sat = 1e4 * ispec  # IC = 1e4
    vg = mos.gate_voltage_sat(m, W, L, i_sat, vs=0.0)
    vdsat = mos.saturation_voltage(m, W, L, i_sat)
    # Strong inversion: the channel pinches off where VD reaches VP = (VG - VT0)/n ([EKV95],
    # from memory; the square law's VDSsat = (VG - VT)/n with the slope factor). VDSsat lies
    # 4 UT past it: within 4 UT / (2 UT sqrt(IC)) = 2 % of VP - VS at IC = 1e4.
    vp = (vg - m.vt0) / m.n
    assert vdsat == pytest.approx(vp, rel=0.025)
    assert vdsat > vp
    # ... and the device carries its saturated current there, less the reverse term
    # F(-4) / F(2 sqrt(IC)) = ln^2(1 + e^-2) / 1e4 = 1.6e-6.
    assert mos.current(m, W, L, vg, vdsat, 0.0) == pytest.approx(i_sat, rel=1e-5)


def test_saturation_voltage_square_law_is_overdrive():
    m = device(SQ, va_per_l=math.inf)  # no length modulation: I = beta/2 (VGS - VT)^2 exactly
    vg = 1.5
    i = mos.current(m, W, L, vg, 2.0, 0.0)
    # Shichman-Hodges / SPICE level 1: saturation starts at VDS = VGS - VT.
    assert mos.saturation_voltage(m, W, L, i) == pytest.approx(vg - 0.7, rel=1e-12)


@pytest.mark.parametrize("kind", [EKV, SQ])
def test_saturation_voltage_slope_matches_central_difference(kind):
    m = device(kind)
    i = np.array([1e-9, 1e-7, 1e-5, 1e-3])
    v, dv = mos.saturation_voltage(m, W, L, i, slope=True)
    assert np.array_equal(v, mos.saturation_voltage(m, W, L, i))
    h = 1e-5 * i
    fd = (mos.saturation_voltage(m, W, L, i + h) - mos.saturation_voltage(m, W, L, i - h)) / (2 * h)
    np.testing.assert_allclose(dv, fd, rtol=1e-7)  # central difference, truncation ~1e-10


# ---------------------------------------------------------------------------------------
# Shapes
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", [EKV, SQ])
def test_batch_of_devices_keeps_its_shape(kind):
    m = device(kind)
    vg = np.linspace(0.4, 2.0, 1000)
    out = mos.current_partials(m, W, L, vg, 1.0, 0.0)
    assert [np.shape(x) for x in out] == [(1000,)] * 4


@pytest.mark.parametrize("kind", [EKV, SQ])
def test_population_by_conditions_broadcasts(kind):
    mt = ah02_tech(Polarity.N)
    temps = np.linspace(250.0, 400.0, 10)[:, None]  # (10, 1) PVT axis
    m = mos.at_conditions(mt, Polarity.N, kind, temps, T300)
    w = np.geomspace(1e-6, 1e-4, 7)  # (7,) designs
    out = mos.current_partials(m, w, L, 1.2, 1.0, 0.0)
    assert [np.shape(x) for x in out] == [(10, 7)] * 4
    assert np.shape(mos.diode_voltage(m, w, L, 1e-6, 0.0)) == (10, 7)


@pytest.mark.parametrize("kind", [EKV, SQ])
@pytest.mark.parametrize("idx", [slice(None), slice(2, 5), np.array([0, 3, 6]), np.arange(7)])
def test_restricted_device_has_the_batch_values_at_those_elements(kind, idx):
    # models.devices.device.restricted cuts a device down to some batch elements, a slice or
    # an index array; the cut-out device must give the whole batch's currents and partials
    # at those elements (the whole batch itself is the reference; common practice, no source).
    from models.devices.device import Device, restricted
    temps = np.linspace(250.0, 400.0, 7)  # per element: temperature, width and mismatch differ
    m = mos.at_conditions(ah02_tech(Polarity.N), Polarity.N, kind, temps, T300)
    w = np.geomspace(1e-6, 1e-4, 7)
    dev = Device(m, w, np.full(7, L), dvt=np.linspace(-0.01, 0.01, 7), dbeta=np.linspace(0.02, -0.02, 7))
    vg, vd = np.linspace(0.8, 2.0, 7), np.linspace(0.2, 2.0, 7)
    whole = dev.eval(vg, vd, 0.0, 0.0)
    sub = restricted(dev, idx)
    part = sub.eval(vg[idx], vd[idx], 0.0, 0.0)
    for a, b in zip(part, whole):
        # 1e-14: the same arithmetic per element (the same bits on this machine), with room
        # for a vector library that rounds the last bit by position in the array.
        np.testing.assert_allclose(a, b[idx], rtol=1e-14, atol=0.0)
