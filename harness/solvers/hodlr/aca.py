"""Low-rank compression of off-diagonal kernel blocks: blocked ACA + recompression.

Tolerance semantics
-------------------
Each off-diagonal block K = Sigma[I, J] (I, J disjoint clusters) is compressed on its
own, relative to its own Frobenius norm:

    ||K - U V'||_F <= tol * ||K||_F     (per block, estimated; ``tol`` is this bound)

in two parts, tol / 2 for ACA and tol / 20 for the truncation (``entries.ACA_SHARE``,
``entries.TRUNCATION_SHARE``; written tol / 2 below for both):

1. Adaptive cross approximation (Bebendorf, Numer. Math. 86 (2000) 565-589, sec. 3;
   Bebendorf and Rjasanow, Computing 70 (2003), eq. 3.3 for the stopping rule) builds
   S_k = sum_l a_l b_l' from residual rows and columns, touching only k (m + n) kernel
   entries. It is blocked (the block variant of ACA as in Liu, Sid-Lakhdar, Rebrova,
   Ghysels and Li, "A parallel hierarchical blocked adaptive cross approximation
   algorithm", IJHPCA 34 (2020), from memory): each step evaluates ``block`` residual
   rows at once, R = K[P, :] - A[:, P]' B (one matrix product reads B once for all of
   them, where row-at-a-time ACA reads it once per row: the memory-bound part), picks
   pivot rows and columns in R by Gaussian elimination (pivot row of largest norm, its
   largest entry), evaluates the residual columns C at those pivots, and adds the
   skeleton C W^-1 R[P', :] of the residual (W the pivot cross, split as W = L U so the
   new terms are C U^-1 and L^-1 R). Next rows: the largest unused entries of the new
   columns. It stops when the newest term has ||a_k|| ||b_k|| <= (tol / 2) ||S_k||_F,
   tried first against the diagonal part sum_l ||a_l||^2 ||b_l||^2 of ||S_k||_F^2
   (scaled by the ratio seen at the last exact evaluation) and confirmed against the
   exact ||S_k||_F^2 = sum_{l,j} (a_l'a_j)(b_l'b_j) from the Gram matrices, which are
   kept and extended (BLAS-3) and later reused by the recompression. That rule alone
   can fire early on blocks of touching clusters (errors 50-100x the target were seen
   with row-at-a-time ACA), so when it fires, ``checks`` random rows of the residual are
   evaluated; if (m / #rows) * sum ||residual row||^2 > (tol / 2)^2 ||S_k||_F^2 those
   rows become the next step's rows, up to ``checks.shape[0]`` times.
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

_JIT = {"fastmath": True, "nogil": True, "cache": True}
#: Kernels called only from other kernels: without the Python and C-callable wrappers
#: that numba otherwise builds for each, the first compilation is about 0.5 s shorter.
#: This module's kernels avoid slice assignments, in-place operators on array slices and
#: np.dot on small operands for the same reason (``_copy_rows``, ``_cross_pivots``): on a
#: fresh install they compiled in 19 s, now in about 9 (``benchmarks/first_call.py``).
_INNER = {**_JIT, "no_cpython_wrapper": True, "no_cfunc_wrapper": True}

#: Residual rows taken per step of the blocked ACA: 16 rows turn the memory-bound
#: update of one row at a time into a matrix product (2.5x faster on the 16,384 x
#: 16,384 root block at n = 32,768; 4 and 8 rows were no faster at n = 131,072). The
#: ACA rank is 1.2-1.9x the truncated rank (n = 131,072, tol 1e-6, 2D Matern 3/2).
ACA_BLOCK = 16


@numba.njit(**_INNER)
def _residuals(family, points, others, idx, count, shape, scale, mode, own, other, k, out):
    """out[t] = K(points[idx[t]], others) - sum_{l<k} own[l, idx[t]] other[l], t < count.

    Residual rows (points = xs, own = A, other = B) or residual columns (points = ys,
    own = B, other = A) of the block after k cross terms; one matrix product for all.
    """
    n = others.shape[0]
    for t in range(count):
        eval_row(family, points[idx[t]], others, shape, scale, mode, out[t], 0, n)
    if k > 0:
        coef = np.empty((count, k))
        for t in range(count):
            for ell in range(k):
                coef[t, ell] = own[ell, idx[t]]
        update = np.dot(coef, other[:k])
        for t in range(count):
            for j in range(n):
                out[t, j] -= update[t, j]


@numba.njit(**_INNER)
def _cross_pivots(res, count, limit, rows, cols):
    """Pivots of the residual rows res[:count]: Gaussian elimination with the pivot row
    of largest norm and, in it, the entry of largest magnitude (at most ``limit`` steps;
    a row whose exact norm is below 1e-10 of the first pivot row's, or whose largest
    entry sits in a column already taken, is skipped: it is rounding noise of the rows
    already eliminated and a pivot there would amplify it).

    The elimination is kept implicit: the current rows are E res with E (count x count)
    and their norms come from the Gram matrix G = res res' as diag(E G E'), so each
    step reads ``res`` once (the pivot row E[i] res). Fills rows[s] (indices into res)
    and cols[s] in pivot order; returns how many were found.
    """
    # The small count x count products are loops, not np.dot: each distinct np.dot
    # signature adds about 0.5 s to the first compilation, and these gain nothing from BLAS
    rows_now = np.ascontiguousarray(res[:count])
    n = rows_now.shape[1]
    gram = np.dot(rows_now, rows_now.T)
    elim = _identity(count)
    active = np.empty(count, dtype=np.bool_)
    for i in range(count):
        active[i] = True
    pivot_row = np.empty(n)
    at_col = np.empty(count)
    step = np.empty(count)
    first = -1.0
    found = np.int64(0)  # not the literal 0: see aca_compiled
    while found < limit:
        best, bi = 0.0, -1
        for i in range(count):
            if active[i]:
                v = 0.0  # (E G E')_ii
                for a in range(count):
                    eg = 0.0
                    for b in range(count):
                        eg += elim[i, b] * gram[b, a]
                    v += eg * elim[i, a]
                if v > best:
                    best, bi = v, i
        if bi < 0:
            break
        active[bi] = False
        # the Gram estimate only ranks the rows; the pivot row itself is formed exactly
        for j in range(n):
            pivot_row[j] = 0.0
        for a in range(count):
            e = elim[bi, a]
            if e != 0.0:
                for j in range(n):
                    pivot_row[j] += e * rows_now[a, j]
        norm2 = _squared_norm(pivot_row)
        bj, largest = np.int64(0), -1.0  # np.int64: see aca_compiled's counters
        for j in range(n):
            if abs(pivot_row[j]) > largest:
                bj, largest = j, abs(pivot_row[j])
        if first < 0.0:
            first = norm2
        if norm2 <= 1e-20 * first or _listed(cols, found, bj):
            continue  # rounding noise of rows already eliminated: not a pivot
        for i in range(count):
            acc = 0.0
            for a in range(count):
                acc += elim[i, a] * rows_now[a, bj]
            at_col[i] = acc
        pivot = at_col[bi]
        rows[found], cols[found] = bi, bj
        found += 1
        for j in range(count):
            step[j] = elim[bi, j]
        for i in range(count):
            if active[i]:
                f = at_col[i] / pivot
                for j in range(count):
                    elim[i, j] -= f * step[j]
        for j in range(count):
            elim[bi, j] = 0.0
    return found


@numba.njit(**_INNER)
def _skeleton_factors(core):
    """(inv(U)', inv(L)) for core = L U (L unit lower, U upper, no pivoting: ``core``
    is already in pivot order), so that C core^-1 R = (C U^-1)(L^-1 R).

    Only the leading t x t part whose pivots stay above 1e-10 of the first is used
    (t = the returned factors' size; the rest was lost to rounding).
    """
    size = core.shape[0]
    low = _identity(size)
    up = core.copy()
    t = size
    for s in range(size):
        if not abs(up[s, s]) > 1e-10 * abs(up[0, 0]):  # lost to rounding: keep s terms
            t = s
            break
        for i in range(s + 1, size):
            f = up[i, s] / up[s, s]
            low[i, s] = f
            for j in range(s, size):
                up[i, j] -= f * up[s, j]
    inv_low = _identity(t)
    for i in range(t):  # forward substitution, column by column of the identity
        for ell in range(i):
            f = low[i, ell]
            for j in range(t):
                inv_low[i, j] -= f * inv_low[ell, j]
    inv_up = np.zeros((t, t))
    for i in range(t - 1, -1, -1):
        inv_up[i, i] = 1.0 / up[i, i]
        for j in range(i + 1, t):
            acc = 0.0
            for ell in range(i + 1, j + 1):
                acc += up[i, ell] * inv_up[ell, j]
            inv_up[i, j] = -acc / up[i, i]
    inv_up_t = np.empty((t, t))
    for i in range(t):
        for j in range(t):
            inv_up_t[i, j] = inv_up[j, i]
    return inv_up_t, inv_low


@numba.njit(**_INNER)
def _squared_norm(v):
    """v'v, a loop rather than np.dot (one compiled np.dot signature fewer)."""
    acc = 0.0
    for j in range(v.shape[0]):
        acc += v[j] * v[j]
    return acc


@numba.njit(**_INNER)
def _identity(size):
    """np.eye(size) from np.zeros, whose compiled form the callers already have."""
    out = np.zeros((size, size))
    for i in range(size):
        out[i, i] = 1.0
    return out


@numba.njit(**_INNER)
def _copy_rows(dst, d0, src, count):
    """dst[d0 + r] = src[r] for r < count, element by element: a slice assignment
    between arrays compiles numba's shape-mismatch message builder, about 4 s of the
    first compilation here, for a shape check these callers never need."""
    for r in range(count):
        for j in range(src.shape[1]):
            dst[d0 + r, j] = src[r, j]


@numba.njit(**_INNER)
def _layout(scratch, cap, m, n):
    """Views A (cap x m) and B (cap x n) on the front of the flat buffer ``scratch``."""
    a_vecs = scratch[:cap * m].reshape((cap, m))
    b_vecs = scratch[cap * m:cap * (m + n)].reshape((cap, n))
    return a_vecs, b_vecs


@numba.njit(**_INNER)
def _grow(scratch, a_vecs, b_vecs, k, need, cap_limit):
    """A buffer with room for ``need`` rows of A and B (doubling, at most ``cap_limit``),
    the first k rows carried over; returns (buffer, A, B)."""
    m, n = a_vecs.shape[1], b_vecs.shape[1]
    if need <= a_vecs.shape[0]:
        return scratch, a_vecs, b_vecs
    cap = min(cap_limit, max(2 * a_vecs.shape[0], need))
    grown = np.empty(cap * (m + n))
    new_a, new_b = _layout(grown, cap, m, n)
    start = np.int64(0)  # not the literal 0 (a second compiled signature)
    _copy_rows(new_a, start, a_vecs, k)
    _copy_rows(new_b, start, b_vecs, k)
    return grown, new_a, new_b


#: Rows per product when the Gram matrix is extended: only the lower triangle is
#: computed, in chunks, so the first extension costs about k^2 m / 2 multiply-adds.
_GRAM_CHUNK = 64


@numba.njit(**_INNER)
def _extend_gram(gram, vecs, k0, k):
    """vecs[:k] vecs[:k]' given ``gram`` = vecs[:k0] vecs[:k0]' (only rows k0..k new)."""
    out = gram
    if gram.shape[0] < k:
        out = np.empty((vecs.shape[0], vecs.shape[0]))
        for i in range(k0):
            for j in range(k0):
                out[i, j] = gram[i, j]
    for j0 in range(k0, k, _GRAM_CHUNK):
        j1 = min(k, j0 + _GRAM_CHUNK)
        new = np.dot(vecs[j0:j1], vecs[:j1].T)
        for j in range(j1 - j0):
            for i in range(j1):
                out[j0 + j, i] = new[j, i]
                out[i, j0 + j] = new[j, i]
    return out


@numba.njit(**_INNER)
def _listed(idx, count, i):
    for u in range(count):
        if idx[u] == i:
            return True
    return False


@numba.njit(**_JIT)
def aca_compiled(family, xs, ys, shape, scale, mode, tol, max_rank, checks, block, scratch):
    """Blocked ACA on K[i, j] = entry(xs_i, ys_j) (see module docstring).

    ``family``, ``mode``: as in ``harness.model.kernels.rows``; ``checks``: (rounds,
    rows) random row indices for the residual checks; ``block``: residual rows per step;
    ``scratch``: a flat float buffer for the factors, reused when large enough (a fresh
    buffer's first touch costs about 0.5 s per GB here). Returns (A, B, GA, GB, buffer)
    with K ~ A' B, A of shape (k, m), B of shape (k, n) (views into ``buffer``, the
    scratch or a larger one that replaced it), and their Gram matrices GA = A A',
    GB = B B' (k x k). Serial; releases the GIL.
    """
    m = xs.shape[0]
    n = ys.shape[0]
    block = max(1, min(block, m))
    cap_limit = max_rank + block
    cap = min(cap_limit, max(4 * block, scratch.shape[0] // (m + n)))
    if scratch.shape[0] < cap * (m + n):
        scratch = np.empty(cap * (m + n))
    a_vecs, b_vecs = _layout(scratch, cap, m, n)
    gram_a = np.empty((0, 0))
    gram_b = np.empty((0, 0))
    # Counters passed to other kernels start at np.int64(0), not the literal 0: numba
    # types a loop's first pass with Literal[int](0) and compiled _residuals, _grow,
    # _extend_gram and _listed twice, for the literal and for int64
    k_gram = np.int64(0)
    used = np.zeros(m, dtype=np.bool_)
    tol2 = tol * tol
    norm2 = 0.0
    diag2 = 0.0
    ratio = 1.0  # ||S_k||^2 / (its diagonal part) at the last exact evaluation
    k = np.int64(0)
    rounds = 0
    row_idx = np.empty(max(block, checks.shape[1]), dtype=np.int64)
    count = block
    for t in range(count):  # first rows: spread over the (spatially sorted) cluster
        row_idx[t] = (t * m) // count
    res = np.empty((row_idx.shape[0], n))
    sel_rows = np.empty(block, dtype=np.int64)
    sel_cols = np.empty(block, dtype=np.int64)
    ready = False  # res already holds the residual rows row_idx[:count]
    while k < max_rank:
        if not ready:
            _residuals(family, xs, ys, row_idx, count, shape, scale, mode, a_vecs, b_vecs,
                       k, res)
        ready = False
        for t in range(count):
            used[row_idx[t]] = True
        found = _cross_pivots(res, count, min(block, max_rank - k), sel_rows, sel_cols)
        if found > 0:
            # the skeleton C W^-1 R of the residual on the pivot rows and columns, as
            # cross terms: A_new = U^-T C', B_new = L^-1 R (W = L U)
            pivots = np.empty((found, found))
            for s in range(found):
                for s2 in range(found):
                    pivots[s, s2] = res[sel_rows[s], sel_cols[s2]]
            left, right = _skeleton_factors(pivots)
            found = left.shape[0]
        candidate = found == 0
        if found > 0:
            col_res = np.empty((found, m))
            _residuals(family, ys, xs, sel_cols, found, shape, scale, mode, b_vecs, a_vecs,
                       k, col_res)
            rows_sel = np.empty((found, n))
            for s in range(found):
                for j in range(n):
                    rows_sel[s, j] = res[sel_rows[s], j]
            scratch, a_vecs, b_vecs = _grow(scratch, a_vecs, b_vecs, k, k + found, cap_limit)
            _copy_rows(a_vecs, k, np.dot(left, col_res), found)
            _copy_rows(b_vecs, k, np.dot(right, rows_sel), found)
            for s in range(found):
                last2 = _squared_norm(a_vecs[k + s]) * _squared_norm(b_vecs[k + s])
                diag2 += last2
            k += found
            # cheap test on the diagonal part of ||S_k||^2 (scaled by the last exact
            # ratio), confirmed with the exact norm from the Gram matrices
            candidate = last2 <= tol2 * diag2 * ratio
            if candidate:
                gram_a = _extend_gram(gram_a, a_vecs, k_gram, k)
                gram_b = _extend_gram(gram_b, b_vecs, k_gram, k)
                k_gram = k
                norm2 = 0.0
                for i in range(k):
                    for j in range(k):
                        norm2 += gram_a[i, j] * gram_b[i, j]
                ratio = norm2 / diag2 if diag2 > 0.0 else 1.0
                candidate = last2 <= tol2 * norm2
        if candidate:
            if rounds >= checks.shape[0]:
                break
            count = np.int64(0)
            for t in range(checks.shape[1]):
                i = checks[rounds, t]
                if not used[i] and not _listed(row_idx, count, i):
                    row_idx[count] = i
                    count += 1
            rounds += 1
            if count == 0:
                break
            # random residual rows: the check, and the next rows when it fails
            _residuals(family, xs, ys, row_idx, count, shape, scale, mode, a_vecs, b_vecs,
                       k, res)
            est = 0.0
            for t in range(count):
                est += _squared_norm(res[t])
            if est * (m / count) <= tol2 * norm2:
                break
            ready = True
        else:
            # next rows: the largest unused entries of the newest columns
            count = np.int64(0)
            for s in range(found):
                avec = a_vecs[k - found + s]
                best, bi = -1.0, -1
                for i in range(m):
                    v = abs(avec[i])
                    if v > best and not used[i] and not _listed(row_idx, count, i):
                        best, bi = v, i
                if bi >= 0:
                    row_idx[count] = bi
                    count += 1
            if count == 0:
                break
    gram_a = _extend_gram(gram_a, a_vecs, k_gram, k)
    gram_b = _extend_gram(gram_b, b_vecs, k_gram, k)
    return (a_vecs[:k], b_vecs[:k], gram_a[:k, :k].copy(), gram_b[:k, :k].copy(), scratch)


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


#: Bytes of address space a worker reserves up front for its ACA factors. Only the
#: pages the factors reach are ever touched (and count as resident), so the reserve is
#: an upper bound on growth, not a cost; NumPy asks the kernel for huge pages on such
#: a buffer (``madvise``), where a buffer grown inside compiled code takes 4 KiB page
#: faults and a copy per doubling (the largest blocks, which come first, paid both).
SCRATCH_RESERVE_BYTES = 2**31


class FactorScratch:
    """A flat buffer that ``aca_compiled`` reuses for its factors (one per worker thread:
    the largest blocks come first, so later blocks find it large enough)."""

    def __init__(self) -> None:
        self.buffer = np.empty(0)

    def reserve(self, *, rank_bound: int, m: int, n: int, block: int) -> None:
        """Make room for ACA factors of an m x n block up to rank ``rank_bound`` + block
        (at most ``SCRATCH_RESERVE_BYTES``, at least 4 blocks of rows: ``aca_compiled``
        grows it past that when needed)."""
        width = m + n
        rows = min(rank_bound + block,
                   max(4 * block, SCRATCH_RESERVE_BYTES // (8 * max(width, 1))))
        if self.buffer.shape[0] < rows * width:
            self.buffer = np.empty(rows * width)


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


def recompress(a: np.ndarray, b: np.ndarray, *, tol: float, gram_a: np.ndarray | None = None,
               gram_b: np.ndarray | None = None) -> LowRank:
    """Truncated SVD of A' B (A: k x m, B: k x n) to relative Frobenius error ``tol``.

    With A' = Q_a R_a and B' = Q_b R_b, R_a R_b' = u s v', the result is
    U = A' R_a^-1 u_r = Q_a u_r and V = B' R_b^-1 v_r s_r, r the smallest rank whose
    discarded singular values have root-sum-square <= tol * ||s||_2. R comes from the
    column-scaled Gram matrix (one BLAS-3 pass over each factor, no explicit Q) when its
    rcond is high enough (``orth.rcond_for``) that the rounding of applying the implicit
    Q stays below tol / 10 and its loss of orthogonality below 1e-2 (which only scales
    the truncation estimate by 1 +- 1e-2: the kept product A' R_a^-1 (u_r s_r v_r')
    R_b^-T B differs from A'B by Q_a (tail) Q_b'); otherwise Cholesky QR passes form a
    better conditioned Y with Q = Y S^-1, or Householder QR forms Q
    (``orth.basis_factor``). ``gram_a``, ``gram_b``: A A' and B B' when ACA already
    formed them.
    """
    k, m = a.shape
    n = b.shape[1]
    if k == 0:
        return LowRank(np.zeros((m, 0)), np.zeros((n, 0)), 0)
    min_rcond = rcond_for(orthogonality=1e-2, rounding=0.1 * tol)
    basis_a = basis_factor(a.T, min_rcond=min_rcond, gram=gram_a)
    basis_b = basis_factor(b.T, min_rcond=min_rcond, gram=gram_b)
    u, s, vt = np.linalg.svd(basis_a.r @ basis_b.r.T, full_matrices=False)
    r = truncation_rank(s, tol)
    u_r = apply_basis(a.T, basis_a, u[:, :r])
    v_r = apply_basis(b.T, basis_b, vt[:r].T * s[:r])
    return LowRank(np.ascontiguousarray(u_r), np.ascontiguousarray(v_r), k)
