"""A HODLR matrix: dense leaf blocks plus one low-rank pair per internal tree node.

For a cluster tree of depth L (``harness.geometry.tree``) the matrix in tree order is

    K = blockdiag(D_1 .. D_{2^L}) + sum over internal nodes p with children a, b of
        [[0, U_p V_p'], [V_p U_p', 0]] on the rows/columns of p,

(Ambikasaran, O'Neil and Singh, arXiv 1405.0223, eq. 3.1), U_p spanning the rows of a,
V_p those of b. Built from ``KernelEntries`` with each off-diagonal block compressed
to its own relative Frobenius tolerance (``aca`` module). Everything here is in tree
order; callers permute.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

from harness.geometry.tree import ClusterTree
from harness.solvers.hodlr.aca import FactorScratch, LowRank
from harness.solvers.hodlr.aca_compile import prepare_aca
from harness.solvers.hodlr.entries import KernelEntries
from harness.solvers.hodlr.parallel import for_each_node, map_in_runs, node_pool

CHECK_ROUNDS = 8
CHECK_ROWS = 8


@dataclass(frozen=True)
class LevelRanks:
    """Off-diagonal ranks at one tree level (nodes whose children form the pairs)."""

    level: int
    max: int
    mean: float
    blocks: int

    def to_dict(self) -> dict[str, float]:
        return {"level": self.level, "max": self.max, "mean": self.mean, "blocks": self.blocks}


@dataclass(frozen=True)
class HodlrMatrix:
    """Leaf blocks ``leaves[j]`` and pairs ``pairs[l][j]`` (node j of level l) in tree order."""

    tree: ClusterTree
    leaves: tuple[np.ndarray, ...]
    pairs: tuple[tuple[LowRank, ...], ...]

    @property
    def nbytes(self) -> int:
        return int(sum(d.nbytes for d in self.leaves)
                   + sum(p.nbytes for level in self.pairs for p in level))

    @property
    def ranks(self) -> tuple[LevelRanks, ...]:
        out = []
        for level, pairs in enumerate(self.pairs):
            r = np.array([p.rank for p in pairs])
            out.append(LevelRanks(level, int(r.max()), float(r.mean()), int(r.size)))
        return tuple(out)

    def matvec(self, x: np.ndarray, *, threads: int = 1) -> np.ndarray:
        """K x for x of shape (n, k) in tree order (the nodes of a level on ``threads``
        workers)."""
        tree = self.tree
        y = np.empty_like(x)
        leaf_bounds = tree.bounds[tree.depth]

        def leaf(j: int) -> None:
            s, e = leaf_bounds[j], leaf_bounds[j + 1]
            y[s:e] = self.leaves[j] @ x[s:e]

        with node_pool(threads) as pool:
            for_each_node(pool, leaf, range(len(self.leaves)))
            for level, pairs in enumerate(self.pairs):
                b = tree.bounds[level + 1]

                def pair(j: int, b: np.ndarray = b, pairs: tuple = pairs) -> None:
                    s, mid, e = b[2 * j], b[2 * j + 1], b[2 * j + 2]
                    p = pairs[j]
                    y[s:mid] += p.u @ (p.v.T @ x[mid:e])
                    y[mid:e] += p.v @ (p.u.T @ x[s:mid])

                for_each_node(pool, pair, range(len(pairs)))
        return y


def build_hodlr(entries: KernelEntries, tree: ClusterTree, *, tol: float,
                rng: np.random.Generator, threads: int) -> HodlrMatrix:
    """Compress the matrix of ``entries`` on ``tree``.

    Parameters
    ----------
    entries : KernelEntries
        Over points in tree order.
    tree : ClusterTree
    tol : float
        Per-block relative Frobenius tolerance (``aca`` module).
    rng : numpy.random.Generator
        Draws the rows of ACA's residual checks, block by block in a fixed order.
    threads : int
        Worker threads for leaves and small blocks.
    """
    scaled = entries.scaled
    if entries.kernel.compiled:
        prepare_aca()  # on a cold cache, its compilation on two processes
    jobs = []
    for level in range(tree.depth):
        b = tree.bounds[level + 1]
        for j in range(b.shape[0] // 2):
            s, mid, e = int(b[2 * j]), int(b[2 * j + 1]), int(b[2 * j + 2])
            checks = rng.integers(0, mid - s, size=(CHECK_ROUNDS, CHECK_ROWS))
            jobs.append((level, j, (s, mid), (mid, e), checks))

    per_thread = threading.local()

    def compress(job: tuple) -> LowRank:
        _, _, rows, cols, checks = job
        if not hasattr(per_thread, "scratch"):
            per_thread.scratch = FactorScratch()
        return entries.off_diagonal(rows, cols, scaled, tol=tol, checks=checks,
                                    scratch=per_thread.scratch)

    leaf_bounds = tree.bounds[tree.depth]
    # jobs go coarse to fine: the workers take the largest blocks first (longest
    # processing time first), which balances the few big top-level blocks; the many
    # small blocks of the deep levels go in runs (``parallel.map_in_runs``).
    with node_pool(threads) as pool:
        lows = map_in_runs(pool, compress, jobs, rows=lambda job: job[3][1] - job[2][0])
        leaves = tuple(map_in_runs(
            pool, lambda j: entries.leaf(int(leaf_bounds[j]), int(leaf_bounds[j + 1]), scaled),
            range(leaf_bounds.shape[0] - 1),
            rows=lambda j: int(leaf_bounds[j + 1] - leaf_bounds[j])))
    results = {(job[0], job[1]): low for job, low in zip(jobs, lows, strict=True)}
    pairs = tuple(tuple(results[level, j] for j in range(1 << level))
                  for level in range(tree.depth))
    return HodlrMatrix(tree=tree, leaves=leaves, pairs=pairs)
