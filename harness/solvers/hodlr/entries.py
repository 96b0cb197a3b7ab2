"""Entries of Sigma (or of one derivative dSigma/dlog l_k) in cluster-tree order.

``KernelEntries`` hands the HODLR builder the two things it needs: dense diagonal leaf
blocks and low-rank approximations of off-diagonal blocks. Kernels with a compiled
closed form go through ``harness.model.kernels.rows`` (leaf fills and ACA rows/columns in
numba, GIL released); the general Matern family goes through the kernel's numpy path
one row or column at a time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.model.kernels.classes import Kernel
from harness.model.kernels.rows import family_code, fill_block, mode_for
from harness.solvers.hodlr.aca import (
    ACA_BLOCK,
    FactorScratch,
    LowRank,
    aca_callable,
    aca_compiled,
    recompress,
)

#: Shares of ``tol`` for the two approximations of a block (they add up to at most tol).
#: The truncation gets the small share: the singular directions it discards are the
#: rough ones that white-noise-like data weigh most. At n = 16,000 (2D Matern 3/2,
#: l = 0.1, nugget 1e-2, 3 seeds) moving it from 0.5 to 0.05 cut the median log-
#: likelihood error on white-noise values from 2.6 to 0.26 nat at tol 1e-6 and from
#: 0.060 to 0.0017 at 1e-8, for 24% higher ranks; a 10x smaller ACA share changed
#: nothing (2.9 nat).
ACA_SHARE = 0.5
TRUNCATION_SHARE = 0.05


@dataclass(frozen=True)
class KernelEntries:
    """Entries of one matrix over points already in tree order.

    Parameters
    ----------
    kernel : Kernel
    points : ndarray, shape (n, d)
        Coordinates in tree order.
    which : int or None
        None for Sigma (nugget included on the diagonal); k for dSigma/dlog l_k
        (k = 0 for an isotropic kernel), which has no nugget.
    """

    kernel: Kernel
    points: np.ndarray
    which: int | None = None

    @property
    def scaled(self) -> np.ndarray:
        return self.kernel.scale_points(self.points)

    def _param_index(self) -> int:
        return 1 + int(self.which or 0)

    def leaf(self, start: int, stop: int, scaled: np.ndarray) -> np.ndarray:
        """Dense Sigma[start:stop, start:stop] (or its derivative), C-ordered."""
        k = self.kernel
        if k.compiled:
            out = np.empty((stop - start, stop - start))
            xs = scaled[start:stop]
            fill_block(family_code(k.family), xs, xs, k.shape_value, k.variance,
                       mode_for(k.isotropic, self.which), out)
            if self.which is None:
                out.flat[:: stop - start + 1] += k.nugget
            return out
        idx = np.arange(start, stop)
        if self.which is None:
            return k.block(self.points, idx, idx)
        return k.derivative_block(self.points, idx, idx, self._param_index())

    def off_diagonal(self, rows: tuple[int, int], cols: tuple[int, int], scaled: np.ndarray,
                     *, tol: float, checks: np.ndarray,
                     scratch: FactorScratch | None = None) -> LowRank:
        """Sigma[rows, cols] ~ U V' for disjoint ranges, to relative Frobenius ``tol``.

        ``ACA_SHARE`` of the tolerance goes to ACA, ``TRUNCATION_SHARE`` to the
        recompression (``aca`` module). ``scratch``: the calling thread's reusable ACA
        buffer.
        """
        a, b, gram_a, gram_b = self._aca(rows, cols, scaled, tol=ACA_SHARE * tol,
                                         checks=checks, scratch=scratch or FactorScratch())
        return recompress(a, b, tol=TRUNCATION_SHARE * tol, gram_a=gram_a, gram_b=gram_b)

    def _aca(self, rows: tuple[int, int], cols: tuple[int, int], scaled: np.ndarray, *,
             tol: float, checks: np.ndarray, scratch: FactorScratch
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]:
        """ACA factors (A, B), K ~ A' B, to the (estimated) relative tolerance ``tol``,
        with their Gram matrices A A', B B' where the compiled ACA formed them."""
        k = self.kernel
        (r0, r1), (c0, c1) = rows, cols
        m, n = r1 - r0, c1 - c0
        if k.compiled:
            scratch.reserve(rank_bound=min(m, n), m=m, n=n, block=ACA_BLOCK)
            a, b, gram_a, gram_b, scratch.buffer = aca_compiled(
                family_code(k.family), scaled[r0:r1], scaled[c0:c1], k.shape_value,
                k.variance, mode_for(k.isotropic, self.which), tol, min(m, n), checks,
                ACA_BLOCK, scratch.buffer)
            return a, b, gram_a, gram_b
        cols_idx = np.arange(c0, c1)
        rows_idx = np.arange(r0, r1)
        p = self._param_index()

        def value(rr: np.ndarray, cc: np.ndarray) -> np.ndarray:
            if self.which is None:
                return k.cross_covariance(self.points[rr], self.points[cc])
            return k.block_with_derivatives(self.points, rr, cc)[1][p]

        a, b = aca_callable(lambda i: value(np.array([r0 + i]), cols_idx)[0],
                            lambda j: value(rows_idx, np.array([c0 + j]))[:, 0],
                            m, n, tol=tol, checks=checks)
        return a, b, None, None
