"""Where an analytic technology holds (models.validity): the fitted lengths a calibrated
technology file records, and the warnings evaluate, optimise and the report give for
lengths outside them and for replicas whose length differs from the device they stand for.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from models.evaluate import Design
from models.validity import LENGTH_MARGIN, covered, length_warnings
from optimise.cli import main
from optimise.files.errors import InputError
from optimise.files.tables import read_toml
from optimise.files.techfile import load_tech, tech_from_dict
from optimise.report.build import write_report
from optimise.search.runner import optimise_study

ROOT = Path(__file__).resolve().parents[1]
CALIBRATED = ROOT / "studies" / "tech" / "demo180-bsim3-calibrated.toml"
SHIPPED_180 = ROOT / "studies" / "sensor-buffer-180.toml"
EKV_180 = ROOT / "studies" / "tech" / "demo180-bsim3-calibrated.toml"


def _ekv_study(folder: Path) -> Path:
    """The 1.8 V study on the single-length EKV calibration of its card (the shipped study
    runs on the card's tables, which hold at every length and so never warn)."""
    text = SHIPPED_180.read_text()
    start = text.index('technology = "')
    end = text.index('"', start + len('technology = "'))
    path = folder / "sensor-buffer-180-ekv.toml"
    path.write_text(text[:start] + f'technology = "{EKV_180.as_posix()}' + text[end:])
    return path
UM = 1e-6


def floating(l_out=0.36, l_d1=0.36, l_loop=0.36):
    """The shipped floating-loop demo's widths and bias with the given lengths [um] (outputs,
    the D1 replicas, the other loop devices)."""
    data = read_toml(ROOT / "studies" / "sensor-buffer-floating-loop.toml")
    ls = {"mn_out": l_out, "mp_out": l_out, "mn_d1": l_d1, "mp_d1": l_d1}
    w = {r: np.array([float(t["w"]) * UM]) for r, t in data["devices"].items()}
    l = {r: np.array([ls.get(r, l_loop) * UM]) for r in w}
    bias = {"ib_n": np.array([2e-6]), "ib_p": np.array([2e-6]), "ib_ctl": np.array([4e-6])}
    return Design("floating-loop", w, l, bias)


def test_calibrated_technology_records_its_fitted_lengths():
    # studies/tech/demo180-bsim3-calibrated.toml: "--lengths 0.36u" in its own command line.
    assert load_tech(CALIBRATED).fitted_lengths == pytest.approx((0.36e-6,))
    assert load_tech(ROOT / "studies" / "tech" / "demo180-invented.toml").fitted_lengths == ()


@pytest.mark.parametrize("table, words", [
    ({"fitted_lengths_um": []}, ["fitted_lengths_um", "non-empty"]),
    ({"fitted_lengths_um": 0.36}, ["fitted_lengths_um", "non-empty"]),
    ({"fitted_lengths_um": [-1]}, ["-1", "0.01 to 1000 um"]),
    ({"fitted_lengths_um": ["abc"]}, ["fitted_lengths_um"]),
    ({"fitted_length_um": [0.36]}, ["fitted_length_um", "fitted_lengths_um"]),
])
def test_bad_fitted_lengths_are_clear_errors(table, words):
    data = read_toml(CALIBRATED)
    data["calibration"] = table
    with pytest.raises(InputError) as err:
        tech_from_dict(data, "t.toml")
    for word in words:
        assert word in str(err.value), str(err.value)


def test_margin_is_a_quarter_either_side():
    # The documented margin: within 25 % of a fitted length (models.validity.LENGTH_MARGIN).
    assert LENGTH_MARGIN == 0.25
    fitted = (0.36e-6,)
    assert covered(np.array([0.27e-6, 0.36e-6, 0.45e-6]), fitted).all()
    assert not covered(np.array([0.26e-6]), fitted).any() and not covered(np.array([0.46e-6]), fitted).any()


def test_warnings_present_when_lengths_leave_the_fitted_set():
    tech = load_tech(CALIBRATED)
    lines = length_warnings(tech, [floating(l_out=0.72, l_d1=0.72, l_loop=1.08)])
    assert len(lines) == 1  # equal replica lengths: only the fitted-set warning
    text = lines[0]
    assert "1 of 1 designs" in text and "0.36 um, +-25 %" in text
    assert "mn_out 0.72 um" in text and "mn_ctl 1.08 um" in text


def test_warnings_present_when_a_replica_length_differs():
    tech = load_tech(CALIBRATED)
    lines = length_warnings(tech, [floating(l_out=0.36, l_d1=0.40)])
    assert len(lines) == 1  # 0.40 um is within 25 % of 0.36 um: only the replica warning
    assert "mn_d1 vs mn_out" in lines[0] and "mp_d1 vs mp_out" in lines[0]
    assert "0.4 um vs 0.36 um" in lines[0]


def test_no_warning_as_shipped_or_without_a_calibration():
    tech = load_tech(CALIBRATED)
    assert length_warnings(tech, [floating()]) == []  # every L = 0.36 um, as fitted
    invented = load_tech(ROOT / "studies" / "tech" / "demo180-invented.toml")
    assert length_warnings(invented, [floating(l_out=0.72, l_d1=1.08)]) == []


def test_evaluate_warns_on_stderr_and_keeps_json_strict(tmp_path, capsys):
    design = tmp_path / "d.toml"
    text = (ROOT / "studies" / "sensor-buffer-floating-loop.toml").read_text()
    design.write_text(text.replace("l = 0.35", "l = 0.72"))
    study_180 = _ekv_study(tmp_path)
    assert main(["evaluate", str(study_180), "--design", str(design), "--json"]) == 0
    out, err = capsys.readouterr()
    json.loads(out)
    assert err.count("warning:") == 2  # outside the fitted set, and replicas 1.05 um vs 0.72 um
    assert "mn_out 0.72 um" in err and "mn_d1 vs mn_out" in err
    design.write_text(text.replace("l = 0.35", "l = 0.36").replace("l = 1.05", "l = 0.36"))
    assert main(["evaluate", str(study_180), "--design", str(design), "--json"]) == 0
    assert "warning" not in capsys.readouterr().err  # as fitted, replicas equal: silent


def test_optimise_and_report_warn_once_per_run(tmp_path):
    text = _ekv_study(tmp_path).read_text().replace("l = [0.18, 1.44]", "l = [0.36, 0.36]")
    study = tmp_path / "s.toml"
    text = text.replace("l = [0.36, 0.36]", "l = [0.72, 1.44]").replace('current = "300u"', 'current = "5u"')
    # Loose targets, so a tiny search has a front to warn about.
    start, end = text.index("[targets]"), text.index("# ---", text.index("[targets]"))
    study.write_text(text[:start] + "[targets]\n" + text[end:])
    out = tmp_path / "run"
    with (tmp_path / "log.txt").open("w") as stream:
        assert optimise_study(study, out, population=8, generations=1, stream=stream) == 0
    printed = (tmp_path / "log.txt").read_text()
    # Once each for the whole run: lengths outside the fitted set; the floating loop's and
    # the followers' replicas (free lengths, so they differ from their devices).
    assert printed.count("warning:") == 2
    assert printed.count("designs use lengths outside") == 1 and printed.count("give a replica") == 1
    record = json.loads((out / "run.json").read_text())
    assert len(record["warnings"]) == 2
    with (tmp_path / "r.txt").open("w") as stream:
        assert write_report(out, count=2, stream=stream) == 0
    md = (out / "report.md").read_text()
    assert md.count("designs use lengths outside") == 2  # at a glance and in the assumptions
    assert "What the ekv model leaves out" in md and "DIBL" in md and "calibrate --tables" in md
    assert "Bias sources are ideal" in md


def test_warnings_count_the_designs_over_every_population():
    # Counted, not flagged: two populations, two of the three designs outside the fitted set
    # (one in each), one of the three with an unequal replica.
    tech = load_tech(CALIBRATED)
    lines = length_warnings(tech, [floating(), floating(l_out=0.72, l_d1=0.72), floating(l_loop=1.08)])
    assert len(lines) == 1 and lines[0].startswith("2 of 3 designs use lengths outside")
    lines = length_warnings(tech, [floating(), floating(l_d1=0.40)])
    assert len(lines) == 1 and lines[0].startswith("1 of 2 designs give a replica a different length")
    assert "mn_d1 vs mn_out in 1 (e.g." in lines[0]
