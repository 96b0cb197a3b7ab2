"""Dense assembly of the lower triangle of Sigma, in Fortran order, for LAPACK.

The dense reference factors Sigma in place with ``dpotrf(lower=True)``, which reads
only the lower triangle of a column-major array. Filling just that triangle halves
the kernel evaluations, and writing into a preallocated Fortran array avoids a second
n x n copy (scipy's ``cho_factor`` copies a C-ordered input even with
``overwrite_a=True``).
"""

from __future__ import annotations

import mmap

import numpy as np

from harness.model.kernels.assembly import FAMILY_FUNCTIONS, fill_lower_symmetric
from harness.model.kernels.classes import Kernel

_COLUMN_BLOCK = 512


def allocate_fortran(n: int) -> np.ndarray:
    """An (n, n) Fortran-ordered float64 array on fresh anonymous pages.

    numpy asks the kernel for transparent huge pages on large allocations; on the
    machines measured here the compaction that triggers made first touch of a
    512 MB array cost 0.5-1 s, four times the whole assembly. A private anonymous
    ``mmap`` gets ordinary pages, zero-filled on first touch by whichever thread writes
    them.
    The array keeps the mapping alive through its ``base``.
    """
    # Private, not the module's default shared mapping: shared anonymous pages count as
    # shmem, which is capped on some machines (a 5 GB fill died of SIGBUS here).
    buffer = mmap.mmap(-1, max(1, n * n * 8), flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
    return np.frombuffer(buffer, dtype=np.float64, count=n * n).reshape((n, n), order="F")


def assemble_lower(kernel: Kernel, points: np.ndarray, *, out: np.ndarray | None = None
                   ) -> np.ndarray:
    """Sigma's lower triangle (i >= j) in a Fortran-ordered n x n array.

    Parameters
    ----------
    kernel : Kernel
        The covariance model, nugget included.
    points : ndarray, shape (n, d)
    out : ndarray, optional
        A Fortran-ordered (n, n) float64 array to fill; allocated when omitted.

    Returns
    -------
    ndarray
        ``out``, with entries above the diagonal left as they were (zero when
        allocated here).
    """
    points = np.asarray(points, dtype=float)
    points = points[:, None] if points.ndim == 1 else points
    n = points.shape[0]
    if out is None:
        out = allocate_fortran(n)
    elif out.shape != (n, n) or not out.flags.f_contiguous or out.dtype != np.float64:
        raise ValueError(f"out must be a Fortran-ordered float64 array of shape {(n, n)}")
    if getattr(kernel, "compiled", False):
        fill_lower_symmetric(FAMILY_FUNCTIONS[kernel.family][0], kernel.scale_points(points),
                             kernel.shape_value, kernel.variance, kernel.nugget, out)
        return out
    idx = np.arange(n)
    for j0 in range(0, n, _COLUMN_BLOCK):
        j1 = min(n, j0 + _COLUMN_BLOCK)
        out[j0:, j0:j1] = kernel.block(points, idx[j0:], idx[j0:j1])
    return out
