"""The SPICE hand-off: `stagefront netlist`, `verify` and `calibrate`, against ngspice.

Three loops, each small enough to run in seconds:

- a tiny optimise run on a square-law study built from studies/tech/ah02-level1.toml, the
  constants of [AH02] Table 3.1-2 (Allen and Holberg, CMOS Analog Circuit Design, 2nd ed., 2002):
  the netlist of a row of every architecture must give stagefront's Iq in ngspice within 1 %, and
  verify with the level-1 cards of the same technology must find ngspice and the model
  agreeing on every metric;
- calibration of a level-1 card with the same [AH02] constants must give them back;
- calibration of the shipped invented BSIM3v3 card, then a small optimise run of the 1.8 V
  study on the fitted technology, then verify against the card: the bounds the hand-off is
  held to (Iq within 10 %, headroom within 50 mV at the typical corner for most rows).

Tests marked ngspice need the simulator (tests/conftest.py); the refusals run everywhere.
"""
from __future__ import annotations

import csv
import re
import tempfile
import tomllib
from pathlib import Path

import numpy as np
import pytest

from models.devices.tech import Corner
from models.stages import get_stage
from optimise.cli import main
from optimise.files.techfile import load_tech
from optimise.search.export import read_front
from optimise.spice import ngspice
from optimise.spice import testbench as tb

ROOT = Path(__file__).resolve().parent.parent
AH02 = ROOT / "studies" / "tech" / "ah02-level1.toml"
CARD = ROOT / "studies" / "models" / "demo180-bsim3-invented.lib"
STUDY_180 = ROOT / "studies" / "sensor-buffer-180.toml"
ARCHS = ("floating-loop", "fixed-bias", "follower")

# A square-law study at 5 V, the supply of the [AH02] 0.8 um process. Targets are loose so
# that every architecture has feasible rows; the search is tiny (the rows only need to exist).
SQUARE_STUDY = """
name = "ah02-handoff"
technology = "{tech}"
architectures = ["floating-loop", "fixed-bias", "follower"]
seed = 3
[supply]
nominal = 5.0
min = 4.5
max = 5.5
[conditions]
temperatures_c = [27]
corners = ["tt", "ss"]
[load]
current = "100u"
capacitance = "10p"
[targets]
iq_min = "1u"
[objectives]
power_w = "min"
swing_v = "max"
[bounds.floating-loop]
mn_out = {{ w = [20, 100], l = [0.8, 1.6] }}
mp_out = {{ w = [60, 300], l = [0.8, 1.6] }}
mn_d1 = {{ w = [5, 30], l = [1.6, 3.2] }}
mp_d1 = {{ w = [15, 90], l = [1.6, 3.2] }}
ib_n = ["1u", "4u"]
ib_p = ["1u", "4u"]
ib_ctl = ["2u", "8u"]
[ties.floating-loop]
mn_d2 = "mn_d1"
mn_ctl = "mn_d1"
mp_d2 = "mp_d1"
mp_ctl = "mp_d1"
[bounds.fixed-bias]
mn_out = {{ w = [20, 100], l = [0.8, 1.6] }}
mp_out = {{ w = [60, 300], l = [0.8, 1.6] }}
ib = ["2u", "6u"]
r_bias = ["700k", "900k"]
[bounds.follower]
mn_f = {{ w = [100, 300], l = [0.8, 1.6] }}
mp_f = {{ w = [300, 900], l = [0.8, 1.6], bulk = "source" }}
mn_b = {{ w = [10, 30], l = [0.8, 1.6] }}
mp_b = {{ w = [30, 90], l = [0.8, 1.6] }}
ib = ["1u", "5u"]
[search]
population = 8
generations = 2
"""


def _run(args, capsys):
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture(scope="module")
def square_run(tmp_path_factory):
    """A run folder of the square-law study with rows of every architecture."""
    folder = tmp_path_factory.mktemp("square")
    study = folder / "study.toml"
    study.write_text(SQUARE_STUDY.format(tech=AH02.as_posix()))
    assert main(["optimise", str(study), "--out", str(folder / "run")]) == 0
    front = read_front(folder / "run" / "front.csv")
    for arch in ARCHS:
        assert (front["architecture"] == arch).any(), f"the tiny run found no feasible {arch} row"
    return folder / "run", front


def _first(front, arch: str) -> str:
    return str(front[front["architecture"] == arch]["id"].iloc[0])


def _op(netlist: str) -> dict:
    plots = ngspice.run_plots(netlist)
    return next(p.vectors for p in plots if p.name.lower().startswith("operating"))


# ---------------------------------------------------------------------------------------
# netlist
# ---------------------------------------------------------------------------------------
@pytest.mark.ngspice
@pytest.mark.parametrize("arch", ARCHS)
def test_netlist_rest_point_reproduces_square_law_iq(square_run, tmp_path, capsys, arch):
    run, front = square_run
    rid = _first(front, arch)
    out = tmp_path / f"{rid}.cir"
    code, _, _ = _run(["netlist", run, "--row", rid, "--out", out], capsys)
    assert code == 0
    text = out.read_text()
    mod = get_stage(arch)
    iq_sim = abs(float(tb.vector(_op(text), tb.device_vector("rest", "", mod.PULL_DOWN))[0]))
    iq_model = float(front[front["id"] == rid]["iq_a"].iloc[0])
    # ngspice running the same level-1 equations gives Iq within 1 % (the simulator's tolerances).
    assert iq_sim == pytest.approx(iq_model, rel=0.01)


@pytest.mark.ngspice
def test_netlist_runs_every_analysis(square_run, capsys):
    run, front = square_run
    code, text, _ = _run(["netlist", run, "--row", _first(front, "floating-loop")], capsys)
    assert code == 0  # written to stdout without --out
    names = [p.name.lower() for p in ngspice.run_plots(text)]
    # .op and three .dc sweeps: the load current and both drive limits.
    assert names.count("operating point") == 1 and sum(n.startswith("dc") for n in names) == 3


def test_netlist_text_names_roles_and_snaps_sizes(square_run, capsys):
    run, front = square_run
    rid = _first(front, "floating-loop")
    code, text, _ = _run(["netlist", run, "--row", rid], capsys)
    assert code == 0
    grid = load_tech(AH02).grid
    devices = re.findall(r"^M_(\w+) .* w=(\S+) l=(\S+) ad=\S+ as=\S+ pd=\S+ ps=\S+$", text, re.MULTILINE)
    assert {d[0].lower() for d in devices} == set(get_stage("floating-loop").ROLES)
    for _, w, l in devices:
        for x in (float(w), float(l)):
            # On the 50 nm drawing grid of the technology file, to rounding of the text.
            assert abs(x / grid - round(x / grid)) < 1e-6
    assert ".op" in text.split() and "X_REST" in text and "I_LOAD" in text


def test_netlist_with_a_users_card_references_it(square_run, tmp_path, capsys):
    run, front = square_run
    code, text, _ = _run(["netlist", run, "--row", _first(front, "fixed-bias"), "--models", CARD,
                          "--corner", "ss"], capsys)
    assert code == 0
    assert f'.lib "{CARD.resolve()}" ss' in text
    assert re.search(r"^M_MN_OUT \S+ \S+ \S+ \S+ nch ", text, re.MULTILINE)
    assert re.search(r"^M_MP_OUT \S+ \S+ \S+ \S+ pch ", text, re.MULTILINE)
    assert ".model" not in text  # the user's card, not level-1 cards


def test_netlist_unknown_row_lists_known_ids(square_run, capsys):
    run, front = square_run
    code, _, err = _run(["netlist", run, "--row", "fl-999"], capsys)
    assert code == 2
    assert "fl-999" in err and str(front["id"].iloc[0]) in err


# ---------------------------------------------------------------------------------------
# verify with the technology's own level-1 cards: both sides run the same equations
# ---------------------------------------------------------------------------------------
@pytest.mark.ngspice
def test_verify_level1_agrees_with_the_square_law_model(square_run, capsys):
    run, front = square_run
    code, out, _ = _run(["verify", run, "--all"], capsys)
    assert code == 0
    rows = list(csv.DictReader((run / "verify.csv").open()))
    # Every row at both corners and three supplies, five metrics each.
    assert len(rows) == len(front) * 2 * 3 * 5
    for r in rows:
        err = abs(float(r["error"]))
        if r["error_unit"] == "V":
            # Headroom: the sweep has 100 points from VDD/2 to the rail (27.5 mV apart at
            # 5.5 V); linear interpolation across the level-1 triode/saturation kink stays
            # within about 1 mV, 2 mV bounds it.
            assert err < 2e-3, r
        else:
            # Same equations, simulator tolerance reltol 1e-7: far below 0.1 %.
            assert err < 1e-3, r
    assert "median |error|" in out


# ---------------------------------------------------------------------------------------
# calibrate: a level-1 card with known constants
# ---------------------------------------------------------------------------------------
# [AH02] Table 3.1-2: VT0 0.7 / -0.7 V, K' 110 / 50 uA/V^2,
# gamma 0.4 / 0.57 V^0.5, 2|phiF| 0.7 / 0.8 V, lambda 0.04 / 0.05 1/V (at L = 1 um).
LEVEL1_CARD = """* level-1 cards with the constants of Allen and Holberg, Table 3.1-2
.lib tt
.model nch nmos (level=1 vto=0.7 kp=110u gamma=0.4 phi=0.7 lambda=0.04)
.model pch pmos (level=1 vto=-0.7 kp=50u gamma=0.57 phi=0.8 lambda=0.05)
.endl tt
"""


@pytest.mark.ngspice
def test_calibration_recovers_level1_parameters(tmp_path, capsys):
    card = tmp_path / "ah02.lib"
    card.write_text(LEVEL1_CARD)
    out = tmp_path / "fitted.toml"
    code, report, _ = _run(["calibrate", "--models", card, "--kind", "square-law", "--lmin", "1u", "--lengths", "1u",
                            "--vdd", "5", "--out", out], capsys)
    assert code == 0, report
    tech = load_tech(out)  # the written file loads as a technology
    assert tech.model.value == "square-law"
    assert tech.fitted_lengths == pytest.approx((1e-6,))  # the one length swept, recorded
    expected = {
        "nmos": {"vt0": 0.7, "kp": 110e-6, "gamma": 0.4, "phi": 0.7, "va": 1 / 0.04},
        "pmos": {"vt0": 0.7, "kp": 50e-6, "gamma": 0.57, "phi": 0.8, "va": 1 / 0.05},
    }
    for pol, want in expected.items():
        mt = getattr(tech, pol)
        # The fit runs the level-1 equations on level-1 data, where ngspice solves no node (every
        # terminal on a source): it recovers the card to rounding (measured 0 and 2e-16); 1e-9
        # leaves room for the fit's stopping tolerance only.
        for key in ("vt0", "kp", "gamma", "phi"):
            assert getattr(mt, key) == pytest.approx(want[key], rel=1e-9), (pol, key)
        # lambda is per volt at the one length swept (1 um): VA = 1 / lambda = va_per_l L.
        assert mt.va_per_l * 1e-6 == pytest.approx(want["va"], rel=1e-9), pol
    assert "weak inversion" in report and "triode" in report
    # Without TOX a level-1 card has no gate charge: cox and cov stay marked as not measured.
    assert "# F/m^2, default, not calibrated" in out.read_text()
    # Refuses to overwrite without --overwrite.
    code, _, err = _run(["calibrate", "--models", card, "--lmin", "1u", "--vdd", "5", "--out", out], capsys)
    assert code == 2 and "--overwrite" in err


@pytest.mark.ngspice
def test_gate_capacitances_are_read_from_the_cards_ac_response():
    # Level 1 with TOX and overlaps: Cox = eps_ox / TOX with eps_ox = 3.9 eps0 (ngspice's
    # level-1 constant; textbook fact, e.g. Sedra and Smith), overlap = CGDO per metre of width.
    # Meyer's model gives Cgd = 0 in saturation and Cgs + Cgd = Cox W L at VDS = 0 in strong
    # inversion, so both are recovered to the simulator's precision.
    from optimise.calibrate.devicefit import gate_capacitances
    card = ("* level 1 with gate charge\n.model nch nmos (level=1 vto=0.7 kp=110u tox=20n cgdo=3e-10 cgso=3e-10)\n"
            ".model pch pmos (level=1 vto=-0.7 kp=50u tox=25n cgdo=2e-10 cgso=2e-10)\n")
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "caps.mod"
        path.write_text(card)
        caps = gate_capacitances(tb.load_models(path, "nch", "pch"), Corner.TT, 27.0, 2e-6, 3.3)
    eps_ox = 3.9 * 8.854214871e-12
    assert caps[1] == pytest.approx((eps_ox / 20e-9, 3e-10), rel=1e-4)
    assert caps[-1] == pytest.approx((eps_ox / 25e-9, 2e-10), rel=1e-4)


# ---------------------------------------------------------------------------------------
# calibrate -> optimise -> verify on the shipped BSIM3v3 card
# ---------------------------------------------------------------------------------------
def _tt_card(tmp_path: Path) -> Path:
    """The tt section of the shipped card as a plain card (which supports tt only)."""
    text = CARD.read_text()
    body = text.split(".lib tt\n", 1)[1].split(".endl tt", 1)[0]
    path = tmp_path / "demo180-tt.mod"
    path.write_text("* tt section of demo180-bsim3-invented.lib\n" + body)
    return path


@pytest.mark.ngspice
def test_calibrated_model_meets_the_handoff_bounds_on_the_bsim3_card(tmp_path, capsys):
    tech = tmp_path / "calibrated.toml"
    code, _, _ = _run(["calibrate", "--models", CARD, "--lmin", "0.36u", "--lengths", "0.36u", "--base",
                       ROOT / "studies" / "tech" / "demo180-invented.toml", "--out", tech], capsys)
    assert code == 0
    assert len(load_tech(tech).corners) == 5  # every section of the card fitted
    study = tomllib.loads(STUDY_180.read_text())
    text = STUDY_180.read_text().replace(f'technology = "{study["technology"]}"', f'technology = "{tech.as_posix()}"')
    # A single-length fit holds at its length: every L at the 0.36 um it was fitted at (the
    # table technology of the shipped study lets lengths differ; see test_table_kind.py).
    text = text.replace("l = [0.18, 1.44]", "l = [0.36, 0.36]")
    study_path = tmp_path / "sensor-buffer-180.toml"
    study_path.write_text(text)
    run = tmp_path / "run"
    assert main(["optimise", str(study_path), "--out", str(run), "--population", "16", "--generations", "3"]) == 0
    capsys.readouterr()
    ids = list(read_front(run / "front.csv")["id"])[:8]
    assert ids, "the small run found no feasible design"
    code, out, _ = _run(["verify", run, "--rows", ",".join(ids), "--models", _tt_card(tmp_path)], capsys)
    assert code == 0
    rows = [r for r in csv.DictReader((run / "verify.csv").open()) if r["corner"] == "tt"]
    assert rows and all(r["simulator"] for r in rows)
    iq = np.array([abs(float(r["error"])) for r in rows if r["metric"] == "iq_a"])
    hr = np.array([abs(float(r["error"])) for r in rows if r["metric"].startswith("headroom")])
    # The hand-off's bounds: Iq within 10 %, headroom within 50 mV at the typical corner,
    # for most rows (here: at least three in four design x temperature x supply points,
    # and the median well inside).
    assert np.mean(iq <= 0.10) >= 0.75 and np.median(iq) <= 0.10, (np.median(iq), iq.max())
    assert np.mean(hr <= 0.050) >= 0.75 and np.median(hr) <= 0.050, (np.median(hr), hr.max())
    assert "iq_a" in out


# ---------------------------------------------------------------------------------------
# failures: missing or broken model file, no simulator
# ---------------------------------------------------------------------------------------
def test_missing_model_file_is_refused(square_run, tmp_path, capsys):
    run, _ = square_run
    for args in (["verify", run, "--models", tmp_path / "nope.lib"],
                 ["calibrate", "--models", tmp_path / "nope.lib", "--lmin", "1u", "--out", tmp_path / "x.toml"],
                 ["netlist", run, "--row", "fl-001", "--models", tmp_path / "nope.lib"]):
        code, _, err = _run(args, capsys)
        assert code == 2 and "nope.lib" in err and "file not found" in err


def test_model_file_without_the_named_models_is_refused(square_run, tmp_path, capsys):
    run, _ = square_run
    code, _, err = _run(["verify", run, "--models", CARD, "--nmos", "nfet"], capsys)
    assert code == 2 and "nfet" in err and "nch" in err
    empty = tmp_path / "empty.lib"
    empty.write_text("* nothing here\n")
    code, _, err = _run(["verify", run, "--models", empty], capsys)
    assert code == 2 and "no .model card" in err


@pytest.mark.ngspice
def test_broken_model_card_reports_ngspice_and_fails(square_run, tmp_path, capsys):
    run, _ = square_run
    broken = tmp_path / "broken.mod"
    broken.write_text(".model nch nmos (level=8 version=3.3 tox=\n.model pch pmos (level=8 version=3.3 vth0=-0.4\n")
    code, out, err = _run(["verify", run, "--rows", "fl-001", "--models", broken], capsys)
    assert code == 1  # nothing could be verified
    assert "ngspice failed" in out
    rows = list(csv.DictReader((run / "verify.csv").open()))
    assert rows and not any(r["simulator"] for r in rows) and all("ngspice failed" in r["note"] for r in rows)
    code, _, err = _run(["calibrate", "--models", broken, "--lmin", "1u", "--out", tmp_path / "x.toml"], capsys)
    assert code == 1 and "ngspice" in err


def test_absent_simulator_gives_a_clear_message(square_run, tmp_path, capsys, monkeypatch):
    run, _ = square_run
    monkeypatch.setenv(ngspice.ENV_EXECUTABLE, str(tmp_path / "no-such-ngspice"))
    for args in (["verify", run, "--all"],
                 ["calibrate", "--models", CARD, "--lmin", "0.36u", "--out", tmp_path / "x.toml"]):
        code, _, err = _run(args, capsys)
        assert code == 1 and "ngspice not found" in err and "no-such-ngspice" in err
    assert not (tmp_path / "x.toml").exists()


def test_tt_card_helper_keeps_only_the_typical_section(tmp_path):
    source = tb.load_models(_tt_card(tmp_path))
    # A plain card supports the typical corner only.
    assert source.sections == () and [c.value for c in source.corners(None)] == ["tt"]


def test_shipped_card_has_every_corner_section():
    source = tb.load_models(CARD)
    assert source.sections == ("tt", "ff", "ss", "fs", "sf")
    assert source.reference(tb.Corner.FS) == f'.lib "{CARD.resolve()}" fs'


def test_drive_point_follows_the_model_definitions():
    s = np.linspace(0.0, 1.0, 101)
    vdd = 2.0
    # Sourcing: 1 mA pushed at VDD/2 falling linearly to -0.1 mA at the rail. Hand calc: the
    # 0.5 mA load is met at s = 0.5 / 1.1, V(out) = 1 + 0.4545 V, headroom 2 - 1.4545 V.
    peak, hr = tb.drive_point(s, 1e-3 - 1.1e-3 * s, vdd, +1, 0.5e-3)
    assert peak == pytest.approx(1e-3) and hr == pytest.approx(1.0 - 0.5 / 1.1, rel=1e-9)
    # Sinking is the mirror image: the current pushed is negative, the headroom is V(out).
    peak, hr = tb.drive_point(s, -(1e-3 - 1.1e-3 * s), vdd, -1, 0.5e-3)
    assert peak == pytest.approx(1e-3) and hr == pytest.approx(1.0 - 0.5 / 1.1, rel=1e-9)
    # models.evaluate: a peak below the load current gives a headroom of VDD/2.
    peak, hr = tb.drive_point(s, 0.2e-3 - 0.3e-3 * s, vdd, +1, 0.5e-3)
    assert peak == pytest.approx(0.2e-3) and hr == 0.5 * vdd
