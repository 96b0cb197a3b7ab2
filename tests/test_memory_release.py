"""Freed heap memory handed back to the system (``harness.infra.memory_release``).

glibc keeps freed blocks below its mmap threshold in the heap while a live block sits
above them, and ``malloc_trim(0)`` returns their whole pages (malloc_trim(3), mallopt(3)
M_MMAP_THRESHOLD and M_TRIM_THRESHOLD). Without glibc the call does nothing and the test
is skipped with that reason.
"""

from __future__ import annotations

import numpy as np
import psutil
import pytest

from harness.infra.memory_release import release_freed_memory


def _resident() -> int:
    return psutil.Process().memory_info().rss


def test_freed_small_blocks_leave_the_process_after_the_release():
    blocks = [np.ones(12_000) for _ in range(2000)]   # 96 KB each, 187 MiB in the heap
    pinned = np.ones(12_000)                            # a live block above them
    del blocks
    held = _resident()
    if not release_freed_memory():
        pytest.skip("this C library has no malloc_trim")
    released = held - _resident()
    assert pinned.sum() == 12_000
    assert released >= 100 * 2**20, f"only {released / 2**20:.0f} MiB returned"
