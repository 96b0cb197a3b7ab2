"""Rounding in the exact operator's sums and products: accurate dot products and a stated model.

Accurate dots. Every inner product that enters a reported value (the Lanczos
coefficients alpha_j, the quadratic form b'x + x'r) is summed with ``math.fsum``, which
returns the correctly rounded sum of its (rounded) terms (Shewchuk 1997, "Adaptive
precision floating-point arithmetic", Discrete Comput. Geom. 18, 305-363). With each
product a_i b_i rounded once, Higham (2002, *Accuracy and Stability of Numerical
Algorithms*, 2nd ed., section 3.1, eq. 3.2 with n = 1 per term) gives the rigorous

    |fl(a'b) - a'b| <= u sum_i |a_i b_i| + u |a'b|,        u = 2^-53      (``dot_bound``).

A numpy column sum along axis 0 is recursive summation, whose error grows like
gamma_n = n u / (1 - n u) (Higham 2002, eq. 3.4) and, for the n nearly equal terms of a
Lanczos Rayleigh quotient, is *biased*: it put n (alpha_1 - 1) off by 4e-10 nat at
n = 12,000 (1D Matern, HODLR preconditioner), against a stated SE of 8.6e-12 nat before the fix.

Model of the remaining rounding (estimates, not bounds; Higham 2002, section 2.8: rounding
errors as independent random variables of mean zero and |delta| <= u, the model of
Higham and Mary 2019, SIAM J. Sci. Comput. 41(5), A2815-A2835):

* Kernel entries are computed to a relative error |delta_ij| <= ``ENTRY_ULPS`` u (exp of
  a rounded argument; checked against long-double entries for the compiled Matern forms
  in ``tests/test_operator_honest_se.py``). Their effect on L is, to first order,
  1/2 sum_ij delta_ij K_ij (x_i x_j - (K^-1)_ij), x = K^-1 y. Under the model:
  SD of the quadratic-form part <= c u sqrt(sum_ij x_i^2 x_j^2 K_ij^2)
  <= c u sqrt(max|K| (x o x)' |K| (x o x)), one extra product (K >= 0 for the
  Matern family); of the log-det part <= c u sqrt(sum_ij (K^-1)_ij^2 K_ij^2)
  <= c u max|K| ||K^-1||_F <= c u max|K| sqrt(n) / lambda_min.
* The products' accumulation (tiles of BLAS dot products, summed over tiles): its effect
  on the quadratic form, x'e with e = fl(K x) - K x, is *measured*: the residual is
  recomputed from the products K (c_k x) / c_k for four scalings c_k that are not powers
  of two, so that every rounding changes; under the model the differences
  x'(e - e_k) have variance 2 var(x'e), giving an SD estimate with four degrees of
  freedom. In the Lanczos runs the products' rounding differs from probe to probe and
  so already lies in the probes' sample variance.
* log det P, a sum of n logarithms of the preconditioner's pivots, each pivot to a
  relative ``PIVOT_ULPS`` u: SD <= PIVOT_ULPS u sqrt(n).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Unit roundoff of IEEE double.
UNIT_ROUNDOFF = 2.0 ** -53
#: Stated model: relative error of a computed kernel entry, in units of u.
ENTRY_ULPS = 64.0
#: Stated model: relative error of one pivot of the preconditioner's log det, in units of u.
PIVOT_ULPS = 16.0
#: Scalings of the residual's recomputed products (not powers of two).
RESCALINGS = (1.0 / 3.0, 3.0 / 7.0, 5.0 / 11.0, 7.0 / 13.0)


def accurate_dots(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Column-wise sum_i a_ij b_ij, each correctly rounded from the rounded products."""
    a2 = np.asarray(a, dtype=float)
    b2 = np.asarray(b, dtype=float)
    prod = (a2 * b2).reshape(a2.shape[0], -1)
    return np.array([math.fsum(col) for col in prod.T])


def dot_bound(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Rigorous bound u sum_i |a_i b_i| + u |a'b| of ``accurate_dots`` (module docstring)."""
    prod = (np.asarray(a, dtype=float) * np.asarray(b, dtype=float))
    prod = prod.reshape(prod.shape[0], -1)
    return UNIT_ROUNDOFF * (np.sum(np.abs(prod), axis=0) + np.abs(np.sum(prod, axis=0)))


@dataclass(frozen=True)
class QuadraticRounding:
    """Rounding terms of Q = y' K^-1 y (module docstring).

    Attributes
    ----------
    product_se : float
        Measured SD of x'e from the rescaled residual products (estimate).
    entry_se : float
        Model SD of x' dK x from the entries' rounding (estimate).
    """

    product_se: float
    entry_se: float


def quadratic_rounding(matvec, x: np.ndarray, b: np.ndarray, residual: np.ndarray, *,
                       max_entry: float) -> QuadraticRounding:
    """The rounding terms of Q^ = b'x + x'r, r = b - fl(K x), with one extra block product.

    Parameters
    ----------
    matvec : callable
        The exact products K V.
    x, b, residual : ndarray, shape (n,)
        CG solution, right-hand side and its true residual b - fl(K x).
    max_entry : float
        max_ij |K_ij| (variance plus nugget for a stationary kernel).
    """
    xv = np.asarray(x, dtype=float).ravel()
    block = np.column_stack([c * xv for c in RESCALINGS] + [xv * xv])
    out = np.asarray(matvec(block))
    diffs = []
    for k, c in enumerate(RESCALINGS):
        other = b - out[:, k] / c
        diffs.append(float(accurate_dots(xv, np.asarray(residual) - other)[0]))
    product_se = math.sqrt(sum(d * d for d in diffs) / (2.0 * len(diffs)))
    weighted = float(accurate_dots(xv * xv, out[:, -1])[0])
    entry_se = ENTRY_ULPS * UNIT_ROUNDOFF * math.sqrt(max(max_entry * weighted, 0.0))
    return QuadraticRounding(product_se=product_se, entry_se=entry_se)


def logdet_entry_se(n: int, *, max_entry: float, lambda_min: float) -> float:
    """Model SD of tr(K^-1 dK): ENTRY_ULPS u max|K| sqrt(n) / lambda_min (module docstring)."""
    if not (lambda_min > 0 and math.isfinite(lambda_min)):
        return float("inf")
    return ENTRY_ULPS * UNIT_ROUNDOFF * max_entry * math.sqrt(n) / lambda_min


def pivot_logdet_se(n: int) -> float:
    """Model SD of log det P: PIVOT_ULPS u sqrt(n) (module docstring)."""
    return PIVOT_ULPS * UNIT_ROUNDOFF * math.sqrt(n)
