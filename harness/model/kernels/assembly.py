"""Compiled assembly of covariance blocks and their log-scale derivatives.

The dense reference spends its time in two places: filling Sigma and factoring it. A
naive ``cdist`` + ``exp`` fill of a 2D Matern matrix costs more than its Cholesky
factorization, so the closed-form families are filled here by a fused numba loop: one
pass over the entries computes the scaled squared distance coordinate by coordinate
(no cancellation, unlike the ||x||^2 + ||y||^2 - 2 x.y matrix-product form), the
correlation and, when asked, the derivative factors. Columns are spread over threads
(``_over_threads``); a lower-triangle fill in Fortran order feeds LAPACK's ``dpotrf``
without a transpose or a second n x n copy.

The closed form of each family is a compiled scalar function handed to the loops
(``FAMILY_FUNCTIONS``); the general Matern family, which needs scipy's Bessel
function, goes through the numpy path in ``harness.model.kernels.classes``.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numba
import numpy as np

from harness.infra.thread_ranges import over_threads, thread_count

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


#: compiled family name -> integer code (numba caches functions of plain arguments only)
FAMILY_CODES = {"exponential": 0, "matern32": 1, "matern52": 2, "gaussian": 3,
                "rational_quadratic": 4}
_CODE_OF = {fn: FAMILY_CODES[name] for name, pair in FAMILY_FUNCTIONS.items() for fn in pair}
#: The fills are serial and release the GIL; ``_over_threads`` spreads their columns over
#: threads. A ``parallel=True`` (prange) fill compiled 1-2 s slower on a fresh install, and
#: the fork server cannot preload parallel kernels (``harness.infra.kernel_cache``).
_SERIAL = {"cache": True, "fastmath": True, "nogil": True}


@numba.njit(cache=True, fastmath=True, nogil=True)
def apply_rho(family, shape, scale, buf, j0, j1):
    """buf[j] <- scale * rho(buf[j]) for j0 <= j < j1 (buf holds squared scaled distances).

    One branch on the family code outside each loop, so every family's loop is
    branch-free (a switch inside the inner loop ran 7x slower, measured at n = 8,000).
    """
    if family == 0:
        for j in range(j0, j1):
            buf[j] = scale * _exponential(buf[j], shape)
    elif family == 1:
        for j in range(j0, j1):
            buf[j] = scale * _matern32(buf[j], shape)
    elif family == 2:
        for j in range(j0, j1):
            buf[j] = scale * _matern52(buf[j], shape)
    elif family == 3:
        for j in range(j0, j1):
            buf[j] = scale * _gaussian(buf[j], shape)
    else:
        for j in range(j0, j1):
            buf[j] = scale * _rational_quadratic(buf[j], shape)


@numba.njit(cache=True, fastmath=True, nogil=True)
def _apply_rho_slope(family, shape, q, values, slopes):
    """values[i], slopes[i] <- rho(q_i), s(q_i), one family branch outside the loop."""
    m = q.shape[0]
    if family == 0:
        for i in range(m):
            values[i], slopes[i] = _exponential_slope(q[i], shape)
    elif family == 1:
        for i in range(m):
            values[i], slopes[i] = _matern32_slope(q[i], shape)
    elif family == 2:
        for i in range(m):
            values[i], slopes[i] = _matern52_slope(q[i], shape)
    elif family == 3:
        for i in range(m):
            values[i], slopes[i] = _gaussian_slope(q[i], shape)
    else:
        for i in range(m):
            values[i], slopes[i] = _rational_quadratic_slope(q[i], shape)


@numba.njit(inline="always", cache=True, fastmath=True)
def _squared_distances(xs, y, buf, i0):
    """buf[i] = ||xs_i - y||^2 for i >= i0, coordinate by coordinate (no cancellation)."""
    d = xs.shape[1]
    for i in range(i0, xs.shape[0]):
        q = 0.0
        for k in range(d):
            t = xs[i, k] - y[k]
            q += t * t
        buf[i] = q


@numba.njit(**_SERIAL)
def _fill_correlation(family, xs, ys, shape, scale, out, j0, j1):
    """Columns j0 <= j < j1 of out[i, j] = scale * rho(||xs_i - ys_j||)."""
    m = xs.shape[0]
    buf = np.empty(m)
    for j in range(j0, j1):
        _squared_distances(xs, ys[j], buf, 0)
        apply_rho(family, shape, scale, buf, 0, m)
        for i in range(m):
            out[i, j] = buf[i]


@numba.njit(**_SERIAL)
def _fill_lower_symmetric(family, xs, shape, scale, nugget, out, p0, p1):
    """Columns p and n - 1 - p of the lower triangle, for p0 <= p < p1."""
    n = xs.shape[0]
    for p in range(p0, p1):
        for side in range(2):
            j = p if side == 0 else n - 1 - p
            if side == 1 and j == p:
                continue
            col = out[:, j]
            _squared_distances(xs, xs[j], col, j)
            apply_rho(family, shape, scale, col, j, n)
            col[j] += nugget


@numba.njit(**_SERIAL)
def _fill_with_derivatives(family, xs, ys, shape, scale, isotropic, out, derivs, j0, j1):
    """Columns j0 <= j < j1 of the covariance and its derivatives (``fill_with_derivatives``)."""
    m, d = xs.shape
    q = np.empty(m)
    values = np.empty(m)
    slopes = np.empty(m)
    for j in range(j0, j1):
        _squared_distances(xs, ys[j], q, 0)
        _apply_rho_slope(family, shape, q, values, slopes)
        for i in range(m):
            out[i, j] = scale * values[i]
            s = scale * slopes[i]
            if isotropic:
                derivs[0, i, j] = s
            elif q[i] > 0.0:
                for k in range(d):
                    t = xs[i, k] - ys[j, k]
                    derivs[k, i, j] = s * (t * t) / q[i]
            else:
                for k in range(d):
                    derivs[k, i, j] = 0.0


#: Entries below which a fill runs on the calling thread alone (a thread pool's start
#: costs about as much as filling this many entries; common practice, not tuned)
_THREADED_ENTRIES = 1 << 16


def _over_threads(fill: Callable[[int, int], None], count: int, entries: int) -> None:
    """``fill(start, stop)`` over ``range(count)`` on numba's thread count
    (``harness.infra.thread_ranges``), or on the calling thread alone below
    ``_THREADED_ENTRIES`` entries."""
    threads = thread_count() if entries >= _THREADED_ENTRIES else 1
    over_threads(fill, count, threads=threads)


def fill_correlation(rho, xs: np.ndarray, ys: np.ndarray, shape: float,
                     scale: float, out: np.ndarray) -> None:
    """out[i, j] = scale * rho(||xs_i - ys_j||) for pre-scaled coordinates (x / l).

    ``rho`` is a compiled closed form of ``FAMILY_FUNCTIONS``; ``out`` may be C- or
    Fortran-ordered; columns run in parallel (cached compiled code).
    """
    code, shape, scale = _CODE_OF[rho], float(shape), float(scale)
    _over_threads(lambda j0, j1: _fill_correlation(code, xs, ys, shape, scale, out, j0, j1),
                  ys.shape[0], xs.shape[0] * ys.shape[0])


def fill_lower_symmetric(rho, xs: np.ndarray, shape: float, scale: float, nugget: float,
                         out: np.ndarray) -> None:
    """Lower triangle (i >= j) of scale * R + nugget * I, in place.

    Entries above the diagonal are left untouched, which is what ``dpotrf`` with
    ``lower=True`` reads. ``out`` must be Fortran-ordered (each column contiguous).
    Column j is paired with column n-1-j so both threads get equal work.
    """
    code, shape, scale, nugget = _CODE_OF[rho], float(shape), float(scale), float(nugget)
    n = xs.shape[0]
    _over_threads(lambda p0, p1: _fill_lower_symmetric(code, xs, shape, scale, nugget, out,
                                                       p0, p1), (n + 1) // 2, n * n // 2)


def fill_with_derivatives(rho_slope, xs: np.ndarray, ys: np.ndarray, shape: float,
                          scale: float, isotropic: bool, out: np.ndarray,
                          derivs: np.ndarray) -> None:
    """Covariance and its log-length-scale derivatives in one pass.

    out[i, j] = scale * rho; derivs[k, i, j] = scale * s(r) * w_k, where w = 1 for an
    isotropic kernel and w_k = (xs_ik - ys_jk)^2 / r^2 otherwise (0 at r = 0).
    """
    code, shape, scale, isotropic = _CODE_OF[rho_slope], float(shape), float(scale), bool(
        isotropic)
    _over_threads(lambda j0, j1: _fill_with_derivatives(code, xs, ys, shape, scale, isotropic,
                                                        out, derivs, j0, j1),
                  ys.shape[0], xs.shape[0] * ys.shape[0])
