"""The records' defaults against the study reader's: a caller of models.evaluate who builds
`Targets` with only the load gets the same targets as a study file that gives only the
load, so both get the same figures.

Check values: the study reader's defaults for the keys a study leaves out
(optimise/files/study.py: [driver] compliance 0.2 V, drive "both", every [targets] limit
off); no tolerance, the values are set, not computed.
"""
from __future__ import annotations

from pathlib import Path

from models.records import Targets
from optimise.files.study import study_from_dict
from optimise.files.tables import read_toml

ROOT = Path(__file__).resolve().parents[1]


def test_targets_defaults_are_those_of_a_study_that_gives_only_the_load():
    path = ROOT / "studies" / "sensor-buffer.toml"
    data = {k: v for k, v in read_toml(path).items() if k not in ("driver", "targets", "amplifier")}
    study = study_from_dict(data, path)
    direct = Targets(i_load=study.targets.i_load, c_load=study.targets.c_load)
    assert study.targets == direct
