"""The search: optimiser wiring on a known front, determinism, front validity, resume,
run-folder safety and refusals of bad search tables."""
from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from pymoo.problems import get_problem

from models.evaluate import evaluate
from optimise.cli import main
from optimise.files.space import load_search
from optimise.files.study import load_study
from optimise.search import nsga as search
from optimise.search.export import design_from_row, read_front, write_front
from optimise.search.nsga import Progress, hypervolume, non_dominated, run_search
from optimise.search.runner import optimise_study

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "studies" / "sensor-buffer.toml"


def tiny_study(tmp_path, population=8, generations=3, extra=""):
    """The demo study cut down to 2 corners x 1 temperature and a tiny budget."""
    text = DEMO.read_text()
    text = text.replace('"tech/', f'"{ROOT / "studies" / "tech"}/')
    text = text.replace("temperatures_c = [27, -40, 125]", "temperatures_c = [27]")
    text = text.replace('corners = ["tt", "ff", "ss", "fs", "sf"]', 'corners = ["tt", "ss"]')
    text = re.sub(r"population = \d+", f"population = {population}", text)
    text = re.sub(r"generations = \d+", f"generations = {generations}", text)
    text = text.replace("checkpoint_every = 5", "checkpoint_every = 1")
    path = tmp_path / "tiny.toml"
    path.write_text(text + extra)
    return path


class Quiet(Progress):
    def __init__(self):
        super().__init__(stream=open("/dev/null", "w"))


# ------------------------------------------------------------------------- ZDT1 wiring
def test_zdt1_front_and_hypervolume_through_the_runner(tmp_path):
    # Zitzler, Deb and Thiele 2000: ZDT1 (n = 30) has the convex front f2 = 1 - sqrt(f1),
    # f1 in [0, 1]; its hypervolume with reference point (1, 1) is 2/3 (integral of sqrt).
    problem = get_problem("zdt1")
    state = run_search(problem, seed=1, population=60, generations=150, checkpoint=tmp_path / "zdt1.npz",
                       resume=False, progress=Quiet(), label="zdt1", box=(np.zeros(2), np.ones(2)),
                       checkpoint_every=50)
    X, F, _ = state["archive"]
    assert non_dominated(F).all()
    # Distance to the known front: NSGA-II at this budget gets within a few hundredths
    # (Deb et al. 2002 report convergence metrics of order 1e-3 at 250 x 100 evaluations).
    gap = np.abs(F[:, 1] - (1.0 - np.sqrt(np.clip(F[:, 0], 0, 1))))
    assert np.median(gap) < 0.02
    # 2/3 exact (the integral of 1 - sqrt(f1) over [0, 1] under ref (1, 1), by hand; front of
    # E. Zitzler, K. Deb, L. Thiele, Evolutionary Computation 8(2), 2000); a finite front of this quality falls
    # short by a few percent.
    assert hypervolume(F, np.zeros(2), np.ones(2)) == pytest.approx(2 / 3, rel=0.05)
    # The same export code writes it and reads it back unchanged.
    table = pd.DataFrame({"id": [f"z-{k}" for k in range(len(F))], "f1": F[:, 0], "f2": F[:, 1]})
    write_front(tmp_path / "front.csv", table)
    back = read_front(tmp_path / "front.csv")
    assert np.array_equal(back[["f1", "f2"]].to_numpy(), F)


def test_hypervolume_hand_values():
    # By hand (areas of the dominated boxes): {(0.5, 0.5)} -> 0.25; {(0.25, 0.75), (0.75, 0.25)} -> 0.3125, ref (1, 1).
    z, o = np.zeros(2), np.ones(2)
    assert hypervolume(np.array([[0.5, 0.5]]), z, o) == pytest.approx(0.25)
    assert hypervolume(np.array([[0.25, 0.75], [0.75, 0.25]]), z, o) == pytest.approx(0.3125)


def test_non_dominated_mask():
    F = np.array([[1, 2], [2, 1], [2, 2], [1, 2]])
    # (2, 2) is dominated by (1, 2); equal points do not dominate each other.
    assert non_dominated(F).tolist() == [True, True, False, True]


# ------------------------------------------------------------------------- the study search
@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("run")
    study = tiny_study(tmp)
    out = tmp / "out"
    code = main(["optimise", str(study), "--out", str(out)])
    assert code == 0
    return study, out


def test_run_folder_has_every_file(tiny_run):
    _, out = tiny_run
    for name in ("front.csv", "run.json", "objectives.png", "hypervolume.png", "parallel.png"):
        assert (out / name).stat().st_size > 0, name
    record = json.loads((out / "run.json").read_text())
    assert record["status"] == "finished"
    assert {"numpy", "pymoo", "python"} <= set(record["versions"])
    assert record["seed"] == 1 and record["evaluations"] > 0
    for arch, rec in record["architectures"].items():
        assert len(rec["hypervolume"]) == 3


def test_front_rows_are_feasible_non_dominated_and_reproducible(tiny_run):
    study_path, out = tiny_run
    study = load_study(study_path)
    table = read_front(out / "front.csv")
    assert len(table) > 0
    settings = load_search(study)
    for arch, rows in table.groupby("architecture"):
        F = []
        for _, row in rows.iterrows():
            res = evaluate(design_from_row(row), study.tech, study.conditions, study.targets)
            assert res.feasible[0], res.violations[0]
            for name in ("iq_a", "power_w", "swing_v", "area_um2", "iq_sigma_pct", "headroom_high_v"):
                assert res.summary[name][0] == pytest.approx(row[name], rel=1e-9, abs=1e-15)
            F.append([row[n] * (-1 if s == "max" else 1) if n != "supply_sens_pct_per_v" else abs(row[n])
                      for n, s in settings.objectives.items()])
        assert non_dominated(np.array(F)).all()
        # every width and length on the drawing grid (10 nm for demo350)
        for c in [c for c in rows.columns if c.endswith(("_w_um", "_l_um"))]:
            v = rows[c].to_numpy() * 1e3  # nm
            assert np.allclose(v / 10, np.round(v / 10), atol=1e-6)


def test_same_seed_gives_identical_front(tiny_run, tmp_path):
    study, out = tiny_run
    again = tmp_path / "again"
    assert main(["optimise", str(study), "--out", str(again)]) == 0
    assert (again / "front.csv").read_bytes() == (out / "front.csv").read_bytes()


def test_existing_run_folder_is_refused(tiny_run, capsys):
    study, out = tiny_run
    before = (out / "front.csv").read_bytes()
    assert main(["optimise", str(study), "--out", str(out)]) == 2
    assert "exists" in capsys.readouterr().err
    assert (out / "front.csv").read_bytes() == before


def test_resume_after_interrupt_gives_the_uninterrupted_front(tmp_path, monkeypatch):
    study = tiny_study(tmp_path, population=8, generations=4)
    full = tmp_path / "full"
    assert optimise_study(study, full, stream=open("/dev/null", "w")) == 0

    calls = {"n": 0}
    real = search.Progress.update

    def interrupting(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 6:  # during the second architecture
            raise KeyboardInterrupt
        return real(self, *args, **kwargs)

    part = tmp_path / "part"
    monkeypatch.setattr(search.Progress, "update", interrupting)
    assert optimise_study(study, part, stream=open("/dev/null", "w")) == 130
    assert json.loads((part / "run.json").read_text())["status"] == "interrupted"
    assert (part / "front.csv").exists()
    monkeypatch.setattr(search.Progress, "update", real)
    assert optimise_study(study, part, resume=True, stream=open("/dev/null", "w")) == 0
    assert (part / "front.csv").read_bytes() == (full / "front.csv").read_bytes()


# ------------------------------------------------------------------------- bad studies
@pytest.mark.parametrize("extra_old, extra_new, message", [
    ('power_w = "min"', 'power_watts = "min"', "unknown key 'power_watts'"),
    ('mn_out = { w = [10, 400], l = [0.35, 1.4] }\nmp_out', 'mn_out = { w = [], l = [0.35, 1.4] }\nmp_out',
     "is not a [lower, upper] pair"),
    ('ib_n = ["0.3u", "10u"]', 'ib_n = ["10u", "0.3u"]', "lower bound above upper bound"),
    ('mn_d2 = "mn_d1"', 'mn_d2 = "mn_d9"', "ties to a missing role"),
    ('swing_v = "max"', 'swing_v = "maximum"', "is not a sense"),
])
def test_bad_search_tables_are_refused(tmp_path, capsys, extra_old, extra_new, message):
    path = tiny_study(tmp_path)
    text = path.read_text()
    assert extra_old in text
    path.write_text(text.replace(extra_old, extra_new, 1))
    assert main(["optimise", str(path), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert message in err and "tiny.toml" in err


def test_a_run_with_nothing_feasible_keeps_the_full_header_and_names_the_blocking_constraint(tmp_path, capsys):
    # An area cap of 1 um^2 no design of the demo can meet: front.csv still documents every
    # column (variables, metrics, margins), and run.json names the cap as what blocks the
    # least-violating design, with a negative worst margin (the cap is missed by far).
    study = tiny_study(tmp_path, population=6, generations=1)
    study.write_text(study.read_text().replace("area_max_um2 = 3000", "area_max_um2 = 1"))
    out = tmp_path / "out"
    assert main(["optimise", str(study), "--out", str(out)]) == 0
    front = pd.read_csv(out / "front.csv")
    assert len(front) == 0
    for col in ("id", "architecture", "overall_front", "mn_out_w_um", "ib_ctl_a", "power_w", "fp2_hz",
                "margin_area_pct"):
        assert col in front.columns, col
    record = json.loads((out / "run.json").read_text())
    for arch, info in record["architectures"].items():
        assert info["front_size"] == 0, arch
        assert info["blocked"]["blocking_constraint"] == "area", arch
        assert info["blocked"]["closest_margin"] < -0.9, arch  # area far above 1 um^2: margin near -(A - 1)/1
        # The same worst margin in percent (a hundredth part, rounding only).
        assert info["blocked"]["closest_margin_pct"] == pytest.approx(100.0 * info["blocked"]["closest_margin"],
                                                                      rel=1e-12, abs=0.0), arch
        assert any("area" in v for v in info["blocked"]["closest_violations"]), arch
    capsys.readouterr()
