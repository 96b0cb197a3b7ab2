"""Stochastic Lanczos quadrature of log det C for a symmetric positive definite operator C.

Ubaru, Chen and Saad (2017), "Fast estimation of tr(f(A)) via stochastic Lanczos
quadrature", SIAM J. Matrix Anal. Appl. 38(4), 1075-1099, Algorithm 1: for probe
vectors z_l with E[z z'] = I (Rademacher),

    tr(log C) ~ (1/N) sum_l ||z_l||^2 sum_k tau_lk^2 log theta_lk,

where theta_lk are the eigenvalues of the m x m Lanczos matrix T of C started at
z_l / ||z_l|| and tau_lk the first components of its eigenvectors (Gauss quadrature of
z' log(C) z, Golub and Meurant 2010, ch. 7). The standard error is the sample standard
deviation over probes divided by sqrt(N).

Each probe's Lanczos run stops when its quadrature value changes by less than
``step_tol`` nats between steps (or at an invariant subspace, where it is exact). All
probes run together, one block product per step. No reorthogonalization: the Gauss
quadrature values stay accurate under the loss of orthogonality of plain Lanczos
(Ubaru et al. 2017, section 4.3, "from memory"), and for a well-preconditioned C the
runs are short.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.linalg import eigh_tridiagonal

BlockMap = Callable[[np.ndarray], np.ndarray]


class IndefiniteOperatorError(ValueError):
    """A Lanczos matrix had a non-positive eigenvalue: C is not positive definite."""


@dataclass(frozen=True)
class SlqResult:
    """Per-probe quadrature values of z' log(C) z.

    Attributes
    ----------
    values : ndarray, shape (N,)
    steps : ndarray of int, shape (N,)
        Lanczos steps (block products) per probe.
    converged : ndarray of bool, shape (N,)
        Whether each run met ``step_tol`` within ``max_steps``.
    ritz_min, ritz_max : float
        Extreme Ritz values seen over all probes.
    """

    values: np.ndarray
    steps: np.ndarray
    converged: np.ndarray
    ritz_min: float
    ritz_max: float


def _quadrature(alphas: np.ndarray, betas: np.ndarray, norm2: float) -> tuple[float, float, float]:
    theta, vecs = eigh_tridiagonal(alphas, betas)
    if theta[0] <= 0.0:
        raise IndefiniteOperatorError(
            f"a Lanczos matrix of the preconditioned covariance has eigenvalue "
            f"{theta[0]:.3g} <= 0: the preconditioner (or the covariance) is not positive "
            "definite")
    tau2 = vecs[0] ** 2
    return float(norm2 * np.sum(tau2 * np.log(theta))), float(theta[0]), float(theta[-1])


def slq_logdet(apply_c: BlockMap, probes: np.ndarray, *, max_steps: int = 200,
               step_tol: float = 1e-6) -> SlqResult:
    """z' log(C) z for each probe column by Lanczos quadrature (module docstring).

    Parameters
    ----------
    apply_c : callable
        C V for a block V (n, c).
    probes : ndarray, shape (n, N)
    max_steps : int
        Lanczos steps per probe at most.
    step_tol : float
        Stop a probe when its value changes by <= step_tol between two steps.

    Raises
    ------
    IndefiniteOperatorError
        When a Lanczos matrix is not positive definite.
    """
    z = np.asarray(probes, dtype=float)
    n, count = z.shape
    norm2 = np.sum(z * z, axis=0)
    v = z / np.sqrt(norm2)
    v_prev = np.zeros_like(v)
    beta_prev = np.zeros(count)
    alphas = np.zeros((count, max_steps))
    betas = np.zeros((count, max_steps))
    values = np.zeros(count)
    steps = np.zeros(count, dtype=np.int64)
    converged = np.zeros(count, dtype=bool)
    active = np.arange(count)
    ritz_lo, ritz_hi = np.inf, -np.inf
    for step in range(min(max_steps, n)):
        w = np.asarray(apply_c(v[:, active]), dtype=float)
        alpha = np.sum(v[:, active] * w, axis=0)
        w -= alpha * v[:, active] + beta_prev[active] * v_prev[:, active]
        beta = np.linalg.norm(w, axis=0)
        alphas[active, step] = alpha
        betas[active, step] = beta
        keep = []
        for pos, col in enumerate(active):
            value, lo, hi = _quadrature(alphas[col, :step + 1], betas[col, :step],
                                        float(norm2[col]))
            ritz_lo, ritz_hi = min(ritz_lo, lo), max(ritz_hi, hi)
            change = abs(value - values[col])
            values[col] = value
            steps[col] = step + 1
            invariant = beta[pos] <= 1e-13 * max(abs(alpha[pos]), 1e-300)
            if invariant or (step > 0 and change <= step_tol) or step + 1 == n:
                converged[col] = True
            else:
                keep.append(pos)
        keep_arr = np.asarray(keep, dtype=np.int64)
        cols = active[keep_arr]
        v_prev[:, cols] = v[:, cols]
        v[:, cols] = w[:, keep_arr] / beta[keep_arr]
        beta_prev[cols] = beta[keep_arr]
        active = cols
        if active.size == 0:
            break
    return SlqResult(values=values, steps=steps, converged=converged,
                     ritz_min=float(ritz_lo), ritz_max=float(ritz_hi))
