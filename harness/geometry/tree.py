"""Balanced binary cluster tree by recursive median bisection along the principal axis.

Each node's points are split at the median of their projection on the node's principal
axis (the leading eigenvector of the node's coordinate covariance), the first
floor(m / 2) points going to the left child. Every level is therefore a partition of all
points into 2^level contiguous ranges of the permuted order whose sizes differ by at most
one, whatever the geometry (clustered points, duplicates); no node is empty, since
leaf_size >= 2 keeps 2^L < 2 n / leaf_size <= n. The depth is the smallest L with
ceil(n / 2^L) <= leaf_size, i.e. L = ceil(log2(n / leaf_size)) for n > leaf_size.

This is the cluster tree of a hierarchical off-diagonal low-rank (HODLR) matrix
(Ambikasaran, O'Neil and Singh, arXiv 1405.0223, sec. 3): at level l the diagonal blocks
are Sigma[I, I] for the level-l ranges I, and each node's two children give the
off-diagonal pair Sigma[I_left, I_right] compressed to low rank.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.geometry.point_arrays import finite_points


class TreeError(ValueError):
    """Invalid input to the cluster tree (points, leaf size)."""


@dataclass(frozen=True)
class ClusterTree:
    """A complete binary tree over permuted points.

    Attributes
    ----------
    perm : ndarray of intp, shape (n,)
        ``points[perm]`` is the tree order; node ranges index into it.
    depth : int
        Number of levels below the root; the leaves are at level ``depth``.
    bounds : tuple of ndarray
        ``bounds[l]`` has 2^l + 1 increasing offsets; node j of level l is the range
        ``bounds[l][j]:bounds[l][j + 1]`` of the tree order.
    leaf_size : int
        The requested maximum leaf size.
    """

    perm: np.ndarray
    depth: int
    bounds: tuple[np.ndarray, ...]
    leaf_size: int

    @property
    def n(self) -> int:
        return int(self.perm.shape[0])

    @property
    def iperm(self) -> np.ndarray:
        """Inverse permutation: ``iperm[perm[k]] = k``."""
        out = np.empty_like(self.perm)
        out[self.perm] = np.arange(self.perm.shape[0], dtype=self.perm.dtype)
        return out

    def node(self, level: int, j: int) -> tuple[int, int]:
        """(start, stop) of node j at ``level`` in the tree order."""
        if not 0 <= level <= self.depth:
            raise IndexError(f"level {level} out of range 0..{self.depth}")
        b = self.bounds[level]
        if not 0 <= j < b.shape[0] - 1:
            raise IndexError(f"node {j} out of range 0..{b.shape[0] - 2} at level {level}")
        return int(b[j]), int(b[j + 1])

    def sizes(self, level: int) -> np.ndarray:
        """Node sizes at ``level``."""
        return np.diff(self.bounds[level])


def tree_depth(n: int, leaf_size: int) -> int:
    """Smallest L >= 0 with ceil(n / 2^L) <= leaf_size."""
    depth = 0
    while -(-n // (1 << depth)) > leaf_size:
        depth += 1
    return depth


def _principal_axis(x: np.ndarray) -> np.ndarray:
    centred = x - x.mean(axis=0)
    if x.shape[1] == 1:
        return np.ones(1)
    cov = centred.T @ centred
    if not np.any(cov):
        return np.eye(x.shape[1])[0]
    _, vecs = np.linalg.eigh(cov)
    return vecs[:, -1]


def build_tree(points: np.ndarray, *, leaf_size: int = 128) -> ClusterTree:
    """Cluster tree of ``points`` by principal-axis median bisection.

    Parameters
    ----------
    points : ndarray, shape (n, d) or (n,)
        Coordinates, d = 1, 2 or 3 (any d works).
    leaf_size : int
        Maximum number of points in a leaf (>= 2).

    Returns
    -------
    ClusterTree
    """
    x = finite_points(points, error=TreeError)
    if int(leaf_size) != leaf_size or leaf_size < 2:
        raise TreeError(f"leaf_size must be an integer >= 2, got {leaf_size!r}")
    n = x.shape[0]
    depth = tree_depth(n, int(leaf_size))
    perm = np.arange(n, dtype=np.intp)
    bounds = [np.array([0, n], dtype=np.intp)]
    for _ in range(depth):
        parent = bounds[-1]
        child = np.empty(2 * (parent.shape[0] - 1) + 1, dtype=np.intp)
        child[0] = 0
        for j in range(parent.shape[0] - 1):
            s, e = int(parent[j]), int(parent[j + 1])
            half = (e - s) // 2
            idx = perm[s:e]
            proj = x[idx] @ _principal_axis(x[idx])
            order = np.argpartition(proj, half) if 0 < half < e - s else np.arange(e - s)
            perm[s:e] = idx[order]
            child[2 * j + 1] = s + half
            child[2 * j + 2] = e
        bounds.append(child)
    return ClusterTree(perm=perm, depth=depth, bounds=tuple(bounds), leaf_size=int(leaf_size))
