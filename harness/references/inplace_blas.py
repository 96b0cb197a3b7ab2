"""BLAS and LAPACK calls on sub-blocks of one Fortran-ordered array, without copies.

``scipy.linalg.blas`` and ``scipy.linalg.lapack`` take whole contiguous arrays, so a
sub-block ``a[i0:i1, j0:j1]`` of a large matrix is copied in and out of every call. The
routines here call the same Fortran entry points through the function pointers SciPy
exports in ``scipy.linalg.cython_blas`` / ``cython_lapack`` (LP64: 32-bit integers),
passing the address of the block's first entry and the parent's leading dimension, as
LAPACK's own blocked routines do (Anderson et al., *LAPACK Users' Guide*, 3rd ed., 1999,
section 5.1.3 "leading dimension"). The calls go through ``ctypes.CFUNCTYPE``, which
releases the GIL.

Every function checks that the array is float64, Fortran-ordered and 2-D and that the
block lies inside it; blocks are given by their row and column ranges.
"""

from __future__ import annotations

import ctypes
from collections.abc import Callable

import numpy as np
from scipy.linalg import cython_blas, cython_lapack

_INT_MAX = 2**31 - 1

_get_name = ctypes.pythonapi.PyCapsule_GetName
_get_name.restype = ctypes.c_char_p
_get_name.argtypes = [ctypes.py_object]
_get_pointer = ctypes.pythonapi.PyCapsule_GetPointer
_get_pointer.restype = ctypes.c_void_p
_get_pointer.argtypes = [ctypes.py_object, ctypes.c_char_p]

_P = ctypes.c_void_p  # every Fortran argument is passed by reference


def _routine(module: object, name: str, n_args: int) -> Callable[..., None]:
    capsule = module.__pyx_capi__[name]  # type: ignore[attr-defined]
    address = _get_pointer(capsule, _get_name(capsule))
    return ctypes.CFUNCTYPE(None, *([_P] * n_args))(address)


_DSYRK = _routine(cython_blas, "dsyrk", 10)
_DTRSM = _routine(cython_blas, "dtrsm", 11)
_DPOTRF = _routine(cython_lapack, "dpotrf", 5)


def _char(c: str) -> ctypes.c_char:
    return ctypes.c_char(c.encode())


def _int(i: int) -> ctypes.c_int:
    if not 0 <= i <= _INT_MAX:
        raise ValueError(f"dimension {i} does not fit a 32-bit BLAS integer")
    return ctypes.c_int(i)


def _check(a: np.ndarray) -> None:
    if a.dtype != np.float64 or a.ndim != 2 or not a.flags.f_contiguous:
        raise ValueError("expected a 2-D float64 array in Fortran order, got "
                         f"{a.dtype}, ndim {a.ndim}, f_contiguous={a.flags.f_contiguous}")
    if not a.flags.writeable:
        raise ValueError("the array must be writeable")
    if a.shape[0] > _INT_MAX:
        raise ValueError("leading dimension does not fit a 32-bit BLAS integer")


def _address(a: np.ndarray, rows: tuple[int, int], cols: tuple[int, int]) -> int:
    (r0, r1), (c0, c1) = rows, cols
    if not (0 <= r0 <= r1 <= a.shape[0] and 0 <= c0 <= c1 <= a.shape[1]):
        raise ValueError(f"block rows {rows} cols {cols} outside an array of shape {a.shape}")
    return a.ctypes.data + 8 * (r0 + c0 * a.shape[0])


def _ref(value: ctypes._SimpleCData) -> ctypes._CArgObject:
    return ctypes.byref(value)


def potrf_lower(a: np.ndarray, rows: tuple[int, int]) -> int:
    """Lower Cholesky factor of the diagonal block a[rows, rows], in place (LAPACK dpotrf).

    Returns LAPACK's ``info``: 0, or the 1-based column of the block where it is not
    positive definite. The strict upper triangle of the block is not referenced.
    """
    _check(a)
    m = rows[1] - rows[0]
    info = ctypes.c_int(0)
    lda = _int(a.shape[0])
    _DPOTRF(_ref(_char("L")), _ref(_int(m)), _P(_address(a, rows, rows)), _ref(lda),
            _ref(info))
    return int(info.value)


def trsm_right_lower_transpose(a: np.ndarray, diag: tuple[int, int],
                               rows: tuple[int, int]) -> None:
    """a[rows, diag] <- a[rows, diag] L^-T with L = lower(a[diag, diag]) (BLAS dtrsm)."""
    _check(a)
    m, k = rows[1] - rows[0], diag[1] - diag[0]
    lda = _int(a.shape[0])
    one = ctypes.c_double(1.0)
    _DTRSM(_ref(_char("R")), _ref(_char("L")), _ref(_char("T")), _ref(_char("N")),
           _ref(_int(m)), _ref(_int(k)), _ref(one), _P(_address(a, diag, diag)), _ref(lda),
           _P(_address(a, rows, diag)), _ref(lda))


def syrk_lower_update(a: np.ndarray, target: tuple[int, int],
                      cols: tuple[int, int]) -> None:
    """lower(a[target, target]) -= a[target, cols] a[target, cols]' (BLAS dsyrk)."""
    _check(a)
    m, k = target[1] - target[0], cols[1] - cols[0]
    lda = _int(a.shape[0])
    minus, one = ctypes.c_double(-1.0), ctypes.c_double(1.0)
    _DSYRK(_ref(_char("L")), _ref(_char("N")), _ref(_int(m)), _ref(_int(k)), _ref(minus),
           _P(_address(a, target, cols)), _ref(lda), _ref(one),
           _P(_address(a, target, target)), _ref(lda))
