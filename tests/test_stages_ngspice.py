"""Rest-point Iq of every architecture: stagefront's square-law solve against ngspice.

Both sides run the same equations: models.devices.mos's square law is SPICE level 1 with LD = 0,
and optimise.spice.netlist writes one level-1 card per device from the same technology, with no
temperature scaling left to ngspice. The netlists come from each
architecture's TOPOLOGY, so the check covers the netlist writer as well as the solver.

Technology: studies/tech/ah02-level1.toml, the constants of [AH02] Table 3.1-2
(P. E. Allen, D. R. Holberg, CMOS Analog Circuit Design, 2nd ed., Oxford University
Press, 2002), at VDD = 5 V as for that 0.8 um process. The designs are
hand-sized to keep every device in its intended region at rest (checked below through the
model's own lowest-supply requirement); they vary the current densities around each loop
(unequal W/L of the diodes and the control device, unbalanced N and P loops), the lengths,
the bulk connection (rail, source, a mix) and the source-bulk voltage of the stacked
devices (long, narrow diodes lift them by a volt and more), with Iq from about 2 uA to
0.3 mA. One fixed-bias design cuts off: Iq = 0 is its answer.

The ngspice-marked tests need the simulator; the netlist-text tests run everywhere.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner, ModelKind
from models.evaluate import Conditions, Design, Targets, evaluate
from models.stages import get_stage
from optimise.files.techfile import load_tech
from optimise.spice import netlist as spice

TECH = load_tech(Path(__file__).resolve().parents[1] / "studies" / "tech" / "ah02-level1.toml")
VDD = 5.0  # V
UM = 1e-6  # sizes below are in micrometres for readability only
# Loads and limits only feed metrics other than Iq; any legal values do.
TARGETS = Targets(i_load=100e-6, c_load=10e-12)

# Iq within 1 % of ngspice (the project's hand-off bound). The equations are the same on both sides, so
# the residual is the simulator's own (reltol 1e-7) and the junction leakage below; the
# largest difference seen over these designs is about 1e-5 (the follower's output sits
# tens of microvolts from VDD/2, see optimise.spice.netlist), a thousand times under the bound.
RTOL = 0.01
# A cut-off pair still carries the drain-junction leakage ngspice adds: IS + GMIN |VDB| =
# 1e-14 A + 1e-12 S * 2.5 V, about 2.5 pA. 100 pA bounds it with margin and is still 1e-4
# of the smallest Iq here.
LEAKAGE = 1e-10  # A

STACKED = ("mn_d2", "mn_ctl", "mp_d2", "mp_ctl")  # floating-loop devices with the source off the rail


def floating(out_n, out_p, n_loop, p_loop, ib_n, ib_p, ib_ctl, tied=()):
    """A floating-loop case; n_loop = (D1, D2, CTL) sizes, p_loop likewise, (w, l) in um."""
    sizes = {"mn_out": out_n, "mp_out": out_p}
    sizes.update(zip(("mn_d1", "mn_d2", "mn_ctl"), n_loop))
    sizes.update(zip(("mp_d1", "mp_d2", "mp_ctl"), p_loop))
    return "floating-loop", sizes, {"ib_n": ib_n, "ib_p": ib_p, "ib_ctl": ib_ctl}, tuple(tied)


def fixed(n, p, ib, r_bias, tied=()):
    return "fixed-bias", {"mn_out": n, "mp_out": p}, {"ib": ib, "r_bias": r_bias}, tuple(tied)


def follower(f_n, f_p, b_n, b_p, ib, tied=()):
    return "follower", {"mn_f": f_n, "mp_f": f_p, "mn_b": b_n, "mp_b": b_p}, {"ib": ib}, tuple(tied)


CASES = {
    # Floating loop. Matched densities give Iq about ib_n (W/L)_out / (W/L)_d1 (20 uA here).
    "fl-matched": floating((60, 0.8), (180, 0.8), [(18, 2.4)] * 3, [(54, 2.4)] * 3, 2e-6, 2e-6, 4e-6),
    "fl-densities-unbalanced": floating((60, 0.8), (180, 0.8), [(10, 2.4), (20, 2.4), (40, 2.4)],
                                        [(54, 2.4), (30, 2.4), (15, 2.4)], 2e-6, 5e-6, 4e-6),
    "fl-densities-unbalanced-tied": floating((60, 0.8), (180, 0.8), [(10, 2.4), (20, 2.4), (40, 2.4)],
                                             [(54, 2.4), (30, 2.4), (15, 2.4)], 2e-6, 5e-6, 4e-6, STACKED),
    "fl-mixed-lengths": floating((40, 1.6), (100, 0.8), [(6, 1.6), (12, 3.2), (8, 0.8)],
                                 [(20, 4.0), (20, 1.6), (30, 2.4)], 1e-6, 3e-6, 2e-6),
    # Diodes of W/L 1/4 lift the stack: VSB of MN_D2 about 1.1 V, of MP_D2 about 1.2 V.
    "fl-high-vsb-matched": floating((20, 2.0), (40, 2.0), [(2, 8.0)] * 3, [(4, 8.0)] * 3, 2e-6, 2e-6, 4e-6),
    "fl-high-vsb-wide-d2": floating((20, 2.0), (40, 2.0), [(2, 8.0), (8, 8.0), (2, 8.0)],
                                    [(4, 8.0), (16, 8.0), (4, 8.0)], 2e-6, 2e-6, 4e-6),
    "fl-high-vsb-wide-d2-tied": floating((20, 2.0), (40, 2.0), [(2, 8.0), (8, 8.0), (2, 8.0)],
                                         [(4, 8.0), (16, 8.0), (4, 8.0)], 2e-6, 2e-6, 4e-6, STACKED),
    "fl-partly-tied": floating((80, 0.8), (120, 0.8), [(18, 2.4)] * 3, [(54, 2.4)] * 3, 5e-6, 1e-6, 20e-6,
                               ("mn_ctl", "mp_d2")),
    "fl-long-outputs": floating((30, 4.0), (90, 4.0), [(18, 2.4)] * 3, [(54, 2.4)] * 3, 2e-6, 2e-6, 4e-6),
    "fl-short-loops": floating((100, 0.8), (250, 0.8), [(5, 1.2), (5, 1.2), (10, 1.2)],
                               [(12, 1.2), (15, 1.2), (25, 1.2)], 1e-6, 2e-6, 1e-6),
    # Fixed bias: Iq follows (VDD - ib r_bias - VTN - |VTP|)^2, so small changes of ib r_bias
    # move it a lot. Bulk ties of the output devices change the netlist, not the physics.
    "fb-demo": fixed((60, 0.8), (180, 0.8), 4e-6, 860e3),
    "fb-more-drive": fixed((60, 0.8), (180, 0.8), 4e-6, 840e3),
    "fb-long-n": fixed((20, 2.0), (200, 0.8), 2e-6, 1.6e6),
    "fb-tied": fixed((100, 0.8), (50, 1.6), 1e-6, 3.3e6, ("mn_out", "mp_out")),
    "fb-small": fixed((10, 5.0), (10, 5.0), 3e-6, 1e6),
    "fb-tied-p": fixed((60, 0.8), (180, 0.8), 10e-6, 335e3, ("mp_out",)),
    "fb-equal-sizes": fixed((40, 1.2), (40, 1.2), 5e-6, 640e3),
    "fb-wide": fixed((200, 0.8), (600, 0.8), 1e-6, 3.45e6),
    # 5 V - 4 uA * 950 kohm = 1.2 V < VTN + |VTP| = 1.4 V: the pair is off.
    "fb-cut-off": fixed((60, 0.8), (180, 0.8), 4e-6, 950e3),
    # Followers: sources at VDD/2, so with bulks on the rails VSB = 2.5 V on all four devices.
    "fo-matched": follower((200, 0.8), (600, 0.8), (20, 0.8), (60, 0.8), 2e-6),
    "fo-all-tied": follower((200, 0.8), (600, 0.8), (20, 0.8), (60, 0.8), 2e-6,
                            ("mn_f", "mp_f", "mn_b", "mp_b")),
    "fo-followers-tied": follower((20, 3.2), (60, 3.2), (20, 0.8), (60, 0.8), 2e-6, ("mn_f", "mp_f")),
    "fo-diodes-tied": follower((50, 0.8), (150, 0.8), (2, 16.0), (2, 8.0), 2e-6, ("mn_b", "mp_b")),
    "fo-unbalanced": follower((100, 0.8), (600, 0.8), (20, 1.6), (30, 0.8), 5e-6),
    "fo-mp-f-tied": follower((50, 1.6), (80, 0.8), (4, 0.8), (30, 2.4), 1e-6, ("mp_f",)),
    "fo-long-diodes": follower((300, 0.8), (300, 0.8), (10, 4.0), (10, 4.0), 2e-6),
    "fo-unity-ratio": follower((40, 0.8), (100, 0.8), (40, 0.8), (100, 0.8), 10e-6),
    "fo-mn-f-tied": follower((10, 4.8), (300, 1.2), (25, 1.2), (70, 1.2), 3e-6, ("mn_f",)),
}
CUT_OFF = {"fb-cut-off"}

# Every design again at one other corner and temperature, taken in turn from this list.
OTHER_CONDITIONS = [(Corner.SS, 27.0), (Corner.FF, 27.0), (Corner.FS, 85.0), (Corner.SF, -40.0)]
CORNER_CASES = [(name, *OTHER_CONDITIONS[k % len(OTHER_CONDITIONS)]) for k, name in enumerate(CASES)]


def design(name: str) -> Design:
    """The case as a one-element Design, its sizes snapped to the drawing grid (the netlist
    snaps them too, so both sides see the same devices)."""
    arch, sizes, bias, tied = CASES[name]
    return Design(
        arch,
        {r: TECH.snap(np.array([w * UM])) for r, (w, _) in sizes.items()},
        {r: TECH.snap(np.array([l * UM])) for r, (_, l) in sizes.items()},
        {k: np.array([v]) for k, v in bias.items()},
        frozenset(tied),
    )


def model_rest(d: Design, corner: Corner, temp: float):
    """(Iq [A], lowest supply at rest [V], converged) from models.evaluate at one PVT point."""
    res = evaluate(d, TECH, Conditions((corner,), (temp,), VDD, VDD, VDD), TARGETS)
    return float(res.pvt["iq_a"][0, 0]), float(res.pvt["vdd_min_v"][0, 0]), bool(res.converged[0, 0])


def both(name: str, corner: Corner = Corner.TT, temp_c: float | None = None):
    """(stagefront Iq, ngspice Iq, stagefront's lowest supply) for a case at one condition."""
    temp = TECH.tnom if temp_c is None else temp_c + ZERO_CELSIUS
    d = design(name)
    iq, vdd_min, ok = model_rest(d, corner, temp)
    assert ok, f"{name}: the square-law solve did not converge"
    sim = spice.rest_iq(d.architecture, d, 0, TECH, VDD, corner, None if temp_c is None else temp)
    return iq, sim, vdd_min


def test_cases_cover_every_architecture():
    assert TECH.model is ModelKind.SQUARE_LAW
    for arch in ("floating-loop", "fixed-bias", "follower"):
        assert sum(CASES[n][0] == arch for n in CASES) >= 8, arch


@pytest.mark.ngspice
@pytest.mark.parametrize("name", list(CASES))
def test_rest_iq_matches_ngspice(name):
    iq, sim, vdd_min = both(name)
    if name in CUT_OFF:
        assert iq == 0.0 and vdd_min > VDD
    else:
        # The design is where it is meant to be: every device keeps its region at rest.
        assert vdd_min < VDD and iq > 1e-6
    assert sim == pytest.approx(iq, rel=RTOL, abs=LEAKAGE)


@pytest.mark.ngspice
@pytest.mark.parametrize(("name", "corner", "temp_c"), CORNER_CASES,
                         ids=[f"{n}-{c.value}-{t:g}C" for n, c, t in CORNER_CASES])
def test_rest_iq_matches_ngspice_at_corner(name, corner, temp_c):
    iq, sim, _ = both(name, corner, temp_c)
    assert sim == pytest.approx(iq, rel=RTOL, abs=LEAKAGE)


@pytest.mark.ngspice
@pytest.mark.parametrize(("untied", "tied"), [("fl-high-vsb-wide-d2", "fl-high-vsb-wide-d2-tied"),
                                              ("fl-densities-unbalanced", "fl-densities-unbalanced-tied")])
def test_body_effect_is_reproduced(untied, tied):
    # With unequal densities on a shared substrate the body effect
    # moves Iq by several to tens of percent; both sides must see the same move.
    iq_u, sim_u, _ = both(untied)
    iq_t, sim_t, _ = both(tied)
    assert abs(iq_t / iq_u - 1.0) > 0.04
    assert sim_t / sim_u == pytest.approx(iq_t / iq_u, rel=RTOL)


# ---------------------------------------------------------------------------------------
# Netlist text (no simulator needed)
# ---------------------------------------------------------------------------------------
def test_subcircuit_ports_names_and_bulks():
    d = design("fl-partly-tied")
    text = spice.stage_subcircuit(get_stage("floating-loop"), d, 0, TECH)
    lines = text.splitlines()
    assert ".subckt floating_loop vdd gnd out gp gn" in lines
    assert lines[-1] == ".ends floating_loop"
    # Bulk on the rail by default, on the source for the tied roles.
    assert "M_MN_D2 nb2 nb2 nb1 gnd floating_loop_mn_d2 w=1.8e-05 l=2.4e-06" in lines
    assert "M_MN_CTL gp nb2 gn gn floating_loop_mn_ctl w=1.8e-05 l=2.4e-06" in lines
    assert "M_MP_D2 pb2 pb2 pb1 pb1 floating_loop_mp_d2 w=5.4e-05 l=2.4e-06" in lines
    assert "M_MP_CTL gn pb2 gp vdd floating_loop_mp_ctl w=5.4e-05 l=2.4e-06" in lines
    # SourceSpec pushes current from a to b, as a SPICE current source does from n+ to n-.
    assert "I_N vdd nb2 dc 5e-06" in lines and "I_CTL_BOT gn gnd dc 2e-05" in lines
    fb = spice.stage_subcircuit("fixed-bias", design("fb-demo"), 0, TECH).splitlines()
    assert "R_BIAS gp gn 860000.0" in fb
    assert spice.subcircuit_ports("follower") == ("vdd", "gnd", "out", "nm")


def test_sizes_snap_to_the_grid_and_external_models():
    d = design("fb-demo")
    off_grid = Design(d.architecture, {"mn_out": np.array([10.02e-6]), "mp_out": np.array([30.0e-6])},
                      {"mn_out": np.array([0.81e-6]), "mp_out": np.array([0.8e-6])}, d.bias)
    # 50 nm grid of the technology file: 10.02 um -> 10.0 um, 0.81 um -> 0.8 um.
    assert "M_MN_OUT out gn gnd gnd fixed_bias_mn_out w=1e-05 l=8e-07" in \
        spice.stage_subcircuit("fixed-bias", off_grid, 0, TECH)
    text = spice.stage_subcircuit("fixed-bias", off_grid, 0, {"mn_out": "nch", "mp_out": "pch"})
    assert "M_MN_OUT out gn gnd gnd nch w=1.002e-05 l=8.1e-07" in text
    with pytest.raises(ValueError, match="mp_out"):
        spice.stage_subcircuit("fixed-bias", off_grid, 0, {"mn_out": "nch"})


def test_model_cards_carry_corner_and_length():
    cards = spice.model_cards("fixed-bias", design("fb-demo"), 0, TECH, Corner.FS).splitlines()
    fields = [dict(f.split("=") for f in c[c.index("(") + 1:-1].split()) for c in cards]
    n, p = fields
    # fs: fast NMOS (VT0 0.7 - 0.15 V, KP x 1.1), slow PMOS (0.7 + 0.15 V, x 0.9), AH02 file corners.
    assert float(n["vto"]) == pytest.approx(0.55) and float(n["kp"]) == pytest.approx(121e-6)
    assert float(p["vto"]) == pytest.approx(-0.85) and float(p["kp"]) == pytest.approx(45e-6)
    # LAMBDA = 1 / (va_per_l L): 1 / (2.5e7 V/m * 0.8 um) = 0.05 /V (N), 1 / (2e7 * 0.8 um) = 0.0625 /V (P).
    assert float(n["lambda"]) == pytest.approx(0.05) and float(p["lambda"]) == pytest.approx(0.0625)
    assert cards[0].startswith(".model fixed_bias_mn_out nmos (level=1 ")
