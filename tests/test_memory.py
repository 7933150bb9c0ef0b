"""The allocator setting of attribution.memory: a large array freed leaves the process at once (glibc).

The premise is glibc's documented malloc behaviour (mallopt(3), M_MMAP_THRESHOLD: the threshold is dynamic
unless set, rising to the size of each freed mapping up to 32 MiB); checked here on the machine's own C library.
"""

from __future__ import annotations

import os
import platform
import subprocess
import sys
import textwrap

import pytest

pytestmark = pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc",
                                reason="the setting is glibc's")

# A night's pattern: one large column freed (the threshold rises to 16 MiB), then 8 MB temporaries made, a result
# column made after them and kept, the temporaries freed.
CHILD = textwrap.dedent("""
    import sys
    import numpy as np
    from attribution.memory import free_large_arrays_at_once

    def rss_mb():
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * 4096 / 2**20

    if sys.argv[1] == "set":
        assert free_large_arrays_at_once() and free_large_arrays_at_once()  # once; a second call changes nothing
    big = np.ones(2 << 20)  # 16 MiB
    del big
    before = rss_mb()
    temporary = [np.ones(1 << 20) for _ in range(24)]  # 24 columns of a million rows: 192 MiB
    result = np.ones(1 << 20)  # a column made after them, kept
    temporary = None
    print(rss_mb() - before - result.nbytes / 2**20)
""")


def held_after_free(mode: str) -> float:
    """MB still held by the process for the 24 temporary columns of 8 MB, freed.

    The child gets glibc's defaults: no ``MALLOC_*`` or ``GLIBC_TUNABLES`` variable of this process (a Dask
    cluster started earlier in the test session sets ``MALLOC_TRIM_THRESHOLD_`` here, and the heap is then
    trimmed at every free)."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_") and k != "GLIBC_TUNABLES"}
    done = subprocess.run([sys.executable, "-c", CHILD, mode], capture_output=True, text=True, check=True, env=env)
    return float(done.stdout)


def test_freed_columns_leave_the_process_once_set():
    assert held_after_free("set") < 16.0


def test_without_the_setting_glibc_keeps_freed_columns():
    """The premise: by default the freed columns stay with the process (the setting is what returns them)."""
    assert held_after_free("default") > 64.0


POOL_CHILD = textwrap.dedent("""
    import pyarrow as pa
    from attribution.memory import free_large_arrays_at_once

    free_large_arrays_at_once()
    print(pa.default_memory_pool().backend_name)
""")


def arrow_pool_after_setting(**env_extra: str) -> str:
    """Arrow's default pool in a child after the setting (the child's environment: glibc's defaults, no pool named,
    then ``env_extra``)."""
    env = {k: v for k, v in os.environ.items()
           if not k.startswith("MALLOC_") and k not in ("GLIBC_TUNABLES", "ARROW_DEFAULT_MEMORY_POOL")}
    done = subprocess.run([sys.executable, "-c", POOL_CHILD], capture_output=True, text=True, check=True,
                          env={**env, **env_extra})
    return done.stdout.strip()


def test_arrow_allocates_from_the_c_library_once_set():
    assert arrow_pool_after_setting() == "system"


def test_a_pool_named_by_the_user_is_left_as_chosen():
    assert arrow_pool_after_setting(ARROW_DEFAULT_MEMORY_POOL="mimalloc") == "mimalloc"
