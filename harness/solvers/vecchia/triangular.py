"""Products and triangular solves with the sparse upper triangular factor U.

U is stored by columns: column k has rows ``rows[ptr[k]:ptr[k + 1]]`` ascending, the
last being k itself (the diagonal). Every routine costs O(nnz) per right-hand side;
blocks of right-hand sides run their columns in parallel (products U'B by rows of the
result), never forming U U' or its inverse.
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
    out = np.zeros((n, m))
    for c in numba.prange(m):
        for k in range(n):
            x = b[k, c]
            if x != 0.0:
                for e in range(ptr[k], ptr[k + 1]):
                    out[rows[e], c] += vals[e] * x
    return out


@numba.njit(parallel=True, cache=True)
def u_solve(ptr: np.ndarray, rows: np.ndarray, vals: np.ndarray, b: np.ndarray) -> np.ndarray:
    """U^-1 B by back substitution over the columns of U, last to first."""
    n, m = b.shape
    out = b.copy()
    for c in numba.prange(m):
        for k in range(n - 1, -1, -1):
            last = ptr[k + 1] - 1
            x = out[k, c] / vals[last]
            out[k, c] = x
            for e in range(ptr[k], last):
                out[rows[e], c] -= vals[e] * x
    return out


@numba.njit(parallel=True, cache=True)
def ut_solve(ptr: np.ndarray, rows: np.ndarray, vals: np.ndarray, b: np.ndarray
             ) -> np.ndarray:
    """U'^-1 B by forward substitution: x_k = (b_k - sum_{j<k} U_jk x_j) / U_kk."""
    n, m = b.shape
    out = b.copy()
    for c in numba.prange(m):
        for k in range(n):
            last = ptr[k + 1] - 1
            acc = out[k, c]
            for e in range(ptr[k], last):
                acc -= vals[e] * out[rows[e], c]
            out[k, c] = acc / vals[last]
    return out
