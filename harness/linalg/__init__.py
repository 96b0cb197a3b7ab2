"""Dense linear algebra shared by the solvers and the references, below both layers.

Every BLAS and LAPACK call on a large array goes through ``blas_calls`` on tiles whose
operands stay within ``tile_bounds.MAX_OPERAND_ELEMENTS`` entries: the tiled Cholesky
factorization and inverse (``tiled_cholesky``) and the tiled triangular and symmetric
products and solves (``tiled_triangular``).
"""

from harness.linalg.tile_bounds import MAX_OPERAND_ELEMENTS, PANEL, TILE
from harness.linalg.tiled_cholesky import (
    symmetrize_from_lower,
    tiled_cholesky,
    tiled_inverse_from_cholesky,
)
from harness.linalg.tiled_triangular import lower_multiply, lower_solve, symmetric_multiply

__all__ = [
    "MAX_OPERAND_ELEMENTS",
    "PANEL",
    "TILE",
    "lower_multiply",
    "lower_solve",
    "symmetric_multiply",
    "symmetrize_from_lower",
    "tiled_cholesky",
    "tiled_inverse_from_cholesky",
]
