"""Output folders stagefront may replace: a marker file says a folder is one of ours.

`--overwrite` removes a folder only when it holds the marker this module writes into run and
sweep folders, and never the current folder, one of its parents, the home folder, the root,
or a folder holding an input file. Names that come from input files (grid names, technology
stems, axis values) become single safe path components with `component`.
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import socket
import time
from pathlib import Path

from .atomic import write_text
from .errors import InputError

MARKER = ".stagefront-folder"


def component(text: str) -> str:
    """`text` as one folder-safe path component: letters, digits and ``.+_-``, never
    empty, never ``.`` or ``..``, never starting with a dot (no hidden or parent names)."""
    cleaned = re.sub(r"[^A-Za-z0-9.+_-]+", "-", str(text)).strip("-.")
    return cleaned[:120] or "x"


def mark(folder: Path, kind: str) -> None:
    """Write the marker that lets a later `--overwrite` replace `folder`."""
    write_text(Path(folder) / MARKER, f"stagefront {kind} folder\n")


def _protected(folder: Path) -> str:
    """Why `folder` (resolved) may never be removed, or an empty string."""
    cwd = Path.cwd().resolve()
    if folder == cwd:
        return "it is the current folder"
    if folder in cwd.parents:
        return "it holds the current folder"
    if folder == Path(folder.anchor):
        return "it is the root folder"
    home = Path.home().resolve()
    if folder == home or folder in home.parents:
        return "it is the home folder or holds it"
    return ""


def clear(folder, kind: str, inputs=(), where: str | None = None) -> None:
    """Remove `folder` for `--overwrite`, after checking that it is a stagefront `kind` folder.

    Raises InputError, and removes nothing, when the folder is protected (see the module
    docstring), holds one of `inputs` (the study, technology or grid files of this run), or
    has no marker file.
    """
    folder = Path(folder)
    where = where or f"--out {folder}"
    resolved = folder.resolve()
    reason = _protected(resolved)
    if not reason:
        for path in inputs:
            p = Path(path).resolve()
            if p == resolved or resolved in p.parents:
                reason = f"it holds the input file {path}"
                break
    if not reason and not (folder / MARKER).is_file():
        reason = f"it is not a stagefront {kind} folder (no {MARKER} marker file in it)"
    if reason:
        raise InputError(where, f"--overwrite refused: {reason}; nothing was deleted",
                         f"a {kind} folder stagefront wrote, or a new folder",
                         "choose another --out, or remove the folder yourself if you mean it")
    for child in folder.iterdir():  # the folder itself (and a lock in it) stays
        if child.name == LOCK:
            continue
        if child.is_dir() and not child.is_symlink():
            shutil.rmtree(child)
        else:
            child.unlink()


def is_empty(folder: Path) -> bool:
    """Whether `folder` holds nothing but a lock file."""
    return not any(child.name != LOCK for child in Path(folder).iterdir())


# ---------------------------------------------------------------------------- lock
LOCK = ".stagefront-lock"


def process_alive(pid: int) -> bool:
    """Whether a process with this id runs on this machine (another user's counts)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True


def _holder(path: Path) -> dict:
    try:
        data = json.loads(path.read_text())
        return data if isinstance(data, dict) and isinstance(data.get("pid"), int) else {}
    except (OSError, ValueError):
        return {}


@contextlib.contextmanager
def locked(folder, command: str):
    """Hold `folder` for one writer: a lock file with this process's id, removed on exit.

    The folder is created when missing. A lock whose process no longer runs on this host
    (a killed run) is stale and taken over; a live one gives InputError naming its process.
    """
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise InputError(f"--out {folder}", "exists and is not a folder", "a new folder or a run folder")
    created = not folder.exists()
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError):
        blocking = next((str(p) for p in folder.parents if p.exists() and not p.is_dir()), str(folder.parent))
        raise InputError(f"--out {folder}", f"cannot be created: {blocking} is a file, not a folder",
                         hint="choose a path in a folder") from None
    except OSError as err:
        raise InputError(f"--out {folder}", f"cannot be created ({err.strerror or err})",
                         hint="choose a folder you may write to") from None
    path = folder / LOCK
    mine = {"pid": os.getpid(), "host": socket.gethostname(), "command": command, "started": time.time()}
    for _ in range(3):
        try:
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:
            other = _holder(path)
            stale = other and other.get("host") == mine["host"] and not process_alive(other["pid"])
            if stale or (not other and time.time() - path.stat().st_mtime > 60):
                path.unlink(missing_ok=True)
                continue
            raise InputError(str(folder), f"is in use by another stagefront process "
                                          f"(pid {other.get('pid', '?')}, {other.get('command', '?')})",
                             "one writer per run or sweep folder",
                             f"wait for it to finish, or choose another --out; if no such process runs, "
                             f"remove {path}")
        with os.fdopen(fd, "w") as fh:
            fh.write(json.dumps(mine))
        break
    else:
        raise InputError(str(folder), "its lock file keeps changing", hint=f"remove {path} and try again")
    try:
        yield folder
    finally:
        if _holder(path).get("pid") == os.getpid():
            path.unlink(missing_ok=True)
        if created and not any(folder.iterdir()):  # nothing was written: leave no trace
            folder.rmdir()
