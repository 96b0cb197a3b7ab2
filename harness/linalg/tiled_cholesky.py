"""Dense Cholesky factorization and inverse, in place, by tiles of bounded size.

Both work on the lower triangle of one Fortran-ordered n x n array and never hand the
BLAS an operand above ``tile_bounds.MAX_OPERAND_ELEMENTS`` entries: LAPACK's ``dpotrf``,
``dtrtri`` and ``dlauum`` run on single diagonal tiles only, and every update is a BLAS
call on tiles (``blas_calls``), so the flop counts are those of one ``dpotrf``
(n^3 / 3) and one ``dpotri`` (2 n^3 / 3). The strict upper triangle is never read or
written.
"""

from __future__ import annotations

import numpy as np

from harness.linalg.blas_calls import (
    Tile,
    gemm,
    lauum_lower,
    potrf_lower,
    syrk_lower,
    trmm_lower,
    trsm_lower,
    trtri_lower,
)
from harness.linalg.tile_bounds import PANEL, TILE, tile_ranges


def _square(a: np.ndarray) -> int:
    if a.ndim != 2 or a.shape[0] != a.shape[1]:
        raise ValueError(f"expected a square matrix, got shape {a.shape}")
    return int(a.shape[0])


def _sizes(tile: int, panel: int) -> None:
    if tile < 1 or panel < 1 or panel > tile:
        raise ValueError(f"need 1 <= panel <= tile, got panel={panel!r}, tile={tile!r}")


def tiled_cholesky(a: np.ndarray, *, tile: int = TILE, panel: int = PANEL) -> int:
    """Lower Cholesky factor of a Fortran-ordered SPD array, in place.

    Right-looking blocked Cholesky (Golub and Van Loan, *Matrix Computations*, 4th ed.,
    Algorithm 4.2.10): for each panel K of ``panel`` columns, A_KK = L_KK L_KK' (dpotrf
    on the panel's diagonal block), L_RK = A_RK L_KK^-T (dtrsm on row tiles of the rows
    R below), and the trailing matrix A_RR -= L_RK L_RK', split into ``tile`` x ``tile``
    tiles: dsyrk on the diagonal tiles, dgemm on the tiles below them.

    Returns
    -------
    int
        0 on success, else the 1-based column at which the matrix is not positive definite.
    """
    _sizes(tile, panel)
    n = _square(a)
    for k0, k1 in tile_ranges(n, panel):
        diag = Tile(a, (k0, k1), (k0, k1))
        info = potrf_lower(diag)
        if info != 0:
            return k0 + info if info > 0 else info
        if k1 == n:
            break
        below = [(r0 + k1, r1 + k1) for r0, r1 in tile_ranges(n - k1, tile)]
        for rows in below:
            trsm_lower(Tile(a, rows, (k0, k1)), diag, side="right", trans=True)
        for j, cols in enumerate(below):
            panel_j = Tile(a, cols, (k0, k1))
            syrk_lower(Tile(a, cols, cols), panel_j, alpha=-1.0, beta=1.0)
            for rows in below[j + 1:]:
                gemm(Tile(a, rows, cols), Tile(a, rows, (k0, k1)), panel_j, alpha=-1.0,
                     beta=1.0, trans_b=True)
    return 0


def tiled_inverse_from_cholesky(a: np.ndarray, *, tile: int = TILE) -> int:
    """lower(a) <- lower(Sigma^-1) from the lower Cholesky factor L in lower(a), in place.

    Sigma^-1 = L^-T L^-1, as LAPACK's dpotri: first L^-1 in place (tiled dtrtri), then
    the product L^-T L^-1 in place (tiled dlauum). With tiles I, J, K of size ``tile``:

    * inverse (tile columns J from last to first; Golub and Van Loan, 4th ed., section
      3.1.4 on block triangular inverses): for L = [[L_JJ, 0], [L_RJ, L_RR]],
      (L^-1)_RJ = -L_RR^-1 L_RJ L_JJ^-1, with L_RR^-1 already in place; then L_JJ^-1.
    * product (tile rows I from first to last): (L^-T L^-1)_IJ =
      sum_{K >= I} (L^-1)_KI' (L^-1)_KJ, which reads only rows K >= I, not yet
      overwritten.

    Returns
    -------
    int
        0, or LAPACK's positive ``info`` of a diagonal tile (a zero pivot) offset to
        the whole matrix.
    """
    _sizes(tile, 1)
    n = _square(a)
    tiles = tile_ranges(n, tile)
    m = len(tiles)
    for j in range(m - 1, -1, -1):
        tj = tiles[j]
        for i in range(m - 1, j, -1):
            ti = tiles[i]
            x_i = Tile(a, ti, tj)
            trmm_lower(x_i, Tile(a, ti, ti), side="left", trans=False, alpha=-1.0)
            for k in range(j + 1, i):
                gemm(x_i, Tile(a, ti, tiles[k]), Tile(a, tiles[k], tj), alpha=-1.0,
                     beta=1.0)
        for i in range(j + 1, m):
            trsm_lower(Tile(a, tiles[i], tj), Tile(a, tj, tj), side="right", trans=False)
        info = trtri_lower(Tile(a, tj, tj))
        if info != 0:
            return tj[0] + info if info > 0 else info
    for i in range(m):
        ti = tiles[i]
        for j in range(i):
            tj = tiles[j]
            r_ij = Tile(a, ti, tj)
            trmm_lower(r_ij, Tile(a, ti, ti), side="left", trans=True)
            for k in range(i + 1, m):
                gemm(r_ij, Tile(a, tiles[k], ti), Tile(a, tiles[k], tj), alpha=1.0,
                     beta=1.0, trans_a=True)
        r_ii = Tile(a, ti, ti)
        info = lauum_lower(r_ii)
        if info != 0:
            return info
        for k in range(i + 1, m):
            syrk_lower(r_ii, Tile(a, tiles[k], ti), alpha=1.0, beta=1.0, trans=True)
    return 0


def symmetrize_from_lower(a: np.ndarray, *, tile: int = TILE) -> None:
    """Copy the strict lower triangle of ``a`` onto its upper triangle, tile by tile."""
    n = _square(a)
    for j0, j1 in tile_ranges(n, tile):
        diag = a[j0:j1, j0:j1]
        upper = np.triu_indices(j1 - j0, k=1)
        diag[upper] = diag.T[upper]
        a[j0:j1, j1:] = a[j1:, j0:j1].T
