"""sillmark.process_memory: freed whole-grid arrays leave the process's resident memory."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest

CHILD = textwrap.dedent("""
    import ctypes
    import sys
    import numpy as np

    class MallInfo2(ctypes.Structure):  # glibc >= 2.33, malloc.h
        _fields_ = [(name, ctypes.c_size_t) for name in (
            "arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks", "fsmblks",
            "uordblks", "fordblks", "keepcost")]

    libc = ctypes.CDLL("libc.so.6")
    libc.mallinfo2.restype = MallInfo2

    def rss_mb():
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024

    if sys.argv[1] == "fixed":
        from sillmark.process_memory import return_freed_memory
        assert return_freed_memory() and return_freed_memory()  # once is enough; twice is fine
    base = rss_mb()
    # glibc: freeing a 24 MB mapped block raises a moving mmap threshold to 24 MB, so
    # the next 24 MB array would come from the heap. With the threshold fixed it is a
    # mapping of its own, which free() gives back.
    a = np.ones(3_000_000); del a
    b = np.ones(3_000_000)
    mapped = libc.mallinfo2().hblkhd / 2**20
    del b
    print(mapped, rss_mb() - base)
""")


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's malloc on Linux")
def test_a_freed_array_goes_back_to_the_system():
    out = subprocess.run([sys.executable, "-c", CHILD, "fixed"], check=True,
                         capture_output=True, text=True).stdout
    mapped, kept = (float(v) for v in out.split())
    assert mapped >= 22.8, out  # the second array (22.9 MiB) has its own mapping
    assert kept < 4.0, out  # and once freed it is no longer resident
