"""What leaves a run folder for someone else: a front row as a design file, clean numbers in
front.csv and netlists (with AD/AS/PD/PS), and a report that stays small whatever the size
of verify.csv.
"""
from __future__ import annotations

import html
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from models.devices.tech import Polarity
from models.evaluate import evaluate
from optimise.cli import main
from optimise.files.errors import InputError
from optimise.files.space import study_ties
from optimise.files.study import load_design
from optimise.files.techfile import tech_from_dict
from optimise.report.build import write_report
from optimise.search.export import METRICS
from optimise.search.runfolder import load_run, study_of_run

ROOT = Path(__file__).resolve().parents[1]
STUDY = ROOT / "studies" / "sensor-buffer.toml"


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("runs") / "handoff"
    assert main(["optimise", str(STUDY), "--out", str(out), "--population", "12", "--generations", "4",
                 "--seed", "4"]) == 0
    assert len(pd.read_csv(out / "front.csv")) >= 2
    return out


def test_exported_row_evaluates_to_the_metrics_of_front_csv(run, tmp_path, capsys):
    r = load_run(run)
    study = study_of_run(r.path, r.record)
    for rid in list(r.table["id"])[:3]:
        path = tmp_path / f"{rid}.toml"
        assert main(["export-design", str(run), rid, "--out", str(path)]) == 0
        res = evaluate(load_design(path, study.tech), study.tech, study.conditions, study.targets)
        row = r.table.set_index("id").loc[rid]
        for name in METRICS:
            got, want = float(res.summary[name][0]), float(row[name])
            # The row was evaluated with the very numbers the file holds; a result does not depend
            # on the batch it was solved in beyond the solvers' 1e-12 (DEVELOPERS.md conventions).
            assert got == pytest.approx(want, rel=1e-12, abs=1e-30), (rid, name)
        assert res.feasible[0]
    capsys.readouterr()
    # `evaluate` then shows the full PVT table
    assert main(["evaluate", str(STUDY), "--design", str(path)]) == 0
    out = capsys.readouterr().out
    assert "feasible: yes" in out and len([ln for ln in out.splitlines() if ln.startswith("  ss ")]) == 9
    assert main(["export-design", str(run), "fl-999", "--out", str(tmp_path / "x.toml")]) == 2
    assert "has no row 'fl-999'" in capsys.readouterr().err
    assert main(["export-design", str(run), rid, "--out", str(path)]) == 2
    assert "exists" in capsys.readouterr().err


def test_design_files_accept_the_studys_ties(run, tmp_path):
    r = load_run(run)
    study = study_of_run(r.path, r.record)
    rid = r.table["id"].iloc[0]
    full = tmp_path / "full.toml"
    assert main(["export-design", str(run), rid, "--out", str(full)]) == 0
    text = full.read_text()
    ties = study_ties(study, "floating-loop")
    assert ties == {"mn_d2": "mn_d1", "mn_ctl": "mn_d1", "mp_d2": "mp_d1", "mp_ctl": "mp_d1"}
    short = text
    for role in ties:  # drop every tied role's table: the study's ties fill them in
        short = re.sub(rf"\[devices\.{role}\][^\n]*\n(?:[wl] = [^\n]*\n)+", "", short)
    assert "[devices.mn_d2]" not in short
    (tmp_path / "short.toml").write_text(short)
    a = load_design(full, study.tech)
    b = load_design(tmp_path / "short.toml", study.tech, lambda arch: study_ties(study, arch))
    for role in a.w:
        assert a.w[role][0] == b.w[role][0] and a.l[role][0] == b.l[role][0]
    with pytest.raises(InputError, match="Missing|missing"):
        load_design(tmp_path / "short.toml", study.tech)  # without the study's ties, roles are missing
    wrong = text.replace("[devices.mn_d2]  # tied to mn_d1 in the study\nw = ", "[devices.mn_d2]\nw = 1")
    (tmp_path / "wrong.toml").write_text(wrong)
    with pytest.raises(InputError, match="the study ties mn_d2 to mn_d1"):
        load_design(tmp_path / "wrong.toml", study.tech, lambda arch: study_ties(study, arch))


def test_front_csv_sizes_are_the_grid_numbers(run):
    text = (run / "front.csv").read_text()
    table = pd.read_csv(run / "front.csv")
    grid_um = 0.01  # demo350-invented: grid = "10n"
    header = text.splitlines()[0].split(",")
    for line in text.splitlines()[1:]:
        for name, cell in zip(header, line.split(",")):
            if name.endswith(("_w_um", "_l_um")) and cell:
                # as the grid gives them: at most two decimals, no binary noise (21.080000000000002)
                assert re.fullmatch(r"[0-9]+(\.[0-9]{1,2})?", cell), (name, cell)
                steps = float(cell) / grid_um
                assert abs(steps - round(steps)) < 1e-6
            if name.endswith("_a") and name.split("_")[0] in ("ib",) and cell:
                assert len(re.sub(r"e.*|[.-]", "", cell).lstrip("0")) <= 6, (name, cell)  # 6 digits
    assert {"power_max_w", "iout_peak_a", "delivers_load"} <= set(table.columns)
    assert table["delivers_load"].all() and (table["power_max_w"] >= table["power_w"]).all()
    assert all(c.endswith("_pct") for c in table.columns if c.startswith("margin_"))


def test_netlist_devices_carry_diffusion_geometry(run, tmp_path):
    r = load_run(run)
    rid = r.table["id"].iloc[0]
    deck = tmp_path / "d.cir"
    assert main(["netlist", str(run), "--row", rid, "--out", str(deck)]) == 0
    lines = [ln for ln in deck.read_text().splitlines() if ln.startswith("M_")]
    assert len(lines) == 2 * 8  # the stage's 8 devices, in its subcircuit and in the AC bench's copy
    study = study_of_run(r.path, r.record)
    for ln in lines:
        w = float(re.search(r" w=([0-9.e+-]+)", ln).group(1))
        ext = 2.5 * 0.35e-6  # the default: 2.5 l_min, both polarities of demo350 have l_min 0.35 um
        got = {k: float(v) for k, v in re.findall(r" (ad|as|pd|ps)=([0-9.e+-]+)", ln)}
        # rectangle W x E beyond the gate; perimeter 2 (W + E): hand formula
        assert got["ad"] == pytest.approx(w * ext, rel=1e-11) and got["as"] == got["ad"]
        assert got["pd"] == pytest.approx(2 * (w + ext), rel=1e-11) and got["ps"] == got["pd"]
        for number in re.findall(r"=([0-9.e+-]+)", ln):
            assert len(re.sub(r"e.*|[.-]", "", number).strip("0")) <= 12, ln  # no float noise
    assert study.tech.extension(Polarity.N) == ext


def test_technology_diffusion_extension_is_read_and_checked():
    base = {"name": "t", "model": "ekv", "grid": "10n",
            "nmos": dict(vt0=0.5, kp="100u", n=1.3, gamma=0.5, phi=0.8, va_per_l=2e7, tc_vt=1e-3, mu_exp=-1.5,
                         a_vt="5n", a_beta="10n", cox=5e-3, cov=3e-10, w_min="0.4u", l_min="0.35u")}
    base["pmos"] = dict(base["nmos"], l_min="0.5u")
    tech = tech_from_dict(base)
    assert tech.extension(Polarity.N) == pytest.approx(0.875e-6)  # 2.5 x 0.35 um
    assert tech.extension(Polarity.P) == pytest.approx(1.25e-6)  # 2.5 x 0.5 um
    tech = tech_from_dict(dict(base, diffusion_extension="0.6u"))
    assert tech.extension(Polarity.N) == tech.extension(Polarity.P) == pytest.approx(0.6e-6)
    with pytest.raises(InputError, match="diffusion_extension"):
        tech_from_dict(dict(base, diffusion_extension="-1u"))


def test_report_stays_small_with_a_large_verify_csv(run, tmp_path):
    # verify.csv of the 1.8 V demo's size: 220 designs x 45 PVT points x 5 metrics = 49,500 rows
    table = pd.read_csv(run / "front.csv")
    rng = np.random.default_rng(3)
    ids = np.resize(table["id"].to_numpy(), 220)
    grid = [(c, t, v) for c in ("tt", "ff", "ss", "fs", "sf") for t in (27, -40, 125) for v in (3.3, 2.7, 3.6)]
    metrics = [("iq_a", "rel", 2e-5), ("iout_source_a", "rel", 5e-3), ("iout_sink_a", "rel", 5e-3),
               ("headroom_high_v", "V", 0.02), ("headroom_low_v", "V", 0.02)]
    rows = []
    for rid in ids:
        for c, t, v in grid:
            for m, unit, model in metrics:
                err = rng.normal(0, 0.05 if unit == "rel" else 2e-3)
                sim = model * (1 + err) if unit == "rel" else model + err
                rows.append((rid, "floating-loop", c, t, v, m, model, sim, err, unit, ""))
    cols = ["id", "architecture", "corner", "temp_c", "vdd_v", "metric", "model", "simulator", "error", "error_unit",
            "note"]
    frame = pd.DataFrame(rows, columns=cols)
    assert len(frame) == 49_500
    frame.to_csv(run / "verify.csv", index=False)
    out = tmp_path / "review" / "r.html"
    out.parent.mkdir()
    try:
        assert write_report(run, out, stream=open("/dev/null", "w")) == 0
    finally:
        (run / "verify.csv").unlink()
    page, md = out.read_text(), out.with_suffix(".md").read_text()
    # The limits the report must keep: 3 MB of HTML, 1,000 lines of Markdown.
    assert out.stat().st_size < 3_000_000 and len(md.splitlines()) < 1000
    # every comparison stays one click away: verify.csv linked relative to the report
    href = Path(os.path.relpath(run / "verify.csv", out.parent)).as_posix()
    assert f'<a href="{href}">' in page and f"]({href})" in md
    # per metric and corner: median, 95th percentile, worst and where
    assert "95th percentile |error|" in page and md.count("| iq_a ") >= 6
    worst = frame.loc[frame[frame["metric"] == "iq_a"]["error"].abs().idxmax()]
    assert f"{worst['id']} {worst['corner']} {worst['temp_c']:g} C {worst['vdd_v']:g} V" in md
    # the caution once per report
    from optimise import CAUTION

    assert page.count(html.escape(CAUTION)) == 1 and md.count(CAUTION) == 1


def test_parallel_plot_is_translucent_up_is_better_and_highlights_picks(run):
    from optimise.search import plots

    r = load_run(run)
    picks = plots.best_per_objective(r.table, r.objectives)
    assert len(picks) >= 1 and all(v.startswith("best ") for v in picks.values())
    ax = plots.parallel_coordinates(r.table, r.objectives, highlight=picks)
    lines = ax.get_lines()
    faint = [ln for ln in lines if ln.get_linewidth() < 1.0]
    bold = [ln for ln in lines if ln.get_linewidth() > 2.0]
    assert len(faint) == len(r.table) and all(ln.get_alpha() < 1.0 for ln in faint)
    assert len(bold) == len(picks)
    # up is better: the design best in power sits at the top of the power axis
    k = list(r.objectives).index("power_w")
    best = r.table["id"].iloc[int(np.argmin(r.table["power_w"]))]
    row = next(ln for ln in bold if ln.get_label().startswith(best))
    assert row.get_ydata()[k] == pytest.approx(1.0)
    ticks = [t.get_text() for t in ax.get_xticklabels()]
    assert any("µW" in t for t in ticks) and any("µm²" in t for t in ticks)
    assert "(higher is better)" in plots.label("swing_v", "max")
    assert "(lower is better)" in plots.label("power_w", "min")
    import matplotlib.pyplot as plt

    plt.close(ax.figure)
