"""The C allocator's thresholds for a process that streams large buffers between threads.

An input streams through in frames: the reader thread makes each frame's arrays (8 MiB
of features for 65,536 rows of 16 features), the model thread learns from them and
frees them, and the labels thread does the same with the labels columns. glibc's malloc
serves blocks from 128 KiB up with their own ``mmap`` at first, and returns freed memory
at the top of an arena to the kernel once more than 128 KiB is free there. Either way
the next frame's arrays are fresh pages, which the kernel must zero and map again (and
unmapping them interrupts the other threads to flush their TLBs): kernel time that
grows with the input, a noticeable share of its CPU on a small machine.

:func:`tune_allocator` keeps blocks up to 32 MiB inside the arenas and keeps up to
128 MiB free at an arena's top, so the frames reuse the same memory. The peak resident
memory does not grow (the same blocks are reused), but up to that much may stay
resident between inputs.

Arrow's own allocator (mimalloc) does the same by default: memory it frees goes back to
the kernel shortly after. ``ARROW_PURGE_DELAY`` (an environment variable and its value,
which the command line sets unless it is set already, before pyarrow first allocates)
makes it keep that memory for reuse.
"""
from __future__ import annotations

import ctypes
import os
import sys

__all__ = ["tune_allocator", "MMAP_THRESHOLD", "TRIM_THRESHOLD", "ARROW_PURGE_DELAY"]

# mallopt parameters (glibc <malloc.h>)
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD = 32 << 20    # glibc's largest (HEAP_MAX_SIZE / 2 on 64-bit)
TRIM_THRESHOLD = 128 << 20
ARROW_PURGE_DELAY = ("MIMALLOC_PURGE_DELAY", "-1")   # milliseconds; -1: never hand back


def tune_allocator(environ=os.environ) -> bool:
    """Set glibc malloc's mmap and trim thresholds for this process (see the module's
    text). Returns whether they were set: not on other platforms or C libraries, and not
    when ``GLIBC_TUNABLES`` already sets malloc tunables (the operator's choice wins)."""
    if not sys.platform.startswith("linux") or \
            "glibc.malloc." in environ.get("GLIBC_TUNABLES", ""):
        return False
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    # glibc returns 1 on success; musl's mallopt is a stub returning 0
    return mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1 and \
        mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD) == 1
