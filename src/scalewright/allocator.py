"""Keep mid-sized arrays on the heap (glibc's allocator, Linux only).

The engine's iterations create many short-lived arrays of a few hundred
kilobytes (a 245 × 245 information matrix is 480 kB).  glibc serves every
request above its mmap threshold (128 kB at start) with fresh pages from
the kernel and returns them on free, so each such array pays a page fault
per 4 kB page on first touch: measured, this was about 15% of a 100-item
fit.  Raising the mmap threshold to 32 MiB (and the trim threshold, below
which freed heap memory is kept for reuse, to 128 MiB) lets these arrays
reuse heap memory; arrays larger than 32 MiB, such as a large data file's
answer matrix, are still given back to the system when freed.  The cost is
that up to 128 MiB of freed memory may stay with the process.

Applied once, when scalewright is imported; elsewhere than glibc (macOS,
Windows, musl) nothing is changed.  ``mallopt`` is documented in glibc's
manual (section "Malloc Tunable Parameters") and mallopt(3).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

#: mallopt parameter numbers (glibc's malloc.h)
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
MMAP_THRESHOLD = 32 * 1024 * 1024
TRIM_THRESHOLD = 128 * 1024 * 1024


def keep_arrays_on_heap() -> bool:
    """Set the two thresholds; True when glibc accepted both."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):          # not glibc (e.g. musl has no mallopt)
        return False
    mallopt.argtypes, mallopt.restype = (ctypes.c_int, ctypes.c_int), ctypes.c_int
    return bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)
                and mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD))
