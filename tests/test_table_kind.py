"""The `table` model kind: the shipped card tabulated by ngspice, against ngspice itself.

The reference is ngspice running the same BSIM3v3 card (studies/models/demo180-bsim3-
invented.lib) at operating points between the grid nodes: random VGS, VDS, VSB, lengths
between the tabulated ones and widths other than the reference width, for each polarity,
every corner section and the three tabulated temperatures. The table method itself is the
gm/ID lookup-table method (Silveira, Flandre, Jespers, IEEE JSSC 31(9), 1996; Jespers and
Murmann, Systematic Design of Analog CMOS Circuits, 2017); what is checked here is that the
interpolation reproduces the card.

Then the tables' own consistency (partials are the derivatives of the current), bad table
files and study ranges refused with their names, `calibrate --tables` from a card, and the
end-to-end loop optimise -> verify on a table technology with lengths that differ per role.
"""
from __future__ import annotations

import csv
import shutil
import tomllib
from pathlib import Path

import numpy as np
import pytest

from models.devices.constants import ZERO_CELSIUS
from models.devices.mos import at_conditions, current_partials
from models.devices.table_data import TableSelect
from models.devices.tech import ModelKind, Polarity
from optimise.cli import main
from optimise.files.errors import InputError
from optimise.files.space import load_search
from optimise.files.study import load_study
from optimise.files.techfile import load_tech
from optimise.search.export import read_front
from optimise.spice import ngspice

ROOT = Path(__file__).resolve().parent.parent
TECH = ROOT / "studies" / "tech" / "demo180-bsim3-tables.toml"
CARD = ROOT / "studies" / "models" / "demo180-bsim3-invented.lib"
STUDY_180 = ROOT / "studies" / "sensor-buffer-180.toml"


@pytest.fixture(scope="module")
def tech():
    return load_tech(TECH)


def _model(tech, pol, corner, temp_k, n):
    t = tech.tables[Polarity(pol)]
    mt = tech.mos(Polarity(pol))
    temps = np.full(n, temp_k)
    return at_conditions(mt, pol, ModelKind.TABLE, temps, tech.tnom, table=TableSelect(t, t.slots[corner], temps))


def _ngspice_points(pol, corner, temp_c, w, l, vgs, vds, vsb):
    """ngspice's Id, gm, gds of single devices of the card at frame voltages (magnitudes)."""
    model = "nch" if pol == 1 else "pch"
    lines = ["table check", ".options reltol=1e-7 abstol=1e-15 vntol=1e-9", f".temp {temp_c!r}",
             f'.lib "{CARD}" {corner}']
    for k in range(len(w)):
        lines += [f"VS{k} s{k} 0 {float(pol * vsb[k])!r}", f"VG{k} g{k} s{k} {float(pol * vgs[k])!r}",
                  f"VD{k} d{k} s{k} {float(pol * vds[k])!r}",
                  f"M{k} d{k} g{k} s{k} 0 {model} w={float(w[k])!r} l={float(l[k])!r}",
                  f".save @m{k}[id] @m{k}[gm] @m{k}[gds]"]
    res = ngspice.run("\n".join(lines + [".op", ".end"]))
    get = lambda q: np.array([abs(float(ngspice.vector(res, f"@m{k}[{q}]")[0])) for k in range(len(w))])
    return get("id"), get("gm"), get("gds")


@pytest.mark.ngspice
def test_table_reproduces_the_card_between_the_grid_nodes(tech):
    rng = np.random.default_rng(7)
    n = 60
    errors = {"weak": [], "moderate": [], "strong": []}
    gm_err, gds_err = [], []
    for pol in (1, -1):
        t = tech.tables[Polarity(pol)]
        for corner in ("tt", "ff", "ss", "fs", "sf"):
            for temp_c in (-40.0, 27.0, 125.0):
                l = np.round(np.exp(rng.uniform(np.log(t.lengths[0]), np.log(t.lengths[-1]), n)) / 5e-9) * 5e-9
                w = np.exp(rng.uniform(np.log(1e-6), np.log(100e-6), n))
                vgs = rng.uniform(0.15, 1.9, n)
                vds = rng.uniform(0.03, 1.9, n)
                vsb = rng.uniform(0.0, 1.2, n)
                i_s, gm_s, gds_s = _ngspice_points(pol, corner, temp_c, w, l, vgs, vds, vsb)
                m = _model(tech, pol, corner, temp_c + ZERO_CELSIUS, n)
                vs = pol * vsb
                i, gg, gd, _ = current_partials(m, w, l, vs + pol * vgs, vs + pol * vds, vs, 0.0)
                err = np.abs(i) / i_s - 1.0
                # Region from ngspice's own gm/ID: gm n UT / ID is 1 in weak inversion and
                # falls as 1/sqrt(IC) in strong inversion (EKV, Enz, Krummenacher, Vittoz 1995).
                q = gm_s * 1.3 * 8.617e-5 * (temp_c + ZERO_CELSIUS) / i_s
                for name, mask in (("weak", q > 0.75), ("moderate", (q <= 0.75) & (q > 0.35)), ("strong", q <= 0.35)):
                    errors[name] += list(err[mask])
                gm_err += list(np.abs(gg) / gm_s - 1.0)
                gds_err += list(np.abs(gd) / gds_s - 1.0)
    figures = {k: (np.median(np.abs(v)), np.percentile(np.abs(v), 95), len(v)) for k, v in errors.items()}
    print("relative Id error (median, 95th percentile, points):", figures)
    # Measured on this card: weak 1.1 % / 3 %, moderate 0.7 % / 3 %, strong 0.1 % / 0.7 %
    # (median / 95th percentile). The bounds leave about 1.5x: the residual is the linear
    # blend between lengths and VSB nodes and the narrow-width correction taken at VSB = 0.
    for name, (med, p95, count) in figures.items():
        assert count >= 50
        bound = (0.005, 0.015) if name == "strong" else (0.02, 0.05)
        assert med <= bound[0] and p95 <= bound[1], (name, med, p95)
    # gm from the interpolant's derivative (Hermite with ngspice's gm at the nodes).
    assert np.median(np.abs(gm_err)) <= 0.005 and np.percentile(np.abs(gm_err), 95) <= 0.04
    # gds is the VDS slope of the interpolant, a derivative of a derivative-free direction:
    # median within 3 %, as measured 1.5-2.5 %.
    assert np.median(np.abs(gds_err)) <= 0.03


def test_partials_are_the_derivatives_of_the_current(tech):
    """The solvers' Jacobians: each returned partial against a central difference of the
    interpolated current (exact to the difference's truncation, about 1e-6 relative)."""
    rng = np.random.default_rng(3)
    n = 400
    for pol in (1, -1):
        m = _model(tech, pol, "tt", 300.15, n)
        l = rng.uniform(0.2e-6, 1.7e-6, n)
        w = rng.uniform(2e-6, 50e-6, n)
        vsb = rng.uniform(0.0, 1.0, n)
        vs = pol * vsb
        vg = vs + pol * rng.uniform(0.3, 1.5, n)
        # Both directions (the reversed device too), with the drain kept above the bulk: a
        # junction forward-biased is outside the tables, where only the current continues.
        vd = vs + pol * rng.uniform(-vsb, 1.5)
        i, gg, gd, gs = current_partials(m, w, l, vg, vd, vs, 0.0)
        h = 1e-6
        for k, g in enumerate((gg, gd, gs)):
            up = [vg, vd, vs]
            dn = [vg, vd, vs]
            up[k], dn[k] = up[k] + h, up[k] - h
            fd = pol * (current_partials(m, w, l, *up, 0.0)[0] - current_partials(m, w, l, *dn, 0.0)[0]) / (2 * h)
            scale = np.abs(gg) + np.abs(gd) + np.abs(gs)
            # Cells are C1 in VGS and VDS; the VSB blend is C0 at its nodes, so a difference
            # straddling one may miss by a little: the median is exact, the worst bounded.
            rel = np.abs(fd - g) / scale
            assert np.median(rel) < 1e-5 and np.percentile(rel, 99) < 2e-2, (k, np.median(rel), rel.max())


def _copy_tech(tmp_path: Path) -> Path:
    shutil.copy(TECH, tmp_path / TECH.name)
    shutil.copy(TECH.with_suffix(".npz"), tmp_path / TECH.with_suffix(".npz").name)
    return tmp_path / TECH.name


def _rewrite_npz(path: Path, change) -> None:
    with np.load(path, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    change(arrays)
    np.savez(path, **arrays)


@pytest.mark.parametrize("change, words", [
    (lambda a: a.pop("nmos_gm"), "'nmos_gm' is missing"),
    (lambda a: a.__setitem__("pmos_id", a["pmos_id"][..., :-1]), "pmos: array 'id' has shape"),
    (lambda a: a["nmos_id"].__setitem__((0, 0, 0, 0, 3, 5), np.nan), "not finite"),
    (lambda a: a.__setitem__("nmos_vgs", a["nmos_vgs"][::-1].copy()), "vgs must hold"),
    (lambda a: a.__setitem__("format", np.array(7)), "'format' = 7"),
])
def test_a_bad_table_file_is_a_clear_error(tmp_path, change, words):
    path = _copy_tech(tmp_path)
    _rewrite_npz(path.with_suffix(".npz"), change)
    with pytest.raises(InputError) as err:
        load_tech(path)
    assert words in str(err.value) and "demo180-bsim3-tables.npz" in str(err.value)


def test_a_table_file_that_is_not_arrays_or_holds_objects_is_refused(tmp_path):
    path = _copy_tech(tmp_path)
    path.with_suffix(".npz").write_bytes(b"not a zip file")
    with pytest.raises(InputError, match="not a numpy array file"):
        load_tech(path)
    _copy_tech(tmp_path)
    _rewrite_npz(path.with_suffix(".npz"), lambda a: a.__setitem__("nmos_corners", np.array([{"x": 1}] * 5)))
    with pytest.raises(InputError, match="nmos_corners"):  # an object array would need a pickle
        load_tech(path)


@pytest.mark.parametrize("old, new, words", [
    ("mn_out = { w = [5, 300], l = [0.18, 1.44] }", "mn_out = { w = [5, 300], l = [0.18, 2.5] }",
     "outside the tabulated lengths [0.18, 1.8] um"),
    ("mn_d1 = { w = [1, 50], l = [0.18, 1.44] }", "mn_d1 = { w = [0.5, 50], l = [0.18, 1.44] }",
     "below the narrowest tabulated width 1 um"),
    ("temperatures_c = [27, -40, 125]", "temperatures_c = [27, -55, 125]", "outside the tabulated temperatures"),
    ("max = 1.98 ", "max = 2.2 ", "above the tabulated voltages"),
])
def test_a_study_outside_its_tables_is_refused(tmp_path, old, new, words):
    text = STUDY_180.read_text().replace('technology = "tech/', f'technology = "{ROOT.as_posix()}/studies/tech/')
    assert old in text
    path = tmp_path / "study.toml"
    path.write_text(text.replace(old, new))
    with pytest.raises(InputError) as err:
        load_search(load_study(path))  # bounds are read with the search settings
    assert words in str(err.value) and str(path) in str(err.value)


@pytest.mark.ngspice
def test_calibrate_tables_writes_a_table_technology_from_a_card(tmp_path, capsys):
    body = CARD.read_text().split(".lib tt\n", 1)[1].split(".endl tt", 1)[0]
    card = tmp_path / "plain.mod"  # a plain card (no sections) with other model names
    card.write_text("* plain card\n" + body.replace("nch nmos", "nfet nmos").replace("pch pmos", "pfet pmos"))
    out = tmp_path / "mine.toml"
    code = main(["calibrate", "--models", str(card), "--nmos", "nfet", "--pmos", "pfet", "--lmin", "0.18u",
                 "--tables", "--table-lengths", "0.18u,0.5u", "--temps", "27", "--vdd", "1.5", "--out", str(out)])
    assert code == 0
    capsys.readouterr()
    text = tomllib.loads(out.read_text())
    assert text["model"] == "table" and text["table"]["nmos"] == "nfet" and text["table"]["file"] == "mine.npz"
    tech = load_tech(out)
    t = tech.tables[Polarity.N]
    assert list(t.slots) == ["tt"] and np.allclose(t.lengths, [0.18e-6, 0.5e-6]) and t.span == pytest.approx(1.5)
    assert tech.card[1:] == ("nfet", "pfet")
    # One point between the nodes against ngspice on the same plain card.
    m = _model(tech, 1, "tt", 300.15, 1)
    i = current_partials(m, 4e-6, 0.3e-6, 0.75, 0.9, 0.0, 0.0)[0].ravel()[0]
    lines = ["x", f'.include "{card}"', ".temp 27", "VG g 0 0.75", "VD d 0 0.9",
             "M1 d g 0 0 nfet w=4e-06 l=3e-07", ".save @m1[id]", ".op", ".end"]
    i_s = abs(float(ngspice.vector(ngspice.run("\n".join(lines)), "@m1[id]")[0]))
    # Two lengths only (0.18 and 0.5 um): the length blend is coarse here, 5 % holds.
    assert float(i) == pytest.approx(i_s, rel=0.05)


@pytest.mark.ngspice
def test_optimise_then_verify_on_the_table_technology(tmp_path, capsys):
    text = STUDY_180.read_text().replace('technology = "tech/', f'technology = "{ROOT.as_posix()}/studies/tech/')
    text = text.replace('architectures = ["floating-loop", "fixed-bias", "follower"]', 'architectures = ["floating-loop"]')
    text = text[:text.index("[bounds.fixed-bias]")] + text[text.index("[search]"):]
    text = text.replace('temperatures_c = [27, -40, 125]', 'temperatures_c = [27, 125]')
    text = text.replace('corners = ["tt", "ff", "ss", "fs", "sf"]', 'corners = ["tt", "fs"]')
    study = tmp_path / "study.toml"
    study.write_text(text)
    run = tmp_path / "run"
    assert main(["optimise", str(study), "--out", str(run), "--population", "16", "--generations", "4"]) == 0
    front = read_front(run / "front.csv")
    # The search is free to give every role its own length; check that the rows verified do.
    rows = front.head(6)
    assert (rows["mn_out_l_um"] != rows["mn_d1_l_um"]).any()
    capsys.readouterr()
    assert main(["verify", str(run), "--rows", ",".join(rows["id"])]) == 0  # the card the table names
    out = capsys.readouterr()
    assert "tabulates" in out.err
    records = list(csv.DictReader((run / "verify.csv").open()))
    iq = np.array([abs(float(r["error"])) for r in records if r["metric"] == "iq_a" and r["simulator"]])
    hr = np.array([abs(float(r["error"])) for r in records if r["metric"].startswith("headroom") and r["simulator"]])
    assert len(iq) == 6 * 2 * 2 * 3
    # Measured on the demo front: Iq within 0.3 % median, 0.7 % worst; headroom within 0.5 mV.
    assert np.median(iq) <= 0.01 and iq.max() <= 0.03, (np.median(iq), iq.max())
    assert hr.max() <= 0.005


def _ngspice_gate_capacitances(pol, corner, temp_c, w, l, vgs, vds, vsb):
    """ngspice's small-signal gate capacitances of single devices of the card, overlap
    included, from an AC analysis at 1 kHz: with an AC volt on the gate, the gate
    current's imaginary part over omega is the whole gate capacitance (to every terminal);
    with it on the drain instead, the gate-drain one."""
    model = "nch" if pol == 1 else "pch"
    f = 1e3
    lines = ["table capacitance check", ".options reltol=1e-7 abstol=1e-18", f".temp {temp_c!r}",
             f'.lib "{CARD}" {corner}']
    for k in range(len(w)):
        for tag, on_gate in (("g", True), ("d", False)):
            n = f"{tag}{k}"
            lines += [f"VS{n} s{n} 0 {float(pol * vsb[k])!r}",
                      f"VG{n} g{n} s{n} dc {float(pol * vgs[k])!r}" + (" ac 1" if on_gate else ""),
                      f"VD{n} d{n} s{n} dc {float(pol * vds[k])!r}" + ("" if on_gate else " ac 1"),
                      f"M{n} d{n} g{n} s{n} 0 {model} w={float(w[k])!r} l={float(l[k])!r}"]
    res = ngspice.run("\n".join(lines + [f".ac lin 1 {f!r} {f!r}", ".end"]))

    def cap(name):
        return np.array([abs(np.imag(ngspice.vector(res, f"i(vg{name}{k})")[0])) / (2 * np.pi * f)
                         for k in range(len(w))])
    return cap("g"), cap("d")


@pytest.mark.ngspice
def test_table_capacitances_agree_with_the_cards_ac_response(tech):
    # The small-signal model of the stage inside its amplifier takes each device's gate
    # capacitances from the table: here against the card's own AC response at points
    # between the grid nodes (both polarities, two corners, a hot temperature).
    from models.devices.mos import capacitances
    rng = np.random.default_rng(11)
    n = 30
    err_gg, err_gd = [], []
    for pol in (1, -1):
        t = tech.tables[Polarity(pol)]
        for corner, temp_c in (("tt", 27.0), ("ss", 125.0)):
            l = np.round(np.exp(rng.uniform(np.log(t.lengths[0]), np.log(t.lengths[-1]), n)) / 5e-9) * 5e-9
            w = np.exp(rng.uniform(np.log(2e-6), np.log(100e-6), n))
            vgs = rng.uniform(0.5, 1.7, n)  # above threshold, where the gate charge is the channel's
            vds = rng.uniform(0.05, 1.7, n)
            vsb = rng.uniform(0.0, 0.8, n)
            c_gg, c_gd = _ngspice_gate_capacitances(pol, corner, temp_c, w, l, vgs, vds, vsb)
            m = _model(tech, pol, corner, temp_c + ZERO_CELSIUS, n)
            vs = pol * vsb
            cgs, cgd, cgb, _, _ = capacitances(m, tech.mos(Polarity(pol)), w, l, vs + pol * vgs, vs + pol * vds, vs, 0.0)
            err_gg += list((cgs + cgd + cgb) / c_gg - 1.0)
            err_gd += list(cgd / c_gd - 1.0)
    med_gg, p95_gg = np.median(np.abs(err_gg)), np.percentile(np.abs(err_gg), 95)
    med_gd, p95_gd = np.median(np.abs(err_gd)), np.percentile(np.abs(err_gd), 95)
    print(f"whole gate capacitance: median {med_gg:.3%}, p95 {p95_gg:.3%}; gate-drain: median {med_gd:.3%}, "
          f"p95 {p95_gd:.3%}")
    # Measured on this card: whole gate 0.55 % median, 6.1 % p95; gate-drain 0.5 % / 5.2 %.
    # The tail is the multilinear interpolation across the 0.1 V VGS steps where the channel
    # charge bends (saturation to triode); the overlap is the card's, measured by calibrate's
    # AC analysis (without it, 22 % low). Bounds about 1.5x the measured figures.
    assert med_gg <= 0.01 and p95_gg <= 0.09
    assert med_gd <= 0.01 and p95_gd <= 0.08
