"""Detect whether a point set is a complete tensor grid, in any ordering.

A set of n points in d dimensions is a tensor grid when the distinct values u_k along
each axis satisfy n = prod_k |u_k| and every combination of axis values occurs exactly
once. Coordinates are compared exactly (as written by ``harness.geometry.tensor_grid``
or any generator that repeats the same axis values); a grid perturbed by rounding is
not a grid here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


class NotAGridError(ValueError):
    """The points do not form a complete tensor grid; the message gives the reason."""


@dataclass(frozen=True)
class GridLayout:
    """Where each point sits in a row-major tensor grid.

    Attributes
    ----------
    axes : tuple of ndarray
        Sorted distinct coordinate values along each axis.
    position : ndarray of int, shape (n,)
        Row-major (last axis fastest) grid index of each input point:
        ``grid.ravel()[position[i]]`` is the value at ``points[i]``.
    """

    axes: tuple[np.ndarray, ...]
    position: np.ndarray

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(a.size for a in self.axes)

    @property
    def n(self) -> int:
        return self.position.size

    def to_grid(self, values: np.ndarray) -> np.ndarray:
        """Values in input order -> array of shape ``shape + values.shape[1:]``."""
        values = np.asarray(values, dtype=float)
        out = np.empty((self.n,) + values.shape[1:])
        out[self.position] = values
        return out.reshape(self.shape + values.shape[1:])

    def from_grid(self, grid: np.ndarray) -> np.ndarray:
        """Inverse of ``to_grid``: a grid-shaped array -> values in input order."""
        grid = np.asarray(grid)
        flat = grid.reshape((self.n,) + grid.shape[len(self.shape):])
        return flat[self.position]


def detect_grid(points: np.ndarray) -> GridLayout:
    """The tensor-grid layout of ``points`` (n, d), or ``NotAGridError`` with the reason."""
    pts = np.asarray(points, dtype=float)
    if pts.ndim == 1:
        pts = pts[:, None]
    if pts.ndim != 2 or pts.shape[0] == 0:
        raise NotAGridError(f"points: expected a non-empty (n, d) array, got shape {pts.shape}")
    n, d = pts.shape
    axes, indices = [], []
    for k in range(d):
        values, inverse = np.unique(pts[:, k], return_inverse=True)
        axes.append(values)
        indices.append(inverse.ravel())
    shape = tuple(a.size for a in axes)
    size = int(np.prod(shape, dtype=np.int64))
    if size != n:
        counts = " x ".join(f"{s} distinct {'xyz'[k] if d <= 3 else k} values"
                            for k, s in enumerate(shape))
        raise NotAGridError(f"points do not form a tensor grid: {counts} = {size} != {n} points")
    position = np.ravel_multi_index(tuple(indices), shape)
    hits = np.bincount(position, minlength=n)
    if np.any(hits != 1):
        repeated = int(np.count_nonzero(hits > 1))
        raise NotAGridError(
            f"points do not form a tensor grid: {repeated} grid node(s) of the "
            f"{' x '.join(map(str, shape))} grid occur more than once and as many are missing"
        )
    return GridLayout(axes=tuple(axes), position=position)
