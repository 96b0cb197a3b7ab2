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
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from typing import TypeVar

from harness.infra.thread_ranges import over_threads

T = TypeVar("T")


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
