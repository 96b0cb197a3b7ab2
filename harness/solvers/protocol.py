"""The solver protocol: what a solver under test must offer the harness.

A solver is a factory ``factorize(points, kernel, theta, *, tol, **options)`` returning a
``Factorization`` of Sigma(theta) at ``points``. ``kernel`` is a ``harness.model.kernels.Kernel``;
``theta`` (log scale, ``kernel.param_names`` order) overrides its parameters, i.e. the
model is ``kernel.with_theta(theta)``. Required members are in ``Factorization``; the
optional ones are listed in ``OPTIONAL_METHODS`` and supplied generically by
``harness.solvers.fallback`` when a plugin lacks them.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import numpy as np

#: Optional Factorization members, with what each gives.
OPTIONAL_METHODS: dict[str, str] = {
    "solve_sqrt": "W^-1 B for the symmetric factor Sigma~ = W W'",
    "apply_sqrt": "W B (sampling from the model)",
    "solve_sqrt_transpose": "W^-T B (saves a product and a solve per trace probe block)",
    "derivative_matvec": "dSigma/dtheta_i @ B",
    "derivative_affine": "(a, b) when dSigma~/dtheta_i = a Sigma~ + b I exactly, else None "
                         "(such parameters share one trace estimate)",
    "ranks": "off-diagonal ranks per tree level",
}


@runtime_checkable
class Factorization(Protocol):
    """A factored covariance matrix Sigma~ ~ Sigma(theta), n x n, symmetric positive definite.

    ``solve`` and ``matvec`` accept a vector (n,) or a block (n, k) and return the same shape.
    """

    @property
    def n(self) -> int: ...

    @property
    def nbytes(self) -> int:
        """Bytes of storage held by the factorization."""
        ...

    def logdet(self) -> float:
        """log det Sigma~."""
        ...

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Sigma~^-1 b."""
        ...

    def matvec(self, b: np.ndarray) -> np.ndarray:
        """Sigma~ b."""
        ...


@runtime_checkable
class SymmetricFactorization(Factorization, Protocol):
    """A Factorization that also exposes its symmetric factor W (Sigma~ = W W')."""

    def solve_sqrt(self, b: np.ndarray) -> np.ndarray: ...

    def apply_sqrt(self, b: np.ndarray) -> np.ndarray: ...


@runtime_checkable
class DifferentiableFactorization(Factorization, Protocol):
    """A Factorization that also offers products with dSigma/dtheta_i."""

    def derivative_matvec(self, i: int, b: np.ndarray) -> np.ndarray: ...


class SolverFactory(Protocol):
    """``factorize(points, kernel, theta, *, tol, **options) -> Factorization``."""

    def __call__(self, points: np.ndarray, kernel: object, theta: np.ndarray, *, tol: float,
                 **options: object) -> Factorization: ...
