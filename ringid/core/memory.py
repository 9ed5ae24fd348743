"""Memory allocator setting for the identification jobs.

Scoring a sample against a large library makes and frees many arrays of a few MB each. glibc's
malloc serves such blocks by ``mmap`` and returns them to the system when freed, so every new
array's pages are faulted in afresh; that cost ~15 % of the identification time at 1,000 phases
(measured with benchmarks/bench_identify.py). Raising the mmap and trim thresholds (mallopt(3):
M_MMAP_THRESHOLD, M_TRIM_THRESHOLD) keeps those blocks in the heap for reuse instead.
"""

from __future__ import annotations

import sys

M_TRIM_THRESHOLD = -1  # mallopt(3) parameter numbers (glibc's malloc.h)
M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD_BYTES = 32 * 1024 * 1024  # glibc's upper limit for M_MMAP_THRESHOLD on 64-bit systems
TRIM_THRESHOLD_BYTES = 64 * 1024 * 1024


def reuse_freed_arrays() -> bool:
    """Ask glibc's malloc to keep freed blocks of up to 32 MiB for reuse; False where it is not
    glibc (the setting is only a speed-up, never needed for a result)."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        return bool(libc.mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES)
                    and libc.mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES))
    except (OSError, AttributeError):
        return False
