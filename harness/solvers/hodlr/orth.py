"""Orthogonal bases of tall matrices, and the one dense Cholesky helper of the solver.

Every basis the solver needs (ACA factors before recompression, the whitened bases of
the symmetric factorization) is a tall X (m x k, m >= k) with X = Q R. Three ways to
get there, from cheap to robust:

* implicit Cholesky QR: R = chol(D^-1 X'X D^-1) D (D the column norms) from one Gram
  product, Q = X R^-1 never formed. Its loss of orthogonality is about
  eps cond(X D^-1)^2 (Yamamoto, Nakatsukasa, Yanagisawa and Fukaya, ETNA 44 (2015),
  "Roundoff error analysis of the CholeskyQR2 algorithm", Thm 3.3), and applying
  Q = X R^-1 to a vector costs a relative error of about eps cond(X D^-1);
* CholeskyQR2 (ibid.): a second Cholesky QR pass on the explicit first Q, orthogonal
  to working precision when eps cond^2 < 1;
* Householder QR (``numpy.linalg.qr``, LAPACK dgeqrf/dorgqr), unconditionally stable.

``basis_factor`` picks the cheapest that keeps both effects below a caller-given
level (``rcond_for``); all Gram factors go through ``scaled_gram_factor``, and all
small dense SPD factorizations (leaf blocks, I - G'G) through ``cholesky_lower``.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack, solve_triangular

_EPS = float(np.finfo(float).eps)


def cholesky_lower(a: np.ndarray) -> tuple[np.ndarray, int]:
    """Lower L with L L' = a (LAPACK dpotrf) and dpotrf's ``info`` (0 on success)."""
    c, info = lapack.dpotrf(a, lower=1, clean=1, overwrite_a=0)
    return c, int(info)


def rcond_for(*, orthogonality: float, rounding: float) -> float:
    """Smallest rcond of a column-scaled Gram factor for which implicit Cholesky QR keeps
    the loss of orthogonality ||Q'Q - I|| (~ eps / rcond^2) below ``orthogonality`` and
    the relative rounding error of applying Q = X R^-1 (~ eps / rcond) below ``rounding``.

    rcond >= max(sqrt(eps / orthogonality), eps / rounding) (the two first-order
    bounds of Yamamoto et al., ETNA 44 (2015), sec. 3), capped at 0.5.
    """
    return min(0.5, max(float(np.sqrt(_EPS / orthogonality)), _EPS / rounding))


def scaled_gram_factor(x: np.ndarray, gram: np.ndarray | None = None
                       ) -> tuple[np.ndarray, np.ndarray, float] | None:
    """Cholesky factor of the column-scaled Gram matrix of a tall ``x``.

    Returns (R1, d, rcond) with R1' R1 = D^-1 X'X D^-1, d the column norms
    (R = R1 diag(d) is the triangular factor of X) and rcond LAPACK dtrcon's 1-norm
    reciprocal condition number of R1; None when a column is zero or not finite or the
    scaled Gram matrix is not numerically positive definite. ``gram``, when given, is
    X'X already computed (it is then not formed again).
    """
    if gram is None:
        d = np.sqrt(np.einsum("ij,ij->j", x, x))
    else:
        d = np.sqrt(np.diag(gram).copy())
    if not (np.all(d > 0) and np.all(np.isfinite(d))):
        return None
    if gram is None:
        xs = x / d
        scaled = xs.T @ xs
    else:
        scaled = gram / np.outer(d, d)
    r1, info = lapack.dpotrf(scaled, lower=0, clean=1, overwrite_a=1)
    if info != 0:
        return None
    rcond, info = lapack.dtrcon(r1, norm="1", uplo="U")
    return r1, d, (float(rcond) if info == 0 else 0.0)


def thin_qr(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """X = Q R with Q (m x k) orthonormal to working precision and R (k x k) upper.

    CholeskyQR2 on the column-scaled X when its Gram factor has rcond >= 1e-6
    (so eps cond^2 < 1e-3 and the second pass restores orthogonality), Householder QR
    otherwise.

    Parameters
    ----------
    x : ndarray, shape (m, k)
        Tall (m >= k) matrix; not modified.
    """
    m, k = x.shape
    if k == 0:
        return np.empty((m, 0)), np.empty((0, 0))
    if m < k:
        raise ValueError(f"thin_qr: expected a tall matrix (m >= k), got shape {x.shape}")
    first = scaled_gram_factor(x)
    if first is not None and first[2] >= 1e-6:
        r1, d, _ = first
        q = solve_triangular(r1, (x / d).T, trans="T", lower=False).T
        second = scaled_gram_factor(q)
        if second is not None:
            r2, d2, _ = second
            q = solve_triangular(r2, (q / d2).T, trans="T", lower=False).T
            return q, ((r2 * d2) @ r1) * d
    q, r = np.linalg.qr(x)
    return q, r


def basis_factor(x: np.ndarray, *, min_rcond: float, gram: np.ndarray | None = None
                 ) -> tuple[np.ndarray, np.ndarray | None]:
    """R with X = Q R, and Q when it had to be formed.

    Returns (R, None) when the column-scaled Gram factor has rcond >= ``min_rcond``
    (Q = X R^-1 stays implicit), else (R, Q) from ``thin_qr``. A wide X (m < k) gets
    Q = I, R = X. ``gram``: X'X when already computed.
    """
    m, k = x.shape
    if k == 0:
        return np.zeros((0, 0)), None
    first = scaled_gram_factor(x, gram)
    if first is not None and first[2] >= min_rcond:
        r1, d, _ = first
        return r1 * d, None
    if m < k:
        return np.array(x), np.eye(m)
    q, r = thin_qr(x)
    return r, q


def apply_basis(x: np.ndarray, r: np.ndarray, q: np.ndarray | None, t: np.ndarray
                ) -> np.ndarray:
    """Q t for the basis of ``basis_factor`` (Q explicit, or X R^-1)."""
    if q is not None:
        return q @ t
    return x @ solve_triangular(r, t, lower=False, check_finite=False)
