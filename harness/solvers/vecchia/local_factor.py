"""Columns of the KL-minimizing inverse Cholesky factor, their derivatives, and the
Vecchia log-likelihood's score and Fisher information, one supernode at a time.

Column k of U, with rows s = (c, k) (its earlier rows c, then k), is in closed form
(Schafer, Katzfuss and Owhadi 2021, SIAM J. Sci. Comput. 43(3), Thm. 2.1)

    u = A^-1 e_k / sqrt(e_k' A^-1 e_k),   A = Sigma[s, s],

which is Vecchia's (1988, JRSS-B 50, eq. 3) conditional y_k | y_c written as a column:
u_k = d^-1/2 and u_c = -b d^-1/2 with b = A_cc^-1 A_ck, d = A_kk - A_kc b. With the
upper Cholesky factor A = R'R of a supernode's set, the column of the member at place
t is u = R_t^-1 e_t (R_t the leading (t+1) x (t+1) block), one back substitution.

Derivatives, for dA = dSigma/dtheta_i [s, s] (``Kernel`` derivative blocks),

    du = -A^-1 dA u + 1/2 (u' dA u) u,

from d(A^-1 e) = -A^-1 dA A^-1 e and d(e'A^-1 e) = -u' dA u (e'A^-1 e).

Log-likelihood per column (Vecchia 1988, eq. 3; Guinness 2021, Stat. Comput. 31, eq. 3):
log p(y_k | y_c) = log u_k - 1/2 (u'y_s)^2 - 1/2 log 2 pi, so with r_i = du_k / u_k

    dL/dtheta_i = sum_k [ r_i - (u'y_s)(du_i'y_s) ].

Fisher information (Guinness 2021, sec. 3: the sum over columns of the information of
the conditional y_k | y_c with y_s ~ N(0, A), i.e. of the joint block minus that of the
conditioning block, 1/2 tr(A^-1 dA_i A^-1 dA_j) - 1/2 tr(A_cc^-1 dA_cc,i A_cc^-1
dA_cc,j)), evaluated here in O(m^2) per column rather than O(m^3): with
a_i = du_i - r_i u (zero at k; -d^-1/2 db_i on c) and dd_i / d = -2 r_i,

    F_ij = sum_k [ (R_t a_i)'(R_t a_j) + 2 r_i r_j ],

since db_i' A_cc db_j / d + 1/2 (dd_i / d)(dd_j / d) = a_i' A a_j + 2 r_i r_j and
A = R_t'R_t on the leading block.

The data enter only through u'Y and du_i'Y for the columns of Y = [y, F] (data, then
the mean design), so one pass gives the sums needed by the GLS profile likelihood:
(U'Y), sum_k (u'Y)'(du_i'Y) and sum_k r_i; no factor is stored when only these are
wanted.
"""

from __future__ import annotations

import numba
import numpy as np

from harness.model.kernels.rows import VALUE, eval_row

#: ``status`` of a supernode whose local Cholesky factorization succeeded.
OK = -1


@numba.njit(inline="always", cache=True, fastmath=False)
def _cholesky_upper(r: np.ndarray, m: int) -> int:
    """In place A = R'R on the upper triangle (right-looking); the failing place or -1."""
    for j in range(m):
        piv = r[j, j]
        if not (piv > 0.0) or not np.isfinite(piv):
            return j
        rjj = np.sqrt(piv)
        r[j, j] = rjj
        inv = 1.0 / rjj
        for c in range(j + 1, m):
            r[j, c] *= inv
        for i in range(j + 1, m):
            f = r[j, i]
            if f != 0.0:
                for c in range(i, m):
                    r[i, c] -= f * r[j, c]
    return -1


@numba.njit(parallel=True, cache=True)
def supernode_pass(xs, family, shape, s2, tau2, ls_modes, has_nugget,
                   member_ptr, members, set_ptr, set_rows, col_ptr,
                   want_u, u_vals, want_du, du_vals,
                   want_stats, ydata, uy, quad, trace, fisher,
                   diag, status):
    """Compute, per supernode in parallel, what the flags ask for (module docstring).

    Parameters (all arrays in maximin positions)
    ----------
    xs : (n, d) scaled coordinates (x / l); family, shape : compiled kernel code and shape;
    s2, tau2 : variance and nugget; ls_modes : ``rows`` modes of the length-scale
    derivatives; has_nugget : whether log tau2 is a parameter (the last);
    member_ptr, members, set_ptr, set_rows, col_ptr : ``supernodes.Supernodes``.
    Outputs: u_vals (nnz), du_vals (p, nnz), uy (n, c) = U'Y, quad (n_sn, p, c, c),
    trace (n_sn, p) = sum r_i, fisher (n_sn, p, p) (empty quad: U'Y only, no derivative
    blocks), diag (n) = u_kk, status (n_sn) =
    ``OK`` or the failing place in the supernode's set.
    """
    n_sn = member_ptr.shape[0] - 1
    d = xs.shape[1]
    nls = ls_modes.shape[0]
    p = 1 + nls + (1 if has_nugget else 0)
    nc = ydata.shape[1]
    deriv = want_du or (want_stats and quad.shape[0] > 0)
    for s in numba.prange(n_sn):
        a0 = set_ptr[s]
        m = set_ptr[s + 1] - a0
        xl = np.empty((m, d))
        for a in range(m):
            for q in range(d):
                xl[a, q] = xs[set_rows[a0 + a], q]
        r = np.empty((m, m))
        buf = np.empty(m)
        for a in range(m):
            eval_row(family, xl[a], xl, shape, s2, VALUE, buf, a, m)
            for b in range(a, m):
                r[a, b] = buf[b]
                r[b, a] = buf[b]
        dblocks = np.empty((p if deriv else 0, m, m))
        if deriv:
            dblocks[0] = r
            for li in range(nls):
                for a in range(m):
                    eval_row(family, xl[a], xl, shape, s2, ls_modes[li], buf, a, m)
                    for b in range(a, m):
                        dblocks[1 + li, a, b] = buf[b]
                        dblocks[1 + li, b, a] = buf[b]
            if has_nugget:
                dblocks[p - 1] = 0.0
                for a in range(m):
                    dblocks[p - 1, a, a] = tau2
        for a in range(m):
            r[a, a] += tau2
        fail = _cholesky_upper(r, m)
        status[s] = fail
        if fail != OK:
            continue
        t = 0
        u = np.empty(m)
        v = np.empty(m)
        w = np.empty(m)
        du = np.empty((p, m))
        g = np.empty((p, m))
        rr = np.empty(p)
        wy = np.empty(nc)
        for a in range(member_ptr[s], member_ptr[s + 1]):
            k = members[a]
            while set_rows[a0 + t] != k:
                t += 1
            # u = R_t^-1 e_t
            u[t] = 1.0 / r[t, t]
            for i in range(t - 1, -1, -1):
                acc = 0.0
                for q in range(i + 1, t + 1):
                    acc += r[i, q] * u[q]
                u[i] = -acc / r[i, i]
            diag[k] = u[t]
            c0 = col_ptr[k]
            if want_u:
                for i in range(t + 1):
                    u_vals[c0 + i] = u[i]
            if want_stats:
                for c in range(nc):
                    acc = 0.0
                    for i in range(t + 1):
                        acc += u[i] * ydata[set_rows[a0 + i], c]
                    wy[c] = acc
                    uy[k, c] = acc
            if not deriv:
                continue
            for pi in range(p):
                blk = dblocks[pi]
                # v = dA u on the leading block; alpha = u' dA u
                alpha = 0.0
                for i in range(t + 1):
                    acc = 0.0
                    for q in range(t + 1):
                        acc += blk[i, q] * u[q]
                    v[i] = acc
                    alpha += u[i] * acc
                # w = A_t^-1 v: R_t' z = v (forward, by columns of R), then R_t w = z
                for q in range(t + 1):
                    zq = v[q] / r[q, q]
                    v[q] = zq
                    for i in range(q + 1, t + 1):
                        v[i] -= zq * r[q, i]
                for i in range(t, -1, -1):
                    acc = v[i]
                    for q in range(i + 1, t + 1):
                        acc -= r[i, q] * w[q]
                    w[i] = acc / r[i, i]
                for i in range(t + 1):
                    du[pi, i] = -w[i] + 0.5 * alpha * u[i]
                if want_du:
                    for i in range(t + 1):
                        du_vals[pi, c0 + i] = du[pi, i]
                if want_stats:
                    ri = du[pi, t] / u[t]
                    rr[pi] = ri
                    trace[s, pi] += ri
                    for c in range(nc):
                        acc = 0.0
                        for i in range(t + 1):
                            acc += du[pi, i] * ydata[set_rows[a0 + i], c]
                        for c2 in range(nc):
                            quad[s, pi, c2, c] += wy[c2] * acc
                    # g = R_t (du - r_i u)
                    for i in range(t + 1):
                        acc = 0.0
                        for q in range(i, t + 1):
                            acc += r[i, q] * (du[pi, q] - ri * u[q])
                        g[pi, i] = acc
            if want_stats:
                for pi in range(p):
                    for pj in range(pi, p):
                        acc = 2.0 * rr[pi] * rr[pj]
                        for i in range(t + 1):
                            acc += g[pi, i] * g[pj, i]
                        fisher[s, pi, pj] += acc
                        if pj != pi:
                            fisher[s, pj, pi] += acc
