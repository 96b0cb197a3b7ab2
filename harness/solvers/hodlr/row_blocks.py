"""Matrix products on row blocks of the factorization's C-ordered basis array, in place.

The symmetric factorization updates, at every node, the ancestor columns X (m x c) of
its rows by X <- X - U C with U (m x r) columns of the same rows. Through NumPy each
such update allocates U' X and U C and copies the result back. Here the row block is
handed to BLAS dgemm where it lies: a C-ordered array read as Fortran-ordered is its
transpose, so a row block ``a[i0:i1, j0:j1]`` is the Fortran block ``a'[j0:j1, i0:i1]``
with leading dimension ``a.shape[1]`` (Anderson et al., *LAPACK Users' Guide*, 3rd ed.,
1999, sec. 5.1.3), and

    U' X = (X' U)'          is dgemm("N", "T") on the transposed blocks,
    X - U C = (X' - C' U')' is dgemm("N", "N") with beta = 1, written into X.

The entry point is SciPy's exported Fortran dgemm (``scipy.linalg.cython_blas``, LP64)
called through ``ctypes``, which releases the GIL, so the nodes of a level run on worker
threads at once.
"""

from __future__ import annotations

import ctypes
from collections.abc import Callable

import numpy as np
from scipy.linalg import cython_blas


def _exported_dgemm() -> Callable[..., None]:
    """SciPy's Fortran dgemm as a ctypes function (13 arguments, all by reference).

    The solver keeps its own lookup rather than the dense reference's
    (``harness.references.inplace_blas``): the two are audited against each other.
    """
    capsule = cython_blas.__pyx_capi__["dgemm"]
    api = ctypes.pythonapi
    api.PyCapsule_GetName.restype = ctypes.c_char_p
    api.PyCapsule_GetName.argtypes = [ctypes.py_object]
    api.PyCapsule_GetPointer.restype = ctypes.c_void_p
    api.PyCapsule_GetPointer.argtypes = [ctypes.py_object, ctypes.c_char_p]
    address = api.PyCapsule_GetPointer(capsule, api.PyCapsule_GetName(capsule))
    return ctypes.CFUNCTYPE(None, *([ctypes.c_void_p] * 13))(address)


_DGEMM = _exported_dgemm()
_LARGEST_INT = 2**31 - 1


def _dgemm(trans_b: bytes, m: int, n: int, k: int, alpha: float, a: int, lda: int, b: int,
           ldb: int, beta: float, c: int, ldc: int) -> None:
    """C <- alpha A op(B) + beta C on raw Fortran blocks (A not transposed)."""
    for size in (m, n, k, lda, ldb, ldc):
        if not 0 <= size <= _LARGEST_INT:
            raise ValueError(f"dimension {size} does not fit a 32-bit BLAS integer")
    if m == 0 or n == 0:
        return
    ref = ctypes.byref
    _DGEMM(ref(ctypes.c_char(b"N")), ref(ctypes.c_char(trans_b)), ref(ctypes.c_int(m)),
           ref(ctypes.c_int(n)), ref(ctypes.c_int(k)), ref(ctypes.c_double(alpha)),
           ctypes.c_void_p(a), ref(ctypes.c_int(lda)), ctypes.c_void_p(b),
           ref(ctypes.c_int(ldb)), ref(ctypes.c_double(beta)), ctypes.c_void_p(c),
           ref(ctypes.c_int(ldc)))


def _check_basis(a: np.ndarray, rows: slice, *column_ranges: slice) -> None:
    if a.dtype != np.float64 or a.ndim != 2 or not a.flags.c_contiguous:
        raise ValueError("expected a C-ordered 2-D float64 array, got "
                         f"{a.dtype}, ndim {a.ndim}, c_contiguous={a.flags.c_contiguous}")
    for s in (rows, *column_ranges):
        limit = a.shape[0] if s is rows else a.shape[1]
        if s.step not in (None, 1) or not 0 <= s.start <= s.stop <= limit:
            raise ValueError(f"range {s} is not a block of an array of shape {a.shape}")


def _address(a: np.ndarray, row: int, col: int) -> int:
    return int(a.ctypes.data) + 8 * (row * a.shape[1] + col)


def cross_product(a: np.ndarray, rows: slice, left: slice, right: slice) -> np.ndarray:
    """a[rows, left]' a[rows, right] (shape: left width x right width, C order)."""
    _check_basis(a, rows, left, right)
    m = rows.stop - rows.start
    r, c = left.stop - left.start, right.stop - right.start
    out = np.empty((r, c))  # C order (r x c) = Fortran order (c x r)
    if m == 0:
        out[...] = 0.0
        return out
    _dgemm(b"T", c, r, m, 1.0, _address(a, rows.start, right.start), a.shape[1],
           _address(a, rows.start, left.start), a.shape[1], 0.0, int(out.ctypes.data), c)
    return out


def subtract_product(a: np.ndarray, rows: slice, target: slice, basis: slice,
                     coefficients: np.ndarray) -> None:
    """a[rows, target] -= a[rows, basis] @ coefficients, in place (no temporaries).

    ``coefficients`` is (basis width x target width); it is copied to C order if needed.
    """
    _check_basis(a, rows, target, basis)
    m = rows.stop - rows.start
    r, c = basis.stop - basis.start, target.stop - target.start
    coef = np.ascontiguousarray(coefficients, dtype=np.float64)
    if coef.shape != (r, c):
        raise ValueError(f"coefficients have shape {coef.shape}, expected {(r, c)}")
    if (max(basis.start, target.start) < min(basis.stop, target.stop)) and m:
        raise ValueError(f"the target columns {target} overlap the basis columns {basis}")
    _dgemm(b"N", c, m, r, -1.0, int(coef.ctypes.data), c,
           _address(a, rows.start, basis.start), a.shape[1], 1.0,
           _address(a, rows.start, target.start), a.shape[1])
