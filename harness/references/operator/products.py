"""Exact products Sigma B and dSigma/dtheta_i B from kernel entries, never stored.

For an n x k block B the products are computed tile by tile: each tile pair {I, J} of
the ``schedule.TilePlan`` is evaluated once from the kernel (compiled entries of
``tile_entries``, which follow ``harness.model.kernels.rows``) and used for both
out[I] += K_IJ B[J] and out[J] += K_IJ' B[I]. Memory is O(n k) plus one tile per thread;
time O(n^2 k).

Parallelism and reproducibility: the pairs of one round write disjoint rows, so a round
runs its pairs on threads (``harness.infra.thread_ranges``); the rounds run in their
fixed order, so each output row sums its contributions in the same order whatever the
thread count (results are bitwise equal for 1 and 2 threads:
``tests/test_operator_products.py``). BLAS runs on one thread inside the tiles.

Derivatives (Rasmussen and Williams 2006, eq. 5.9 needs dSigma/dtheta_i; the entries are
those of ``harness.model.kernels.classes``):

    dSigma/dlog s2   B = s2 R B
    dSigma/dlog l_k  B = s2 S_k B        (S_k entries s(r) w_k, compiled modes)
    dSigma/dlog tau2 B = tau2 B

Kernels without a compiled form (the general Matern) take the same tile order through
numpy blocks in Python (slower, same numbers up to rounding of the Bessel function).
"""

from __future__ import annotations

import time
from concurrent.futures import ThreadPoolExecutor
from functools import partial

import numba
import numpy as np
from threadpoolctl import threadpool_limits

from harness.infra.thread_ranges import over_threads, thread_count
from harness.linalg.dense_budget import default_memory_budget
from harness.model.kernels import Kernel
from harness.model.kernels.rows import family_code
from harness.references.operator.product_progress import product_bar
from harness.references.operator.schedule import DEFAULT_TILE, TilePlan, column_chunk, plan_tiles
from harness.references.operator.tile_entries import fill_tile, kernel_modes

#: Fraction of the available memory one product may use when no budget is given.
DEFAULT_PRODUCT_FRACTION = 0.25


@numba.njit(cache=True, nogil=True)
def _round_product(family, xs, shape, scale, modes, b, out, starts, first, second, q0, q1):
    """Pairs q0 <= q < q1 of one round: for each pair (I, J) and mode m,
    out[m, I] += K_m B[J] (and the mirror). The sums are loops, not ``+=`` on slices:
    that form compiles numba's shape-mismatch message, seconds of a first compilation."""
    k = b.shape[1]
    for q in range(q0, q1):
        ti = first[q]
        tj = second[q]
        i0 = starts[ti]
        i1 = starts[ti + 1]
        j0 = starts[tj]
        j1 = starts[tj + 1]
        tile = np.empty((i1 - i0, j1 - j0))
        for mi in range(modes.shape[0]):
            fill_tile(family, xs[i0:i1], xs[j0:j1], shape, scale, modes[mi], tile)
            part = np.dot(tile, b[j0:j1])
            for r in range(i1 - i0):
                for c in range(k):
                    out[mi, i0 + r, c] += part[r, c]
            if ti != tj:
                part = np.dot(tile.T, b[i0:i1])
                for r in range(j1 - j0):
                    for c in range(k):
                        out[mi, j0 + r, c] += part[r, c]


def _as_block(b: np.ndarray, n: int) -> tuple[np.ndarray, bool]:
    arr = np.asarray(b, dtype=float)
    if arr.ndim not in (1, 2) or arr.shape[0] != n:
        raise ValueError(f"B: expected shape ({n},) or ({n}, k), got {arr.shape}")
    vector = arr.ndim == 1
    return np.ascontiguousarray(arr.reshape(n, -1)), vector


class KernelOperator:
    """Sigma(theta) and its derivatives at ``points`` as exact products (never stored).

    Parameters
    ----------
    points : ndarray, shape (n, d) or (n,)
    kernel : Kernel
        The model with its parameters set.
    tile : int
        Rows per tile (``schedule.DEFAULT_TILE``).
    memory_budget : int, optional
        Bytes one product may use (input, outputs, per-thread tiles); B is processed in
        column chunks that fit. Default: ``DEFAULT_PRODUCT_FRACTION`` of available memory.
    progress : bool or None
        Show a tqdm bar with a time estimate on stderr: None shows it for long products
        when stderr is a terminal, False never, True always.
    client : dask.distributed.Client, optional
        Run row blocks on its workers (``harness.references.operator.distributed``).

    Attributes
    ----------
    column_products : int
        n x 1 products done so far (a block with k columns and q outputs counts k q).
    seconds : float
        Wall-clock seconds spent in products.
    """

    def __init__(self, points: np.ndarray, kernel: Kernel, *, tile: int = DEFAULT_TILE,
                 memory_budget: int | None = None, progress: bool | None = None,
                 client: object | None = None) -> None:
        pts = np.asarray(points, dtype=float)
        pts = pts[:, None] if pts.ndim == 1 else pts
        if not np.all(np.isfinite(pts)):
            raise ValueError("points: coordinates must be finite")
        kernel.check_dimension(pts.shape[1])
        self.points = pts
        self.kernel = kernel
        self.n = int(pts.shape[0])
        self.plan: TilePlan = plan_tiles(self.n, tile=tile)
        self.tile = int(self.plan.starts[1] - self.plan.starts[0])
        self.memory_budget = (int(DEFAULT_PRODUCT_FRACTION * default_memory_budget()
                                  / 0.6) if memory_budget is None else int(memory_budget))
        self.progress = progress
        self.client = client
        self._scaled = kernel.scale_points(pts)
        self._family = family_code(kernel.family) if kernel.compiled else -1
        self.column_products = 0
        self.seconds = 0.0

    @property
    def n_params(self) -> int:
        return self.kernel.n_params

    # -- public products -------------------------------------------------------------
    def matvec(self, b: np.ndarray) -> np.ndarray:
        """Sigma B = s2 R B + tau2 B (same shape as B)."""
        block, vector = _as_block(b, self.n)
        out = self._products(block, (-1,))[0]
        if self.kernel.nugget:
            out += self.kernel.nugget * block
        return out[:, 0] if vector else out

    def derivative_matvecs(self, b: np.ndarray) -> np.ndarray:
        """dSigma/dtheta_i B for every parameter i, stacked as (p, n, k) (or (p, n))."""
        block, vector = _as_block(b, self.n)
        k = len(self.kernel.lengthscale)
        out = np.empty((self.n_params, *block.shape))
        out[:1 + k] = self._products(block, tuple(range(1 + k)))
        if self.kernel.has_nugget:
            out[1 + k] = self.kernel.nugget * block
        return out[:, :, 0] if vector else out

    def derivative_matvec(self, i: int, b: np.ndarray) -> np.ndarray:
        """dSigma/dtheta_i B for one parameter index i."""
        if not 0 <= int(i) < self.n_params:
            raise IndexError(f"parameter index {i} out of range for {self.kernel.param_names}")
        block, vector = _as_block(b, self.n)
        k = len(self.kernel.lengthscale)
        if int(i) == 1 + k:
            out = self.kernel.nugget * block
        else:
            out = self._products(block, (int(i),))[0]
        return out[:, 0] if vector else out

    # -- machinery ---------------------------------------------------------------------
    def _products(self, block: np.ndarray, which: tuple[int, ...]) -> np.ndarray:
        start = time.perf_counter()
        k = block.shape[1]
        out = np.zeros((len(which), self.n, k))
        threads = numba.get_num_threads()
        chunk = column_chunk(self.n, k, outputs=len(which), tile=self.tile, threads=threads,
                             memory_budget=self.memory_budget)
        for c0 in range(0, k, chunk):
            c1 = min(k, c0 + chunk)
            part = np.ascontiguousarray(block[:, c0:c1])
            out[:, :, c0:c1] = self._pass(part, which)
        self.column_products += k * len(which)
        self.seconds += time.perf_counter() - start
        return out

    def _pass(self, part: np.ndarray, which: tuple[int, ...]) -> np.ndarray:
        if self.client is not None:
            from harness.references.operator.distributed import distributed_products
            return distributed_products(self.client, self._scaled, self.kernel, part, which,
                                        self.plan)
        out = np.zeros((len(which), self.n, part.shape[1]))
        rounds = self.plan.rounds
        with product_bar(len(rounds), n=self.n, k=part.shape[1] * len(which),
                         show=self.progress) as bar, threadpool_limits(limits=1,
                                                                       user_api="blas"):
            if self._family >= 0:
                modes = kernel_modes(self.kernel, which)
                threads = thread_count()
                with ThreadPoolExecutor(max_workers=threads) as pool:
                    for first, second in rounds:
                        # the pairs of a round write disjoint rows: the sums do not
                        # depend on how the round is split over threads
                        over_threads(partial(_round_product, self._family, self._scaled,
                                             self.kernel.shape_value, self.kernel.variance,
                                             modes, part, out, self.plan.starts, first,
                                             second), int(first.shape[0]),
                                     threads=threads, pool=pool)
                        bar.update(1)
            else:
                for first, second in rounds:
                    self._generic_round(part, which, out, first, second)
                    bar.update(1)
        return out

    def _generic_round(self, part: np.ndarray, which: tuple[int, ...], out: np.ndarray,
                       first: np.ndarray, second: np.ndarray) -> None:
        """The same round order through numpy blocks (kernels without compiled entries)."""
        starts = self.plan.starts
        derivative_index = [0 if i == -1 else i for i in which]
        for ti, tj in zip(first.tolist(), second.tolist(), strict=True):
            rows = np.arange(starts[ti], starts[ti + 1])
            cols = np.arange(starts[tj], starts[tj + 1])
            _, derivs = self.kernel.block_with_derivatives(self.points, rows, cols)
            for mi, i in enumerate(derivative_index):
                tile = derivs[i]          # derivs[0] is s2 R without the nugget
                out[mi, rows] += tile @ part[cols]
                if ti != tj:
                    out[mi, cols] += tile.T @ part[rows]
