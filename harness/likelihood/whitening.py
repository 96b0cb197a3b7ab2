"""The GLS mean fit and profile log-likelihood through any Factorization.

``harness.model.gls.gls_loglik`` needs whitened data u = W^-1 y and G = W^-1 F.
With ``solve_sqrt`` they come from the factor directly. Without it, the function only
ever uses the Gram products u'u, G'u and G'G, i.e. the (p+1) x (p+1) matrix

    M = [F y]' Sigma^-1 [F y],

which solves give. Any H with H'H = M has the same products; the symmetric square root
H = D^1/2 V' of M = V D V' (eigh), zero-padded to n rows so that ``gls_loglik`` counts n
observations, is one. The result is exact up to rounding, though the quadratic form
y'Sigma^-1 y - (F'Sigma^-1 y)'(F'Sigma^-1 F)^-1 F'Sigma^-1 y loses digits when the mean
model explains most of y; the whitened path does not. ``GlsFit.whitened_residual`` is
meaningless on the solve path (callers recompute a = Sigma^-1 r with ``solve``).
"""

from __future__ import annotations

from typing import TypeGuard

import numpy as np

from harness.model.gls import GlsFit, gls_loglik
from harness.solvers.protocol import Factorization, SymmetricFactorization


def supports_sqrt(factorization: Factorization) -> TypeGuard[SymmetricFactorization]:
    """Whether the factorization offers W^-1 B (``solve_sqrt``) and W B (``apply_sqrt``)."""
    flag = getattr(factorization, "supports_sqrt", None)
    if isinstance(flag, bool):
        return flag
    return (callable(getattr(factorization, "solve_sqrt", None))
            and callable(getattr(factorization, "apply_sqrt", None)))


def fit_mean(factorization: Factorization, y: np.ndarray, design: np.ndarray, logdet: float, *,
             reml: bool = False) -> tuple[GlsFit, str]:
    """GLS fit and log-likelihood, and a note saying which path computed them."""
    n = y.size
    stacked = np.column_stack([design, y])
    if supports_sqrt(factorization):
        white = np.asarray(factorization.solve_sqrt(stacked), dtype=np.float64)
        fit = gls_loglik(logdet, white[:, -1], white[:, :-1], design, reml=reml)
        return fit, "GLS fit from whitened data W^-1 [F y] (solve_sqrt)"
    solved = np.asarray(factorization.solve(stacked), dtype=np.float64)
    gram = stacked.T @ solved
    gram = 0.5 * (gram + gram.T)
    values, vectors = np.linalg.eigh(gram)
    root = np.sqrt(np.clip(values, 0.0, None))[:, None] * vectors.T      # H'H = M
    if n < root.shape[0]:
        raise ValueError(f"{n} observations cannot fit a mean model with "
                         f"{design.shape[1]} coefficients")
    padded = np.zeros((n, root.shape[1]))
    padded[: root.shape[0]] = root
    fit = gls_loglik(logdet, padded[:, -1], padded[:, :-1], design, reml=reml)
    return fit, ("GLS fit from the Gram matrix [F y]' Sigma^-1 [F y] through solves "
                 "(no solve_sqrt)")
