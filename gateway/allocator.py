"""Process-wide tuning of the C allocator for shard-sized buffers.

Every shard read allocates a buffer of about one shard (1 MiB at the
default 4 MiB stripe, k=4), in a worker thread. glibc's malloc serves an
allocation that large from a fresh mmap() region unless its threshold has
grown past it, and in worker-thread arenas it often has not: the kernel
then zero-fills and faults in every page of the buffer before the read
copies into it, and unmaps it again on free. Measured on the development
machine (docs/performance.md), reading and verifying a 1 MiB shard from
tmpfs took 0.53 ms that way and 0.13-0.22 ms with the buffers served from
the heap; the rebuild rate rose by about a third.

``tune()`` sets glibc's mmap threshold to 32 MiB (the largest value glibc
itself would grow it to) and its trim threshold to 64 MiB, so freed shard
buffers are reused. The price is memory: freed heap memory stays with the
process, up to about the trim threshold per arena, instead of going back to
the kernel at once. Other C libraries are left alone.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import logging
import platform

log = logging.getLogger(__name__)

M_TRIM_THRESHOLD = -1  # from glibc's <malloc.h>
M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD = 32 << 20
TRIM_THRESHOLD = 64 << 20


def tune() -> bool:
    """Apply the settings above if the C library is glibc; True if applied."""
    if platform.libc_ver()[0] != "glibc":
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    ok = mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1 and mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD) == 1
    if not ok:
        log.debug("mallopt refused the shard-buffer settings; the allocator keeps its defaults")
    return ok
