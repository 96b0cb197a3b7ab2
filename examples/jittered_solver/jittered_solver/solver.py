"""Sigma~ = Sigma(theta) + tol * s2 * I, factored by a dense Cholesky.

The perturbation is exact and known, so every error an audit reports has a closed form
to first order in tol, e.g. log det Sigma~ - log det Sigma ~ tol * s2 * tr(Sigma^-1).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
from harness.solvers.knobs import KnobSpec


class JitteredCholesky:
    """Cholesky factor L of Sigma + jitter * I; Sigma~ = L L' (so W = L)."""

    def __init__(self, sigma: np.ndarray, jitter: float) -> None:
        self.jitter = float(jitter)
        perturbed = np.array(sigma, dtype=float, copy=True)
        perturbed[np.diag_indices_from(perturbed)] += self.jitter
        self._chol = scipy.linalg.cholesky(perturbed, lower=True)
        self._matrix = perturbed

    @property
    def n(self) -> int:
        return int(self._chol.shape[0])

    @property
    def nbytes(self) -> int:
        return int(self._chol.nbytes + self._matrix.nbytes)

    def logdet(self) -> float:
        return 2.0 * float(np.sum(np.log(np.diag(self._chol))))

    def solve(self, b: np.ndarray) -> np.ndarray:
        return scipy.linalg.cho_solve((self._chol, True), b)

    def matvec(self, b: np.ndarray) -> np.ndarray:
        return self._matrix @ b

    def solve_sqrt(self, b: np.ndarray) -> np.ndarray:
        return scipy.linalg.solve_triangular(self._chol, b, lower=True)

    def apply_sqrt(self, b: np.ndarray) -> np.ndarray:
        return self._chol @ b


def factorize(points: np.ndarray, kernel, theta: np.ndarray, *, tol: float,
              **options: object) -> JitteredCholesky:
    """covaudit solver factory: Sigma(theta) + tol * s2 * I at ``points``.

    ``kernel`` is a covaudit kernel; ``kernel.with_theta(theta)`` is the model and its
    ``covariance(points)`` the dense Sigma. Unknown options are refused.
    """
    if options:
        raise TypeError(f"jittered solver takes no options, got {sorted(options)}")
    if tol is None or not np.isfinite(tol) or tol < 0:
        raise ValueError(f"jittered solver needs a finite tol >= 0, got {tol!r}")
    model = kernel.with_theta(theta)
    return JitteredCholesky(model.covariance(points), tol * model.variance)


#: The accuracy knob: tol, the jitter as a fraction of the variance, at most 0.1
#: (covaudit refuses larger values before calling the solver).
factorize.knob = KnobSpec(  # type: ignore[attr-defined]
    name="tol", kind="float", low=0.0, high=0.1, low_closed=False, high_closed=True,
    more_accurate="smaller", default_sweep=(1e-2, 1e-4, 1e-6, 1e-8),
    meaning="jitter on the diagonal, as a fraction of the kernel variance")
