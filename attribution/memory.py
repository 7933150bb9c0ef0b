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

Arrow's own allocator (mimalloc in the pyarrow wheels) keeps what Arrow frees for Arrow's later use, even
when asked to hand it back: the hash tables of the trade ids' coding and the files' read buffers. Once the
threshold is set, Arrow allocates from the same C library (its "system" pool), so its large buffers leave
the process when freed too: a 1M-position night's peak RSS 1,283 -> 1,243 MB, its read stage's peak
599 -> 501 MB (``python benchmarks/bench_memory.py``), for about 0.1 s more CPU in reading its two dates.
A pool named in ``ARROW_DEFAULT_MEMORY_POOL`` is left as chosen.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

import pyarrow as pa

MMAP_THRESHOLD_BYTES = 1 << 20  # 1 MiB: a column of 131,072 rows or more
_M_MMAP_THRESHOLD = -3          # mallopt's parameter number (malloc.h)

_done = False


def free_large_arrays_at_once() -> bool:
    """Fix glibc's mmap threshold at :data:`MMAP_THRESHOLD_BYTES` for the rest of the process, and have Arrow
    allocate from the C library too unless ``ARROW_DEFAULT_MEMORY_POOL`` names its pool (once; later calls do
    nothing). Returns whether the allocator is set so (False where the C library is not glibc)."""
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
    if _done and not os.environ.get("ARROW_DEFAULT_MEMORY_POOL"):
        pa.set_memory_pool(pa.system_memory_pool())  # buffers made before keep the pool that made them
    return _done


def hand_back_arrow_memory() -> None:
    """What Arrow's pool has freed, handed back to the system where the pool keeps it (mimalloc, jemalloc). The
    C library's pool (:func:`free_large_arrays_at_once`) has already returned every large buffer when it was
    freed: trimming its heap as well costs about 5 ms of a small night and gives nothing back worth it."""
    pool = pa.default_memory_pool()
    if pool.backend_name != "system":
        pool.release_unused()
