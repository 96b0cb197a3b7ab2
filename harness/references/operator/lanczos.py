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
``step_tol`` nats between steps (or at an invariant subspace, where it is exact).

Quadrature and stopping error, bracketed per probe. For f = log every even derivative is
negative and every odd one positive on (0, inf), so with k Lanczos steps the Gauss rule
G_k is an upper bound of z' log(C) z and the Gauss-Radau rule R_k with a prescribed
node a <= lambda_min(C) a lower bound (Golub and Meurant 2010, *Matrices, Moments and
Quadrature with Applications*, ch. 6, section 6.2, the error terms of the Gauss and
Gauss-Radau rules with the sign of f^(2k) and f^(2k+1)). R_k is the Gauss value of
T_k extended by beta_k and omega = a + beta_k^2 [(T_k - a I)^-1]_kk (ibid., the
Gauss-Radau construction). So 0 <= G_k - z'log(C)z <= G_k - R_k =
``widths``: the error of the mean of the reported G values lies in
[-mean(widths), 0]. The bound holds in exact arithmetic given a <= lambda_min(C); the
caller passes such a (or the default, one half of the smallest Ritz value seen, an
estimate). This bound replaces the a-priori Chebyshev bound of Ubaru et al. (2017,
Theorem 4.1, Corollary 4.5), which needs the condition number of C and is far looser.

Rounding. alpha_j is the Rayleigh quotient v'Cv / v'v with both dot products correctly
rounded (``rounding.accurate_dots``): a column sum along axis 0 is recursive and, with
n nearly equal terms, biased, and n (alpha_1 - 1) multiplies that bias by n. The
quadrature e1' log(T) e1 is evaluated from the eigenvalues of T - alpha_1 I (absolute
accuracy u ||T - alpha_1 I||, small for a good preconditioner) as
log(alpha_1) + sum tau_k^2 log1p(mu_k / alpha_1). All
probes run together, one block product per step. No reorthogonalization: the Gauss
quadrature values stay accurate under the loss of orthogonality of plain Lanczos
(Ubaru et al. 2017, section 4.3, "from memory"), and for a well-preconditioned C the
runs are short.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.linalg import eigh_tridiagonal

from harness.references.operator.rounding import accurate_dots

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
    widths : ndarray, shape (N,)
        G_k - R_k >= 0 per probe: the Gauss/Gauss-Radau bracket of each value's
        quadrature and stopping error (module docstring).
    radau_node : float
        The prescribed node a of the Gauss-Radau rule.
    """

    values: np.ndarray
    steps: np.ndarray
    converged: np.ndarray
    ritz_min: float
    ritz_max: float
    widths: np.ndarray
    radau_node: float


def _quadrature(alphas: np.ndarray, betas: np.ndarray, norm2: float) -> tuple[float, float, float]:
    shift = float(alphas[0])
    if len(alphas) == 1:
        mu, vecs = np.zeros(1), np.ones((1, 1))
    else:
        mu, vecs = eigh_tridiagonal(alphas - shift, betas)
    theta = shift + mu
    if not shift > 0.0 or theta[0] <= 0.0:
        raise IndefiniteOperatorError(
            f"a Lanczos matrix of the preconditioned covariance has eigenvalue "
            f"{min(theta[0], shift):.3g} <= 0: the preconditioner (or the covariance) is not "
            "positive definite")
    tau2 = vecs[0] ** 2
    value = math.log(shift) * float(np.sum(tau2)) + float(np.sum(tau2 * np.log1p(mu / shift)))
    return float(norm2 * value), float(theta[0]), float(theta[-1])


def _radau(alphas: np.ndarray, betas: np.ndarray, beta_last: float, node: float,
           norm2: float) -> float:
    """The Gauss-Radau value with prescribed node ``node`` (module docstring)."""
    k = alphas.size
    shifted = np.diag(alphas - node) + np.diag(betas, 1) + np.diag(betas, -1)
    rhs = np.zeros(k)
    rhs[-1] = beta_last ** 2
    try:
        delta = np.linalg.solve(shifted, rhs)
    except np.linalg.LinAlgError:
        return float("-inf")
    omega = node + float(delta[-1])
    ext_a = np.append(alphas, omega)
    ext_b = np.append(betas, beta_last)
    try:
        return _quadrature(ext_a, ext_b, norm2)[0]
    except IndefiniteOperatorError:
        return float("-inf")


def slq_logdet(apply_c: BlockMap, probes: np.ndarray, *, max_steps: int = 200,
               step_tol: float = 1e-6, radau_node: float | None = None) -> SlqResult:
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
    radau_node : float, optional
        a <= lambda_min(C) for the Gauss-Radau bound; default one half of the smallest
        Ritz value seen (an estimate).

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
        alpha = (accurate_dots(v[:, active], w)
                 / accurate_dots(v[:, active], v[:, active]))
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
    node = 0.5 * float(ritz_lo) if radau_node is None else float(radau_node)
    widths = np.empty(count)
    for j in range(count):
        last = int(steps[j])
        beta_last = float(betas[j, last - 1])
        if last == n or beta_last <= 1e-13 * max(abs(float(alphas[j, last - 1])), 1e-300):
            widths[j] = 0.0  # invariant subspace: the Gauss value is exact
            continue
        lower = _radau(alphas[j, :last], betas[j, :last - 1], beta_last, node, float(norm2[j]))
        widths[j] = max(values[j] - lower, 0.0)
    return SlqResult(values=values, steps=steps, converged=converged,
                     ritz_min=float(ritz_lo), ritz_max=float(ritz_hi), widths=widths,
                     radau_node=node)
