"""One writer per run folder: a second optimise into a busy folder stops with a clear
error and leaves the first run's results intact; a lock left by a killed run is stale."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

from optimise.cli import main
from optimise.files.folders import LOCK, locked
from test_search import tiny_study

ROOT = Path(__file__).resolve().parent.parent

# The first run waits inside its first generation until the test lets it go, so the two
# runs overlap for certain, whatever the machine's speed.
FIRST = """
import sys, time
from pathlib import Path
from optimise.search import nsga
from optimise.search.runner import optimise_study
study, out, go, started = sys.argv[1:]
real = nsga.Progress.update
def waiting(self, *a, **k):
    Path(started).write_text("1")
    while not Path(go).exists():
        time.sleep(0.05)
    return real(self, *a, **k)
nsga.Progress.update = waiting
sys.exit(optimise_study(study, out, stream=open("/dev/null", "w")))
"""


def _wait_for(path: Path, proc, limit_s: float = 120.0) -> None:
    end = time.monotonic() + limit_s  # a guard against a hung test, not a timing assertion
    while not path.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < end, f"{path} never appeared"
        time.sleep(0.05)


def test_second_optimise_into_a_busy_folder_is_refused(tmp_path, capsys):
    study = tiny_study(tmp_path, population=4, generations=2)
    out, go, started = tmp_path / "run", tmp_path / "go", tmp_path / "started"
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + str(ROOT / "tests")}
    proc = subprocess.Popen([sys.executable, "-c", FIRST, str(study), str(out), str(go), str(started)],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        _wait_for(started, proc)
        assert json.loads((out / LOCK).read_text())["pid"] == proc.pid
        for extra in ([], ["--overwrite"], ["--resume"]):
            code = main(["optimise", str(study), "--out", str(out), *extra])
            err = capsys.readouterr().err
            assert code == 2 and "in use by another stagefront process" in err and str(proc.pid) in err, err
    finally:
        go.write_text("1")
        _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert json.loads((out / "run.json").read_text())["status"] == "finished"
    assert (out / "front.csv").is_file() and not (out / LOCK).exists()


def test_a_lock_left_by_a_dead_process_is_taken_over(tmp_path):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    folder = tmp_path / "run"
    folder.mkdir()
    import socket

    (folder / LOCK).write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(), "command": "optimise"}))
    with locked(folder, "verify"):
        assert json.loads((folder / LOCK).read_text())["pid"] == os.getpid()
    assert not (folder / LOCK).exists()
