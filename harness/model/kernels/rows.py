"""Compiled evaluation of kernel rows and small blocks, for compressed solvers.

Compressed solvers touch Sigma a row or a column of an off-diagonal block at a time
(adaptive cross approximation) and in small dense blocks (cluster-tree leaves). These
routines evaluate one row of the matrix chosen by ``mode`` from pre-scaled coordinates
(x / l) of a compiled family, named by ``FAMILY_CODES``:

* ``mode = VALUE`` (0): scale * rho(r), i.e. s2 R (no nugget);
* ``mode = SLOPE`` (1): scale * s(r), s = -r rho'(r), the isotropic derivative
  dSigma/dlog l (``harness.model.kernels.classes``);
* ``mode = COORD + k`` (2 + k): scale * s(r) * (x_k - y_k)^2 / r^2 (0 at r = 0), the
  anisotropic derivative dSigma/dlog l_k.

The family is an integer code, not a function argument: numba cannot cache functions
that take functions as arguments (each process recompiled them, 10-30 s here), and the
switch sits outside the inner loops so each family's loop stays branch-free. All
functions are serial and release the GIL, so callers spread blocks over threads; none
adds a nugget (callers add tau2 where a row index equals a column index).
"""

from __future__ import annotations

import numba

from harness.model.kernels.assembly import (
    FAMILY_CODES,
    _exponential_slope,
    _gaussian_slope,
    _matern32_slope,
    _matern52_slope,
    _rational_quadratic_slope,
    apply_rho,
)

VALUE = 0
SLOPE = 1
COORD = 2


_FAST = {"cache": True, "fastmath": True, "nogil": True}


@numba.njit(inline="always", **_FAST)
def _slope(family, q, shape):
    if family == 0:
        return _exponential_slope(q, shape)
    if family == 1:
        return _matern32_slope(q, shape)
    if family == 2:
        return _matern52_slope(q, shape)
    if family == 3:
        return _gaussian_slope(q, shape)
    return _rational_quadratic_slope(q, shape)


@numba.njit(**_FAST)
def eval_row(family, x, ys, shape, scale, mode, out, j0, j1):
    """out[j] = entry(x, ys_j) for j0 <= j < j1 (the matrix selected by ``mode``)."""
    d = x.shape[0]
    for j in range(j0, j1):
        q = 0.0
        for k in range(d):
            t = x[k] - ys[j, k]
            q += t * t
        out[j] = q
    if mode == VALUE:
        apply_rho(family, shape, scale, out, j0, j1)
    elif mode == SLOPE:
        for j in range(j0, j1):
            out[j] = scale * _slope(family, out[j], shape)[1]
    else:
        c = mode - COORD
        for j in range(j0, j1):
            q = out[j]
            if q > 0.0:
                t = x[c] - ys[j, c]
                out[j] = scale * _slope(family, q, shape)[1] * (t * t) / q
            else:
                out[j] = 0.0


@numba.njit(**_FAST)
def fill_block(family, xs, ys, shape, scale, mode, out):
    """out[i, j] = entry(xs_i, ys_j) for all i, j (C-ordered ``out``)."""
    n = ys.shape[0]
    for i in range(xs.shape[0]):
        eval_row(family, xs[i], ys, shape, scale, mode, out[i], 0, n)


def mode_for(kernel_isotropic: bool, which: int | None) -> int:
    """The ``mode`` for the value (``which=None``) or the derivative in length scale k."""
    if which is None:
        return VALUE
    return SLOPE if kernel_isotropic else COORD + int(which)


def family_code(family: str) -> int:
    """Integer code of a compiled family (``FAMILY_CODES``)."""
    if family not in FAMILY_CODES:
        raise KeyError(f"family {family!r} has no compiled row routine; compiled families: "
                       f"{sorted(FAMILY_CODES)}")
    return FAMILY_CODES[family]
