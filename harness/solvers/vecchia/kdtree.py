"""A static k-d tree for ball queries from compiled loops.

Nodes split at the median of their widest coordinate (Hoare's selection), down to
leaves of at most ``LEAF`` points; each node keeps its bounding box, and a ball query
descends into the nodes whose box meets the ball (Bentley 1975, CACM 18(9)). The
maximin ordering issues one query per picked point from inside its compiled loop and
the sparsity pattern one per column in parallel, which a Python-level tree cannot serve
at a million points.
"""

from __future__ import annotations

import numba
import numpy as np

#: Points per leaf.
LEAF = 16
#: Depth of the traversal stack (two entries per level; ample for any n < 2^63).
STACK = 256


@numba.njit(cache=True)
def select_median(x: np.ndarray, idx: np.ndarray, dim: int, s: int, e: int, mid: int) -> None:
    """Permute idx[s:e] so that x[idx[mid], dim] is the median (Hoare's selection, median
    of three pivots): smaller-or-equal values before mid, larger-or-equal after."""
    a, b = s, e - 1
    while b > a:
        m = (a + b) // 2
        va, vm, vb = x[idx[a], dim], x[idx[m], dim], x[idx[b], dim]
        pivot = max(min(va, vm), min(max(va, vm), vb))
        i, j = a, b
        while i <= j:
            while x[idx[i], dim] < pivot:
                i += 1
            while x[idx[j], dim] > pivot:
                j -= 1
            if i <= j:
                t = idx[i]
                idx[i] = idx[j]
                idx[j] = t
                i += 1
                j -= 1
        if mid <= j:
            b = j
        elif mid >= i:
            a = i
        else:
            break


@numba.njit(cache=True)
def build_kdtree(x: np.ndarray, leaf: int) -> tuple:
    """Static k-d tree: nodes split at the median of their widest coordinate."""
    n, d = x.shape
    cap = 4 * (n // leaf + 2)
    start = np.empty(cap, np.int64)
    stop = np.empty(cap, np.int64)
    left = np.full(cap, -1, np.int64)
    right = np.full(cap, -1, np.int64)
    lo = np.empty((cap, d))
    hi = np.empty((cap, d))
    idx = np.arange(n)
    stack = np.empty(cap, np.int64)
    start[0], stop[0] = 0, n
    count = 1
    top = 0
    stack[0] = 0
    while top >= 0:
        node = stack[top]
        top -= 1
        s, e = start[node], stop[node]
        for k in range(d):
            a = x[idx[s], k]
            b = a
            for q in range(s + 1, e):
                v = x[idx[q], k]
                a = min(a, v)
                b = max(b, v)
            lo[node, k] = a
            hi[node, k] = b
        if e - s <= leaf:
            continue
        dim = 0
        for k in range(1, d):
            if hi[node, k] - lo[node, k] > hi[node, dim] - lo[node, dim]:
                dim = k
        mid = s + (e - s) // 2
        select_median(x, idx, dim, s, e, mid)
        left[node], right[node] = count, count + 1
        start[count], stop[count] = s, mid
        start[count + 1], stop[count + 1] = mid, e
        top += 1
        stack[top] = count
        top += 1
        stack[top] = count + 1
        count += 2
    return idx, start[:count], stop[:count], left[:count], right[:count], lo[:count], hi[:count]


@numba.njit(inline="always", cache=True)
def sq_dist(x: np.ndarray, i: int, j: int) -> float:
    q = 0.0
    for k in range(x.shape[1]):
        t = x[i, k] - x[j, k]
        q += t * t
    return q


@numba.njit(inline="always", cache=True)
def box_sq_dist(x: np.ndarray, i: int, lo: np.ndarray, hi: np.ndarray, node: int) -> float:
    q = 0.0
    for k in range(x.shape[1]):
        v = x[i, k]
        if v < lo[node, k]:
            t = lo[node, k] - v
            q += t * t
        elif v > hi[node, k]:
            t = v - hi[node, k]
            q += t * t
    return q
