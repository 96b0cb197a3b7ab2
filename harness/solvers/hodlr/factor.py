"""Symmetric factorization K = W W' of a HODLR matrix (tree order).

Method of Ambikasaran, O'Neil and Singh, "Fast symmetric factorization of hierarchical
matrices with applications", arXiv 1405.0223 (sec. 3-4), for the GP likelihood as in
Ambikasaran, Foreman-Mackey, Greengard, Hogg and O'Neil, IEEE TPAMI 38 (2016) 252-265:

    K = W_L W_{L-1} ... W_0 W_0' ... W_{L-1}' W_L',    W = W_L W_{L-1} ... W_0,

with W_L = blockdiag(chol(D_j)) over the leaves and, for each level l < L, W_l block
diagonal over the level-l nodes p. At node p (children a, b) the off-diagonal pair,
after all finer factors have been divided out of its bases, is
[[I, U V'], [V U', I]] = I + Q M Q' with U = Q_a R_a, V = Q_b R_b (thin QR),
Q = blockdiag(Q_a, Q_b), M = [[0, G], [G', 0]], G = R_a R_b'. Its symmetric factor
(paper, Lemma 3.1 with orthonormal Q) is

    W_p = I + Q (L - I) Q',   L = chol(I + M) = [[I, 0], [G', L_22]],
    L_22 = chol(I - G' G),

so only the b-rows of a vector change under W_p, W_p^-1 and their transposes, and

    log det K = sum_j log det D_j + 2 sum_p sum log diag(L_22,p)   (TPAMI 2016, eq. 18).

The bases of all coarser levels are divided by W_l as level l is factored, bottom up
(the paper's Algorithm 2); they live in one array, ``basis`` (n x sum of max ranks),
whose level-l columns hold U_a / U_b as divided by the finer factors once level l
is done; Q = U R^-1 is applied through the small triangular R (``NodeFactor``). I - G'G fails to be
positive definite exactly when the compressed matrix is not: that is reported as
``CompressionBreakdownError`` with the level and node.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy.linalg import blas, solve_triangular

from harness.geometry.tree import ClusterTree
from harness.solvers.hodlr.compressed import HodlrMatrix
from harness.solvers.hodlr.orth import basis_factor, cholesky_lower, rcond_for
from harness.solvers.hodlr.parallel import NodePool, for_each_node, map_in_runs, node_pool
from harness.solvers.hodlr.row_blocks import cross_product, subtract_product


class CompressionBreakdownError(np.linalg.LinAlgError):
    """The compressed covariance is not positive definite at some tree level and node."""

    def __init__(self, *, level: int, block: int, rows: tuple[int, int], depth: int,
                 detail: str) -> None:
        self.level, self.block, self.rows, self.depth = level, block, rows, depth
        where = ("leaf" if level == depth else "off-diagonal pair of node")
        super().__init__(
            f"compressed covariance lost positive definiteness at tree level {level} of "
            f"{depth} ({where} {block}, rows {rows[0]}:{rows[1]} in tree order): {detail}; "
            "the compression tolerance is too loose for this matrix's conditioning: "
            "use a tighter tol (e.g. 100x smaller) or a larger nugget")


@dataclass(frozen=True)
class NodeFactor:
    """W_p at one internal node: rank r, G = R_a R_b', L_22 = chol(I - G'G), the
    triangular factors R_a, R_b with Q_a = U_a R_a^-1 (the stored basis columns hold
    U_a, U_b, or, where the Gram matrix was too ill conditioned, the Y of
    ``orth.basis_factor``'s Cholesky QR passes, R then its last factor S), and the
    r x r maps of W_p^-1 (``inverse_maps``)."""

    rank: int
    g: np.ndarray
    l22: np.ndarray
    ra: np.ndarray
    rb: np.ndarray
    solve_a: np.ndarray
    solve_b: np.ndarray

    @classmethod
    def build(cls, rank: int, g: np.ndarray, l22: np.ndarray, ra: np.ndarray,
              rb: np.ndarray) -> NodeFactor:
        """The node factor with its inverse maps computed."""
        solve_a, solve_b = inverse_maps(g, l22, ra, rb)
        return cls(rank, g, l22, ra, rb, solve_a, solve_b)

    @property
    def nbytes(self) -> int:
        return int(sum(a.nbytes for a in (self.g, self.l22, self.ra, self.rb, self.solve_a,
                                          self.solve_b)))


def inverse_maps(g: np.ndarray, l22: np.ndarray, ra: np.ndarray, rb: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """(A_a, A_b) with W_p^-1 x = x - [0; U_b (A_a U_a' x_a + A_b U_b' x_b)].

    Multiplying out W_p^-1 (t = Q' x = R^-T U' x, w = L_22^-1 (t_b - G' t_a),
    x_b -= Q_b (t_b - w); module docstring):

        A_a = R_b^-1 L_22^-1 G' R_a^-T,    A_b = R_b^-1 (I - L_22^-1) R_b^-T,

    and W_p'^-1 x = x - [U_a A_a' U_b' x_b; U_b A_b' U_b' x_b]. With these r x r
    matrices every product with W_p^-1 or W_p'^-1 is three (two) products with the
    bases and no triangular solve of the vectors' width (OpenBLAS's triangular solves
    with a small r x r factor run far below its matrix-product rate). Only r x r
    inverses are formed; their rounding is that of the substitutions they replace
    (Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., 2002, sec. 14.2).
    """
    eye = np.eye(g.shape[0])
    l22_inv = solve_triangular(l22, eye, lower=True, check_finite=False)
    rb_inv = solve_triangular(rb, eye, lower=False, check_finite=False)
    ra_inv = solve_triangular(ra, eye, lower=False, check_finite=False)
    return rb_inv @ (l22_inv @ g.T) @ ra_inv.T, rb_inv @ (eye - l22_inv) @ rb_inv.T


def _qt(u: np.ndarray, r: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Q' x = R^-T (U' x)."""
    return solve_triangular(r, u.T @ x, trans="T", lower=False, check_finite=False)


def _q(u: np.ndarray, r: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Q t = U (R^-1 t)."""
    return u @ solve_triangular(r, t, lower=False, check_finite=False)


@dataclass(frozen=True)
class SymmetricFactor:
    """W with K = W W' in tree order (see module docstring)."""

    tree: ClusterTree
    leaf_chol: tuple[np.ndarray, ...]
    basis: np.ndarray
    offsets: np.ndarray
    nodes: tuple[tuple[NodeFactor, ...], ...]
    logdet: float

    @property
    def nbytes(self) -> int:
        return int(self.basis.nbytes + sum(c.nbytes for c in self.leaf_chol)
                   + sum(f.nbytes for lv in self.nodes for f in lv))

    def _node_views(self, level: int, j: int) -> tuple[slice, slice, np.ndarray, np.ndarray]:
        b = self.tree.bounds[level + 1]
        s, mid, e = int(b[2 * j]), int(b[2 * j + 1]), int(b[2 * j + 2])
        r = self.nodes[level][j].rank
        c0 = int(self.offsets[level])
        return (slice(s, mid), slice(mid, e), self.basis[s:mid, c0:c0 + r],
                self.basis[mid:e, c0:c0 + r])

    def _leaves(self) -> list[tuple[int, int, np.ndarray]]:
        b = self.tree.bounds[self.tree.depth]
        return [(int(b[j]), int(b[j + 1]), c) for j, c in enumerate(self.leaf_chol)]

    def _leaf_pass(self, pool: NodePool | None,
                   step: Callable[[np.ndarray, np.ndarray], np.ndarray],
                   y: np.ndarray) -> None:
        def leaf(item: tuple[int, int, np.ndarray]) -> None:
            s, e, c = item
            y[s:e] = step(c, y[s:e])
        for_each_node(pool, leaf, self._leaves())

    def _level_pass(self, pool: NodePool | None, level: int,
                    step: Callable[..., None], y: np.ndarray) -> None:
        def node(j: int) -> None:
            f = self.nodes[level][j]
            if f.rank:
                ia, ib, ua, ub = self._node_views(level, j)
                step(f, ua, ub, y[ia], y[ib])
        for_each_node(pool, node, range(len(self.nodes[level])))

    def apply(self, x: np.ndarray, *, threads: int = 1) -> np.ndarray:
        """W x (x: (n, k), tree order): W_0 first, leaves last."""
        y = x.copy()
        with node_pool(threads) as pool:
            for level in range(self.tree.depth):
                self._level_pass(pool, level, _forward_update, y)
            self._leaf_pass(pool, lambda c, v: c @ v, y)
        return y

    def apply_transpose(self, x: np.ndarray, *, threads: int = 1) -> np.ndarray:
        """W' x: leaves first, then W_{L-1}' ... W_0'."""
        y = x.copy()
        with node_pool(threads) as pool:
            self._leaf_pass(pool, lambda c, v: c.T @ v, y)
            for level in range(self.tree.depth - 1, -1, -1):
                self._level_pass(pool, level, _transpose_update, y)
        return y

    def solve(self, x: np.ndarray, *, threads: int = 1) -> np.ndarray:
        """W^-1 x: leaves first, then W_{L-1}^-1 ... W_0^-1."""
        y = x.copy()
        with node_pool(threads) as pool:
            self._leaf_pass(pool, _leaf_solve, y)
            for level in range(self.tree.depth - 1, -1, -1):
                self._level_pass(pool, level, _inverse_update, y)
        return y

    def solve_transpose(self, x: np.ndarray, *, threads: int = 1) -> np.ndarray:
        """W'^-1 x: W_0'^-1 first, leaves last."""
        y = x.copy()
        with node_pool(threads) as pool:
            for level in range(self.tree.depth):
                self._level_pass(pool, level, _inverse_transpose_update, y)
            self._leaf_pass(pool, _leaf_solve_transpose, y)
        return y


def _leaf_solve(c: np.ndarray, v: np.ndarray) -> np.ndarray:
    """L^-1 v for a leaf's Cholesky factor L (Fortran order, from dpotrf) and a C-ordered
    row block v, in place where BLAS can: v' is a Fortran view, and X' L' = v' is one
    dtrsm from the right. dtrsm, not scipy's ``solve_triangular``, whose checks cost
    more than a 128-row leaf's solve (development measurement: 781 leaves of 128 rows, 64
    columns, 0.04 s against 0.05-0.07 s)."""
    return blas.dtrsm(1.0, c, v.T, side=1, lower=1, trans_a=1, overwrite_b=1).T


def _leaf_solve_transpose(c: np.ndarray, v: np.ndarray) -> np.ndarray:
    """L'^-1 v as ``_leaf_solve``: X' L = v'."""
    return blas.dtrsm(1.0, c, v.T, side=1, lower=1, trans_a=0, overwrite_b=1).T


def _forward_update(f: NodeFactor, ua: np.ndarray, ub: np.ndarray, xa: np.ndarray,
                    xb: np.ndarray) -> None:
    """x <- W_p x in place: x_b += Q_b (G' t_a + L_22 t_b - t_b), t = Q' x."""
    ta, tb = _qt(ua, f.ra, xa), _qt(ub, f.rb, xb)
    xb += _q(ub, f.rb, f.g.T @ ta + f.l22 @ tb - tb)


def _transpose_update(f: NodeFactor, ua: np.ndarray, ub: np.ndarray, xa: np.ndarray,
                      xb: np.ndarray) -> None:
    """x <- W_p' x in place: x_a += Q_a G t_b, x_b += Q_b (L_22' t_b - t_b)."""
    tb = _qt(ub, f.rb, xb)
    xa += _q(ua, f.ra, f.g @ tb)
    xb += _q(ub, f.rb, f.l22.T @ tb - tb)


def _inverse_transpose_update(f: NodeFactor, ua: np.ndarray, ub: np.ndarray,
                              xa: np.ndarray, xb: np.ndarray) -> None:
    """x <- W_p'^-1 x in place: c = U_b' x_b, x_a -= U_a A_a' c, x_b -= U_b A_b' c."""
    c = ub.T @ xb
    xa -= ua @ (f.solve_a.T @ c)
    xb -= ub @ (f.solve_b.T @ c)


def _inverse_update(f: NodeFactor, ua: np.ndarray, ub: np.ndarray, xa: np.ndarray,
                    xb: np.ndarray) -> None:
    """x <- W_p^-1 x in place: x_b -= U_b (A_a U_a' x_a + A_b U_b' x_b)."""
    xb -= ub @ (f.solve_a @ (ua.T @ xa) + f.solve_b @ (ub.T @ xb))


def implicit_rcond(tol: float) -> float:
    """Smallest rcond of the scaled Gram factor for which Q = U R^-1 is kept implicit.

    Q'Q - I ~ eps cond^2 (Cholesky QR) perturbs W_p W_p' by about that much in the
    whitened frame, where the compression error itself is at least tol, so it is held
    to tol; the rounding of applying Q = U R^-1 (~ eps cond) to tol / 100
    (``orth.rcond_for``). Holding the orthogonality to tol / 100 instead formed Q
    explicitly at most nodes for tol <= 1e-8 (rcond >= 0.5): at n = 16,000 it gave the
    same log-likelihood errors to three digits at tol 1e-6, 1e-8 and 1e-10 (white-noise
    and smooth-field values, 5 seeds) with a factorization 1.7 times as long at 1e-8
    (``benchmarks/results/hodlr_variants.json``, variant ``strict_orthogonality``).
    """
    return rcond_for(orthogonality=tol, rounding=0.01 * tol)


def factor_symmetric(hodlr: HodlrMatrix, *, tol: float, threads: int) -> SymmetricFactor:
    """W W' = K for the HODLR matrix K (Algorithm 2 of arXiv 1405.0223, bottom up).

    ``tol`` (the compression tolerance) sets how orthonormal the implicit Q factors
    must be (``implicit_rcond``).

    Raises
    ------
    CompressionBreakdownError
        When a leaf block or a level's I - G'G is not numerically positive definite.
    """
    tree = hodlr.tree
    depth, n = tree.depth, tree.n
    min_rcond = implicit_rcond(tol)
    max_ranks = [max((p.rank for p in level), default=0) for level in hodlr.pairs]
    offsets = np.concatenate([[0], np.cumsum(max_ranks, dtype=np.int64)]).astype(np.int64)
    # not np.zeros: each worker zeroes its own leaves' rows (first touch in parallel, on
    # the huge pages NumPy requests for large buffers)
    basis = np.empty((n, int(offsets[-1])))
    leaf_b = tree.bounds[depth]

    def fill_rows(j: int, s: int, e: int) -> None:
        # the rows of leaf j in every level's U (a-child) or V (b-child): written row
        # block by row block, by the workers (column block by column block was 3 s of
        # one thread at n = 131,072)
        basis[s:e] = 0.0  # the columns past a pair's rank, up to its level's maximum
        for level, pairs in enumerate(hodlr.pairs):
            child = j >> (depth - level - 1)  # the leaf's ancestor at tree level level + 1
            p = pairs[child >> 1]
            side = p.u if child % 2 == 0 else p.v
            start = int(tree.bounds[level + 1][child])
            c0 = int(offsets[level])
            basis[s:e, c0:c0 + p.rank] = side[s - start:e - start]

    def leaf(j: int) -> tuple[np.ndarray, float]:
        s, e = int(leaf_b[j]), int(leaf_b[j + 1])
        fill_rows(j, s, e)
        c, info = cholesky_lower(hodlr.leaves[j])
        if info != 0:
            raise CompressionBreakdownError(
                level=depth, block=j, rows=(s, e), depth=depth,
                detail=f"the dense leaf block is not positive definite (dpotrf info={info})")
        if basis.shape[1]:
            rows = basis[s:e].T  # Fortran view of a C block: in-place X <- L^-1 X
            blas.dtrsm(1.0, c, rows, side=1, lower=1, trans_a=1, overwrite_b=1)
        return c, 2.0 * float(np.sum(np.log(np.diag(c))))

    def node(level: int, j: int, rank: int, halves: ThreadPoolExecutor | None = None
             ) -> tuple[NodeFactor, float]:
        # halves: a pool to factor the two children's bases on at once (the root)
        b = tree.bounds[level + 1]
        s, mid, e = int(b[2 * j]), int(b[2 * j + 1]), int(b[2 * j + 2])
        c0 = int(offsets[level])
        if rank == 0:
            empty = np.zeros((0, 0))
            return NodeFactor(0, empty, empty, empty, empty, empty, empty), 0.0
        ua, ub = basis[s:mid, c0:c0 + rank], basis[mid:e, c0:c0 + rank]
        if halves is not None:
            half_b = halves.submit(basis_factor, ub, min_rcond=min_rcond)
            basis_a = basis_factor(ua, min_rcond=min_rcond)
            basis_b = half_b.result()
        else:
            basis_a, basis_b = (basis_factor(ua, min_rcond=min_rcond),
                                basis_factor(ub, min_rcond=min_rcond))
        g = basis_a.r @ basis_b.r.T
        l22, info = cholesky_lower(np.eye(rank) - g.T @ g)
        if info != 0:
            norm = float(np.linalg.norm(g, 2))
            raise CompressionBreakdownError(
                level=level, block=j, rows=(s, e), depth=depth,
                detail=f"the scaled off-diagonal coupling has 2-norm {norm:.6g} >= 1 "
                       f"(I - G'G not positive definite, dpotrf info={info})")
        # where Cholesky QR passes formed Y, the basis columns hold Y and Q = Y S^-1
        if basis_a.explicit is not None:
            ua[...] = basis_a.explicit
        if basis_b.explicit is not None:
            ub[...] = basis_b.explicit
        f = NodeFactor.build(rank, g, l22, basis_a.last, basis_b.last)
        if c0:  # the ancestors' columns of these rows <- W_p^-1 (them)
            rows_a, rows_b, own = slice(s, mid), slice(mid, e), slice(c0, c0 + rank)
            coefficients = (f.solve_a @ cross_product(basis, rows_a, own, slice(0, c0))
                            + f.solve_b @ cross_product(basis, rows_b, own, slice(0, c0)))
            subtract_product(basis, rows_b, slice(0, c0), own, coefficients)
        return f, 2.0 * float(np.sum(np.log(np.diag(l22))))

    def rows(level: int) -> Callable[[int], int]:  # node j's rows at ``level``
        return lambda j: int(tree.bounds[level][j + 1] - tree.bounds[level][j])

    with node_pool(threads) as pool:
        leaf_out = map_in_runs(pool, leaf, range(leaf_b.shape[0] - 1), rows=rows(depth))
        node_out: list[list[tuple[NodeFactor, float]]] = [[] for _ in range(depth)]
        for level in range(depth - 1, 0, -1):
            ranks = [p.rank for p in hodlr.pairs[level]]

            def level_node(j: int, lv: int = level, rk: list[int] = ranks
                           ) -> tuple[NodeFactor, float]:
                return node(lv, j, rk[j])

            node_out[level] = map_in_runs(pool, level_node, range(len(ranks)),
                                          rows=rows(level))
        if depth:  # one node: on this thread, its two halves' bases on the pool
            node_out[0] = [node(0, 0, hodlr.pairs[0][0].rank,
                                None if pool is None else pool.executor)]
    logdet = sum(ld for _, ld in leaf_out) + sum(ld for lv in node_out for _, ld in lv)
    return SymmetricFactor(tree=tree, leaf_chol=tuple(c for c, _ in leaf_out), basis=basis,
                           offsets=offsets,
                           nodes=tuple(tuple(f for f, _ in lv) for lv in node_out),
                           logdet=float(logdet))
