"""GLS mean and the quadratic form r' Sigma^-1 r by preconditioned CG with exact products.

With design F (n x p) and G = F' Sigma^-1 F the GLS estimate is
beta = G^-1 F' Sigma^-1 y and Q = min_beta (y - F beta)' Sigma^-1 (y - F beta)
(Mardia and Marshall 1984, Biometrika 71; Cressie 1993, section 3.4). Here:

1. CG on Sigma [y, F] gives beta^ = G^-1 F' Sigma^-1 y from approximate solves;
2. CG on Sigma a = r^, r^ = y - F beta^ (started from the combination of step 1's
   solutions), gives Q(beta^) with the rigorous residual bound of ``pcg``;
3. Q(beta) = Q_min + (beta - beta*)' G (beta - beta*) exactly, and
   G (beta* - beta^) = F' Sigma^-1 r^, so Q_min = Q(beta^) - c with
   c = (F' a)' G^-1 (F' a). The correction c (second order in the error of step 1) is
   subtracted and, conservatively, added to the bound.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from harness.references.operator.pcg import BlockMap, CgResult, pcg


class RankDeficientDesignError(ValueError):
    """F' Sigma^-1 F is not positive definite: the mean model's design is rank deficient."""


@dataclass(frozen=True)
class GlsSolve:
    """The GLS fit by CG.

    Attributes
    ----------
    beta : ndarray, shape (p,)
    quadratic, bound : float
        Q_min and a bound on |Q_min - quadratic| (see module docstring).
    a : ndarray, shape (n,)
        Sigma^-1 (y - F beta).
    sinv_design : ndarray, shape (n, p)
        Sigma^-1 F (from CG).
    gram : ndarray, shape (p, p)
        G = F' Sigma^-1 F.
    iterations : int
    converged, rigorous : bool
    messages : tuple of str
    residual : ndarray, shape (n,)
        True residual r^ - Sigma a of the final solve (for ``rounding.quadratic_rounding``).
    rhs : ndarray, shape (n,)
        The final solve's right-hand side r^ = y - F beta.
    dot_rounding : float
        Rigorous bound of the rounding of the final quadratic form's dot products.
    lambda_min : float
        The lambda_min the final solve's bound used (``CgResult.lambda_min``).
    """

    beta: np.ndarray
    quadratic: float
    bound: float
    a: np.ndarray
    sinv_design: np.ndarray
    gram: np.ndarray
    iterations: int
    converged: bool
    rigorous: bool
    messages: tuple[str, ...]
    residual: np.ndarray | None = None
    rhs: np.ndarray | None = None
    dot_rounding: float = 0.0
    lambda_min: float = float("nan")


def gls_by_cg(apply_a: BlockMap, y: np.ndarray, design: np.ndarray, *,
              precondition: BlockMap, rtol: float, max_iterations: int,
              lambda_min: float | None,
              lambda_min_fallback: Callable[[float], float] | None = None) -> GlsSolve:
    """GLS estimate and quadratic form (module docstring)."""
    y = np.asarray(y, dtype=float).ravel()
    f = np.asarray(design, dtype=float).reshape(y.size, -1)
    p = f.shape[1]
    kwargs = {"precondition": precondition, "rtol": rtol, "lambda_min": lambda_min,
              "lambda_min_fallback": lambda_min_fallback}
    if p == 0:
        res = pcg(apply_a, y[:, None], max_iterations=max_iterations, **kwargs)  # type: ignore[arg-type]
        return GlsSolve(beta=np.empty(0), quadratic=float(res.quadratic[0]),
                        bound=float(res.bound[0]), a=res.x[:, 0], sinv_design=np.empty((y.size, 0)),
                        gram=np.empty((0, 0)), iterations=res.iterations,
                        converged=res.converged, rigorous=res.rigorous, messages=res.messages,
                        residual=_column(res.residual), rhs=y,
                        dot_rounding=_first(res.dot_rounding), lambda_min=res.lambda_min)
    first: CgResult = pcg(apply_a, np.column_stack([y, f]), max_iterations=max_iterations,
                          **kwargs)  # type: ignore[arg-type]
    xy, xf = first.x[:, 0], first.x[:, 1:]
    gram = f.T @ xf
    gram = 0.5 * (gram + gram.T)
    try:
        chol = np.linalg.cholesky(gram)
    except np.linalg.LinAlgError:
        raise RankDeficientDesignError(
            "the mean model's design matrix is rank deficient (e.g. a linear trend along a "
            "coordinate that does not vary); choose a simpler mean model") from None
    beta = np.linalg.solve(gram, f.T @ xy)
    resid = y - f @ beta
    left = max(1, max_iterations - first.iterations)
    second = pcg(apply_a, resid[:, None], max_iterations=left, x0=(xy - xf @ beta)[:, None],
                 **kwargs)  # type: ignore[arg-type]
    a = second.x[:, 0]
    fa = f.T @ a
    half = np.linalg.solve(chol, fa)
    correction = float(half @ half)
    messages = tuple(dict.fromkeys(first.messages + second.messages))
    return GlsSolve(beta=beta, quadratic=float(second.quadratic[0]) - correction,
                    bound=float(second.bound[0]) + abs(correction), a=a, sinv_design=xf,
                    gram=gram, iterations=first.iterations + second.iterations,
                    converged=first.converged and second.converged,
                    rigorous=second.rigorous, messages=messages,
                    residual=_column(second.residual), rhs=resid,
                    dot_rounding=_first(second.dot_rounding) + 2e-16 * abs(correction),
                    lambda_min=second.lambda_min)


def _column(block: np.ndarray | None) -> np.ndarray | None:
    return None if block is None else np.asarray(block)[:, 0]


def _first(values: np.ndarray | None) -> float:
    return 0.0 if values is None else float(np.asarray(values)[0])
