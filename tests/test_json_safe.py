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
