"""Compiled evaluation of single kernel entries, rows and small blocks.

Compressed solvers touch Sigma entry by entry (a row or a column of an off-diagonal
block at a time, in adaptive cross approximation) and in small dense blocks (the
leaves of a cluster tree). These routines evaluate the entries of one matrix chosen by
``mode`` from the pre-scaled coordinates (x / l) of a compiled family
(``harness.kernels.assembly.FAMILY_FUNCTIONS``, second element ``rho_slope``):

* ``mode = VALUE`` (0): scale * rho(r), i.e. s2 R (no nugget);
* ``mode = SLOPE`` (1): scale * s(r), s = -r rho'(r), the isotropic derivative
  dSigma/dlog l (``harness.kernels.base``);
* ``mode = COORD + k`` (2 + k): scale * s(r) * (x_k - y_k)^2 / r^2 (0 at r = 0), the
  anisotropic derivative dSigma/dlog l_k.

The serial functions release the GIL so callers can spread many small blocks over
threads; none adds a nugget (callers add tau2 where a row index equals a column index).
"""

from __future__ import annotations

import numba
import numpy as np

VALUE = 0
SLOPE = 1
COORD = 2

_FAST = {"cache": True, "fastmath": True, "nogil": True}


@numba.njit(inline="always", **_FAST)
def entry(rho_slope, x: np.ndarray, y: np.ndarray, shape: float, scale: float,
          mode: int) -> float:
    """One entry of the matrix selected by ``mode`` for scaled points x, y (see module)."""
    q = 0.0
    for k in range(x.shape[0]):
        t = x[k] - y[k]
        q += t * t
    rho, s = rho_slope(q, shape)
    if mode == VALUE:
        return scale * rho
    if mode == SLOPE:
        return scale * s
    if q <= 0.0:
        return 0.0
    t = x[mode - COORD] - y[mode - COORD]
    return scale * s * (t * t) / q


@numba.njit(**_FAST)
def fill_block(rho_slope, xs: np.ndarray, ys: np.ndarray, shape: float, scale: float,
               mode: int, out: np.ndarray) -> None:
    """out[i, j] = entry(xs_i, ys_j) for all i, j (serial, GIL released)."""
    for i in range(xs.shape[0]):
        for j in range(ys.shape[0]):
            out[i, j] = entry(rho_slope, xs[i], ys[j], shape, scale, mode)


@numba.njit(**_FAST)
def fill_row(rho_slope, x: np.ndarray, ys: np.ndarray, shape: float, scale: float,
             mode: int, out: np.ndarray) -> None:
    """out[j] = entry(x, ys_j): one row of a block (serial, GIL released)."""
    for j in range(ys.shape[0]):
        out[j] = entry(rho_slope, x, ys[j], shape, scale, mode)


def mode_for(kernel_isotropic: bool, which: int | None) -> int:
    """The ``mode`` for the value (``which=None``) or the derivative in length scale k."""
    if which is None:
        return VALUE
    return SLOPE if kernel_isotropic else COORD + int(which)
