"""glibc's allocator settings for the process that gathers tile results (the client).

The workers get them from their environment (cluster.WORKER_ENV: glibc reads it at process
start). The client's process is already running when it starts a job, so it sets the same two
with mallopt: arrays up to 32 MiB from the heap, and free heap kept up to 64 MiB instead of
handed back to the kernel at once. Without them every array of more than 128 KiB that the
client makes and drops (unpacking a tile's histograms, merging them) is a fresh mapping whose
pages the kernel faults in and zeroes again: measured ten times slower for a 55,000-bin
histogram (benchmarks/RESULTS.md, issue 13). Elsewhere than on glibc nothing is changed.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import functools

MMAP_THRESHOLD = 32 * 2**20  # glibc's largest (HEAP_MAX_SIZE / 2 on 64-bit)
TRIM_THRESHOLD = 64 * 2**20
_M_TRIM_THRESHOLD = -1  # mallopt parameters (malloc.h)
_M_MMAP_THRESHOLD = -3


@functools.cache
def tune_allocator() -> bool:
    """Set this process's mmap and trim thresholds (once); whether glibc took both."""
    name = ctypes.util.find_library("c")
    try:
        mallopt = ctypes.CDLL(name).mallopt
    except (OSError, AttributeError, TypeError):  # no C library by that name, or not glibc
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    took_mmap = mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1
    took_trim = mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD) == 1
    return took_mmap and took_trim
