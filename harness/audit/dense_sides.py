"""The dense reference's work in its child process: factorizations in, results out.

``dense_sides`` factors Sigma of all points and of the kriging conditioning points with
the certified dense Cholesky and reduces each to the audit's sides; the parent
(``audit_references.DenseReference``) calls it through
``harness.infra.child_process.run_stage``, so only these results cross the process
boundary, never an n x n factor. This module imports little, so the child starts fast.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.audit.sides import KrigingSide, Side, evaluate_side, kriging_side
from harness.linalg.dense_cholesky import DenseCholesky
from harness.model.kernels import Kernel


@dataclass(frozen=True)
class DenseSides:
    """What the dense reference's child process sends back: no factor, only results."""

    full: Side
    kriging: KrigingSide
    certificate_full: float
    certificate_train: float


def dense_sides(points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                holdout: np.ndarray, probes: np.ndarray,
                memory_budget: int | None, variance_at: np.ndarray | None = None
                ) -> DenseSides:
    """The dense reference's quantities: all points, then the kriging conditioning points
    (all but ``holdout``), kriging at the held-out points: means at every one, variances
    at ``variance_at`` (positions among them; default every one).

    Runs in a child process (``DenseReference``); only means and variances cross the
    boundary.
    """
    x = points
    train = np.setdiff1d(np.arange(y.size), holdout)
    chol = DenseCholesky(x, kernel, memory_budget=memory_budget)
    cert_full = float(chol.certificate if chol.certificate is not None else np.nan)
    full = evaluate_side("dense", chol, x, y, kernel, mean=mean, probes=probes,
                         factor_seconds=chol.seconds["assemble"] + chol.seconds["factor"])
    del chol
    chol_t = DenseCholesky(x[train], kernel, memory_budget=memory_budget)
    cert_t = float(chol_t.certificate if chol_t.certificate is not None else np.nan)
    ks = kriging_side("dense", chol_t, x[train], y[train], kernel, x[holdout], mean=mean,
                      variance_at=variance_at)
    return DenseSides(full, ks, cert_full, cert_t)


