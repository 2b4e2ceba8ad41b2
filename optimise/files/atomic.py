"""Atomic file writes: write beside the target, then rename over it, so a reader (or a
crash) never sees half a file and nothing already written is lost. A target that is a folder,
or a folder path that runs through a file, is an InputError naming the path."""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

from .errors import InputError


def write_bytes(path, data: bytes) -> None:
    """Write `data` to `path` atomically (same-folder temporary file, then os.replace)."""
    path = Path(path)
    if path.is_dir():
        raise InputError(str(path), "is a folder", "a file path to write to")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    except (FileExistsError, NotADirectoryError):
        blocking = next((str(p) for p in path.parents if p.exists() and not p.is_dir()), str(path.parent))
        raise InputError(str(path), f"cannot be written: {blocking} is a file, not a folder",
                         hint="choose a path in a folder") from None
    except OSError as err:
        raise InputError(str(path), f"cannot be written ({err.strerror or err})",
                         hint="choose a folder you may write to") from None
    try:
        # mkstemp makes the file private (0600); give it the usual permissions instead.
        umask = os.umask(0)
        os.umask(umask)
        os.fchmod(fd, 0o666 & ~umask)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_text(path, text: str) -> None:
    """Write text (UTF-8) to `path` atomically."""
    write_bytes(path, text.encode("utf-8"))
