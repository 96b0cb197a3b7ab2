"""BLAS and LAPACK calls on tiles of Fortran-ordered arrays, in place, without copies.

``scipy.linalg.blas`` and ``scipy.linalg.lapack`` take whole contiguous arrays, so a tile
``a[i0:i1, j0:j1]`` of a large matrix would be copied in and out of every call. The
routines here call the same Fortran entry points through the function pointers SciPy
exports in ``scipy.linalg.cython_blas`` / ``cython_lapack`` (LP64: 32-bit integers),
passing the address of the tile's first entry and the parent's leading dimension, as
LAPACK's own blocked routines do (Anderson et al., *LAPACK Users' Guide*, 3rd ed., 1999,
section 5.1.3 "leading dimension"). The calls go through ``ctypes.CFUNCTYPE``, which
releases the GIL.

A tile is a ``Tile(array, rows, cols)``: a Fortran-ordered, writeable 2-D float64 array
and two half-open index ranges inside it. Every call checks its tiles and the sizes the
routine needs, and refuses an operand of more than ``MAX_OPERAND_ELEMENTS`` entries
(``harness.linalg.tile_bounds``): the tiled algorithms of this package never hand the
BLAS a call of the shape that crashes it. ``record_calls()`` collects the name and the
operand shapes of every call made inside it (the tests use it to prove the bound).
"""

from __future__ import annotations

import contextlib
import ctypes
from collections.abc import Callable, Iterator
from contextvars import ContextVar
from dataclasses import dataclass

import numpy as np
from scipy.linalg import cython_blas, cython_lapack

from harness.linalg.tile_bounds import MAX_OPERAND_ELEMENTS

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


_DGEMM = _routine(cython_blas, "dgemm", 13)
_DSYRK = _routine(cython_blas, "dsyrk", 10)
_DSYMM = _routine(cython_blas, "dsymm", 12)
_DTRSM = _routine(cython_blas, "dtrsm", 11)
_DTRMM = _routine(cython_blas, "dtrmm", 11)
_DPOTRF = _routine(cython_lapack, "dpotrf", 5)
_DTRTRI = _routine(cython_lapack, "dtrtri", 6)
_DLAUUM = _routine(cython_lapack, "dlauum", 5)


@dataclass(frozen=True)
class BlasCall:
    """One recorded call: the routine and the (rows, columns) of each operand."""

    routine: str
    shapes: tuple[tuple[int, int], ...]

    @property
    def largest_operand(self) -> int:
        """Entries of the largest operand."""
        return max(r * c for r, c in self.shapes)


_RECORDER: ContextVar[list[BlasCall] | None] = ContextVar("covaudit_blas_calls", default=None)


@contextlib.contextmanager
def record_calls() -> Iterator[list[BlasCall]]:
    """Collect every call of this module made inside the ``with`` block (this context)."""
    calls: list[BlasCall] = []
    token = _RECORDER.set(calls)
    try:
        yield calls
    finally:
        _RECORDER.reset(token)


class OversizedCallError(ValueError):
    """A call would hand the BLAS an operand above ``MAX_OPERAND_ELEMENTS`` entries."""


@dataclass(frozen=True)
class Tile:
    """The block ``array[rows[0]:rows[1], cols[0]:cols[1]]`` of a Fortran-ordered array."""

    array: np.ndarray
    rows: tuple[int, int]
    cols: tuple[int, int]

    def __post_init__(self) -> None:
        a = self.array
        if a.dtype != np.float64 or a.ndim != 2 or not a.flags.f_contiguous:
            raise ValueError("expected a 2-D float64 array in Fortran order, got "
                             f"{a.dtype}, ndim {a.ndim}, f_contiguous={a.flags.f_contiguous}")
        if not a.flags.writeable:
            raise ValueError("the array must be writeable")
        if a.shape[0] > _INT_MAX:
            raise ValueError("leading dimension does not fit a 32-bit BLAS integer")
        (r0, r1), (c0, c1) = self.rows, self.cols
        if not (0 <= r0 <= r1 <= a.shape[0] and 0 <= c0 <= c1 <= a.shape[1]):
            raise ValueError(f"tile rows {self.rows} cols {self.cols} outside an array of "
                             f"shape {a.shape}")

    @property
    def shape(self) -> tuple[int, int]:
        return self.rows[1] - self.rows[0], self.cols[1] - self.cols[0]

    def pointer(self) -> _P:
        return _P(self.array.ctypes.data + 8 * (self.rows[0] + self.cols[0] * self.array.shape[0]))

    def lead(self) -> ctypes._CArgObject:
        return _ref(_int(max(1, self.array.shape[0])))


def _char(c: str) -> ctypes._CArgObject:
    return ctypes.byref(ctypes.c_char(c.encode()))


def _int(i: int) -> ctypes.c_int:
    if not 0 <= i <= _INT_MAX:
        raise ValueError(f"dimension {i} does not fit a 32-bit BLAS integer")
    return ctypes.c_int(i)


def _ref(value: ctypes._SimpleCData) -> ctypes._CArgObject:
    return ctypes.byref(value)


def _double(x: float) -> ctypes._CArgObject:
    return ctypes.byref(ctypes.c_double(float(x)))


def _admit(routine: str, *tiles: Tile) -> None:
    shapes = tuple(t.shape for t in tiles)
    for rows, cols in shapes:
        if rows * cols > MAX_OPERAND_ELEMENTS:
            raise OversizedCallError(
                f"{routine} on a {rows} x {cols} operand ({rows * cols:,} entries) exceeds "
                f"the bound of {MAX_OPERAND_ELEMENTS:,} entries per BLAS operand "
                "(harness.linalg.tile_bounds)")
    calls = _RECORDER.get()
    if calls is not None:
        calls.append(BlasCall(routine, shapes))


def _need(condition: bool, routine: str, what: str) -> None:
    if not condition:
        raise ValueError(f"{routine}: {what}")


def _square_lapack(routine: str, call: Callable[..., None], a: Tile,
                   *flags: str) -> int:
    """One LAPACK call on the lower triangle of the square tile ``a``; LAPACK's ``info``."""
    m, k = a.shape
    _need(m == k, routine, f"tile must be square, got {a.shape}")
    _admit(routine, a)
    info = ctypes.c_int(0)
    call(_char("L"), *(_char(f) for f in flags), _ref(_int(m)), a.pointer(), a.lead(),
         _ref(info))
    return int(info.value)


def potrf_lower(a: Tile) -> int:
    """Lower Cholesky factor of the square tile ``a``, in place (LAPACK dpotrf).

    Returns LAPACK's ``info``: 0, or the 1-based column of the tile where it is not
    positive definite. The strict upper triangle of the tile is not referenced.
    """
    return _square_lapack("dpotrf", _DPOTRF, a)


def trtri_lower(a: Tile) -> int:
    """Inverse of the lower triangle of the square tile ``a``, in place (LAPACK dtrtri)."""
    return _square_lapack("dtrtri", _DTRTRI, a, "N")


def lauum_lower(a: Tile) -> int:
    """lower(a) <- L' L with L = lower(a), in place (LAPACK dlauum)."""
    return _square_lapack("dlauum", _DLAUUM, a)


def gemm(c: Tile, a: Tile, b: Tile, *, alpha: float = 1.0, beta: float = 1.0,
         trans_a: bool = False, trans_b: bool = False) -> None:
    """c <- alpha op(a) op(b) + beta c (BLAS dgemm)."""
    m, n = c.shape
    am, ak = a.shape[::-1] if trans_a else a.shape
    bk, bn = b.shape[::-1] if trans_b else b.shape
    _need(am == m and bn == n and ak == bk, "dgemm",
          f"shapes do not conform: c {c.shape}, op(a) {(am, ak)}, op(b) {(bk, bn)}")
    _admit("dgemm", c, a, b)
    if m == 0 or n == 0:
        return
    _DGEMM(_char("T" if trans_a else "N"), _char("T" if trans_b else "N"), _ref(_int(m)),
           _ref(_int(n)), _ref(_int(ak)), _double(alpha), a.pointer(), a.lead(), b.pointer(),
           b.lead(), _double(beta), c.pointer(), c.lead())


def syrk_lower(c: Tile, a: Tile, *, alpha: float = -1.0, beta: float = 1.0,
               trans: bool = False) -> None:
    """lower(c) <- alpha a a' + beta lower(c), or alpha a' a + beta c with ``trans`` (dsyrk)."""
    n, k = a.shape[::-1] if trans else a.shape
    _need(c.shape == (n, n), "dsyrk", f"c {c.shape} does not match op(a) {(n, k)}")
    _admit("dsyrk", c, a)
    if n == 0:
        return
    _DSYRK(_char("L"), _char("T" if trans else "N"), _ref(_int(n)), _ref(_int(k)),
           _double(alpha), a.pointer(), a.lead(), _double(beta), c.pointer(), c.lead())


def symm_lower_left(c: Tile, a: Tile, b: Tile, *, alpha: float = 1.0,
                    beta: float = 1.0) -> None:
    """c <- alpha A b + beta c, A symmetric stored in the lower triangle of ``a`` (dsymm)."""
    m, n = c.shape
    _need(a.shape == (m, m) and b.shape == (m, n), "dsymm",
          f"shapes do not conform: c {c.shape}, a {a.shape}, b {b.shape}")
    _admit("dsymm", c, a, b)
    if m == 0 or n == 0:
        return
    _DSYMM(_char("L"), _char("L"), _ref(_int(m)), _ref(_int(n)), _double(alpha), a.pointer(),
           a.lead(), b.pointer(), b.lead(), _double(beta), c.pointer(), c.lead())


def trsm_lower(b: Tile, a: Tile, *, side: str, trans: bool, alpha: float = 1.0) -> None:
    """b <- alpha op(L)^-1 b (``side="left"``) or alpha b op(L)^-1 (``"right"``); L = lower(a)."""
    _triangular("dtrsm", _DTRSM, b, a, side=side, trans=trans, alpha=alpha)


def trmm_lower(b: Tile, a: Tile, *, side: str, trans: bool, alpha: float = 1.0) -> None:
    """b <- alpha op(L) b (``side="left"``) or alpha b op(L) (``"right"``); L = lower(a)."""
    _triangular("dtrmm", _DTRMM, b, a, side=side, trans=trans, alpha=alpha)


def _triangular(routine: str, call: Callable[..., None], b: Tile, a: Tile, *, side: str,
                trans: bool, alpha: float) -> None:
    if side not in ("left", "right"):
        raise ValueError(f"{routine}: side must be 'left' or 'right', got {side!r}")
    m, n = b.shape
    order = m if side == "left" else n
    _need(a.shape == (order, order), routine,
          f"triangle {a.shape} does not match b {b.shape} on the {side}")
    _admit(routine, b, a)
    if m == 0 or n == 0:
        return
    call(_char("L" if side == "left" else "R"), _char("L"), _char("T" if trans else "N"),
         _char("N"), _ref(_int(m)), _ref(_int(n)), _double(alpha), a.pointer(), a.lead(),
         b.pointer(), b.lead())
