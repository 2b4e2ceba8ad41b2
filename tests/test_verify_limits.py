"""verify and the ngspice runner under pressure: a time limit scaled to the deck, progress
while a process runs long, and temporary folders removed on every exit path (a time-out,
Ctrl-C, SIGTERM, and stale folders of killed processes at the next start)."""
from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from optimise.cli import main
from optimise.spice import ngspice, process
from optimise.spice.verify import TIME_BASE_S, TIME_PER_POINT_S, time_limit
from test_search import tiny_study

ROOT = Path(__file__).resolve().parent.parent


def _ours(folder: Path) -> list:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(process.PREFIX))


def test_time_limit_grows_with_the_deck_and_stays_in_seconds():
    assert time_limit(1, 1) == TIME_BASE_S + TIME_PER_POINT_S
    assert time_limit(16, 3) - time_limit(8, 3) == pytest.approx(8 * 3 * TIME_PER_POINT_S)
    # A full batch (16 designs x 3 supplies) stays about a minute, not the 300 s of old.
    assert time_limit(16, 3) < 90


def test_a_process_over_its_limit_is_killed_with_progress_on_the_way(tmp_path):
    seen = []
    t0 = time.monotonic()
    with pytest.raises(subprocess.TimeoutExpired):
        process.run(["sleep", "30"], tmp_path, timeout=1.5, progress=seen.append, every=0.4)
    assert time.monotonic() - t0 < 10  # killed at the limit, not after the 30 s
    assert len(seen) >= 2 and all(0 < t < 1.5 for t in seen)


def test_stale_folders_of_dead_processes_are_removed(tmp_path):
    dead = subprocess.Popen(["true"])
    dead.wait()
    stale = tmp_path / f"{process.PREFIX}{dead.pid}-abc"
    mine = tmp_path / f"{process.PREFIX}{os.getpid()}-def"
    other = tmp_path / "stagefront-ngspice-old-name"  # not named by a process: left alone
    for f in (stale, mine, other):
        f.mkdir()
        (f / "deck.cir").write_text("* x\n")
    assert process.remove_stale(tmp_path) == [stale]
    assert not stale.exists() and mine.exists() and other.exists()


@pytest.mark.ngspice
def test_a_deck_over_its_time_limit_fails_and_leaves_no_folder(tmp_path, monkeypatch):
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    # A transient of a second in 1 ps steps: far more work than one second allows.
    deck = "slow\nV1 a 0 sin(0 1 1meg)\nR1 a b 1k\nC1 b 0 1n\n.tran 1p 1 0 1p\n.end\n"
    t0 = time.monotonic()
    with pytest.raises(ngspice.NgspiceError, match="did not finish within 1 s") as err:
        ngspice.run_plots(deck, timeout=1.0)
    assert err.value.timed_out and time.monotonic() - t0 < 10
    assert _ours(tmp_path) == []


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("verify-limits")
    out = tmp / "run"
    assert main(["optimise", str(tiny_study(tmp, population=8, generations=3)), "--out", str(out)]) == 0
    return out


CHILD = ("import signal, sys; signal.signal(signal.SIGINT, signal.default_int_handler); "
         "from optimise.cli import main; sys.exit(main(sys.argv[1:]))")


@pytest.mark.ngspice
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["ctrl-c", "sigterm"])
def test_interrupted_verify_removes_its_ngspice_folders(run_folder, tmp_path, sig):
    env = dict(os.environ, TMPDIR=str(tmp_path), PYTHONPATH=str(ROOT))
    child = subprocess.Popen([sys.executable, "-c", CHILD, "verify", str(run_folder), "--all"], env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not _ours(tmp_path) and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    assert child.poll() is None, "verify ended before an ngspice folder was seen"
    child.send_signal(sig)
    out, err = child.communicate(timeout=60)
    assert child.returncode == 130, (out, err)
    assert "interrupted" in err and "Traceback" not in err, err
    assert _ours(tmp_path) == []
    assert not (run_folder / ".stagefront-lock").exists()  # the lock went with it


def test_calibrate_time_limits_are_scaled_to_the_deck():
    from optimise.calibrate import devicefit, tables

    # A sweep deck's limit is the start-up allowance plus its devices x points.
    one, two = (process.time_limit(n * 181, devicefit.SWEEP_S_PER_POINT) for n in (16, 48))
    assert one == pytest.approx(process.START_S + 16 * 181 * devicefit.SWEEP_S_PER_POINT)
    assert one < two < 60  # seconds, not the fixed 300 s of old
    axes = tables.grid_axes(1.8)
    few, many = (tables.deck_limit(tables.default_lengths(0.18e-6, 1.8e-6, n), axes) for n in (3, 12))
    assert process.START_S < few < many < 300


def _reader(stream, lines):
    import threading

    def read():
        for line in stream:
            lines.append(line)
    thread = threading.Thread(target=read, daemon=True)
    thread.start()
    return thread


@pytest.mark.ngspice
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["ctrl-c", "sigterm"])
@pytest.mark.parametrize("phase, seen", [("sweeps", "[1/"), ("tables", "degC started")])
def test_interrupted_calibrate_removes_its_ngspice_folders(tmp_path, sig, phase, seen):
    # The sweeps run one at a time in the main thread; the tables two at once in threads,
    # whose ngspice processes the interrupt must reach too.
    env = dict(os.environ, TMPDIR=str(tmp_path), PYTHONPATH=str(ROOT))
    out = tmp_path / "t.toml"
    child = subprocess.Popen([sys.executable, "-c", CHILD, "calibrate", "--models",
                              str(ROOT / "studies" / "models" / "demo180-bsim3-invented.lib"), "--lmin", "0.18u",
                              "--out", str(out), "--tables", "--table-lengths", "0.18u,0.36u", "--temps", "27"],
                             env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    lines = []
    reader = _reader(child.stderr, lines)
    deadline = time.monotonic() + 120
    while not (any(seen in ln for ln in lines) and _ours(tmp_path)) and child.poll() is None \
            and time.monotonic() < deadline:
        time.sleep(0.01)
    assert child.poll() is None, f"calibrate ended before its {phase} were seen: {''.join(lines)}"
    child.send_signal(sig)
    child.wait(timeout=60)
    reader.join(timeout=10)
    err = "".join(lines)
    assert child.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err, err
    assert _ours(tmp_path) == []
    assert not out.exists() and not out.with_suffix(".npz").exists()
    # Stopped, not run to the end. (Lines printed just before the signal may still be read
    # after it, so the check counts what finished, not what started after the signal.)
    if phase == "sweeps":
        assert "device tables:" not in err, err  # the tables after the sweeps never began
    else:
        runs = int(re.search(r"device tables: (\d+) ngspice runs", err).group(1))
        assert sum(" done (" in ln for ln in lines) < runs, err
