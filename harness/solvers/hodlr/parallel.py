"""Loops over the nodes of one tree level, on worker threads.

The nodes of a level own disjoint row ranges, so their updates of a block of vectors
can run in any order: the result is the same with any number of threads (each node's
operations are the same; only who runs them changes). The BLAS calls inside release
the GIL; the caller holds BLAS to one thread.

The nodes of a level are cut into one contiguous run per thread, and each thread walks
its run: a level of the same-sized nodes of a balanced tree splits evenly this way, and
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


def contiguous_runs(count: int, parts: int) -> list[range]:
    """``range(count)`` cut into at most ``parts`` consecutive runs whose lengths differ
    by at most one (no empty run)."""
    parts = max(1, min(int(parts), int(count)))
    edges = [count * k // parts for k in range(parts + 1)]
    return [range(edges[k], edges[k + 1]) for k in range(parts)]


def for_each_node(pool: NodePool | None, work: Callable[[T], object],
                  items: Sequence[T]) -> None:
    """Run ``work`` on every item: one contiguous run of items per thread of the pool
    when there is one and two or more items (module docstring)."""
    if pool is None or len(items) < 2:
        for item in items:
            work(item)
        return

    def walk(run: range) -> None:
        for k in run:
            work(items[k])

    futures = [pool.executor.submit(walk, run)
               for run in contiguous_runs(len(items), pool.threads)]
    for future in futures:
        future.result()
