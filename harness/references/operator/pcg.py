"""Preconditioned conjugate gradients with exact products and a rigorous error bound.

Solves A X = B column by column (all columns share each exact product) with the
preconditioner's ``solve`` as M^-1 (Hestenes and Stiefel 1952; preconditioned form as in
Saad 2003, *Iterative Methods for Sparse Linear Systems*, Algorithm 9.1).

Error bound of the quadratic form. For any approximation x of A^-1 b with true residual
r = b - A x (recomputed with an exact product, not the recursive one) the identity

    b' A^-1 b = b' x + x' r + r' A^-1 r

is elementary algebra (expand b = A x + r). The estimate reported is Q^ = b'x + x'r and
its error r' A^-1 r lies in [||r||^2 / lambda_max, ||r||^2 / lambda_min] (Rayleigh
quotient; the same bound of the CG A-norm error, Golub and Meurant 2010, *Matrices,
Moments and Quadrature with Applications*, ch. 12 "from memory"). For Sigma = s2 R +
tau2 I with R positive semidefinite, lambda_min >= tau2, so

    0 <= b' Sigma^-1 b - Q^ <= ||r||^2 / tau2            (bound_kind "residual/nugget").

Without a nugget no lower bound of lambda_min is known in O(n^2) work; then the bound
uses an *estimate* (bound_kind "residual/ritz-estimate", not rigorous): one tenth of the
smallest Ritz value of M^-1 A from the CG coefficients (Saad 2003, section 6.7.3) times
an estimate of lambda_min(M) from a few Lanczos steps on M^-1.

Rounding. Q^ = b'x + x'r is summed with correctly rounded dot products
(``rounding.accurate_dots``; a numpy column sum is recursive, error up to gamma_n |b|'|x|,
Higham 2002, eq. 3.4), with the rigorous bound u (|b|'|x| + |x|'|r|) + 2 u |Q^| of the
two dots and their sum (``CgResult.dot_rounding``). The rounding of the product K x in
r is not in this bound: ``rounding.quadratic_rounding`` estimates it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.linalg import eigh_tridiagonal

from harness.references.operator.rounding import UNIT_ROUNDOFF, accurate_dots, dot_bound

BlockMap = Callable[[np.ndarray], np.ndarray]

#: Residual replacements (restarts from the current x with the true residual) allowed
#: when the recursive residual has converged but the true one has not.
MAX_RESTARTS = 3


class PreconditionerError(ValueError):
    """The preconditioner is not positive definite or returned non-finite values."""


@dataclass(frozen=True)
class CgResult:
    """Solutions of A X = B with per-column quadratic forms and their error bounds.

    Attributes
    ----------
    x : ndarray, shape (n, k)
    quadratic : ndarray, shape (k,)
        Q^ = b'x + x'r, the estimate of b' A^-1 b (see module docstring).
    bound : ndarray, shape (k,)
        ||r||^2 / lambda_min (an estimate when ``rigorous`` is False).
    relative_residual : ndarray, shape (k,)
        ||b - A x|| / ||b|| from a final exact product.
    iterations : int
        CG iterations (each one exact product of the active columns).
    converged : bool
        Every true relative residual <= rtol.
    rigorous : bool
        Whether ``bound`` uses a proven lambda_min (the nugget).
    lambda_min : float
        The value used for lambda_min.
    ritz_min : float
        Smallest Ritz value of M^-1 A seen (nan if none).
    messages : tuple of str
    residual : ndarray, shape (n, k)
        The true residual b - A x from the final product.
    dot_rounding : ndarray, shape (k,)
        Rigorous bound of the rounding of b'x + x'r and their sum (module docstring).
    """

    x: np.ndarray
    quadratic: np.ndarray
    bound: np.ndarray
    relative_residual: np.ndarray
    iterations: int
    converged: bool
    rigorous: bool
    lambda_min: float
    ritz_min: float
    messages: tuple[str, ...]
    residual: np.ndarray | None = None
    dot_rounding: np.ndarray | None = None


def _ritz_extremes(alphas: list[float], betas: list[float]) -> tuple[float, float]:
    """Extreme eigenvalues of the CG Lanczos matrix (Saad 2003, eq. 6.103)."""
    k = len(alphas)
    if k == 0:
        return float("nan"), float("nan")
    a = np.asarray(alphas)
    b = np.asarray(betas[:k])
    diag = 1.0 / a
    diag[1:] += b[:k - 1] / a[:k - 1]
    off = np.sqrt(np.maximum(b[:k - 1], 0.0)) / a[:k - 1]
    values = eigh_tridiagonal(diag, off, eigvals_only=True)
    return float(values[0]), float(values[-1])


def _check_preconditioned(z: np.ndarray, r: np.ndarray, rz: np.ndarray) -> None:
    if not np.all(np.isfinite(z)):
        raise PreconditionerError("the preconditioner's solve returned non-finite values")
    bad = (rz <= 0.0) & (np.sum(r * r, axis=0) > 0.0)
    if np.any(bad):
        raise PreconditionerError(
            f"the preconditioner is not positive definite: r' M^-1 r = {float(rz[bad][0]):.3g} "
            "<= 0 for a nonzero residual; use a positive definite preconditioner (e.g. the "
            "built-in solver at a tighter tolerance)")


def lambda_min_estimate(precondition: BlockMap, n: int, *, rng: np.random.Generator,
                        steps: int = 20) -> float:
    """Estimate of lambda_min(M) as 1 / (largest Ritz value of M^-1) after ``steps``
    Lanczos steps (an over-estimate of lambda_min(M): the Ritz value is a lower bound of
    lambda_max(M^-1); Saad 2003, section 6.6)."""
    v = rng.standard_normal(n)
    v /= np.linalg.norm(v)
    v_prev = np.zeros(n)
    beta = 0.0
    alphas, betas = [], []
    for _ in range(min(steps, n)):
        w = np.asarray(precondition(v[:, None]))[:, 0] - beta * v_prev
        alpha = float(v @ w)
        w -= alpha * v
        alphas.append(alpha)
        beta = float(np.linalg.norm(w))
        if beta <= 1e-14 * abs(alpha):
            break
        betas.append(beta)
        v_prev, v = v, w / beta
    off = np.asarray(betas[:len(alphas) - 1])
    top = float(eigh_tridiagonal(np.asarray(alphas), off, eigvals_only=True)[-1])
    return 1.0 / top if top > 0 else float("nan")


def pcg(apply_a: BlockMap, b: np.ndarray, *, precondition: BlockMap, rtol: float,
        max_iterations: int, lambda_min: float | None,
        lambda_min_fallback: Callable[[float], float] | None = None,
        x0: np.ndarray | None = None) -> CgResult:
    """Preconditioned CG for A X = B with the module docstring's bound.

    Parameters
    ----------
    apply_a : callable
        Exact products A V for a block V (n, c).
    b : ndarray, shape (n, k)
    precondition : callable
        M^-1 V (the preconditioner's ``solve``).
    rtol : float
        Stop a column when ||r|| <= rtol ||b||.
    max_iterations : int
        Budget of CG iterations (all restarts together).
    lambda_min : float or None
        A proven lower bound of lambda_min(A) (the nugget), or None.
    lambda_min_fallback : callable, optional
        Maps the smallest Ritz value of M^-1 A to an estimate of lambda_min(A); used
        when ``lambda_min`` is None.
    x0 : ndarray, optional
        Starting guess (n, k).

    Raises
    ------
    PreconditionerError
        When r' M^-1 r <= 0 for a nonzero residual or M^-1 returns non-finite values.
    """
    if not (np.isfinite(rtol) and 0.0 < rtol < 1.0):
        raise ValueError(f"cg_rtol must be in (0, 1), got {rtol!r}")
    if int(max_iterations) != max_iterations or max_iterations < 1:
        raise ValueError(f"max_iterations must be a positive integer, got {max_iterations!r}")
    b = np.asarray(b, dtype=float)
    n, k = b.shape
    bnorm = np.linalg.norm(b, axis=0)
    target = rtol * np.where(bnorm > 0, bnorm, 1.0)
    x = np.zeros((n, k)) if x0 is None else np.array(x0, dtype=float, copy=True)
    r = b - apply_a(x) if x0 is not None else b.copy()
    iterations = 0
    messages: list[str] = []
    alphas: list[float] = []
    betas: list[float] = []
    restarts = 0
    while True:
        rnorm = np.linalg.norm(r, axis=0)
        active = np.flatnonzero(rnorm > target)
        if active.size == 0 or iterations >= max_iterations:
            break
        z = np.asarray(precondition(r[:, active]))
        rz = np.sum(r[:, active] * z, axis=0)
        _check_preconditioned(z, r[:, active], rz)
        p = z.copy()
        track = active[0]
        while active.size and iterations < max_iterations:
            q = apply_a(p)
            pq = np.sum(p * q, axis=0)
            if np.any(pq <= 0.0):
                messages.append("p' A p <= 0 in CG: the operator is not positive definite "
                                "in floating point (nugget too small for this kernel?)")
                iterations = max_iterations
                break
            alpha = rz / pq
            x[:, active] += alpha * p
            r[:, active] -= alpha * q
            iterations += 1
            z = np.asarray(precondition(r[:, active]))
            rz_new = np.sum(r[:, active] * z, axis=0)
            _check_preconditioned(z, r[:, active], rz_new)
            beta = rz_new / rz
            pos = np.flatnonzero(active == track)
            if pos.size and restarts == 0:
                alphas.append(float(alpha[pos[0]]))
                betas.append(float(beta[pos[0]]))
            keep = np.linalg.norm(r[:, active], axis=0) > target[active]
            p = (z + beta * p)[:, keep]
            rz = rz_new[keep]
            active = active[keep]
        # residual replacement: the true residual decides
        r = b - apply_a(x)
        if restarts >= MAX_RESTARTS:
            break
        restarts += 1
    true_norm = np.linalg.norm(r, axis=0)
    rel = true_norm / np.where(bnorm > 0, bnorm, 1.0)
    converged = bool(np.all(true_norm <= target))
    if not converged:
        messages.append(
            f"CG did not converge within max_iterations = {max_iterations}: largest relative "
            f"residual {float(rel.max()):.3g} > cg_rtol = {rtol:.3g}; raise max_iterations or "
            "use a better preconditioner")
    ritz_min, _ = _ritz_extremes(alphas, betas)
    rigorous = lambda_min is not None and lambda_min > 0
    if rigorous:
        lam = float(lambda_min)  # type: ignore[arg-type]
    elif lambda_min_fallback is not None and np.isfinite(ritz_min) and ritz_min > 0:
        lam = float(lambda_min_fallback(ritz_min))
    else:
        lam = float("nan")
    bx, xr = accurate_dots(b, x), accurate_dots(x, r)
    quadratic = bx + xr
    dot_rounding = dot_bound(b, x) + dot_bound(x, r) + UNIT_ROUNDOFF * np.abs(quadratic)
    bound = true_norm ** 2 / lam if lam > 0 else np.full(k, np.inf)
    return CgResult(x=x, quadratic=quadratic, bound=bound, relative_residual=rel,
                    iterations=iterations, converged=converged, rigorous=rigorous,
                    lambda_min=lam, ritz_min=ritz_min, messages=tuple(messages),
                    residual=r, dot_rounding=dot_rounding)
