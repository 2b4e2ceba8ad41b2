"""Sweeps: grid files expand into cell studies, cells run as Dask tasks and give the same
fronts as one-by-one runs, failures are reported by cell, re-runs reuse finished cells,
and bad grid files are refused with the file and the key."""
from __future__ import annotations

import io
import json
import logging
import re
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from optimise.cli import main
from optimise.files.errors import InputError
from optimise.files.study import load_study
from optimise.search.export import read_front
from optimise.search.runner import optimise_study
from optimise.sweep.grid import dumps, load_grid
from optimise.sweep.runner import montecarlo_on_cluster, montecarlo_task, run_sweep

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "studies" / "sensor-buffer.toml"
TINY_SEARCH = "[search]\npopulation = 8\ngenerations = 2\n"


def tiny_base(folder: Path) -> Path:
    """The demo study cut to 2 corners x 1 temperature, technology by absolute path."""
    text = DEMO.read_text().replace('"tech/', f'"{ROOT / "studies" / "tech"}/')
    text = text.replace("temperatures_c = [27, -40, 125]", "temperatures_c = [27]")
    text = text.replace('corners = ["tt", "ff", "ss", "fs", "sf"]', 'corners = ["tt", "ss"]')
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "base.toml"
    path.write_text(text)
    return path


def write_grid(folder: Path, body: str, name: str = "grid.toml") -> Path:
    tiny_base(folder)
    path = folder / name
    path.write_text(body)
    return path


@pytest.fixture(scope="module")
def cluster():
    """One local cluster (2 single-threaded worker processes) shared by the tests that
    pass its address as --scheduler."""
    from distributed import LocalCluster

    c = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                     silence_logs=logging.CRITICAL)
    try:
        yield c
    finally:
        c.close()


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    """A 4-cell sweep on a local cluster that the sweep starts itself (2 workers)."""
    folder = tmp_path_factory.mktemp("sweep")
    grid = write_grid(folder, 'base = "base.toml"\nname = "tiny"\n[axes]\narchitecture = ["floating-loop"]\n'
                              '"supply.nominal" = [3.0, 3.3]\nseed = [1, 2]\n' + TINY_SEARCH)
    text = io.StringIO()
    rc = run_sweep(grid, folder / "out", workers=2, stream=text)
    return grid, folder / "out", rc, text.getvalue()


# ---------------------------------------------------------------------- on a cluster
def test_sweep_gives_the_fronts_of_one_by_one_runs(swept, tmp_path):
    grid, out, rc, text = swept
    assert rc == 0, text
    summary = pd.read_csv(out / "summary.csv")
    assert summary["status"].tolist() == ["finished"] * 4
    assert re.search(r"\[4/4\] ", text)
    for name in summary["cell"]:
        # The cell's own study file, run in this process with its own seed, gives the same bytes.
        study = out / "studies" / f"{name}.toml"
        assert optimise_study(study, tmp_path / name, stream=io.StringIO()) == 0
        assert (tmp_path / name / "front.csv").read_bytes() == (out / "cells" / name / "front.csv").read_bytes()
    assert summary["front_size"].sum() > 0
    assert (out / "fronts.png").stat().st_size > 0 and (out / "summary.md").is_file()


def test_supply_range_scales_with_the_nominal(swept):
    _, out, _, _ = swept
    data = tomllib.loads((out / "studies" / "floating-loop_nominal-3_seed-2.toml").read_text())
    # Base 3.3 V in [2.7, 3.6] V; nominal 3.0 V keeps the ratios: 3.0 * 2.7 / 3.3 = 2.454545...,
    # 3.0 * 3.6 / 3.3 = 3.272727..., written to six significant digits.
    assert data["supply"] == {"nominal": 3.0, "min": 2.45455, "max": 3.27273}
    assert data["architectures"] == ["floating-loop"] and set(data["bounds"]) == {"floating-loop"}
    assert data["seed"] == 2 and data["search"]["population"] == 8


def test_rerun_reuses_finished_cells_and_adds_montecarlo(swept, cluster):
    grid, out, _, _ = swept
    cells = sorted(p.name for p in (out / "cells").iterdir())
    stale = cells[0]
    record = json.loads((out / "cells" / stale / "run.json").read_text())
    record["status"] = "interrupted"
    (out / "cells" / stale / "run.json").write_text(json.dumps(record))
    mtimes = {c: (out / "cells" / c / "run.json").stat().st_mtime_ns for c in cells}
    text = io.StringIO()
    rc = run_sweep(grid, out, scheduler=cluster.scheduler_address, montecarlo=50, stream=text)
    assert rc == 0, text.getvalue()
    for c in cells[1:]:
        assert f"{c}: reused" in text.getvalue()
        assert (out / "cells" / c / "run.json").stat().st_mtime_ns == mtimes[c]  # not recomputed
    assert f"{stale}: finished" in text.getvalue()
    assert json.loads((out / "cells" / stale / "run.json").read_text())["status"] == "finished"
    summary = pd.read_csv(out / "summary.csv")
    assert sorted(summary["status"]) == ["finished"] + ["reused"] * 3
    with_front = summary[summary["front_size"] > 0]
    assert len(with_front) and np.isfinite(with_front["mc_sigma_pct"]).all()
    assert (with_front["mc_samples"] == 50).all()


def test_montecarlo_on_cluster_matches_in_process(swept, cluster):
    from distributed import Client

    _, out, _, _ = swept
    name = next(p.name for p in (out / "cells").iterdir() if len(read_front(p / "front.csv")))
    study = load_study(out / "studies" / f"{name}.toml")
    row = read_front(out / "cells" / name / "front.csv").iloc[0].to_dict()
    with Client(cluster.scheduler_address) as client:
        got = montecarlo_on_cluster(client, {name: (study, row)}, samples=40, seed=3)[name]
    # Same draws (seed 3) in this process: the cluster changes where it runs, not the numbers.
    assert got == montecarlo_task(study, row, 40, 3)


def test_failed_cell_is_reported_and_the_others_finish(tmp_path, cluster):
    # supply.min = 3.5 V lies above the base's 3.3 V nominal: that cell's study is invalid.
    grid = write_grid(tmp_path, 'base = "base.toml"\n[axes]\narchitecture = ["floating-loop"]\n'
                                '"supply.min" = [2.7, 3.5]\n' + TINY_SEARCH)
    text = io.StringIO()
    rc = run_sweep(grid, tmp_path / "out", scheduler=cluster.scheduler_address, stream=text)
    assert rc == 1
    bad = "floating-loop_min-3.5"
    assert re.search(rf"{bad}: FAILED \(after one retry\): .*not in order", text.getvalue())
    assert re.search(rf"cell\(s\) failed:\n  - {bad}: .*not in order", text.getvalue())
    summary = pd.read_csv(tmp_path / "out" / "summary.csv").set_index("cell")
    assert summary.loc[bad, "status"] == "failed" and "not in order" in summary.loc[bad, "reason"]
    assert summary.loc["floating-loop_min-2.7", "status"] == "finished"
    assert "not in order" in (tmp_path / "out" / "cells" / bad / "error.txt").read_text()
    assert bad in (tmp_path / "out" / "summary.md").read_text()


# ------------------------------------------------------------------------ grid files
BAD_GRIDS = [
    ('[axes]\n"load.current" = ["300u"]\n', "missing required key base"),
    ('base = "nowhere.toml"\n[axes]\n"load.current" = ["300u"]\n', "base = 'nowhere.toml': no such study file"),
    ('base = "base.toml"\n[axes]\n"supply.nominl" = [3.0]\n', "unknown key 'supply.nominl'.*did you mean"),
    ('base = "base.toml"\n[axes]\n"load.current" = []\n', r"\[axes\] load.current = an array is not a non-empty"),
    ('base = "base.toml"\n[axes]\n"load.current" = "300u"\n', r"\[axes\] load.current = '300u' is not a non-empty"),
    ('base = "base.toml"\n[axes]\n', r"\[axes\] is empty"),
    ('base = "base.toml"\n[axes]\narchitecture = ["floating-lop"]\n', "'floating-lop' is not known"),
    ('base = "base.toml"\n[axes]\ntechnology = ["tech/none.toml"]\n', "technology: 'tech/none.toml' is not a"),
    ('base = "base.toml"\n[axes]\nseed = [1, 1]\n', r"\[axes\] seed repeats the value 1"),
    ('base = "base.toml"\n[axes]\n"supply.nominal" = ["three"]\n', r"\[axes\] supply.nominal"),
    ('base = "base.toml"\n[axes]\nseed = [1]\n[search]\npopulation = 2\n', r"\[search\] population = 2"),
    ('base = "base.toml"\nbas = 1\n[axes]\nseed = [1]\n', "unknown key 'bas'"),
]


@pytest.mark.parametrize("body, message", BAD_GRIDS)
def test_bad_grid_files_are_refused_naming_file_and_key(tmp_path, body, message):
    grid = write_grid(tmp_path, body)
    with pytest.raises(InputError, match=message) as err:
        load_grid(grid)
    assert str(err.value).startswith(str(grid))


def test_cli_refusals_exit_2(tmp_path, capsys):
    grid = write_grid(tmp_path, 'base = "base.toml"\n[axes]\n"load.curent" = ["300u"]\n')
    assert main(["sweep", str(grid), "--out", str(tmp_path / "out")]) == 2
    assert "load.curent" in capsys.readouterr().err
    grid = write_grid(tmp_path, 'base = "base.toml"\n[axes]\nseed = [1]\n' + TINY_SEARCH)
    assert main(["sweep", str(grid), "--scheduler", "tcp://127.0.0.1:1", "--workers", "2"]) == 2
    assert "--workers" in capsys.readouterr().err
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("mine")
    assert main(["sweep", str(grid), "--out", str(tmp_path / "busy")]) == 2
    assert "holds no sweep" in capsys.readouterr().err


def test_cell_studies_round_trip_and_stand_alone(tmp_path):
    base = load_study(DEMO)
    assert tomllib.loads(dumps(base.raw)) == base.raw
    grid = write_grid(tmp_path, 'base = "base.toml"\n[axes]\narchitecture = ["follower", "floating-loop"]\n'
                                'technology = ["' + str(ROOT / "studies" / "tech" / "demo180-invented.toml") + '"]\n'
                                '"bounds.follower.ib" = [["1u", "20u"]]\n')
    g = load_grid(grid)
    assert [c.name for c in g.cells] == ["follower_demo180-invented_ib-1u+20u",
                                         "floating-loop_demo180-invented_ib-1u+20u"]
    for cell in g.cells:
        path = tmp_path / f"{cell.name}.toml"
        path.write_text(cell.toml)
        study = load_study(path)
        assert study.architectures == (cell.values["architecture"],)
        assert study.tech.name == "demo180-invented"
    assert tomllib.loads(g.cells[0].toml)["bounds"]["follower"]["ib"] == ["1u", "20u"]
