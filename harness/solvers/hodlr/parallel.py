"""Loops over the nodes of one tree level, on worker threads.

The nodes of a level own disjoint row ranges, so their updates of a block of vectors
can run in any order: the result is the same with any number of threads (each node's
operations are the same; only who runs them changes). The BLAS calls inside release
the GIL; the caller holds BLAS to one thread.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from typing import TypeVar

T = TypeVar("T")


@contextmanager
def node_pool(threads: int) -> Iterator[ThreadPoolExecutor | None]:
    """A pool of ``threads`` workers for one operator call, or None for one thread."""
    if threads < 2:
        yield None
        return
    with ThreadPoolExecutor(max_workers=threads) as pool:
        yield pool


def for_each_node(pool: ThreadPoolExecutor | None, work: Callable[[T], object],
                  items: Sequence[T]) -> None:
    """Run ``work`` on every item: on the pool when there is one and two or more items."""
    if pool is None or len(items) < 2:
        for item in items:
            work(item)
        return
    for _ in pool.map(work, items):
        pass
