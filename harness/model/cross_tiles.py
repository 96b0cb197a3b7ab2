"""The cross-covariance k(X, x*) between observations and new points, tile by tile.

Kriging at m new points needs K* = s2 R(X, x*), an n x m array; at n = 65,536 and m =
2,000 that is a gigabyte. Every kriging path (``harness.likelihood.kriging``, the
exact-operator and dense references, the audit's efficiency criteria) instead walks the
new points in column blocks of at most ``TILE_COLUMNS`` and forms one n x block tile at a
time, so the peak is n x ``TILE_COLUMNS`` numbers.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from harness.model.kernels import Kernel

#: New points per tile: the most right-hand sides of one block of solves, too.
TILE_COLUMNS = 64


def column_blocks(m: int, *, width: int | None = None) -> Iterator[slice]:
    """Consecutive slices of ``range(m)`` of at most ``width`` (default ``TILE_COLUMNS``,
    read at call time) entries each."""
    step = TILE_COLUMNS if width is None else int(width)
    if step < 1:
        raise ValueError(f"tile width: expected an integer >= 1, got {width!r}")
    for c0 in range(0, m, step):
        yield slice(c0, min(m, c0 + step))


def cross_covariance_tiles(kernel: Kernel, points: np.ndarray, new_points: np.ndarray, *,
                           width: int | None = None) -> Iterator[tuple[slice, np.ndarray]]:
    """(columns, k(X, x*[columns])) for consecutive column blocks of the new points.

    Parameters
    ----------
    kernel : Kernel
        Its ``cross_covariance`` (s2 R, no nugget) builds each tile.
    points : ndarray, shape (n, d)
    new_points : ndarray, shape (m, d)
    width : int, optional
        Columns per tile (default ``TILE_COLUMNS``).

    Yields
    ------
    columns : slice
        The new points of this tile.
    tile : ndarray, shape (n, columns)
    """
    for cols in column_blocks(new_points.shape[0], width=width):
        yield cols, kernel.cross_covariance(points, new_points[cols])
