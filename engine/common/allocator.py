"""Keeping freed memory for reuse in a process that runs one big job.

A job on a million-vertex mesh makes and drops many temporary arrays of tens
of megabytes. With glibc's default settings each of them is a fresh ``mmap``
returned to the system when freed, and the next one faults its pages in
again: several seconds of system time per job (docs/measurements.md,
"Sculpt-scale meshes"). :func:`keep_freed_memory` asks glibc's allocator to
serve every block from its heap (no block gets a mapping of its own) and keep
what is freed there for the next one, at the cost of a somewhat higher peak.
It is called by the processes that run one job and end (the command line) or
wait between jobs (the add-on's worker, which gives the kept memory back
after each job with :func:`release_freed_memory`), never inside Blender's own
process. Elsewhere (another C library, another system) both do nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys
from typing import Any

__all__ = ["keep_freed_memory", "release_freed_memory", "TRIM_THRESHOLD", "TOP_PAD"]

# mallopt parameters (glibc's malloc.h)
_M_TRIM_THRESHOLD = -1
_M_TOP_PAD = -2
_M_MMAP_MAX = -4

TRIM_THRESHOLD = 1 << 30
"""Free memory at the top of the heap kept before any is returned to the system."""
TOP_PAD = 256 << 20
"""Extra memory asked for each time the heap grows."""


def _glibc_function(name: str) -> Any:
    """``name`` from the C library when it is glibc on Linux, else None."""
    if not sys.platform.startswith("linux"):
        return None
    found = ctypes.util.find_library("c")
    if found is None:
        return None
    try:
        return getattr(ctypes.CDLL(found), name)
    except (OSError, AttributeError):     # not glibc (musl has no mallopt / malloc_trim)
        return None


def keep_freed_memory() -> bool:
    """Tune glibc's allocator for one big job; True when it took the settings."""
    mallopt = _glibc_function("mallopt")
    if mallopt is None:
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    return all(mallopt(param, value) == 1 for param, value in
               ((_M_MMAP_MAX, 0), (_M_TRIM_THRESHOLD, TRIM_THRESHOLD), (_M_TOP_PAD, TOP_PAD)))


def release_freed_memory() -> bool:
    """Give the memory the allocator keeps back to the system (after a job); True when it could."""
    trim = _glibc_function("malloc_trim")
    if trim is None:
        return False
    trim.argtypes = [ctypes.c_size_t]
    trim.restype = ctypes.c_int
    trim(0)
    return True
