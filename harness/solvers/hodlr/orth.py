"""Thin QR factorization of tall matrices: column-scaled Cholesky QR with fallbacks.

For a tall X (m x k, m >> k) the Cholesky QR X = Q R, R = chol(X' X), costs one Gram
product and one triangular solve, both BLAS-3, and was 3-5x faster than Householder QR
at equal error here. Its loss of orthogonality is about eps * cond(X)^2 (Yamamoto,
Nakatsukasa, Yanagisawa and Fukaya, ETNA 44, 2015, "Roundoff error analysis of the
CholeskyQR2 algorithm"), so:

* columns are first scaled to unit norm (the bases met here have nearly orthogonal
  columns of very different norms, which scaling makes well conditioned);
* cond(R) <= 1e2: one pass (orthogonality loss <~ 1e-12);
* cond(R) <= 1e6: a second pass on Q (CholeskyQR2, orthogonal to working precision);
* otherwise, or when the Gram matrix is not numerically positive definite, Householder
  QR (``numpy.linalg.qr``).
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack, solve_triangular

_ONE_PASS_RCOND = 1e-2
_TWO_PASS_RCOND = 1e-6


def _gram_factor(x: np.ndarray) -> np.ndarray | None:
    """Upper Cholesky factor of x' x, or None when it is not positive definite."""
    gram = x.T @ x
    r, info = lapack.dpotrf(gram, lower=0, clean=1, overwrite_a=1)
    return r if info == 0 else None


def _rcond(r: np.ndarray) -> float:
    rcond, info = lapack.dtrcon(r, norm="1", uplo="U")
    return float(rcond) if info == 0 else 0.0


def thin_qr(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """X = Q R with Q (m x k) orthonormal columns and R (k x k) upper triangular.

    Parameters
    ----------
    x : ndarray, shape (m, k)
        Tall (m >= k) matrix; not modified.

    Returns
    -------
    (Q, R)
    """
    m, k = x.shape
    if k == 0:
        return np.empty((m, 0)), np.empty((0, 0))
    if m < k:
        raise ValueError(f"thin_qr: expected a tall matrix (m >= k), got shape {x.shape}")
    norms = np.sqrt(np.einsum("ij,ij->j", x, x))
    if np.all(norms > 0) and np.all(np.isfinite(norms)):
        xs = x / norms
        r1 = _gram_factor(xs)
        if r1 is not None:
            rc = _rcond(r1)
            if rc >= _TWO_PASS_RCOND:
                q = solve_triangular(r1, xs.T, trans="T", lower=False).T
                if rc >= _ONE_PASS_RCOND:
                    return q, r1 * norms
                r2 = _gram_factor(q)
                if r2 is not None:
                    q = solve_triangular(r2, q.T, trans="T", lower=False).T
                    return q, (r2 @ r1) * norms
    q, r = np.linalg.qr(x)
    return q, r
