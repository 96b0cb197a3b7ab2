"""Products and triangular solves with the sparse upper triangular factor U.

U is stored by columns: column k has rows ``rows[ptr[k]:ptr[k + 1]]`` ascending, the
last being k itself (the diagonal). Every routine costs O(nnz) per right-hand side;
blocks of right-hand sides run their columns in parallel (products U'B by rows of the
result), never forming U U' or its inverse. The scattering and substituting routines
work on each right-hand side as a contiguous vector (a transposed copy of the block), so
that their indexed reads and writes stay within one n-vector instead of striding across
the block's rows.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(parallel=True, cache=True)
def ut_mul(ptr: np.ndarray, rows: np.ndarray, vals: np.ndarray, b: np.ndarray) -> np.ndarray:
    """U' B: (U'B)_k = sum over column k of U_jk B_j."""
    n, m = b.shape
    out = np.zeros((n, m))
    for k in numba.prange(n):
        for e in range(ptr[k], ptr[k + 1]):
            v = vals[e]
            j = rows[e]
            for c in range(m):
                out[k, c] += v * b[j, c]
    return out


@numba.njit(parallel=True, cache=True)
def u_mul(ptr: np.ndarray, rows: np.ndarray, vals: np.ndarray, b: np.ndarray) -> np.ndarray:
    """U B (scattered by columns of U; right-hand sides in parallel)."""
    n, m = b.shape
    bt = np.ascontiguousarray(b.T)
    out = np.zeros((m, n))
    for c in numba.prange(m):
        col = out[c]
        src = bt[c]
        for k in range(n):
            x = src[k]
            if x != 0.0:
                for e in range(ptr[k], ptr[k + 1]):
                    col[rows[e]] += vals[e] * x
    return np.ascontiguousarray(out.T)


@numba.njit(parallel=True, cache=True)
def u_solve(ptr: np.ndarray, rows: np.ndarray, vals: np.ndarray, b: np.ndarray) -> np.ndarray:
    """U^-1 B by back substitution over the columns of U, last to first."""
    n, m = b.shape
    out = np.empty((m, n))
    out[:] = b.T
    for c in numba.prange(m):
        col = out[c]
        for k in range(n - 1, -1, -1):
            last = ptr[k + 1] - 1
            x = col[k] / vals[last]
            col[k] = x
            for e in range(ptr[k], last):
                col[rows[e]] -= vals[e] * x
    return np.ascontiguousarray(out.T)


@numba.njit(parallel=True, cache=True)
def ut_solve(ptr: np.ndarray, rows: np.ndarray, vals: np.ndarray, b: np.ndarray
             ) -> np.ndarray:
    """U'^-1 B by forward substitution: x_k = (b_k - sum_{j<k} U_jk x_j) / U_kk."""
    n, m = b.shape
    out = np.empty((m, n))
    out[:] = b.T
    for c in numba.prange(m):
        col = out[c]
        for k in range(n):
            last = ptr[k + 1] - 1
            acc = col[k]
            for e in range(ptr[k], last):
                acc -= vals[e] * col[rows[e]]
            col[k] = acc / vals[last]
    return np.ascontiguousarray(out.T)


@numba.njit(cache=True)
def row_form(ptr: np.ndarray, rows: np.ndarray, vals: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """U by rows (``row_ptr``, column indices ascending, values): row i holds U_ij for
    j >= i, the diagonal first. A counting sort over the entries, O(nnz)."""
    n = ptr.size - 1
    count = np.zeros(n + 1, dtype=np.int64)
    for e in range(rows.size):
        count[rows[e] + 1] += 1
    row_ptr = np.cumsum(count)
    fill = row_ptr[:-1].copy()
    cols = np.empty(rows.size, dtype=np.int64)
    out = np.empty(rows.size)
    for k in range(n):               # columns in order, so each row's columns ascend
        for e in range(ptr[k], ptr[k + 1]):
            i = rows[e]
            cols[fill[i]] = k
            out[fill[i]] = vals[e]
            fill[i] += 1
    return row_ptr, cols, out


@numba.njit(parallel=True, cache=True)
def u_solve_rows(row_ptr: np.ndarray, cols: np.ndarray, vals: np.ndarray, b: np.ndarray
                 ) -> np.ndarray:
    """U^-1 B by back substitution over U's rows (``row_form``), last to first:
    x_i = (b_i - sum_{j>i} U_ij x_j) / U_ii, gathering within one right-hand side."""
    n, m = b.shape
    out = np.empty((m, n))
    out[:] = b.T
    for c in numba.prange(m):
        col = out[c]
        for i in range(n - 1, -1, -1):
            first = row_ptr[i]
            acc = col[i]
            for e in range(first + 1, row_ptr[i + 1]):
                acc -= vals[e] * col[cols[e]]
            col[i] = acc / vals[first]
    return np.ascontiguousarray(out.T)
