"""Slice buffers go back to the operating system when freed.

glibc's malloc serves large blocks with mmap and returns them on free, but it raises that
threshold after the first large free (up to 32 MiB), after which a slice's field arrays (often
0.1 .. 30 MiB each) come from the heap arenas, of which each thread may have its own; freed,
they stay in the process. A server that assembles slices on gRPC and helper threads then grows
by many slices beyond its budget of queued bytes (measured in tests/service/test_service_load.py:
+122 MiB over a 19 MiB budget without this, +38 MiB with it). Fixing the threshold keeps every
block of at least :data:`MMAP_THRESHOLD_BYTES` in its own mapping, returned on free.

No effect (and no error) where the C library is not glibc.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import logging

__all__ = ["return_large_buffers", "MMAP_THRESHOLD_BYTES"]

log = logging.getLogger("penumbra.server")

#: Blocks of at least this many bytes are mapped on their own (glibc's initial default).
MMAP_THRESHOLD_BYTES = 128 * 1024
_M_MMAP_THRESHOLD = -3  # glibc malloc.h


def return_large_buffers() -> bool:
    """Fix glibc's mmap threshold (module docstring); True when set."""
    name = ctypes.util.find_library("c")
    if not name:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok = bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES))
    if not ok:
        log.info("could not fix the C library's mmap threshold; freed slice buffers may stay in the process")
    return ok
