"""Randomized estimate of ||Sigma - Sigma~||_2 / ||Sigma||_2 from matrix-vector products.

Both operators are symmetric, so block power iteration on E = Sigma - Sigma~ converges to
its largest |eigenvalue| = ||E||_2 (Golub and Van Loan 2013, *Matrix Computations*,
4th ed., section 8.2.1; a random start gives a lower bound that is sharp with high
probability, Kuczynski and Wozniakowski 1992, SIAM J. Matrix Anal. Appl. 13). The
estimate after k steps is max_j ||E q_j|| over the orthonormalized block Q.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

MatVec = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class NormEstimate:
    """``value`` estimates ||A||_2; ``iterations`` steps of block size ``block``."""

    value: float
    iterations: int
    block: int


def power_norm(matvec: MatVec, n: int, *, rng: np.random.Generator, iterations: int = 20,
               block: int = 2) -> NormEstimate:
    """||A||_2 of a symmetric operator A given by ``matvec`` (block (n, k) -> (n, k))."""
    q, _ = np.linalg.qr(rng.standard_normal((n, block)))
    value = 0.0
    for _ in range(max(1, iterations)):
        z = np.asarray(matvec(q), dtype=float).reshape(n, block)
        value = float(np.max(np.linalg.norm(z, axis=0)))
        if value == 0.0:
            break
        q, _ = np.linalg.qr(z)
    return NormEstimate(value=value, iterations=iterations, block=block)


@dataclass(frozen=True)
class FactorizationError:
    """||Sigma - Sigma~||_2, ||Sigma||_2 (both estimated) and their ratio."""

    difference_norm: float
    reference_norm: float

    @property
    def relative(self) -> float:
        return self.difference_norm / self.reference_norm

    def to_dict(self) -> dict[str, float]:
        return {"factorization_error": self.relative,
                "factorization_abs_error": self.difference_norm,
                "sigma_norm": self.reference_norm}


def factorization_error(exact_matvec: MatVec, approx_matvec: MatVec, n: int, *,
                        rng: np.random.Generator, iterations: int = 20) -> FactorizationError:
    """Relative operator-norm error of Sigma~ (``approx_matvec``) against Sigma."""
    diff = power_norm(lambda b: exact_matvec(b) - approx_matvec(b), n, rng=rng,
                      iterations=iterations)
    ref = power_norm(exact_matvec, n, rng=rng, iterations=iterations)
    return FactorizationError(difference_norm=diff.value, reference_norm=ref.value)
