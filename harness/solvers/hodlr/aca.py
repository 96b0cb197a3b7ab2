"""Low-rank compression of off-diagonal kernel blocks: ACA with partial pivoting + recompression.

Tolerance semantics
-------------------
Each off-diagonal block K = Sigma[I, J] (I, J disjoint clusters) is compressed on its
own, relative to its own Frobenius norm:

    ||K - U V'||_F <= tol * ||K||_F     (per block, estimated; ``tol`` is this bound)

in two halves of tol / 2 each:

1. Adaptive cross approximation with partial pivoting (Bebendorf, Numer. Math. 86
   (2000) 565-589, Algorithm of sec. 3; Bebendorf and Rjasanow, Computing 70 (2003),
   eq. 3.3 for the stopping rule) builds S_k = sum_l a_l b_l' from k residual rows and
   columns, touching only k (m + n) kernel entries. It stops when
   ||a_k|| ||b_k|| <= (tol / 2) ||S_k||_F. The rule is first tried against the
   diagonal part sum_l ||a_l||^2 ||b_l||^2 of ||S_k||_F^2 and, when it passes there,
   confirmed against the exact ||S_k||_F^2 = sum_{l,j} (a_l'a_j)(b_l'b_j) from the
   two Gram matrices (one BLAS-3 product instead of 2k dot products at every step).
   That rule alone can fire early on blocks of touching clusters (errors 50-100x the
   target were seen), so when it fires, ``checks`` random rows of the residual are
   evaluated; if (m / #rows) * sum ||residual row||^2 > (tol / 2)^2 ||S_k||_F^2 the
   iteration continues from the worst sampled row, up to ``checks.shape[0]`` times.
2. Recompression: triangular factors R_a, R_b of both factors (A' = Q_a R_a,
   B' = Q_b R_b, from the Gram matrices; CholeskyQR2 or Householder QR when those are
   too ill conditioned for ``tol``, see ``orth``), SVD of the small core
   R_a R_b' = u s v', truncated to the smallest r with
   sqrt(sum_{i > r} s_i^2) <= (tol / 2) ||s||_2 (exact for the ACA approximant).

Globally, summing the per-block bounds (each block and its transpose; the diagonal
leaf blocks are exact) gives ||Sigma - Sigma~||_F <= tol ||Sigma||_F up to the ACA
estimate: a global relative Frobenius bound. The relative 2-norm error is checked
against 10 x tol in ``tests/test_hodlr.py``.

The result is U = Q_a u_r (orthonormal columns) and V = Q_b v_r diag(s_r), formed
without Q (``recompress``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numba
import numpy as np

from harness.model.kernels.rows import eval_row
from harness.solvers.hodlr.orth import apply_basis, basis_factor, rcond_for


@numba.njit(inline="always", fastmath=True, nogil=True, cache=True)
def _residual(family, x, ys, shape, scale, mode, coef, mat, k, out):
    """out[j] = K(x, ys_j) - sum_{l<k} coef[l] mat[l, j]  (a residual row or column)."""
    eval_row(family, x, ys, shape, scale, mode, out, 0, ys.shape[0])
    if k > 0:
        out -= np.dot(coef[:k], mat[:k])  # BLAS gemv: the memory-bound part of ACA


@numba.njit(fastmath=True, nogil=True, cache=True)
def aca_compiled(family, xs, ys, shape, scale, mode, tol, max_rank, checks):
    """ACA with partial pivoting on K[i, j] = entry(xs_i, ys_j) (see module docstring).

    ``family``, ``mode``: as in ``harness.model.kernels.rows``; ``checks``: (rounds, rows)
    random row indices for the residual checks. Returns (A, B) with K ~ A' B, A of
    shape (k, m), B of shape (k, n). Serial; releases the GIL.
    """
    m = xs.shape[0]
    n = ys.shape[0]
    cap = min(max_rank, 16)
    a_vecs = np.empty((cap, m))
    b_vecs = np.empty((cap, n))
    coef = np.empty(max_rank)
    used = np.zeros(m, dtype=np.bool_)
    row = np.empty(n)
    col = np.empty(m)
    scratch = np.empty(n)
    tol2 = tol * tol
    norm2 = 0.0
    diag2 = 0.0
    k = 0
    piv_row = 0
    rounds = 0
    while k < max_rank:
        for ell in range(k):
            coef[ell] = a_vecs[ell, piv_row]
        _residual(family, xs[piv_row], ys, shape, scale, mode, coef, b_vecs, k, row)
        used[piv_row] = True
        jp = np.argmax(np.abs(row))
        piv = row[jp]
        if piv == 0.0:
            candidate = True
            if k > 0:
                norm2 = np.sum(np.dot(a_vecs[:k], a_vecs[:k].T) * np.dot(b_vecs[:k], b_vecs[:k].T))
        else:
            row /= piv
            for ell in range(k):
                coef[ell] = b_vecs[ell, jp]
            _residual(family, ys[jp], xs, shape, scale, mode, coef, a_vecs, k, col)
            if k == cap:
                cap = min(max_rank, 2 * cap)
                grown_a = np.empty((cap, m))
                grown_b = np.empty((cap, n))
                grown_a[:k] = a_vecs[:k]
                grown_b[:k] = b_vecs[:k]
                a_vecs = grown_a
                b_vecs = grown_b
            a_vecs[k] = col
            b_vecs[k] = row
            step2 = np.dot(col, col) * np.dot(row, row)
            diag2 += step2
            k += 1
            # cheap test with the diagonal terms of ||S_k||^2; confirmed below with the
            # exact norm from the Gram matrices (BLAS-3) before stopping
            candidate = step2 <= tol2 * diag2
            if candidate:
                ga = np.dot(a_vecs[:k], a_vecs[:k].T)
                gb = np.dot(b_vecs[:k], b_vecs[:k].T)
                norm2 = np.sum(ga * gb)
                candidate = step2 <= tol2 * norm2
        if candidate:
            if rounds >= checks.shape[0]:
                break
            worst = -1.0
            worst_row = -1
            est = 0.0
            for t in range(checks.shape[1]):
                i = checks[rounds, t]
                for ell in range(k):
                    coef[ell] = a_vecs[ell, i]
                _residual(family, xs[i], ys, shape, scale, mode, coef, b_vecs, k, scratch)
                e2 = np.dot(scratch, scratch)
                est += e2
                if e2 > worst and not used[i]:
                    worst = e2
                    worst_row = i
            rounds += 1
            est *= m / checks.shape[1]
            if est <= tol2 * norm2 or worst_row < 0 or worst <= 0.0:
                break
            piv_row = worst_row
        else:
            best = -1.0
            piv_row = -1
            for i in range(m):
                if not used[i] and abs(col[i]) > best:
                    best = abs(col[i])
                    piv_row = i
            if piv_row < 0:
                break
    return a_vecs[:k].copy(), b_vecs[:k].copy()


def aca_callable(row: Callable[[int], np.ndarray], col: Callable[[int], np.ndarray],
                 m: int, n: int, *, tol: float, checks: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """The same ACA as ``aca_compiled`` on entries given by ``row(i)`` and ``col(j)``.

    Used for kernels without a compiled closed form (general Matern).
    """
    a_list: list[np.ndarray] = []
    b_list: list[np.ndarray] = []
    used = np.zeros(m, dtype=bool)
    tol2 = tol * tol
    norm2 = 0.0
    piv_row = 0
    rounds = 0
    max_rank = min(m, n)

    def residual_row(i: int) -> np.ndarray:
        r = row(i)
        for a, b in zip(a_list, b_list, strict=True):
            r -= a[i] * b
        return r

    while len(a_list) < max_rank:
        r = residual_row(piv_row)
        used[piv_row] = True
        jp = int(np.argmax(np.abs(r)))
        if r[jp] == 0.0:
            candidate = True
            c = np.zeros(m)
        else:
            b = r / r[jp]
            c = col(jp)
            for a_old, b_old in zip(a_list, b_list, strict=True):
                c -= b_old[jp] * a_old
            cross = sum(float(a_old @ c) * float(b_old @ b)
                        for a_old, b_old in zip(a_list, b_list, strict=True))
            an2, bn2 = float(c @ c), float(b @ b)
            norm2 += an2 * bn2 + 2.0 * cross
            a_list.append(c)
            b_list.append(b)
            candidate = an2 * bn2 <= tol2 * norm2
        if candidate:
            if rounds >= checks.shape[0]:
                break
            errs = np.array([float(np.sum(residual_row(int(i)) ** 2)) for i in checks[rounds]])
            rounds += 1
            free = ~used[checks[rounds - 1]]
            if errs.sum() * m / errs.size <= tol2 * norm2 or not np.any(free & (errs > 0)):
                break
            piv_row = int(checks[rounds - 1][np.argmax(np.where(free, errs, -1.0))])
        else:
            masked = np.where(used, -1.0, np.abs(c))
            piv_row = int(np.argmax(masked))
            if masked[piv_row] < 0:
                break
    k = len(a_list)
    a = np.array(a_list) if k else np.empty((0, m))
    b = np.array(b_list) if k else np.empty((0, n))
    return a, b


@dataclass(frozen=True)
class LowRank:
    """K ~ U V' with U (m x r) (orthonormal columns up to the Gram rounding) and V (n x r)."""

    u: np.ndarray
    v: np.ndarray
    aca_rank: int

    @property
    def rank(self) -> int:
        return int(self.u.shape[1])

    @property
    def nbytes(self) -> int:
        return int(self.u.nbytes + self.v.nbytes)


def truncation_rank(s: np.ndarray, tol: float) -> int:
    """Smallest r with sqrt(sum_{i >= r} s_i^2) <= tol ||s||_2 (s sorted descending):
    the Eckart-Young truncation of a matrix with singular values s to relative
    Frobenius error ``tol``."""
    tail = np.sqrt(np.cumsum((s * s)[::-1])[::-1])  # tail[i] = ||s[i:]||
    keep = np.nonzero(tail > tol * float(np.sqrt(np.sum(s * s))))[0]
    return int(keep[-1]) + 1 if keep.size else 0


def recompress(a: np.ndarray, b: np.ndarray, *, tol: float) -> LowRank:
    """Truncated SVD of A' B (A: k x m, B: k x n) to relative Frobenius error ``tol``.

    With A' = Q_a R_a and B' = Q_b R_b, R_a R_b' = u s v', the result is
    U = A' R_a^-1 u_r = Q_a u_r and V = B' R_b^-1 v_r s_r, r the smallest rank whose
    discarded singular values have root-sum-square <= tol * ||s||_2. R comes from the
    column-scaled Gram matrix (one BLAS-3 pass over each factor, no explicit Q) when its
    rcond is high enough (``orth.rcond_for``) that the rounding of applying the implicit
    Q stays below tol / 100 and its loss of orthogonality below 1e-2 (which only scales
    the truncation estimate by 1 +- 1e-2: the kept product A' R_a^-1 (u_r s_r v_r')
    R_b^-T B differs from A'B by Q_a (tail) Q_b'); otherwise Q is formed by CholeskyQR2
    or Householder QR (``orth.basis_factor``).
    """
    k, m = a.shape
    n = b.shape[1]
    if k == 0:
        return LowRank(np.zeros((m, 0)), np.zeros((n, 0)), 0)
    min_rcond = rcond_for(orthogonality=1e-2, rounding=0.01 * tol)
    ra, qa = basis_factor(a.T, min_rcond=min_rcond)
    rb, qb = basis_factor(b.T, min_rcond=min_rcond)
    u, s, vt = np.linalg.svd(ra @ rb.T, full_matrices=False)
    r = truncation_rank(s, tol)
    u_r = apply_basis(a.T, ra, qa, u[:, :r])
    v_r = apply_basis(b.T, rb, qb, vt[:r].T * s[:r])
    return LowRank(np.ascontiguousarray(u_r), np.ascontiguousarray(v_r), k)
