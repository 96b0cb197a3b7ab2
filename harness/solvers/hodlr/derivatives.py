"""Products with dSigma/dtheta_i for the HODLR solver (tree order).

With Sigma = s2 R + tau2 I and theta = (log s2, log l_1 .. log l_k, log tau2)
(``harness.model.kernels.classes``):

* dSigma/dlog s2 = s2 R = Sigma - tau2 I: the compressed Sigma~ minus tau2 I, no new
  compression;
* dSigma/dlog tau2 = tau2 I exactly;
* dSigma/dlog l_k = s2 s(r) w_k: compressed on the same cluster tree and to the same
  per-block tolerance as Sigma (``aca`` module), once, on first use.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.geometry.tree import ClusterTree
from harness.model.kernels.classes import Kernel
from harness.solvers.hodlr.compressed import HodlrMatrix, build_hodlr
from harness.solvers.hodlr.entries import KernelEntries


@dataclass(frozen=True)
class DerivativeRole:
    """What theta_i is: ``kind`` in {"variance", "lengthscale", "nugget"}, ``k`` its axis."""

    kind: str
    k: int = 0


def derivative_role(kernel: Kernel, i: int) -> DerivativeRole:
    """Role of parameter index ``i`` in ``kernel.param_names``."""
    if not 0 <= i < kernel.n_params:
        raise IndexError(f"derivative index {i} out of range: the kernel has parameters "
                         f"{kernel.param_names} (0..{kernel.n_params - 1})")
    n_ls = len(kernel.lengthscale)
    if i == 0:
        return DerivativeRole("variance")
    if i <= n_ls:
        return DerivativeRole("lengthscale", i - 1)
    return DerivativeRole("nugget")


def compress_lengthscale_derivative(kernel: Kernel, points_tree: np.ndarray, tree: ClusterTree,
                                    k: int, *, tol: float, rng: np.random.Generator,
                                    threads: int) -> HodlrMatrix:
    """HODLR compression of dSigma/dlog l_k over points in tree order."""
    entries = KernelEntries(kernel=kernel, points=points_tree, which=k)
    return build_hodlr(entries, tree, tol=tol, rng=rng, threads=threads)


def derivative_product(role: DerivativeRole, kernel: Kernel, sigma: HodlrMatrix,
                       lengthscale: HodlrMatrix | None, x: np.ndarray, *,
                       threads: int = 1) -> np.ndarray:
    """dSigma/dtheta_i @ x in tree order, x of shape (n, m)."""
    if role.kind == "variance":
        return sigma.matvec(x, threads=threads) - kernel.nugget * x
    if role.kind == "nugget":
        return kernel.nugget * x
    if lengthscale is None:
        raise ValueError(f"the derivative in log_lengthscale (axis {role.k}) has not been "
                         "compressed")
    return lengthscale.matvec(x, threads=threads)
