"""Files handed in, read with care: only regular files below a size limit, strict JSON.

A path given as a study, technology, design, grid, model card or run-folder file may name a
FIFO (reading blocks for ever), a device such as /dev/zero (reading never ends), a folder or
a file far larger than any real input. `read_input` refuses all of these with InputError
before reading: it opens without blocking, checks what was opened (not only what the name
pointed to a moment before) and reads at most the limit. `load_json` parses JSON strictly:
NaN and Infinity, which Python's json module accepts, are refused, and so is nesting too
deep to parse.
"""
from __future__ import annotations

import json
import os
import stat
from pathlib import Path

from .errors import InputError

# Limits of what stagefront reads: far above the largest real file of each kind, below what
# makes a laptop swap ("common practice, no source"). A study or technology file is a few
# kilobytes, front.csv of a large run a few megabytes, a foundry model library tens.
MAX_TEXT_BYTES = 16 * 2**20
MAX_TABLE_BYTES = 256 * 2**20
MAX_CARD_BYTES = 256 * 2**20


def _size(n: int) -> str:
    return f"{n / 2**20:.0f} MiB" if n >= 2**20 else f"{n} bytes"


def read_input(path, where: str | None = None, limit: int = MAX_TEXT_BYTES, hint: str = "") -> bytes:
    """The bytes of a regular file of at most `limit` bytes.

    Parameters
    ----------
    path : str or Path
        The file.
    where : str, optional
        How messages name it (default: the path).
    limit : int
        Largest size accepted, bytes.
    hint : str
        Added to the message of a missing file.

    Raises
    ------
    InputError
        Missing, a folder, not a regular file (FIFO, device, socket), larger than `limit`,
        or unreadable.
    """
    where = where or str(path)
    try:
        fd = os.open(Path(path), os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except FileNotFoundError:
        raise InputError(where, "file not found", hint=f"check the path{'; ' + hint if hint else ''}") from None
    except IsADirectoryError:
        raise InputError(where, "is a folder, not a file", "a regular file") from None
    except (OSError, TypeError, ValueError) as err:
        reason = getattr(err, "strerror", None) or str(err)
        raise InputError(where, f"cannot read the file ({reason})", "a readable regular file") from None
    try:
        info = os.fstat(fd)
        if stat.S_ISDIR(info.st_mode):
            raise InputError(where, "is a folder, not a file", "a regular file")
        if not stat.S_ISREG(info.st_mode):
            kind = ("a FIFO (named pipe)" if stat.S_ISFIFO(info.st_mode) else
                    "a device" if stat.S_ISCHR(info.st_mode) or stat.S_ISBLK(info.st_mode) else
                    "a socket" if stat.S_ISSOCK(info.st_mode) else "not a regular file")
            raise InputError(where, f"is {kind}, not a regular file", "a regular file",
                             "copy the contents into a file and give that file")
        if info.st_size > limit:
            raise InputError(where, f"is {_size(info.st_size)}, larger than any file of its kind",
                             f"at most {_size(limit)}", "check that this is the file you meant")
        os.set_blocking(fd, True)
        chunks, total = [], 0
        while True:
            chunk = os.read(fd, 1 << 20)
            if not chunk:
                break
            chunks.append(chunk)
            total += len(chunk)
            if total > limit:  # grew while being read
                raise InputError(where, "is larger than any file of its kind", f"at most {_size(limit)}")
        return b"".join(chunks)
    except OSError as err:
        raise InputError(where, f"cannot read the file ({err.strerror or err})", "a readable regular file") from None
    finally:
        os.close(fd)


def read_input_text(path, where: str | None = None, limit: int = MAX_TEXT_BYTES, hint: str = "") -> str:
    """`read_input` decoded as UTF-8; text that is not UTF-8 is an InputError."""
    where = where or str(path)
    raw = read_input(path, where, limit, hint)
    try:
        return raw.decode("utf-8-sig")  # a byte-order mark (some editors write one) is dropped
    except UnicodeDecodeError as err:
        raise InputError(where, f"not UTF-8 text ({err.reason} at byte {err.start})", "a UTF-8 text file") from None


def _no_constant(name: str):
    raise ValueError(f"{name} is not a JSON number")


def loads_json(text: str, where: str):
    """Strict JSON: NaN, Infinity and nesting too deep to parse are InputError naming `where`."""
    try:
        return json.loads(text, parse_constant=_no_constant)
    except RecursionError:
        raise InputError(where, "is not valid JSON: nested too deeply") from None
    except ValueError as err:
        raise InputError(where, f"is not valid JSON ({err})") from None


def load_json(path, where: str | None = None, limit: int = MAX_TEXT_BYTES):
    """A JSON file read with `read_input` and parsed with `loads_json`."""
    where = where or str(path)
    return loads_json(read_input_text(path, where, limit), where)
