"""Loops over the nodes of one tree level, on worker threads.

The nodes of a level own disjoint row ranges, so their updates of a block of vectors
can run in any order: the result is the same with any number of threads (each node's
operations are the same; only who runs them changes). The BLAS calls inside release
the GIL; the caller holds BLAS to one thread.

The nodes of a level are cut into one contiguous run per thread
(``harness.infra.thread_ranges.over_threads``), and each thread walks its run: a level
of the same-sized nodes of a balanced tree splits evenly this way, and
a deep level of many small nodes (a line of 10^5 points has 781 leaves of 128) costs
one task per thread, not one per node, whose pool bookkeeping outweighed a small node's
own work (a profile of a check on 100,000 points on a line counted 0.9 million tasks).

The compression and the factorization map a function over blocks whose results they
keep (``map_in_runs``): consecutive blocks go to the pool in runs of at least
``MIN_TASK_ROWS`` rows, so a big block is still a task of its own and the many small
blocks of a deep level share a few; without a pool they run on the calling thread.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from typing import TypeVar

from harness.infra.thread_ranges import over_threads

T = TypeVar("T")
R = TypeVar("R")

#: Rows of blocks one pool task of ``map_in_runs`` covers at least. Development
#: measurement, points on a line (n = 100,000, ranks 2, tol 1e-6, median of 6): one task
#: per block gave 12,000 tasks a factorization, whose handoffs cost the compression
#: 0.58 s against 0.47 s on the calling thread, and the factorization on its one-worker
#: pool 0.54 s against 0.36 s on the calling thread.
MIN_TASK_ROWS = 8192


@dataclass(frozen=True)
class NodePool:
    """Worker threads for one operator call, and how many there are."""

    executor: ThreadPoolExecutor
    threads: int


@contextmanager
def node_pool(threads: int) -> Iterator[NodePool | None]:
    """A pool of ``threads`` workers for one operator call, or None for one thread."""
    if threads < 2:
        yield None
        return
    with ThreadPoolExecutor(max_workers=threads) as executor:
        yield NodePool(executor, int(threads))


def for_each_node(pool: NodePool | None, work: Callable[[T], object],
                  items: Sequence[T]) -> None:
    """Run ``work`` on every item: one contiguous run of items per thread of the pool
    when there is one and two or more items (module docstring)."""
    if pool is None or len(items) < 2:
        for item in items:
            work(item)
        return

    def walk(start: int, stop: int) -> None:
        for k in range(start, stop):
            work(items[k])

    over_threads(walk, len(items), threads=pool.threads, pool=pool.executor)


def map_in_runs(pool: NodePool | None, work: Callable[[T], R], items: Sequence[T], *,
                rows: Callable[[T], int]) -> list[R]:
    """``[work(item) for item in items]``, the items cut into consecutive runs of at least
    ``MIN_TASK_ROWS`` rows (``rows(item)`` each), one task of ``pool`` per run; on the
    calling thread when ``pool`` is None. The results keep the items' order."""
    if pool is None:
        return [work(item) for item in items]
    runs: list[list[T]] = [[]]
    covered = 0
    for item in items:
        runs[-1].append(item)
        covered += rows(item)
        if covered >= MIN_TASK_ROWS:
            runs.append([])
            covered = 0
    done: list[R] = []
    for part in pool.executor.map(lambda run: [work(item) for item in run],
                                  [r for r in runs if r]):
        done.extend(part)
    return done
