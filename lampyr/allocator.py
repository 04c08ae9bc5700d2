"""Large buffers reused instead of handed back to the kernel at every free (glibc's malloc).

The head and the workers handle a tile's or a batch's film many times a second as buffers of a
few hundred kilobytes (a 64 × 64 tile is 688 KB of float64 sums, a batch's result 344 KB of
float32): decoded, merged, encoded, written. glibc serves a block above its mmap threshold
(128 KiB at start, raised by the frees it sees) with a fresh mmap and trims the top of its heap
above the trim threshold (twice the mmap threshold) at free, so two such buffers alive at once
were returned to the kernel at every free and each new one page-faulted its pages in again,
zeroed (mallopt(3), "M_MMAP_THRESHOLD" and "M_TRIM_THRESHOLD"; the dynamic adjustment is
described there too). Measured here (bench notes in docs/farm.md, Speed): encoding one tile's
film took 1.34 ms, 0.28 ms with the thresholds below; the head's loop used 6.2 CPU seconds for
1728 merged batches, 4.0 s with them.

`keep_large_blocks()` raises both thresholds once per process, before its work starts; forked
children (Celery's pool processes) inherit them. Elsewhere than glibc (macOS, musl) it does
nothing and says so with False.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

# mallopt(3) parameter numbers, from glibc's <malloc.h>
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3

# blocks below this come from the heap and are reused after free (rule of thumb: well above a
# 1024 × 1024 frame's single float64 channel, 8 MiB; below the scene's largest arrays, which stay
# mmapped and go back to the kernel when freed)
MMAP_THRESHOLD = 32 * 2**20
# free memory kept at the heap's top before it is handed back (rule of thumb: a few frames'
# worth of films; the head's tile cache is 192 MiB)
TRIM_THRESHOLD = 256 * 2**20


def keep_large_blocks(mmap_threshold: int = MMAP_THRESHOLD,
                      trim_threshold: int = TRIM_THRESHOLD) -> bool:
    """Raise glibc malloc's mmap and trim thresholds for this process; True when both were
    set (Linux with glibc), False where there is no such allocator."""
    if not sys.platform.startswith("linux"):
        return False
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # musl has no mallopt: nothing to tune
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    # mallopt returns 1 on success, 0 on error (mallopt(3), RETURN VALUE)
    ok = mallopt(M_MMAP_THRESHOLD, int(mmap_threshold)) == 1
    return mallopt(M_TRIM_THRESHOLD, int(trim_threshold)) == 1 and ok
