"""Giving the system back the memory a stage freed.

A report streams its series through one at a time (``sigreport.pipeline.stream_series``); what
a series and its registration allocated is freed when the next series is read, but glibc's
allocator keeps freed pages mapped in its heaps (one per thread that allocated, e.g. the
registration's worker threads) and reuses them only for later allocations of its own heap.
Asking it to return whole free pages between series keeps the resident size to what is live.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys
from functools import cache
from typing import Any

__all__ = ["release_free_memory"]


@cache
def _malloc_trim() -> Any:
    if not sys.platform.startswith("linux"):
        return None
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name)
        trim = libc.malloc_trim  # glibc only; musl has none
    except (OSError, AttributeError, TypeError):
        return None
    trim.argtypes = [ctypes.c_size_t]
    trim.restype = ctypes.c_int
    return trim


def release_free_memory() -> bool:
    """Return the allocator's whole free pages to the system: ``malloc_trim(0)``, which since
    glibc 2.8 releases free pages in every arena, not only at the top of the main heap
    (malloc_trim(3), Linux man-pages). Elsewhere (another C library or system, whose allocator
    returns memory by itself or has no such call) nothing is done.

    Returns
    -------
    bool
        True when memory was given back.
    """
    trim = _malloc_trim()
    return bool(trim(0)) if trim is not None else False
