"""Folders from other people's files: --overwrite removes only a folder stagefront marked as
its own, and names taken from input files become single safe path components."""
from __future__ import annotations

from pathlib import Path

import pytest

from optimise.cli import main
from optimise.files.folders import MARKER, component
from optimise.sweep.grid import label
from test_search import tiny_study


def _listing(folder: Path) -> set:
    return {p.relative_to(folder) for p in folder.rglob("*")}


@pytest.mark.parametrize("case", ["current", "parent", "holds-study", "not-a-run"])
def test_overwrite_refuses_folders_that_are_not_runs(tmp_path, monkeypatch, capsys, case):
    study = tiny_study(tmp_path)
    (tmp_path / "keep.txt").write_text("someone's work\n")
    inner = tmp_path / "a" / "b"
    inner.mkdir(parents=True)
    (inner / "notes.txt").write_text("more work\n")
    target = {"current": tmp_path, "parent": tmp_path / "a", "holds-study": tmp_path,
              "not-a-run": tmp_path / "a"}[case]
    monkeypatch.chdir(inner if case == "parent" else tmp_path)
    if case == "holds-study":
        monkeypatch.chdir(tmp_path.parent)  # not the current folder: refused for holding the study
    before = _listing(tmp_path)
    code = main(["optimise", str(study), "--out", str(target), "--overwrite"])
    err = capsys.readouterr().err
    assert code == 2 and "--overwrite refused" in err and "nothing was deleted" in err, err
    assert "Traceback" not in err
    if case == "holds-study":
        assert "input file" in err
    assert _listing(tmp_path) == before


def test_overwrite_refuses_a_folder_without_the_marker(tmp_path, capsys):
    study = tiny_study(tmp_path)
    other = tmp_path / "other"
    other.mkdir()
    (other / "data.csv").write_text("x\n1\n")
    assert main(["optimise", str(study), "--out", str(other), "--overwrite"]) == 2
    assert MARKER in capsys.readouterr().err
    assert (other / "data.csv").read_text() == "x\n1\n"


def test_overwrite_replaces_a_run_folder_and_refuses_a_file(tmp_path, capsys):
    study = tiny_study(tmp_path, population=4, generations=1)
    out = tmp_path / "run"
    assert main(["optimise", str(study), "--out", str(out)]) == 0
    assert (out / MARKER).is_file()
    (out / "stale.txt").write_text("old\n")
    assert main(["optimise", str(study), "--out", str(out), "--overwrite"]) == 0
    assert not (out / "stale.txt").exists() and (out / "front.csv").is_file()
    afile = tmp_path / "afile"
    afile.write_text("x")
    capsys.readouterr()
    assert main(["optimise", str(study), "--out", str(afile)]) == 2
    assert "not a folder" in capsys.readouterr().err and afile.read_text() == "x"


# A hand list: absolute paths, parent steps, hidden names and empty text from input files.
@pytest.mark.parametrize("text", ["/tmp/victim", "..", ".", "../../etc", "", ".hidden", "a/b\\c", "\n.control"])
def test_names_from_files_become_one_safe_component(text):
    for name in (component(text), label(text)):
        assert name and name not in (".", "..") and not name.startswith(".")
        assert "/" not in name and "\\" not in name and "\n" not in name
        assert Path(name).name == name


def test_grid_name_and_technology_stem_stay_inside_the_sweep(tmp_path, capsys, monkeypatch):
    from test_sweep import TINY_SEARCH, write_grid
    from optimise.sweep.grid import load_grid

    tech = Path(__file__).resolve().parent.parent / "studies" / "tech"
    dots = tmp_path / "...toml"  # its stem is ".."
    dots.write_text(next(tech.glob("*.toml")).read_text())
    grid = write_grid(tmp_path, f'name = "/tmp/victim"\nbase = "base.toml"\n{TINY_SEARCH}'
                                f'[axes]\ntechnology = ["{dots}"]\n')
    loaded = load_grid(grid)
    assert component(loaded.name) == "tmp-victim"
    for cell in loaded.cells:
        assert Path(cell.name).name == cell.name and cell.name not in (".", "..")
        assert ".." not in Path(cell.name).parts


def test_negative_seed_is_refused(tmp_path, capsys):
    study = tiny_study(tmp_path)
    assert main(["optimise", str(study), "--out", str(tmp_path / "r"), "--seed", "-1"]) == 2
    err = capsys.readouterr().err
    assert "--seed" in err and "Traceback" not in err and not (tmp_path / "r").exists()


def test_sweep_overwrite_keeps_technology_files_an_axis_points_into_the_folder(tmp_path, capsys):
    from test_sweep import TINY_SEARCH, write_grid
    from optimise.files.folders import mark

    out = tmp_path / "sw"
    out.mkdir()
    mark(out, "sweep")  # a sweep folder stagefront made, so only the technology file protects it
    tech = out / "mine.toml"
    tech.write_text((Path(__file__).resolve().parent.parent / "studies" / "tech" / "demo350-invented.toml")
                    .read_text())
    (out / "cells").mkdir()
    grid = write_grid(tmp_path, f'base = "base.toml"\n{TINY_SEARCH}[axes]\ntechnology = ["sw/mine.toml"]\n')
    before = _listing(out)
    assert main(["sweep", str(grid), "--out", str(out), "--overwrite"]) == 2
    err = capsys.readouterr().err
    assert "--overwrite refused" in err and "mine.toml" in err and "nothing was deleted" in err
    assert _listing(out) == before and tech.is_file()
