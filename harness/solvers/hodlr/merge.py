"""Merging low-rank approximations of the four quarters of a block into one.

A large off-diagonal block K = Sigma[I, J] is cheaper to compress quarter by quarter
(I = I_0 + I_1, J = J_0 + J_1, both split as in the cluster tree): ACA costs about
k^2 (m + n) and, for clusters that touch along an interface, each quarter has a
rank well below k and half the size (two of the four only touch at a corner). The
quarter approximations K_st ~ U_st V_st' are then merged (the usual agglomeration of
low-rank blocks in hierarchical-matrix arithmetic; Grasedyck and Hackbusch,
Computing 70 (2003), sec. 2.5, "truncation of block matrices"):

    [U_s0, U_s1] = Q_s R_s,   [V_0t, V_1t] = P_t T_t        (thin QR, s, t = 0, 1)
    K ~ blockdiag(Q_0, Q_1) C blockdiag(P_0, P_1)',  C_st = R_s[:, st] T_t[:, st]'
    C = u sigma w',  U = blockdiag(Q_0, Q_1) u_r,  V = blockdiag(P_0, P_1) w_r sigma_r

truncated to the smallest r with sqrt(sum_{i>r} sigma_i^2) <= tol ||sigma||_2. As in
``aca.recompress`` the R factors come from column-scaled Gram matrices and Q is never
formed unless the Gram matrix is too ill conditioned for ``tol`` (``orth.basis_factor``).
"""

from __future__ import annotations

import numpy as np

from harness.solvers.hodlr.aca import LowRank, truncation_rank
from harness.solvers.hodlr.orth import apply_basis, basis_factor, rcond_for


def _basis(parts: list[np.ndarray], min_rcond: float
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """[parts] = Q R: returns (stacked, R, explicit Q or None when Q = stacked R^-1)."""
    stacked = np.hstack(parts)
    r, q = basis_factor(stacked, min_rcond=min_rcond)
    return stacked, r, q


def merge_quarters(quarters: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]],
                   *, tol: float) -> LowRank:
    """One low-rank approximation of [[K_00, K_01], [K_10, K_11]].

    Parameters
    ----------
    quarters : dict
        ``quarters[s, t] = (U_st, V_st)`` with K_st ~ U_st V_st' (tall factors).
    tol : float
        Relative Frobenius truncation tolerance of the merged block.
    """
    min_rcond = rcond_for(orthogonality=1e-2, rounding=0.01 * tol)
    rows = [_basis([quarters[s, 0][0], quarters[s, 1][0]], min_rcond) for s in (0, 1)]
    cols = [_basis([quarters[0, t][1], quarters[1, t][1]], min_rcond) for t in (0, 1)]
    rsz = [r[1].shape[0] for r in rows]
    csz = [c[1].shape[0] for c in cols]
    core = np.zeros((sum(rsz), sum(csz)))
    for s in (0, 1):
        for t in (0, 1):
            k_st = quarters[s, t][0].shape[1]
            # column ranges of quarter (s, t) inside the stacked row / column bases
            rs = slice(0, k_st) if t == 0 else slice(quarters[s, 0][0].shape[1], None)
            ct = slice(0, k_st) if s == 0 else slice(quarters[0, t][1].shape[1], None)
            block = rows[s][1][:, rs] @ cols[t][1][:, ct].T
            core[sum(rsz[:s]):sum(rsz[:s + 1]), sum(csz[:t]):sum(csz[:t + 1])] += block
    m = sum(quarters[s, 0][0].shape[0] for s in (0, 1))
    n = sum(quarters[0, t][1].shape[0] for t in (0, 1))
    if core.size == 0:
        return LowRank(np.zeros((m, 0)), np.zeros((n, 0)), 0)
    u, sig, wt = np.linalg.svd(core, full_matrices=False)
    r = truncation_rank(sig, tol)
    left, right = u[:, :r], wt[:r].T * sig[:r]
    out_u = np.vstack([apply_basis(*rows[s], left[sum(rsz[:s]):sum(rsz[:s + 1])]) for s in (0, 1)])
    out_v = np.vstack([apply_basis(*cols[t], right[sum(csz[:t]):sum(csz[:t + 1])])
                       for t in (0, 1)])
    aca_rank = sum(quarters[key][0].shape[1] for key in quarters)
    return LowRank(np.ascontiguousarray(out_u), np.ascontiguousarray(out_v), aca_rank)
