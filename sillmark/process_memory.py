"""Large arrays go back to the system as soon as they are freed.

glibc's ``malloc`` serves a block of at least ``M_MMAP_THRESHOLD`` bytes (128 KiB
to start with) from a mapping of its own, which ``free`` unmaps. But each time
such a block is freed the threshold rises to the block's size (up to 32 MiB on
64-bit systems), so later arrays of that size come from the heap, and a heap,
one per thread, keeps what is freed for its own thread's later use. A run that
builds and drops arrays of tens of MB on several threads (the rasters written
beside the hierarchy, for instance) then holds far more resident memory than it
uses: on a 3000 x 3000 survey DEM the whole ``sillmark analyse`` peaked at
112 bytes per cell beyond the DEM with the moving threshold and 81 with it
fixed (``bench/bench_survey.py``). Fixing the threshold with ``mallopt`` (which
also turns the moving threshold off) is what glibc documents for this.

:func:`return_freed_memory` does that once per process; it does nothing where
the C library is not glibc.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

__all__ = ["MMAP_THRESHOLD", "return_freed_memory"]

#: Blocks of at least this many bytes get a mapping of their own (glibc's
#: initial default, kept from moving).
MMAP_THRESHOLD = 128 * 1024

_M_MMAP_THRESHOLD = -3  # glibc's malloc.h
_done = False


def return_freed_memory() -> bool:
    """Fix glibc's mmap threshold at :data:`MMAP_THRESHOLD`; True if it was set.

    Call it early in a process that handles whole-grid arrays (the command
    line, a web worker). Elsewhere than Linux with glibc it returns False and
    changes nothing.
    """
    global _done
    if _done:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (e.g. musl has no mallopt)
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    _done = bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD))
    return _done
