"""Giving the system back the memory a stage freed.

A report streams its series through one at a time (``sigreport.pipeline.stream_series``); what
a series and its registration allocated is freed when the next series is read, but glibc's
allocator keeps freed pages mapped in its heaps (arenas: by default up to eight per core, one
for each thread that allocated, e.g. the registration's worker threads) and reuses them only
for later allocations of the same heap. Asking it to return whole free pages between series
(:func:`release_free_memory`), and, in the command-line program, keeping one heap for every
thread (:func:`use_one_heap`), keep the resident size to what is live: on the demo the peak of
``sigreport report`` fell from 341-397 MB to 323 MB, no slower (docs/performance.md).
mallopt(3) and malloc_trim(3) (Linux man-pages) describe both calls; elsewhere they do nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys
from functools import cache
from typing import Any

__all__ = ["release_free_memory", "use_one_heap"]

# mallopt's parameter for the most arenas (glibc's malloc.h: M_ARENA_MAX).
_M_ARENA_MAX = -8


@cache
def _libc() -> Any:
    if not sys.platform.startswith("linux"):
        return None
    try:
        return ctypes.CDLL(ctypes.util.find_library("c"))
    except (OSError, TypeError):
        return None


def _glibc_function(name: str, argtypes: list[Any]) -> Any:
    """A glibc function, or None (another C library, e.g. musl, lacks these)."""
    libc = _libc()
    function = getattr(libc, name, None) if libc is not None else None
    if function is not None:
        function.argtypes = argtypes
        function.restype = ctypes.c_int
    return function


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
    trim = _glibc_function("malloc_trim", [ctypes.c_size_t])
    return bool(trim(0)) if trim is not None else False


def use_one_heap() -> bool:
    """Keep one allocator heap for every thread of the process: ``mallopt(M_ARENA_MAX, 1)``
    (mallopt(3), Linux man-pages). For a program, not a library: the command line calls it
    before any work; a server or a notebook keeps its own allocator policy. Elsewhere nothing
    is done.

    Returns
    -------
    bool
        True when glibc took the setting.
    """
    mallopt = _glibc_function("mallopt", [ctypes.c_int, ctypes.c_int])
    return bool(mallopt(_M_ARENA_MAX, 1)) if mallopt is not None else False
