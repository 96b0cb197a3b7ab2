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
* shifted CholeskyQR3 (Fukaya, Kannan, Nakatsukasa, Yamamoto and Yanagisawa, SIAM J.
  Sci. Comput. 42 (2020) A477-A503): a first pass on X'X + s I, then CholeskyQR2, for
  condition numbers up to about 1 / (m k eps);
* Householder QR (``numpy.linalg.qr``, LAPACK dgeqrf/dorgqr), unconditionally stable,
  the last resort.

``basis_factor`` picks the cheapest that keeps both effects below a caller-given
level (``rcond_for``): it runs explicit passes only until the next one may stay
implicit, so its Q is Y S^-1 with Y the last explicit matrix (``Basis``); all Gram
factors go through ``scaled_gram_factor``, and all small dense SPD factorizations
(leaf blocks, I - G'G) through ``cholesky_lower``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import blas, lapack, solve_triangular

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


def scaled_gram_factor(x: np.ndarray, gram: np.ndarray | None = None, *,
                       shift: bool = False
                       ) -> tuple[np.ndarray, np.ndarray, float] | None:
    """Cholesky factor of the column-scaled Gram matrix of a tall ``x``.

    Returns (R1, d, rcond) with R1' R1 = D^-1 X'X D^-1 (+ s I), d the column norms
    (R = R1 diag(d) is the triangular factor of X) and rcond LAPACK dtrcon's 1-norm
    reciprocal condition number of R1; None when a column is zero or not finite or the
    scaled Gram matrix is not numerically positive definite. ``gram``, when given, is
    X'X already computed (it is then not formed again). The Gram matrix is formed
    first and scaled after (entrywise the same to rounding as the Gram matrix of
    X D^-1, without the copy of X: 1.8x faster at 32,768 x 252 here,
    ``benchmarks/results/hodlr_variants.json``).

    With ``shift``, s = 11 (m k + k (k + 1)) eps ||X D^-1||_2^2, the shift of Fukaya,
    Kannan, Nakatsukasa, Yamamoto and Yanagisawa, SIAM J. Sci. Comput. 42 (2020)
    A477-A503, Algorithm 4.1, which keeps the Cholesky factorization from breaking down
    for condition numbers up to about 1 / (m k eps).
    """
    if gram is None:
        gram = x.T @ x
    d = np.sqrt(np.diag(gram).copy())
    if not (np.all(d > 0) and np.all(np.isfinite(d))):
        return None
    scaled = gram / np.outer(d, d)
    if shift:
        m, k = x.shape
        scaled[np.diag_indices(k)] += (11.0 * (m * k + k * (k + 1)) * _EPS
                                       * _largest_eigenvalue(scaled))
    r1, info = lapack.dpotrf(scaled, lower=0, clean=1, overwrite_a=1)
    if info != 0:
        return None
    rcond, info = lapack.dtrcon(r1, norm="1", uplo="U")
    return r1, d, (float(rcond) if info == 0 else 0.0)


def _largest_eigenvalue(g: np.ndarray) -> float:
    """lambda_max of a symmetric PSD k x k matrix, 30 power steps, 10% margin upward."""
    v = np.ones(g.shape[0]) / np.sqrt(g.shape[0])
    lam = 0.0
    for _ in range(30):
        w = g @ v
        lam = float(np.linalg.norm(w))
        if lam == 0.0:
            break
        v = w / lam
    return 1.1 * lam


@dataclass(frozen=True)
class Basis:
    """X = Q R (m x k, m >= k) with the orthonormal Q kept as Q = Y S^-1.

    ``explicit`` is Y when Cholesky QR passes (or Householder QR) had to form it, None
    when Y is X itself; ``last`` is the upper triangular S (the identity for a
    Householder Q); ``r`` is the whole triangular factor (R = S R_passes).
    """

    r: np.ndarray
    explicit: np.ndarray | None
    last: np.ndarray


#: Explicit Cholesky QR passes before Householder QR takes over (shifted CholeskyQR3
#: needs three; Fukaya et al. 2020).
MAX_PASSES = 3


def basis_factor(x: np.ndarray, *, min_rcond: float, gram: np.ndarray | None = None
                 ) -> Basis:
    """The triangular factor of X and the cheapest exact-enough form of its Q.

    Cholesky QR passes Y <- Y S^-1 (S from the column-scaled Gram factor of Y, Y = X
    at first; the first pass shifted when that factor's rcond is below 1e-6, Fukaya et
    al. 2020) run until the Gram factor S of the current Y has rcond >= ``min_rcond``:
    Q = Y S^-1 then stays implicit (its loss of orthogonality ~ eps / rcond^2 and its
    rounding ~ eps / rcond are those ``rcond_for`` allows; Yamamoto et al. 2015). With
    no pass that is implicit Cholesky QR on X; after one pass, CholeskyQR2 without its
    last triangular solve. Householder QR (``numpy.linalg.qr``) when a pass breaks down
    or ``MAX_PASSES`` do not suffice. A wide X (m < k) gets Q = I, R = X. ``gram``: X'X
    when already computed.
    """
    m, k = x.shape
    if k == 0:
        return Basis(np.zeros((0, 0)), None, np.zeros((0, 0)))
    if m < k:
        return Basis(np.array(x), np.eye(m), np.eye(m))
    factor = scaled_gram_factor(x, gram)
    if factor is not None and factor[2] >= min_rcond:
        s = factor[0] * factor[1]
        return Basis(s, None, s)
    if factor is None or factor[2] < 1e-6:
        factor = scaled_gram_factor(x, gram, shift=True)
    y = np.array(x, dtype=float, order="F")
    r = np.eye(k)
    for _ in range(MAX_PASSES):
        if factor is None:
            break
        step = factor[0] * factor[1]
        y = blas.dtrsm(1.0, step, y, side=1, lower=0, overwrite_b=1)
        r = step @ r
        factor = scaled_gram_factor(y)
        if factor is not None and factor[2] >= min_rcond:
            s = factor[0] * factor[1]
            return Basis(s @ r, y, s)
    q, r = np.linalg.qr(x)
    return Basis(r, q, np.eye(k))


def apply_basis(x: np.ndarray, basis: Basis, t: np.ndarray) -> np.ndarray:
    """Q t for the ``basis_factor`` of ``x``: Y (S^-1 t)."""
    y = x if basis.explicit is None else basis.explicit
    return y @ solve_triangular(basis.last, t, lower=False, check_finite=False)


def thin_qr(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """X = Q R with Q (m x k) orthonormal to working precision and R (k x k) upper.

    ``basis_factor`` with the strictest threshold (rcond >= 0.5: Q'Q - I ~ 4 eps), its
    Q = Y S^-1 then formed: one Cholesky QR pass when X is already that well
    conditioned, CholeskyQR2 when its column-scaled Gram factor has rcond >= 1e-6
    (Yamamoto et al. 2015), shifted CholeskyQR3 below that (Fukaya et al. 2020),
    Householder QR when a pass breaks down. Each pass is one Gram product and one
    in-place dtrsm on one copy of X.

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
    basis = basis_factor(x, min_rcond=0.5)
    y = np.array(x if basis.explicit is None else basis.explicit, dtype=float, order="F")
    q = blas.dtrsm(1.0, basis.last, y, side=1, lower=0, overwrite_b=1)
    return q, basis.r
