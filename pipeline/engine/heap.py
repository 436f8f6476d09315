"""Gives the C heap's free memory back to the system between the steps of a run (memory).

A corpus stage frees most of what it made (signature copies, sketches, candidate codes) when it
ends, but glibc's allocator keeps freed heap pages for reuse: the next stage would start with
them still counted in the process's resident memory and add its own on top (Python's small
objects live in their own mapped arenas and do not reuse them). ``malloc_trim`` returns them:
before each corpus stage, after the walk (before the outputs) and after the manifest (before
the run's states are written). Elsewhere (no glibc) this does nothing.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import sys
from typing import Callable


def _trim() -> Callable[[int], int] | None:
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        return libc.malloc_trim
    except (OSError, AttributeError):  # no C library found, or one without malloc_trim (musl)
        return None


_MALLOC_TRIM = _trim()


def release_free_memory() -> bool:
    """Return the heap's free pages to the system; whether the allocator could be asked."""
    if _MALLOC_TRIM is None:
        return False
    _MALLOC_TRIM(0)
    return True
