"""Dependency direction (STYLE.md sec. 2.1): `models` imports only numpy, scipy and the
standard library. Each models module is imported in a fresh interpreter, so nothing that
another test imported can hide a forbidden import.
"""
from __future__ import annotations

import json
import pkgutil
import subprocess
import sys
from pathlib import Path

import pytest

import models.stages

REPO = Path(__file__).resolve().parents[1]
FORBIDDEN = ("optimise", "pymoo", "pandas", "matplotlib")
CORE = ["models", "models.constants", "models.tech", "models.mos", "models.mismatch", "models.stages"]
STAGES = sorted(info.name for info in pkgutil.walk_packages(models.stages.__path__, "models.stages."))

PROBE = """
import importlib, json, sys
importlib.import_module(sys.argv[1])
forbidden = sys.argv[2].split(",")
print(json.dumps(sorted(m for m in sys.modules if m.split(".")[0] in forbidden)))
"""


@pytest.fixture(scope="module")
def probes():
    """Start one fresh interpreter per module, all at once (each takes about 0.3 s)."""
    procs = {
        module: subprocess.Popen(
            [sys.executable, "-c", PROBE, module, ",".join(FORBIDDEN)],
            cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )
        for module in CORE + STAGES
    }
    results = {}
    for module, proc in procs.items():
        out, err = proc.communicate(timeout=120)
        results[module] = (proc.returncode, out, err)
    return results


@pytest.mark.parametrize("module", CORE + STAGES)
def test_models_module_imports_no_outer_layer(module, probes):
    returncode, out, err = probes[module]
    assert returncode == 0, err
    loaded = json.loads(out.strip().splitlines()[-1])
    assert loaded == [], f"importing {module} loads {', '.join(loaded)}; models may use numpy, scipy and the standard library only"
