"""Keep freed memory in the process for the next tile (glibc malloc settings).

A tile's dense maps are a few dozen arrays of a few MB each, allocated and
freed again for every tile. With glibc's default settings each such array is
mapped fresh from the kernel and its pages are faulted in and zeroed anew
(about 30 MB of new pages per tile, a tenth of the loop's time in system
calls and page faults). Raising the mmap threshold and the trim threshold
lets freed arrays be reused from the heap instead. The heap then stays near
its largest size, which the per-tile peak already sets, so peak memory does
not grow.

Only glibc has ``mallopt``; elsewhere this does nothing.
"""

import ctypes
import ctypes.util
import sys

# parameter numbers from glibc's <malloc.h>
_M_TRIM_THRESHOLD = -1
_M_TOP_PAD = -2
_M_MMAP_THRESHOLD = -3

MMAP_THRESHOLD = 32 * 2**20  # glibc's largest accepted value on 64-bit systems
TRIM_THRESHOLD = 256 * 2**20
TOP_PAD = 64 * 2**20

_applied = None


def reuse_freed_memory():
    """Apply the settings once per process; True when glibc took them."""
    global _applied
    if _applied is not None:
        return _applied
    _applied = False
    if not sys.platform.startswith("linux"):
        return _applied
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (musl has no mallopt)
        return _applied
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    settings = ((_M_MMAP_THRESHOLD, MMAP_THRESHOLD), (_M_TRIM_THRESHOLD, TRIM_THRESHOLD), (_M_TOP_PAD, TOP_PAD))
    _applied = all(mallopt(param, value) == 1 for param, value in settings)
    return _applied
