"""How a fegrid job process asks the C allocator to reuse freed memory.

A fit allocates and frees many arrays of the panel's size (demeaned columns, residuals, scores).
glibc's allocator serves such large blocks by mapping fresh pages from the system and unmapping
them when freed, so each new array pays the system's cost of handing out zeroed pages again; on
virtual machines that cost rivals the arithmetic itself. A job process (see
:func:`fegrid.pipeline.run_logged`) therefore asks the allocator to serve large blocks from its
heap and to keep freed memory for the next array. The process's peak memory is unchanged (freed
memory is reused, not added); it is returned to the system when the job ends.

Only the job processes do this, never an ``import fegrid``: a library must not change its host
program's allocator. On systems without glibc nothing changes.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

__all__ = ["reuse_freed_memory"]

_M_TRIM_THRESHOLD = -1  # mallopt parameters, from glibc's malloc.h
_M_MMAP_MAX = -4


def reuse_freed_memory() -> bool:
    """Serve large blocks from the heap and keep freed memory for reuse; whether it applied."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (musl has no mallopt)
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    return bool(mallopt(_M_MMAP_MAX, 0)) and bool(mallopt(_M_TRIM_THRESHOLD, 2**31 - 1))
