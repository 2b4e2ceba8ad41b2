"""optimise.search.runtime.keep_freed_memory: with it, a repeated evaluation reuses freed heap
memory instead of faulting fresh pages in (glibc's default trims the heap and maps large
blocks anew; see the module notes). Each case runs in a fresh interpreter, since the
setting is process-wide and cannot be undone."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

PROBE = """
import resource, sys
import numpy as np
from optimise.search.runtime import keep_freed_memory
if sys.argv[1] == "keep":
    assert keep_freed_memory() and keep_freed_memory()  # idempotent
from models.evaluate import Design, evaluate
from optimise.files.study import load_design, load_study
study = load_study("studies/sensor-buffer.toml")
base = load_design("studies/sensor-buffer-floating-loop.toml", study.tech)
n = 1500
pop = Design(base.architecture, {k: np.repeat(v, n) for k, v in base.w.items()},
             {k: np.repeat(v, n) for k, v in base.l.items()},
             {k: np.repeat(v, n) * np.linspace(0.5, 2.0, n) for k, v in base.bias.items()})
evaluate(pop, study.tech, study.conditions, study.targets)
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
evaluate(pop, study.tech, study.conditions, study.targets)
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


def _faults(mode):
    out = subprocess.run([sys.executable, "-c", PROBE, mode], cwd=REPO, capture_output=True, text=True, check=True)
    return int(out.stdout.split()[-1])


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the setting is for glibc on Linux")
def test_second_evaluation_faults_no_pages_in_with_freed_memory_kept():
    kept, default = _faults("keep"), _faults("default")
    # 1500 designs x 45 PVT points: with glibc's defaults the second run faults thousands
    # of pages in (12,000-15,000 seen here); with freed memory kept, a few hundred at most
    # (0-330 seen; the amplifier's small matrices are new each time).
    assert default > 1000, (kept, default)
    assert kept < default / 10, (kept, default)
