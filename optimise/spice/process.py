"""ngspice processes: a wall-clock limit, progress while one runs long, and private temporary
folders that never outlive the command.

Every run works in a folder ``stagefront-ngspice-PID-XXXX`` under the system temporary folder.
The folder is removed when the run ends by any path: success, an error, a time-out or an
interrupt (Ctrl-C raises KeyboardInterrupt; `terminate_as_interrupt` turns SIGTERM into the
same), and the ngspice process is killed first when it still runs. A process killed outright
(SIGKILL) cannot clean up: the next run removes folders whose process no longer exists.
"""
from __future__ import annotations

import contextlib
import os
import re
import shutil
import signal
import subprocess
import tempfile
import threading
import time
from pathlib import Path

from ..files.folders import process_alive

PREFIX = "stagefront-ngspice-"
_OWNED = re.compile(re.escape(PREFIX) + r"(\d+)-")
_swept = False
_running: set = set()  # processes started by `run` that still run (several threads may run one each)
_lock = threading.Lock()
# Start-up allowance of one ngspice process [s]: starting and reading the card, which a large
# foundry library makes take seconds ("common practice, no source").
START_S = 10.0


def time_limit(device_points: int, per_point_s: float) -> float:
    """Wall-clock limit [s] of one deck: the start-up allowance plus `per_point_s` for each
    device at each swept point (devices x points), the measure of a DC sweep's work."""
    return START_S + per_point_s * device_points


def stop_all() -> int:
    """Kill every ngspice process `run` started that still runs (an interrupt reaching the main
    thread while other threads wait on theirs); each `run` then returns and its folder is
    removed. Returns how many were killed."""
    with _lock:
        procs = [proc for proc in _running if proc.poll() is None]
    for proc in procs:
        proc.kill()
    return len(procs)


def remove_stale(folder=None) -> list[Path]:
    """Remove this kind of folder left by processes that no longer run; returns those removed."""
    base = Path(folder or tempfile.gettempdir())
    removed = []
    try:
        entries = list(base.iterdir())
    except OSError:
        return removed
    for entry in entries:
        m = _OWNED.match(entry.name)
        if m and int(m.group(1)) != os.getpid() and not process_alive(int(m.group(1))) and entry.is_dir() \
                and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry)
    return removed


@contextlib.contextmanager
def private_folder():
    """A fresh temporary folder for one ngspice run, removed on every exit path."""
    global _swept
    if not _swept:
        _swept = True
        remove_stale()
    with tempfile.TemporaryDirectory(prefix=f"{PREFIX}{os.getpid()}-") as tmp:
        yield Path(tmp)


def run(args: list, cwd, timeout: float, progress=None, every: float = 10.0) -> subprocess.CompletedProcess:
    """Run `args` in `cwd` with text output captured, for at most `timeout` seconds.

    Parameters
    ----------
    args : list of str
        The command.
    cwd : Path
        Its working folder.
    timeout : float
        Wall-clock limit [s]; the process is killed when it is reached.
    progress : callable, optional
        Called with the seconds elapsed every `every` seconds while the process runs.
    every : float
        Interval of `progress` [s].

    Raises
    ------
    subprocess.TimeoutExpired
        With the output so far, after the process was killed.
    OSError
        When the process cannot start. Any exception (KeyboardInterrupt included) kills the
        process before it propagates.
    """
    proc = subprocess.Popen(args, cwd=cwd, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, errors="replace")
    with _lock:
        _running.add(proc)
    t0 = time.monotonic()
    try:
        while True:
            left = timeout - (time.monotonic() - t0)
            try:
                out, err = proc.communicate(timeout=max(0.01, min(left, every) if progress else left))
                return subprocess.CompletedProcess(args, proc.returncode, out, err)
            except subprocess.TimeoutExpired:
                elapsed = time.monotonic() - t0
                if elapsed >= timeout:
                    proc.kill()
                    out, err = proc.communicate()
                    raise subprocess.TimeoutExpired(args, timeout, out, err) from None
                if progress:
                    progress(elapsed)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        with _lock:
            _running.discard(proc)


@contextlib.contextmanager
def terminate_as_interrupt():
    """While inside, SIGTERM raises KeyboardInterrupt (as Ctrl-C does), so that cleanup runs.

    Only the main thread can install signal handlers; elsewhere this does nothing.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        raise KeyboardInterrupt(f"signal {signum}")

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)
