"""Supernodal aggregation of the columns of the inverse Cholesky factor.

Schafer, Katzfuss and Owhadi (2021, SIAM J. Sci. Comput. 43(3), sec. 3.3 and Alg. 3.2)
group nearby columns of similar length scale into supernodes that share one index set,
so that one dense Cholesky factorization serves every column of the group. The rule
here, in the coarse-to-fine order: walk the positions in order; position j joins the
supernode founded by the first founder f in its conditioning set c(j) (the earliest
qualifying one) with

    l_f <= lambda * l_j,

and founds a supernode of its own when there is none. A supernode's set is the sorted
union of its members and their conditioning sets; member k at place t of that set
conditions on the set's first t entries (all earlier than k), a superset of c(k): the
aggregation only adds conditioning, so it refines the approximation and never drops a
neighbour. One Cholesky factorization of the set's covariance (m^3 / 3 flops) then
gives all member columns by back substitution (m^2 each): with as many members as
entries per column the work per column is O(m^2) instead of O(m^3) (the paper's
O(n rho^{2d}) against O(n rho^{3d})).

``lam = None`` keeps every column on its own (set = c(k) and k).
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np


@dataclass(frozen=True)
class Supernodes:
    """Column groups and the sparsity of the factor U they give.

    Attributes
    ----------
    member_ptr, members : ndarray of int64
        Supernode s has columns ``members[member_ptr[s]:member_ptr[s + 1]]``, ascending.
    set_ptr, set_rows : ndarray
        Its shared set ``set_rows[set_ptr[s]:set_ptr[s + 1]]`` (positions, ascending).
    col_ptr, col_rows : ndarray
        Column k of U has rows ``col_rows[col_ptr[k]:col_ptr[k + 1]]``, ascending, k last.
    lam : float or None
    """

    member_ptr: np.ndarray
    members: np.ndarray
    set_ptr: np.ndarray
    set_rows: np.ndarray
    col_ptr: np.ndarray
    col_rows: np.ndarray
    lam: float | None

    @property
    def count(self) -> int:
        return int(self.member_ptr.shape[0] - 1)

    @property
    def nnz(self) -> int:
        return int(self.col_ptr[-1])

    @property
    def nbytes(self) -> int:
        return int(sum(a.nbytes for a in (self.member_ptr, self.members, self.set_ptr,
                                          self.set_rows, self.col_ptr, self.col_rows)))


@numba.njit(cache=True)
def _assign(ptr: np.ndarray, rows: np.ndarray, lengths: np.ndarray, lam: float) -> np.ndarray:
    n = ptr.shape[0] - 1
    group = np.empty(n, np.int64)
    founded = np.full(n, -1, np.int64)
    count = 0
    for j in range(n):
        f = -1
        for e in range(ptr[j], ptr[j + 1]):
            q = rows[e]
            if founded[q] >= 0 and lengths[q] <= lam * lengths[j]:
                f = q
                break
        if f < 0:
            founded[j] = count
            group[j] = count
            count += 1
        else:
            group[j] = founded[f]
    return group


@numba.njit(cache=True)
def _shared_set(ptr: np.ndarray, rows: np.ndarray, member_ptr: np.ndarray,
                members: np.ndarray, s: int) -> np.ndarray:
    """The sorted union of supernode s's members and their conditioning rows."""
    total = 0
    for a in range(member_ptr[s], member_ptr[s + 1]):
        k = members[a]
        total += ptr[k + 1] - ptr[k] + 1
    buf = np.empty(total, np.int64)
    c = 0
    for a in range(member_ptr[s], member_ptr[s + 1]):
        k = members[a]
        for e in range(ptr[k], ptr[k + 1]):
            buf[c] = rows[e]
            c += 1
        buf[c] = k
        c += 1
    return np.unique(buf)


@numba.njit(parallel=True, cache=True)
def _sets(ptr: np.ndarray, rows: np.ndarray, member_ptr: np.ndarray,
          members: np.ndarray) -> tuple:
    n_sn = member_ptr.shape[0] - 1
    sizes = np.zeros(n_sn + 1, np.int64)
    for s in numba.prange(n_sn):
        sizes[s + 1] = _shared_set(ptr, rows, member_ptr, members, s).shape[0]
    set_ptr = np.cumsum(sizes)
    set_rows = np.empty(set_ptr[n_sn], np.int32)
    n = ptr.shape[0] - 1
    col_len = np.zeros(n + 1, np.int64)
    for s in numba.prange(n_sn):
        u = _shared_set(ptr, rows, member_ptr, members, s)
        t = 0
        for a in range(u.shape[0]):
            set_rows[set_ptr[s] + a] = u[a]
        for a in range(member_ptr[s], member_ptr[s + 1]):
            k = members[a]
            while u[t] != k:
                t += 1
            col_len[k + 1] = t + 1
    col_ptr = np.cumsum(col_len)
    col_rows = np.empty(col_ptr[n], np.int32)
    for s in numba.prange(n_sn):
        a0 = set_ptr[s]
        for a in range(member_ptr[s], member_ptr[s + 1]):
            k = members[a]
            m = col_ptr[k + 1] - col_ptr[k]
            for t in range(m):
                col_rows[col_ptr[k] + t] = set_rows[a0 + t]
    return set_ptr, set_rows, col_ptr, col_rows


def aggregate(ptr: np.ndarray, rows: np.ndarray, lengths: np.ndarray, *,
              lam: float | None) -> Supernodes:
    """Supernodes of the conditioning sets ``(ptr, rows)`` (module docstring).

    Parameters
    ----------
    ptr, rows : ndarray
        c(k) = ``rows[ptr[k]:ptr[k + 1]]`` ascending (``sparsity.ConditioningPattern``).
    lengths : ndarray
        Maximin length scales.
    lam : float >= 1 or None
        Aggregation factor lambda; None for no aggregation.
    """
    n = ptr.shape[0] - 1
    if lam is None:
        group = np.arange(n, dtype=np.int64)
    else:
        if not lam >= 1.0:
            raise ValueError(f"lam (supernode aggregation factor) must be >= 1 or None, "
                             f"got {lam!r}")
        group = _assign(ptr, rows, np.asarray(lengths, dtype=float), float(lam))
    members = np.argsort(group, kind="stable").astype(np.int64)
    n_sn = int(group.max()) + 1 if n else 0
    member_ptr = np.zeros(n_sn + 1, dtype=np.int64)
    np.cumsum(np.bincount(group, minlength=n_sn), out=member_ptr[1:])
    set_ptr, set_rows, col_ptr, col_rows = _sets(ptr, rows, member_ptr, members)
    return Supernodes(member_ptr=member_ptr, members=members, set_ptr=set_ptr,
                      set_rows=set_rows, col_ptr=col_ptr, col_rows=col_rows,
                      lam=None if lam is None else float(lam))
