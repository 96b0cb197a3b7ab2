"""The dense exact Cholesky reference exposed as a solver (``--solver dense``)."""

from __future__ import annotations

import numpy as np

from harness.linalg.dense_cholesky import DenseCholesky
from harness.model.kernels import Kernel


def factorize(points: np.ndarray, kernel: Kernel, theta: np.ndarray | None = None, *,
              tol: float | None = None, memory_budget: int | None = None,
              certify: bool = True) -> DenseCholesky:
    """Dense Cholesky of Sigma(theta) = L L' (``harness.linalg.dense_cholesky.DenseCholesky``).

    Parameters
    ----------
    points : ndarray, shape (n, d)
    kernel : Kernel
    theta : ndarray, optional
        Log-scale parameters; the model is ``kernel.with_theta(theta)`` (the kernel's own
        parameters when omitted).
    tol : float, optional
        Ignored: the factorization is exact in float64 (accepted for the protocol).
    memory_budget : int, optional
        Bytes; refused before assembly when the n x n factor would not fit.
    certify : bool
        Check LAPACK's scaled residual (DPOT01) and raise when it fails.
    """
    model = kernel if theta is None else kernel.with_theta(theta)
    return DenseCholesky(points, model, memory_budget=memory_budget, certify=certify)
