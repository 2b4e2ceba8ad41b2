"""Checkpoints from a received run folder are data only: a crafted file runs nothing and is
refused, and --resume refuses when the study or technology text changed."""
from __future__ import annotations

import pickle
import zipfile
from pathlib import Path

import numpy as np

from optimise.cli import main
from test_search import tiny_study


class _Payload:
    """Unpickling this object would create the marker file."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (Path(self.marker).write_text, ("ran",))


def _interrupted_run(tmp_path):
    study = tiny_study(tmp_path, population=4, generations=2)
    out = tmp_path / "run"
    assert main(["optimise", str(study), "--out", str(out)]) == 0
    return study, out


def test_no_pickle_in_the_package():
    root = Path(__file__).resolve().parent.parent / "optimise"
    for path in root.rglob("*.py"):
        text = path.read_text()
        assert "import pickle" not in text and "pickle.load" not in text, path


def test_crafted_checkpoints_are_refused_and_run_nothing(tmp_path, capsys):
    study, out = _interrupted_run(tmp_path)
    marker = tmp_path / "marker"
    ck = next((out / "checkpoint").glob("*.npz"))
    capsys.readouterr()
    # Three crafted files: a raw pickle, a pickle inside the npz, an object array in the npz.
    crafted = [pickle.dumps(_Payload(marker))]
    with zipfile.ZipFile(tmp_path / "a.npz", "w") as z:
        z.writestr("record.npy", pickle.dumps(_Payload(marker)))
    crafted.append((tmp_path / "a.npz").read_bytes())
    np.savez(tmp_path / "b.npz", record=np.array([_Payload(marker)], dtype=object))
    crafted.append((tmp_path / "b.npz").read_bytes())
    for data in crafted:
        ck.write_bytes(data)
        code = main(["optimise", str(study), "--out", str(out), "--resume"])
        err = capsys.readouterr().err
        assert code == 2 and "checkpoint" in err and "Traceback" not in err, err
        assert not marker.exists()


def test_resume_refuses_a_changed_technology_or_study(tmp_path, capsys):
    study = tiny_study(tmp_path, population=4, generations=2)
    tech = Path(next(line.split('"')[1] for line in study.read_text().splitlines()
                     if line.startswith("technology")))
    local = tmp_path / "tech.toml"
    local.write_text(tech.read_text())
    study.write_text(study.read_text().replace(str(tech), str(local)))
    out = tmp_path / "run"
    assert main(["optimise", str(study), "--out", str(out)]) == 0
    capsys.readouterr()
    local.write_text(local.read_text() + "# edited after the run\n")
    assert main(["optimise", str(study), "--out", str(out), "--resume"]) == 2
    assert "study or technology file changed" in capsys.readouterr().err
    local.write_text(tech.read_text())
    study.write_text(study.read_text() + "# edited too\n")
    assert main(["optimise", str(study), "--out", str(out), "--resume"]) == 2
    assert "study file changed" in capsys.readouterr().err
