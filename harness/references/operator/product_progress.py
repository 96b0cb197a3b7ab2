"""Progress display of long exact products: a tqdm bar on stderr with a time estimate."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Protocol

#: Products with at least this many n x 1 entry evaluations (n^2 k / 2) show a bar when
#: stderr is a terminal (about two seconds here; common practice: no bar for short work).
LONG_PRODUCT_ENTRIES = 5e9


class _Bar(Protocol):
    def update(self, n: int = 1) -> object: ...


class _Silent:
    def update(self, n: int = 1) -> None:
        return None


@contextmanager
def product_bar(total: int, *, n: int, k: int, show: bool | None) -> Iterator[_Bar]:
    """A bar over ``total`` rounds; ``show`` None means: only long products on a terminal."""
    if show is None:
        show = sys.stderr.isatty() and 0.5 * n * n * k >= LONG_PRODUCT_ENTRIES
    if not show:
        yield _Silent()
        return
    from tqdm import tqdm
    bar = tqdm(total=total, unit="round", file=sys.stderr, leave=False,
               desc=f"exact product n={n:,} k={k}")
    try:
        yield bar
    finally:
        bar.close()
