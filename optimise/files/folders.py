"""Output folders stagefront may replace: a marker file says a folder is one of ours.

`--overwrite` removes a folder only when it holds the marker this module writes into run and
sweep folders, and never the current folder, one of its parents, the home folder, the root,
or a folder holding an input file. Names that come from input files (grid names, technology
stems, axis values) become single safe path components with `component`.
"""
from __future__ import annotations

import re
import shutil
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
    shutil.rmtree(folder)
