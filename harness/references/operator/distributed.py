"""Row blocks of the exact products on Dask workers.

The tiles' row ranges are split into contiguous row blocks, one task per block; a task
computes out[rows] = sum_J K[rows, J] B[J] with the column tiles J in ascending order
(``products.row_block_products``). Each output row's summation order is therefore fixed
and independent of how many workers or blocks there are; it differs from the serial
symmetric order only by rounding (results agree to ~1e-15 relative; tested to 1e-12).
Across row blocks the symmetry is not used, so each off-diagonal tile is evaluated twice
in total: the price of tasks that need nothing but the points and B.

The points and B are scattered to the workers once per product (broadcast).
"""

from __future__ import annotations

import numpy as np

from harness.model.kernels import Kernel
from harness.references.operator.products import row_block_products
from harness.references.operator.schedule import TilePlan

#: Row blocks per worker (a few, so a slow worker does not hold the whole product up).
BLOCKS_PER_WORKER = 2


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
