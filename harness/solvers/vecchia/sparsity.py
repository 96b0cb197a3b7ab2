"""Sparsity patterns of the inverse Cholesky factor in maximin order: the m nearest
earlier points (the default) or the radius-rho rule.

Nearest rule (Vecchia 1988, JRSS-B 50, sec. 3; Guinness 2018, Technometrics 60(4),
sec. 2): position k of the maximin order conditions on the min(m, k) earlier points
nearest to x_k. This is the solver's knob (``neighbours``), because it is the one that
keeps its accuracy when the covariance has a nugget. Measured by
``benchmarks/vecchia_pattern_rules.py`` (2D uniform points, Matern 3/2, l = 0.1, nugget
1e-2, no supernodes, medians of 3 seeds): at n = 4,096 the radius rule at rho = 6 gives
31.4 nonzeros per column and KL = 34.7 nat, the 30 nearest earlier points 30.9 and KL =
1.7 nat; at rho = 9, 14.7 nat against 0.064. The radius rule's sets vary widely in size:
a point that lands close to an earlier one has a tiny l_k and so a tiny ball, and under
a nugget that one close point does not screen the rest.

Radius rule (Schafer, Katzfuss and Owhadi 2021, SIAM J. Sci. Comput. 43(3), eq. 3.3, written
for the coarse-to-fine order used here): position k of the maximin order conditions on

    c(k) = { j < k : ||x_j - x_k|| <= rho * l_k },

the earlier points within rho times its maximin length scale l_k. (The paper orders
fine to coarse and writes S_i = {j >= i : dist(x_i, x_j) <= rho l_i}; reversing the
order turns one into the other.) Column k of the factor then has rows c(k) and k.

The radius rule stays as an option (``rho=``): its accuracy theory (the KL error decays
exponentially in rho, and rho = O(log(n / eps)) reaches accuracy eps, Schafer et al.
2021, Thm. 3.4) assumes no nugget, where a close earlier point does screen the rest;
with a nugget it loses to the nearest rule at equal cost (measured above). Both rules
feed the same supernodal aggregation (``supernodes``), which takes any conditioning
sets. The mean count per column is what ``VecchiaStructure.nnz_per_column`` reports.

Neighbour search (radius rule): one ball query of radius rho l_k per position, in parallel, on a
compiled k-d tree (``kdtree``) of the ordered points whose nodes record the smallest
position they hold; a node holding no position below k is skipped, and each leaf's
points are sorted by position so its scan stops at k. The earlier points near x_k are
about l_k apart, so a query visits O(rho^d) leaves: O(n rho^d log n) in all. (scipy's
cKDTree serves the same queries through k-nearest searches on log2(n) prefix trees,
vectorized, but took 12 s at 2^20 points against about 1 s here.) The nearest rule
uses the same tree with a bounded max-heap of the m best candidates (Friedman, Bentley
and Finkel 1977, ACM TOMS 3(3)): a node is skipped when it holds no earlier position
or its box lies farther than the heap's worst entry once the heap is full, and the
nearer child is visited first.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from harness.solvers.vecchia.kdtree import LEAF, STACK, box_sq_dist, build_kdtree, sq_dist


@dataclass(frozen=True)
class ConditioningPattern:
    """Conditioning sets c(k) as CSR-like arrays over positions of the maximin order.

    Attributes
    ----------
    ptr : ndarray of int64, shape (n + 1,)
        c(k) is ``rows[ptr[k]:ptr[k + 1]]``.
    rows : ndarray of int32
        Earlier positions, ascending within each k (k itself excluded).
    rule : {"neighbours", "rho"}
        The nearest rule (m earlier points) or the radius rule.
    value : float
        Its m or rho.
    """

    ptr: np.ndarray
    rows: np.ndarray
    rule: str
    value: float

    @property
    def n(self) -> int:
        return int(self.ptr.shape[0] - 1)

    def conditioning(self, k: int) -> np.ndarray:
        """c(k), ascending."""
        return self.rows[self.ptr[k]:self.ptr[k + 1]]


@numba.njit(cache=True)
def _prepare(x: np.ndarray) -> tuple:
    """Tree over positions with leaves sorted by position, the coordinates in the
    tree's slot order, and the smallest position under every node."""
    idx, start, stop, left, right, lo, hi = build_kdtree(x, LEAF)
    m = start.shape[0]
    low = np.empty(m, np.int64)
    for node in range(m - 1, -1, -1):  # children are created after their parent
        if left[node] < 0:
            seg = np.sort(idx[start[node]:stop[node]])
            idx[start[node]:stop[node]] = seg
            low[node] = seg[0]
        else:
            low[node] = min(low[left[node]], low[right[node]])
    xt = np.empty_like(x)
    for q in range(x.shape[0]):
        xt[q] = x[idx[q]]
    return idx, xt, start, stop, left, right, lo, hi, low


@numba.njit(inline="always", cache=True)
def _query(xt, qk, k, r2, idx, start, stop, left, right, lo, hi, low, out, write) -> int:
    """Positions j < k within sqrt(r2) of slot qk (position k); written when ``write``."""
    stack = np.empty(STACK, np.int64)
    top = 0
    stack[0] = 0
    count = 0
    while top >= 0:
        node = stack[top]
        top -= 1
        if low[node] >= k or box_sq_dist(xt, qk, lo, hi, node) > r2:
            continue
        if left[node] < 0:
            for q in range(start[node], stop[node]):
                j = idx[q]
                if j >= k:
                    break
                if sq_dist(xt, qk, q) <= r2:
                    if write:
                        out[count] = j
                    count += 1
        else:
            top += 1
            stack[top] = left[node]
            top += 1
            stack[top] = right[node]
    return count


@numba.njit(parallel=True, cache=True)
def _pattern(x: np.ndarray, radius: np.ndarray) -> tuple:
    n = x.shape[0]
    idx, xt, start, stop, left, right, lo, hi, low = _prepare(x)
    counts = np.zeros(n + 1, np.int64)
    dummy = np.empty(0, np.int32)
    # queries in the tree's slot order: neighbouring queries share tree nodes in cache
    for qk in numba.prange(n):
        k = idx[qk]
        counts[k + 1] = _query(xt, qk, k, radius[k] * radius[k], idx, start, stop, left,
                               right, lo, hi, low, dummy, False)
    ptr = np.cumsum(counts)
    rows = np.empty(ptr[n], np.int32)
    for qk in numba.prange(n):
        k = idx[qk]
        seg = rows[ptr[k]:ptr[k + 1]]
        _query(xt, qk, k, radius[k] * radius[k], idx, start, stop, left, right, lo, hi,
               low, seg, True)
        seg[:] = np.sort(seg)
    return ptr, rows


def radius_pattern(points_ordered: np.ndarray, lengths: np.ndarray, *,
                   rho: float) -> ConditioningPattern:
    """c(k) for every position k of a maximin order (module docstring).

    Parameters
    ----------
    points_ordered : ndarray, shape (n, d)
        Points in maximin order.
    lengths : ndarray, shape (n,)
        Maximin length scales l_k.
    rho : float
        Radius in units of l_k (> 0; ``math.inf`` conditions on every earlier point).
    """
    x = np.ascontiguousarray(points_ordered, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    radius = np.minimum(rho * np.asarray(lengths, dtype=float), np.finfo(float).max ** 0.5)
    ptr, rows = _pattern(np.ascontiguousarray(x), np.ascontiguousarray(radius))
    return ConditioningPattern(ptr=ptr, rows=rows, rule="rho", value=float(rho))


@numba.njit(inline="always", cache=True)
def _heap_push(hd: np.ndarray, hj: np.ndarray, size: int, dist: float, j: int) -> None:
    """Add (dist, j) to the max-heap on hd[:size] (which then holds size + 1)."""
    c = size
    hd[c] = dist
    hj[c] = j
    while c > 0:
        par = (c - 1) // 2
        if hd[par] >= hd[c]:
            return
        hd[par], hd[c] = hd[c], hd[par]
        hj[par], hj[c] = hj[c], hj[par]
        c = par


@numba.njit(inline="always", cache=True)
def _heap_down(hd: np.ndarray, hj: np.ndarray, size: int) -> None:
    """Restore the max-heap on hd[:size] after its root was replaced."""
    i = 0
    while True:
        a = 2 * i + 1
        if a >= size:
            return
        b = a + 1
        big = b if b < size and hd[b] > hd[a] else a
        if hd[big] <= hd[i]:
            return
        hd[i], hd[big] = hd[big], hd[i]
        hj[i], hj[big] = hj[big], hj[i]
        i = big


@numba.njit(inline="always", cache=True)
def _nearest(xt, qk, k, m, idx, start, stop, left, right, lo, hi, low, hd, hj) -> int:
    """The min(m, k) positions j < k nearest to slot qk (position k) into hj."""
    stack = np.empty(STACK, np.int64)
    top = 0
    stack[0] = 0
    size = 0
    while top >= 0:
        node = stack[top]
        top -= 1
        if low[node] >= k:
            continue
        if size == m and box_sq_dist(xt, qk, lo, hi, node) >= hd[0]:
            continue
        if left[node] < 0:
            for q in range(start[node], stop[node]):
                j = idx[q]
                if j >= k:
                    break
                dq = sq_dist(xt, qk, q)
                if size < m:
                    _heap_push(hd, hj, size, dq, j)
                    size += 1
                elif dq < hd[0]:
                    hd[0] = dq
                    hj[0] = j
                    _heap_down(hd, hj, size)
        else:
            a, b = left[node], right[node]
            if box_sq_dist(xt, qk, lo, hi, a) <= box_sq_dist(xt, qk, lo, hi, b):
                a, b = b, a
            top += 1
            stack[top] = a  # the farther child, popped last
            top += 1
            stack[top] = b
    return size


@numba.njit(parallel=True, cache=True)
def _nearest_pattern(x: np.ndarray, m: int) -> tuple:
    n = x.shape[0]
    idx, xt, start, stop, left, right, lo, hi, low = _prepare(x)
    counts = np.zeros(n + 1, np.int64)
    for k in range(n):
        counts[k + 1] = min(m, k)
    ptr = np.cumsum(counts)
    rows = np.empty(ptr[n], np.int32)
    for qk in numba.prange(n):
        k = idx[qk]
        hd = np.empty(m)
        hj = np.empty(m, np.int64)
        size = _nearest(xt, qk, k, m, idx, start, stop, left, right, lo, hi, low, hd, hj)
        seg = rows[ptr[k]:ptr[k + 1]]
        seg[:] = np.sort(hj[:size])
    return ptr, rows


def nearest_pattern(points_ordered: np.ndarray, *, neighbours: int) -> ConditioningPattern:
    """c(k) = the min(m, k) earlier points nearest to x_k (module docstring).

    Parameters
    ----------
    points_ordered : ndarray, shape (n, d)
        Points in maximin order.
    neighbours : int
        m >= 1. Ties in distance are broken by the tree's visiting order.
    """
    m = int(neighbours)
    if m < 1:
        raise ValueError(f"neighbours must be >= 1, got {neighbours!r}")
    x = np.ascontiguousarray(points_ordered, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    ptr, rows = _nearest_pattern(np.ascontiguousarray(x), m)
    return ConditioningPattern(ptr=ptr, rows=rows, rule="neighbours", value=float(m))
