"""Run a GIL-releasing compiled kernel over a range of indices on several threads.

The dense fills (``harness.model.kernels.assembly``) and the exact products' rounds
(``harness.references.operator.products``) are serial numba kernels that release the GIL
and take the range of columns (or tile pairs) they should do. ``over_threads`` splits
``range(count)`` into one contiguous range per thread and runs them at once. Each range
writes its own outputs, so the result does not depend on the thread count; the width is
``numba.get_num_threads()`` by default, so ``NUMBA_NUM_THREADS`` and
``numba.set_num_threads`` still set it.

This module is infrastructure: it imports nothing from the rest of ``harness``.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor


def thread_count() -> int:
    """numba's thread count (``numba.get_num_threads()``)."""
    import numba

    return int(numba.get_num_threads())


def over_threads(work: Callable[[int, int], object], count: int, *, threads: int,
                 pool: ThreadPoolExecutor | None = None) -> None:
    """``work(start, stop)`` over ``range(count)`` split into ``threads`` contiguous
    ranges, run at once on ``pool`` (a new one when None; one thread runs inline)."""
    threads = max(1, min(threads, count))
    if threads == 1:
        work(0, count)
        return
    bounds = [count * t // threads for t in range(threads + 1)]
    if pool is None:
        with ThreadPoolExecutor(max_workers=threads) as own:
            over_threads(work, count, threads=threads, pool=own)
        return
    for job in [pool.submit(work, bounds[t], bounds[t + 1]) for t in range(threads)]:
        job.result()
