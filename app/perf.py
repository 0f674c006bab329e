"""Process-level tuning for the analysis: glibc's allocator keeps freed memory.

The analysers allocate and free many arrays of one to a few tens of megabytes
(a slice batch, its spectrum, scratch copies). By default glibc serves each
such block with a fresh ``mmap`` and returns it on ``free``, so every new array
is page-faulted and zeroed by the kernel again; on a 32-slice volume that was
up to a sixth of the analysis time (measured with ``bench/_measure.py``; the
gain varies from run to run on a shared machine). Raising the mmap and trim
thresholds lets the heap keep and reuse those blocks.

Only on Linux with glibc; ``RAWPROOF_MALLOC_TUNING=0`` turns it off, and any
``MALLOC_*_`` setting already in the environment is left to glibc.
One malloc arena is used, so that the analysis threads share the kept blocks.
References: glibc manual, "Malloc Tunable Parameters" (``mallopt``:
M_TRIM_THRESHOLD -1, M_TOP_PAD -2, M_MMAP_THRESHOLD -3, M_ARENA_MAX -8).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

M_TRIM_THRESHOLD = -1
M_TOP_PAD = -2
M_MMAP_THRESHOLD = -3
M_ARENA_MAX = -8

#: blocks above this still get their own mapping (whole volumes, for example)
MMAP_THRESHOLD = 64 << 20
#: freed memory at the top of the heap kept for reuse, at most
TRIM_THRESHOLD = 256 << 20
TOP_PAD = 32 << 20

_done = False


def tune_allocator() -> bool:
    """Apply the thresholds once per process; True when glibc took them."""
    global _done
    if _done:
        return False
    _done = True
    if not sys.platform.startswith("linux") or os.environ.get("RAWPROOF_MALLOC_TUNING") == "0":
        return False
    if any(k.startswith("MALLOC_") and k.endswith("_") for k in os.environ):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
        libc.gnu_get_libc_version  # noqa: B018 - present only in glibc
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok = mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD)
    ok &= mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD)
    ok &= mallopt(M_TOP_PAD, TOP_PAD)
    # one arena: the analysers' two threads would otherwise each keep their own
    # freed blocks (about 50 MB more peak memory on 512 x 512 DICOM frames)
    ok &= mallopt(M_ARENA_MAX, 1)
    return bool(ok)
