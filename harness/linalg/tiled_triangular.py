"""Products and solves with a dense lower triangle, by tiles of bounded size.

For a lower-triangular L (or a symmetric matrix stored in its lower triangle) in a
Fortran-ordered n x n array and right-hand sides B (n x k), these compute L^-1 B,
L^-T B, L B, L' B and A B with no BLAS operand above ``tile``^2 entries (at most
``tile_bounds.MAX_OPERAND_ELEMENTS``): L is read in ``tile`` x ``tile`` tiles and B in
chunks of ``tile`` columns. They are block forward and back substitution and block
products (Golub and Van Loan, *Matrix Computations*, 4th ed., section 3.1.4), with the
same flop counts as one dtrsm, dtrmm or dsymm call.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from harness.linalg.blas_calls import Tile, gemm, symm_lower_left, trmm_lower, trsm_lower
from harness.linalg.tile_bounds import TILE, tile_ranges


def _prepare(matrix: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, bool]:
    if matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1]:
        raise ValueError(f"expected a square matrix, got shape {matrix.shape}")
    b = np.asarray(b, dtype=float)
    vector = b.ndim == 1
    cols = b[:, None] if vector else b
    if cols.ndim != 2 or cols.shape[0] != matrix.shape[0]:
        raise ValueError(f"expected {matrix.shape[0]} rows, got an array of shape {b.shape}")
    return np.array(cols, dtype=float, order="F", copy=True), vector


def _by_column_chunks(matrix: np.ndarray, b: np.ndarray, tile: int,
                      step: Callable[[list[tuple[int, int]], tuple[int, int], np.ndarray],
                                     None]) -> np.ndarray:
    """Apply ``step(tiles, cols, x)`` to each column chunk of a Fortran copy x of b."""
    x, vector = _prepare(matrix, b)
    n, k = x.shape
    tiles = tile_ranges(n, tile)
    width = tile  # a chunk of B is at most tile x tile
    for c0 in range(0, k, width):
        step(tiles, (c0, min(k, c0 + width)), x)
    return x[:, 0] if vector else x


def lower_solve(lower: np.ndarray, b: np.ndarray, *, transpose: bool = False,
                tile: int = TILE) -> np.ndarray:
    """L^-1 b, or L^-T b with ``transpose``; L = lower(``lower``), b of shape (n,) or (n, k)."""
    a = lower

    def forward(tiles: list[tuple[int, int]], cols: tuple[int, int], x: np.ndarray) -> None:
        for i, ti in enumerate(tiles):
            x_i = Tile(x, ti, cols)
            for tk in tiles[:i]:
                gemm(x_i, Tile(a, ti, tk), Tile(x, tk, cols), alpha=-1.0, beta=1.0)
            trsm_lower(x_i, Tile(a, ti, ti), side="left", trans=False)

    def backward(tiles: list[tuple[int, int]], cols: tuple[int, int], x: np.ndarray) -> None:
        for i in range(len(tiles) - 1, -1, -1):
            ti = tiles[i]
            x_i = Tile(x, ti, cols)
            for tk in tiles[i + 1:]:
                gemm(x_i, Tile(a, tk, ti), Tile(x, tk, cols), alpha=-1.0, beta=1.0,
                     trans_a=True)
            trsm_lower(x_i, Tile(a, ti, ti), side="left", trans=True)

    return _by_column_chunks(a, b, tile, backward if transpose else forward)


def lower_multiply(lower: np.ndarray, b: np.ndarray, *, transpose: bool = False,
                   tile: int = TILE) -> np.ndarray:
    """L b, or L' b with ``transpose``; L = lower(``lower``), b of shape (n,) or (n, k).

    In place on a copy of b: L b from the last tile row up (row I reads rows K < I,
    not yet overwritten), L' b from the first tile row down.
    """
    a = lower

    def product(tiles: list[tuple[int, int]], cols: tuple[int, int], x: np.ndarray) -> None:
        m = len(tiles)
        order = range(m) if transpose else range(m - 1, -1, -1)
        for i in order:
            ti = tiles[i]
            x_i = Tile(x, ti, cols)
            trmm_lower(x_i, Tile(a, ti, ti), side="left", trans=transpose)
            others = tiles[i + 1:] if transpose else tiles[:i]
            for tk in others:
                block = Tile(a, tk, ti) if transpose else Tile(a, ti, tk)
                gemm(x_i, block, Tile(x, tk, cols), alpha=1.0, beta=1.0, trans_a=transpose)

    return _by_column_chunks(a, b, tile, product)


def symmetric_multiply(lower: np.ndarray, b: np.ndarray, *, tile: int = TILE) -> np.ndarray:
    """A b for the symmetric A stored in the lower triangle of ``lower`` (dsymm by tiles)."""
    a = lower
    x, vector = _prepare(a, b)
    n, k = x.shape
    out = np.zeros((n, k), order="F")
    tiles = tile_ranges(n, tile)
    width = tile  # a chunk of B is at most tile x tile
    for c0 in range(0, k, width):
        cols = (c0, min(k, c0 + width))
        for i, ti in enumerate(tiles):
            out_i = Tile(out, ti, cols)
            symm_lower_left(out_i, Tile(a, ti, ti), Tile(x, ti, cols))
            for tk in tiles[:i]:
                gemm(out_i, Tile(a, ti, tk), Tile(x, tk, cols))
                gemm(Tile(out, tk, cols), Tile(a, ti, tk), Tile(x, ti, cols), trans_a=True)
    return out[:, 0] if vector else out
