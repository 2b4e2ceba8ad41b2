"""Process settings for long numerical runs.

glibc gives freed heap memory back to the operating system as soon as 128 KiB gather at
the top of the heap, and serves blocks of 128 KiB and more with fresh mappings. The
evaluation works on chunks of 16384 elements, so nearly every numpy temporary is such a
block: without a change, each one faults its pages in anew and the kernel zeroes them, a
third of the run time. `keep_freed_memory` asks glibc to keep freed memory for reuse
instead (mallopt M_TRIM_THRESHOLD and M_MMAP_THRESHOLD). The process then holds on to
its peak heap (some tens of MiB for an evaluation) until it exits. Other C libraries are
left as they are.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import sys

M_TRIM_THRESHOLD = -1  # glibc <malloc.h>
M_MMAP_THRESHOLD = -3
TRIM_BYTES = 1 << 30  # return freed memory to the system only above 1 GiB at the top
MMAP_BYTES = 32 << 20  # blocks below 32 MiB (glibc's largest threshold) come from the heap

_done = False


def keep_freed_memory() -> bool:
    """Make glibc keep freed memory for reuse; True if the setting took. Idempotent."""
    global _done
    if _done:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (musl has no mallopt)
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    _done = bool(mallopt(M_TRIM_THRESHOLD, TRIM_BYTES)) and bool(mallopt(M_MMAP_THRESHOLD, MMAP_BYTES))
    return _done
