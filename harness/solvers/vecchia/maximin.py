"""Maximin ordering of a point set, with each point's maximin length scale.

The ordering (Guinness 2018, Technometrics 60, sec. 3; Schafer, Katzfuss and Owhadi
2021, SIAM J. Sci. Comput. 43(3), sec. 3.2) picks a first point, then repeatedly the
point farthest from all points picked so far:

    i_k = argmax_{j not picked} min_{q < k} ||x_j - x_{i_q}||,
    l_k = min_{q < k} ||x_{i_k} - x_{i_q}||   (the maximin length scale of position k).

The lengths are non-increasing, and the points picked before position k are at least
l_k apart from each other and cover the whole set to within l_k, so l_k is the local
spacing of the first k points. The first point is the one nearest to the centroid;
its length l_0 is its largest distance to any point (every point is within l_0 of it).

Algorithm (the heap form of Schafer et al. 2021, sec. 3.2 and their appendix): every
unpicked point j carries dist_j, its distance to the nearest picked point, in a max-heap.
Pop the top i; only points j with ||x_i - x_j|| < dist_j <= l_i can change, so one ball
query of radius l_i around x_i (a compiled k-d tree over all points) finds them, and
each decrease is a sift in the heap. The ball around the k-th point holds O(n / k)
points of a quasi-uniform set, hence O(n log n) visits and O(n log^2 n) work in all.
The k-d tree (``kdtree``) is compiled because the queries are issued one
per picked point, in sequence, from inside the compiled loop.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from harness.geometry.point_arrays import finite_points
from harness.solvers.vecchia.kdtree import LEAF, STACK, box_sq_dist, build_kdtree, sq_dist


@dataclass(frozen=True)
class MaximinOrder:
    """A maximin ordering.

    Attributes
    ----------
    perm : ndarray of int64, shape (n,)
        ``points[perm]`` is the maximin order (position k holds point ``perm[k]``).
    lengths : ndarray, shape (n,)
        l_k of position k (module docstring); l_0 is the first point's largest distance.
    nearest : ndarray of int64, shape (n,)
        Position of the earlier point at distance l_k from position k (-1 for k = 0).
    """

    perm: np.ndarray
    lengths: np.ndarray
    nearest: np.ndarray

    @property
    def n(self) -> int:
        return int(self.perm.shape[0])


@numba.njit(inline="always", cache=True)
def _sift_down(hkey: np.ndarray, hlab: np.ndarray, where: np.ndarray, pos: int, size: int,
               key: float, lab: int) -> None:
    """Place (key, lab) at ``pos`` of the max-heap and sift it down (ties: the smaller
    label first). Keys live in the heap itself, so a sift reads adjacent entries."""
    while True:
        child = 2 * pos + 1
        if child >= size:
            break
        c2 = child + 1
        if c2 < size and (hkey[c2] > hkey[child] or (
                hkey[c2] == hkey[child] and hlab[c2] < hlab[child])):
            child = c2
        if hkey[child] > key or (hkey[child] == key and hlab[child] < lab):
            hkey[pos] = hkey[child]
            hlab[pos] = hlab[child]
            where[hlab[pos]] = pos
            pos = child
        else:
            break
    hkey[pos] = key
    hlab[pos] = lab
    where[lab] = pos


@numba.njit(cache=True)
def _maximin(x0: np.ndarray, first0: int) -> tuple:
    n, d = x0.shape
    idx, start, stop, left, right, lo, hi = build_kdtree(x0, LEAF)
    # relabel the points in the tree's order: a leaf's points are then contiguous in
    # memory, and so are the keys and flags the ball queries touch (3x faster at 1M)
    x = np.empty((n, d))
    label = np.empty(n, np.int64)
    for q in range(n):
        label[idx[q]] = q
        for k in range(d):
            x[q, k] = x0[idx[q], k]
    first = label[first0]
    key = np.empty(n)  # squared distance to the nearest picked point
    near = np.full(n, -1, np.int64)  # that point (a point index)
    picked = np.zeros(n, np.bool_)
    perm = np.empty(n, np.int64)
    lengths = np.empty(n)
    nearest = np.full(n, -1, np.int64)
    position = np.empty(n, np.int64)
    far = 0.0
    for j in range(n):
        key[j] = sq_dist(x, first, j)
        near[j] = first
        far = max(far, key[j])
    picked[first] = True
    perm[0] = first
    position[first] = 0
    lengths[0] = np.sqrt(far)
    hkey = np.empty(n)
    hlab = np.empty(n, np.int64)
    where = np.full(n, -1, np.int64)
    size = 0
    for j in range(n):
        if j != first:
            hkey[size] = key[j]
            hlab[size] = j
            where[j] = size
            size += 1
    for pos in range(size // 2 - 1, -1, -1):
        _sift_down(hkey, hlab, where, pos, size, hkey[pos], hlab[pos])
    stack = np.empty(STACK, np.int64)
    for k in range(1, n):
        i = hlab[0]
        size -= 1
        if size > 0:
            _sift_down(hkey, hlab, where, 0, size, hkey[size], hlab[size])
        where[i] = -1
        picked[i] = True
        perm[k] = i
        position[i] = k
        lengths[k] = np.sqrt(key[i])
        nearest[k] = position[near[i]]
        radius2 = key[i]
        top = 0
        stack[0] = 0
        while top >= 0:
            node = stack[top]
            top -= 1
            if box_sq_dist(x, i, lo, hi, node) >= radius2:
                continue
            if left[node] < 0:
                for j in range(start[node], stop[node]):
                    if picked[j]:
                        continue
                    dq = sq_dist(x, i, j)
                    if dq < key[j]:
                        key[j] = dq
                        near[j] = i
                        _sift_down(hkey, hlab, where, where[j], size, dq, j)
            else:
                top += 1
                stack[top] = left[node]
                top += 1
                stack[top] = right[node]
    for k in range(n):
        perm[k] = idx[perm[k]]
    return perm, lengths, nearest


def maximin_order(points: np.ndarray) -> MaximinOrder:
    """The maximin ordering of ``points`` (module docstring), O(n log^2 n).

    Parameters
    ----------
    points : ndarray, shape (n, d) or (n,)
        Finite coordinates; distances are Euclidean in these coordinates (scale the
        coordinates first for an anisotropic kernel).

    Returns
    -------
    MaximinOrder
    """
    x = np.ascontiguousarray(finite_points(points))
    first = int(np.argmin(((x - x.mean(axis=0)) ** 2).sum(axis=1)))
    perm, lengths, nearest = _maximin(x, first)
    return MaximinOrder(perm=perm, lengths=lengths, nearest=nearest)
