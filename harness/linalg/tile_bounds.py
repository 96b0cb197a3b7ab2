"""The bound on every BLAS/LAPACK operand the project hands to the library, and tile sizes.

Why a bound: the threaded level-3 routines of the OpenBLAS build bundled with SciPy 1.17.1
(OpenBLAS 0.3.30, Haswell kernels chosen at run time on a 2-core AMD EPYC) crash with a
segmentation fault when one call's operand is large. Measured on that machine with two
threads:

* one ``dsyrk`` with a 23,000-row target and a 256-column panel (an operand of 5.9 million
  entries) crashed; 12,000 rows x 256 columns (3.1 million) and 23,000 rows x 64 columns
  (1.5 million) ran (0.59 s and 2.84 s);
* one ``dpotrf`` on the whole matrix crashed at n = 24,000 and 26,633 and ran at 22,000
  (40.2 s), and at 26,633 with one thread (137 s); another machine saw it crash at
  n = 16,000, so the limit is not a fixed size. ``dpotrf`` and ``dpotri`` make large
  internal updates of their own, which no bound on the project's calls can reach, so
  they are only ever called on one tile.

The bound is ``MAX_OPERAND_ELEMENTS`` = 2^20 = 1,048,576 entries (8 MiB) per operand of
every call, a third of the largest operand that passed and a sixth of the smallest that
crashed (common practice: a safety factor of a few against a measured failure). The tiled
algorithms (``harness.linalg.tiled_cholesky``, ``harness.linalg.tiled_triangular``) use
square tiles of ``TILE`` = 1,024 rows (one tile is exactly the bound) and Cholesky panels
of ``PANEL`` columns; ``benchmarks/dense_tiled.py`` measures their speed against one
multi-threaded ``dpotrf`` in the same run.
"""

from __future__ import annotations

#: Largest operand (rows x columns) of any BLAS or LAPACK call on a large array.
MAX_OPERAND_ELEMENTS = 2**20
#: Rows (and columns) of a square tile: TILE^2 <= MAX_OPERAND_ELEMENTS.
TILE = 1024
#: Columns of a Cholesky panel (the inner dimension of the trailing updates).
PANEL = 512


def tile_ranges(n: int, size: int) -> list[tuple[int, int]]:
    """Half-open ranges [i, min(n, i + size)) covering 0..n."""
    if size < 1:
        raise ValueError(f"tile size must be a positive integer, got {size!r}")
    return [(i, min(n, i + size)) for i in range(0, n, size)]

