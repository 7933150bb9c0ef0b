"""The process's memory allocator, set for a night's large arrays (glibc; elsewhere nothing is changed).

glibc's malloc serves a request of at least its *mmap threshold* from a mapping of its own, given back to
the system as soon as it is freed; a smaller one comes from its heap, where freed memory mostly stays with
the process. The threshold starts at 128 KiB and, each time such a mapping is freed, rises to its size (up
to 32 MiB). After the first freed column of a million-position night, every later column (8 MB) came from
the heap, and the night's temporary arrays, once freed, stayed in the process: 420 MB of a 1M-position
night's 1.58 GB after the explain were such freed arrays. With the threshold fixed, every array of at
least :data:`MMAP_THRESHOLD_BYTES` keeps its own mapping and leaves the process's memory when freed; the
heap keeps serving the small objects (text, instrument-sized arrays) as before. Only where memory comes
from changes: not one value computed.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

MMAP_THRESHOLD_BYTES = 1 << 20  # 1 MiB: a column of 131,072 rows or more
_M_MMAP_THRESHOLD = -3          # mallopt's parameter number (malloc.h)

_done = False


def free_large_arrays_at_once() -> bool:
    """Fix glibc's mmap threshold at :data:`MMAP_THRESHOLD_BYTES` for the rest of the process (once; later
    calls do nothing). Returns whether the allocator is set so (False where the C library is not glibc)."""
    global _done
    if _done:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (musl has no mallopt)
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    _done = bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES))
    return _done
