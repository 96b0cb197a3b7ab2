"""What the compiled pass needs from a kernel, and the checks that name bad input.

Refused with a message that says what to change: a kernel family without a compiled
closed form; identical points under a zero nugget (Sigma is singular); a local block
that is not numerically positive definite (named by its point).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.model.kernels import Kernel
from harness.model.kernels.assembly import FAMILY_CODES
from harness.model.kernels.rows import COORD, SLOPE
from harness.solvers.vecchia.structure import VecchiaStructure


class VecchiaInputError(ValueError):
    """Input the Vecchia solver cannot factor (the message says what to change)."""


@dataclass(frozen=True)
class KernelCode:
    """A kernel as the compiled pass takes it.

    Attributes
    ----------
    family : int
        ``FAMILY_CODES`` entry.
    shape, variance, nugget : float
    ls_modes : ndarray of int64
        ``harness.model.kernels.rows`` modes of the length-scale derivatives, in
        ``kernel.param_names`` order (SLOPE when isotropic, COORD + k otherwise).
    has_nugget : bool
        Whether log nugget is a parameter (the last).
    """

    family: int
    shape: float
    variance: float
    nugget: float
    ls_modes: np.ndarray
    has_nugget: bool

    @property
    def n_params(self) -> int:
        return 1 + int(self.ls_modes.shape[0]) + int(self.has_nugget)


def kernel_code(kernel: Kernel, dim: int) -> KernelCode:
    """The compiled description of ``kernel`` for ``dim``-dimensional points."""
    if not kernel.compiled or kernel.family not in FAMILY_CODES:
        raise VecchiaInputError(
            f"the vecchia solver needs a kernel with a compiled closed form "
            f"({', '.join(FAMILY_CODES)}); {kernel.family!r} has none: use one of those "
            "(matern with nu = 0.5, 1.5, 2.5 is exponential, matern32, matern52)")
    kernel.check_dimension(dim)
    if kernel.isotropic:
        modes = np.array([SLOPE], dtype=np.int64)
    else:
        modes = COORD + np.arange(len(kernel.lengthscale), dtype=np.int64)
    return KernelCode(family=FAMILY_CODES[kernel.family], shape=float(kernel.shape_value),
                      variance=float(kernel.variance), nugget=float(kernel.nugget),
                      ls_modes=modes, has_nugget=bool(kernel.has_nugget))


def check_duplicates(structure: VecchiaStructure, points: np.ndarray, kernel: Kernel) -> None:
    """Refuse identical points when the nugget is zero (Sigma is then singular).

    With a nugget, identical points are separate noisy observations and legal.
    """
    if kernel.nugget > 0.0:
        return
    order = structure.order
    dup = np.flatnonzero(order.lengths[1:] == 0.0) + 1
    if dup.size == 0:
        return
    pairs = [(int(order.perm[order.nearest[k]]), int(order.perm[k])) for k in dup[:5]]
    shown = "; ".join(f"points {a} and {b} at {np.asarray(points)[b].tolist()}"
                      for a, b in pairs)
    more = f" (and {dup.size - 5} more)" if dup.size > 5 else ""
    raise VecchiaInputError(
        f"{dup.size} point(s) duplicate an earlier point with a zero nugget, so Sigma is "
        f"singular: {shown}{more}; give the kernel a nugget > 0 or remove or average the "
        "duplicates")


def check_status(status: np.ndarray, structure: VecchiaStructure, points: np.ndarray,
                 kernel: Kernel) -> None:
    """Refuse a factorization whose local Cholesky factorization failed somewhere."""
    bad = np.flatnonzero(status >= 0)
    if bad.size == 0:
        return
    s = int(bad[0])
    groups = structure.groups
    position = int(groups.set_rows[groups.set_ptr[s] + status[s]])
    point = int(structure.order.perm[position])
    raise VecchiaInputError(
        f"the local covariance block of point {point} (at "
        f"{np.asarray(points)[point].tolist()}; {bad.size} block(s) in all) is not "
        f"numerically positive definite under {kernel.describe()}: its conditioning "
        "points are too close for this length scale and nugget; add or raise the nugget "
        "(e.g. 1e-6 of the variance or more), shorten the length scale, or remove "
        "near-duplicate points")
