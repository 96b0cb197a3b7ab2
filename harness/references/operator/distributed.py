"""Row blocks of the exact products on Dask workers.

The tiles' row ranges are split into contiguous row blocks, one task per block; a task
computes out[rows] = sum_J K[rows, J] B[J] with the column tiles J in ascending order
(``row_block_products``, compiled here). Each output row's summation order is therefore fixed
and independent of how many workers or blocks there are; it differs from the serial
symmetric order only by rounding (results agree to ~1e-15 relative; tested to 1e-12).
Across row blocks the symmetry is not used, so each off-diagonal tile is evaluated twice
in total: the price of tasks that need nothing but the points and B.

The points and B are scattered to the workers once per product (broadcast).
"""

from __future__ import annotations

import numba
import numpy as np
from threadpoolctl import threadpool_limits

from harness.model.kernels import Kernel
from harness.model.kernels.rows import family_code
from harness.references.operator.schedule import TilePlan
from harness.references.operator.tile_entries import fill_tile, kernel_modes

#: Row blocks per worker (a few, so a slow worker does not hold the whole product up).
BLOCKS_PER_WORKER = 2


@numba.njit(parallel=True, cache=True)
def _row_block_product(family, xs, shape, scale, modes, b, out, starts, row_tiles):
    """out[m, rows of tile t] = sum_J K_m[t, J] B[J] for the given row tiles, J ascending.

    Used by the distributed path: no symmetry across row blocks, so each tile is evaluated
    from both sides; the column order is fixed, so a row block's result does not depend
    on the thread count either.
    """
    m = starts.shape[0] - 1
    for q in numba.prange(row_tiles.shape[0]):
        ti = row_tiles[q]
        i0 = starts[ti]
        i1 = starts[ti + 1]
        for tj in range(m):
            j0 = starts[tj]
            j1 = starts[tj + 1]
            tile = np.empty((i1 - i0, j1 - j0))
            for mi in range(modes.shape[0]):
                fill_tile(family, xs[i0:i1], xs[j0:j1], shape, scale, modes[mi], tile)
                out[mi, i0:i1] += np.dot(tile, b[j0:j1])


def row_block_products(scaled: np.ndarray, kernel: Kernel, part: np.ndarray,
                       which: tuple[int, ...], starts: np.ndarray, row_tiles: np.ndarray
                       ) -> np.ndarray:
    """Rows of the given tiles of K_m B for each mode (a worker's share; no nugget).

    Returns an array (len(which), rows in those tiles, k) in the order of ``row_tiles``.
    """
    n = scaled.shape[0]
    out = np.zeros((len(which), n, part.shape[1]))
    if not kernel.compiled:
        raise ValueError(f"distributed products need a compiled kernel family; "
                         f"{kernel.family!r} has none (run it serially)")
    with threadpool_limits(limits=1, user_api="blas"):
        _row_block_product(family_code(kernel.family), scaled, kernel.shape_value,
                           kernel.variance, kernel_modes(kernel, which), part, out, starts,
                           np.asarray(row_tiles, dtype=np.int64))
    rows = np.concatenate([np.arange(starts[t], starts[t + 1]) for t in row_tiles])
    return out[:, rows]


def _worker_count(client: object) -> int:
    info = client.scheduler_info()  # type: ignore[attr-defined]
    return max(1, len(info.get("workers", {})))


def row_blocks(n_tiles: int, blocks: int) -> list[np.ndarray]:
    """Contiguous groups of tile indices, as even as possible."""
    blocks = max(1, min(int(blocks), n_tiles))
    return [part for part in np.array_split(np.arange(n_tiles, dtype=np.int64), blocks)
            if part.size]


def distributed_products(client: object, scaled: np.ndarray, kernel: Kernel,
                         part: np.ndarray, which: tuple[int, ...], plan: TilePlan
                         ) -> np.ndarray:
    """(len(which), n, k) products computed as row blocks on ``client``'s workers."""
    groups = row_blocks(plan.n_tiles, BLOCKS_PER_WORKER * _worker_count(client))
    scattered_points = client.scatter(scaled, broadcast=True, hash=False)  # type: ignore[attr-defined]
    scattered_block = client.scatter(part, broadcast=True, hash=False)  # type: ignore[attr-defined]
    futures = [client.submit(row_block_products, scattered_points, kernel,  # type: ignore[attr-defined]
                             scattered_block, which, plan.starts, tiles, pure=False)
               for tiles in groups]
    pieces = client.gather(futures)  # type: ignore[attr-defined]
    out = np.empty((len(which), scaled.shape[0], part.shape[1]))
    for tiles, piece in zip(groups, pieces, strict=True):
        r0, r1 = plan.starts[tiles[0]], plan.starts[tiles[-1] + 1]
        out[:, r0:r1] = piece
    return out
