"""Compiled assembly of covariance blocks and their log-scale derivatives.

The dense reference spends its time in two places: filling Sigma and factoring it. A
naive ``cdist`` + ``exp`` fill of a 2D Matern matrix costs more than its Cholesky
factorization, so the closed-form families are filled here by a fused numba loop: one
pass over the entries computes the scaled squared distance coordinate by coordinate
(no cancellation, unlike the ||x||^2 + ||y||^2 - 2 x.y matrix-product form), the
correlation and, when asked, the derivative factors. Columns are spread over threads
with ``prange``; a lower-triangle fill in Fortran order feeds LAPACK's ``dpotrf``
without a transpose or a second n x n copy.

The closed form of each family is a compiled scalar function handed to the loops
(``FAMILY_FUNCTIONS``); the general Matern family, which needs scipy's Bessel
function, goes through the numpy path in ``harness.model.kernels.classes``.
"""

from __future__ import annotations

import math

import numba
import numpy as np

_SQRT3 = math.sqrt(3.0)
_SQRT5 = math.sqrt(5.0)
_JIT = {"cache": True, "fastmath": True, "inline": "always"}


# Scalar closed forms of the squared scaled distance q = r^2: ``rho(q, shape)`` and
# ``rho_slope(q, shape) -> (rho, s)`` with s = -r rho'(r) (see ``harness.model.kernels.radial``).
# Each family gets its own pair so the fill loops below compile to branch-free code;
# a single loop switching on a family code ran 7x slower (measured at n = 8,000).

@numba.njit(**_JIT)
def _exponential(q, shape):
    return math.exp(-math.sqrt(q))


@numba.njit(**_JIT)
def _exponential_slope(q, shape):
    r = math.sqrt(q)
    e = math.exp(-r)
    return e, r * e


@numba.njit(**_JIT)
def _matern32(q, shape):
    a = _SQRT3 * math.sqrt(q)
    return (1.0 + a) * math.exp(-a)


@numba.njit(**_JIT)
def _matern32_slope(q, shape):
    a = _SQRT3 * math.sqrt(q)
    e = math.exp(-a)
    return (1.0 + a) * e, a * a * e


@numba.njit(**_JIT)
def _matern52(q, shape):
    a = _SQRT5 * math.sqrt(q)
    return (1.0 + a + a * a / 3.0) * math.exp(-a)


@numba.njit(**_JIT)
def _matern52_slope(q, shape):
    a = _SQRT5 * math.sqrt(q)
    e = math.exp(-a)
    return (1.0 + a + a * a / 3.0) * e, a * a * (1.0 + a) * e / 3.0


@numba.njit(**_JIT)
def _gaussian(q, shape):
    return math.exp(-0.5 * q)


@numba.njit(**_JIT)
def _gaussian_slope(q, shape):
    e = math.exp(-0.5 * q)
    return e, q * e


@numba.njit(**_JIT)
def _rational_quadratic(q, shape):
    return (1.0 + q / (2.0 * shape)) ** (-shape)


@numba.njit(**_JIT)
def _rational_quadratic_slope(q, shape):
    base = 1.0 + q / (2.0 * shape)
    rho = base ** (-shape)
    return rho, q * rho / base


#: family name -> (rho, rho_slope) compiled scalar functions
FAMILY_FUNCTIONS = {
    "exponential": (_exponential, _exponential_slope),
    "matern32": (_matern32, _matern32_slope),
    "matern52": (_matern52, _matern52_slope),
    "gaussian": (_gaussian, _gaussian_slope),
    "rational_quadratic": (_rational_quadratic, _rational_quadratic_slope),
}


@numba.njit(parallel=True, fastmath=True)
def fill_correlation(rho, xs: np.ndarray, ys: np.ndarray, shape: float,
                     scale: float, out: np.ndarray) -> None:
    """out[i, j] = scale * rho(||xs_i - ys_j||) for pre-scaled coordinates (x / l).

    ``out`` may be C- or Fortran-ordered; the loop runs over columns in parallel.
    """
    m, d = xs.shape
    n = ys.shape[0]
    for j in numba.prange(n):
        for i in range(m):
            q = 0.0
            for k in range(d):
                t = xs[i, k] - ys[j, k]
                q += t * t
            out[i, j] = scale * rho(q, shape)


@numba.njit(parallel=True, fastmath=True)
def fill_lower_symmetric(rho, xs: np.ndarray, shape: float, scale: float, nugget: float,
                         out: np.ndarray) -> None:
    """Lower triangle (i >= j) of scale * R + nugget * I, in place.

    Entries above the diagonal are left untouched, which is what ``dpotrf`` with
    ``lower=True`` reads. Use a Fortran-ordered ``out`` so each column is contiguous.
    Column j is paired with column n-1-j so both threads get equal work.
    """
    n, d = xs.shape
    half = (n + 1) // 2
    for p in numba.prange(half):
        first = np.int64(p)
        for side in range(2):
            j = first if side == 0 else n - 1 - first
            if side == 1 and j == first:
                continue
            for i in range(j, n):
                q = 0.0
                for k in range(d):
                    t = xs[i, k] - xs[j, k]
                    q += t * t
                out[i, j] = scale * rho(q, shape)
            out[j, j] += nugget


@numba.njit(parallel=True, fastmath=True)
def fill_with_derivatives(rho_slope, xs: np.ndarray, ys: np.ndarray, shape: float,
                          scale: float, isotropic: bool, out: np.ndarray,
                          derivs: np.ndarray) -> None:
    """Covariance and its log-length-scale derivatives in one pass.

    out[i, j] = scale * rho; derivs[k, i, j] = scale * s(r) * w_k, where w = 1 for an
    isotropic kernel and w_k = (xs_ik - ys_jk)^2 / r^2 otherwise (0 at r = 0).
    """
    m, d = xs.shape
    n = ys.shape[0]
    for j in numba.prange(n):
        for i in range(m):
            q = 0.0
            for k in range(d):
                t = xs[i, k] - ys[j, k]
                q += t * t
            value, s = rho_slope(q, shape)
            out[i, j] = scale * value
            if isotropic:
                derivs[0, i, j] = scale * s
            elif q > 0.0:
                for k in range(d):
                    t = xs[i, k] - ys[j, k]
                    derivs[k, i, j] = scale * s * (t * t) / q
            else:
                for k in range(d):
                    derivs[k, i, j] = 0.0
