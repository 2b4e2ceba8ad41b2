"""JSON output is strict JSON: nan and inf become null with the reason listed."""
from __future__ import annotations

import json

from optimise.review.evaluation import json_safe


def test_nan_becomes_null_with_a_note():
    notes: list = []
    out = json_safe({"montecarlo": {"iq_sigma_pct": float("nan"), "samples": 10}, "x": [1.0, float("inf")]},
                    notes=notes)
    text = json.dumps(out, allow_nan=False)
    back = json.loads(text, parse_constant=lambda c: (_ for _ in ()).throw(ValueError(c)))
    assert back["montecarlo"]["iq_sigma_pct"] is None and back["x"] == [1.0, None]
    assert any("montecarlo.iq_sigma_pct" in n for n in notes) and any("x[1]" in n for n in notes)


def test_evaluate_montecarlo_json_of_a_cut_off_design_is_valid_json(tmp_path, capsys):
    # A real design with Iq = 0: a fixed-bias stage whose gate-to-gate voltage (4 uA x 700 kohm
    # = 2.8 V) exceeds VDD - (VT0n + |VT0p|) on the square-law technology, so both output
    # devices are off at every point and in every mismatch draw (square law: no current
    # below threshold). Its Monte Carlo sigma in percent of Iq is then undefined.
    import re
    from pathlib import Path

    from optimise.cli import main
    from test_search import tiny_study

    root = Path(__file__).resolve().parent.parent
    study = tiny_study(tmp_path)
    study.write_text(re.sub(r'technology = "[^"]*"', f'technology = "{root / "studies" / "tech" / "ah02-level1.toml"}"',
                            study.read_text(), count=1))
    design = tmp_path / "cut-off.toml"
    design.write_text('architecture = "fixed-bias"\n[devices.mn_out]\nw = 60\nl = 1.0\n[devices.mp_out]\nw = 150\n'
                      'l = 1.0\n[bias]\nib = "4u"\nr_bias = "700k"\n')
    assert main(["evaluate", str(study), "--design", str(design), "--montecarlo", "200", "--json"]) == 0
    text = capsys.readouterr().out
    out = json.loads(text, parse_constant=lambda c: (_ for _ in ()).throw(ValueError(c)))  # strict: no NaN
    assert out["summary"]["iq_a"] == 0.0 and out["montecarlo"]["iq_mean_a"] == 0.0
    assert out["montecarlo"]["iq_sigma_pct"] is None
    assert any("montecarlo.iq_sigma_pct" in v and "zero" in v for v in out["violations"]), out["violations"]
    # The table form says the same instead of failing on the missing number.
    assert main(["evaluate", str(study), "--design", str(design), "--montecarlo", "200"]) == 0
    assert "sigma n/a" in capsys.readouterr().out
