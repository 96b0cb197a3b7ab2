"""Universal-kriging mean and variance by CG with exact products, with error bounds.

m* = f*' beta + k*' Sigma^-1 (y - F beta),
v* = s2 - k*' Sigma^-1 k* + u' G^-1 u,  u = f* - F' Sigma^-1 k*,  G = F' Sigma^-1 F
(Cressie 1993, *Statistics for Spatial Data*, eqs. 3.4.60-3.4.61; simple kriging with
the zero mean, Rasmussen and Williams 2006, eqs. 2.25-2.26).

The GLS step is ``operator_gls.gls_by_cg``; m* uses a = Sigma^-1 r^ at the CG estimate
beta^ plus the first-order correction u' G^-1 F' a, which is exact because m* is linear
in beta and G (beta* - beta^) = F' Sigma^-1 r^. Bounds (rigorous with a nugget, from
||Sigma^-1 e|| <= ||e|| / lambda_min for a residual e):

    |m* error| <= ||k*|| ||r_a|| / lambda_min,      r_a = r^ - Sigma a
    |k*' Sigma^-1 k* error| <= ||r_j||^2 / lambda_min   (``pcg``)

The mean-model terms (u' G^-1 u and the beta correction) use CG solutions without a
separate bound; with a converged CG their error is second order.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.model.kernels import Kernel
from harness.model.mean import design_matrix
from harness.references.operator.operator_gls import gls_by_cg
from harness.references.operator.pcg import pcg
from harness.references.operator.products import KernelOperator
from harness.references.operator.schedule import DEFAULT_TILE
from harness.solvers.protocol import Factorization


@dataclass(frozen=True)
class OperatorKriging:
    """Kriging predictions by the operator reference, with bounds.

    Attributes
    ----------
    mean, variance : ndarray, shape (m,)
        Latent predictive mean and variance (variance clipped at 0).
    mean_bound, variance_bound : ndarray, shape (m,)
        Bounds on their CG errors (estimates without a nugget: ``rigorous`` False).
    beta : ndarray
    iterations : int
    converged, rigorous : bool
    messages : tuple of str
    """

    mean: np.ndarray
    variance: np.ndarray
    mean_bound: np.ndarray
    variance_bound: np.ndarray
    beta: np.ndarray
    iterations: int
    converged: bool
    rigorous: bool
    messages: tuple[str, ...]

    def to_dict(self) -> dict[str, object]:
        return {"mean": self.mean.tolist(), "variance": self.variance.tolist(),
                "mean_bound": self.mean_bound.tolist(),
                "variance_bound": self.variance_bound.tolist(), "beta": self.beta.tolist(),
                "iterations": self.iterations, "converged": self.converged,
                "rigorous": self.rigorous, "messages": list(self.messages)}


def operator_kriging(points: np.ndarray, y: np.ndarray, kernel: Kernel, new_points: np.ndarray,
                     theta: np.ndarray | None = None, *, mean: str = "zero",
                     preconditioner: Factorization, cg_rtol: float = 1e-10,
                     max_iterations: int = 1000, tile: int = DEFAULT_TILE,
                     memory_budget: int | None = None, client: object | None = None,
                     progress: bool | None = None) -> OperatorKriging:
    """Kriging mean and variance at ``new_points`` (module docstring)."""
    model = kernel if theta is None else kernel.with_theta(theta)
    pts = np.asarray(points, dtype=float)
    pts = pts[:, None] if pts.ndim == 1 else pts
    new = np.asarray(new_points, dtype=float)
    new = new[:, None] if new.ndim == 1 else new
    yv = np.asarray(y, dtype=float).ravel()
    if pts.shape[0] != yv.size:
        raise ValueError(f"points have {pts.shape[0]} rows but y has {yv.size} values")
    op = KernelOperator(pts, model, tile=tile, memory_budget=memory_budget, progress=progress,
                        client=client)
    lam = model.nugget if model.nugget > 0 else None
    lam_value = np.nan if lam is None else lam

    def precondition(b: np.ndarray) -> np.ndarray:
        return np.asarray(preconditioner.solve(b)).reshape(b.shape)

    design = design_matrix(pts, mean)
    new_design = design_matrix(new, mean)
    gls = gls_by_cg(op.matvec, yv, design, precondition=precondition, rtol=cg_rtol,
                    max_iterations=max_iterations, lambda_min=lam)
    cross = model.cross_covariance(pts, new)                  # (n, m)
    resid = yv - design @ gls.beta - op.matvec(gls.a)
    values = new_design @ gls.beta + cross.T @ gls.a
    solves = pcg(op.matvec, cross, precondition=precondition, rtol=cg_rtol,
                 max_iterations=max_iterations, lambda_min=lam)
    variance = model.variance - solves.quadratic
    if design.shape[1]:
        u = new_design.T - design.T @ solves.x                # (q, m)
        ginv = np.linalg.inv(gls.gram)
        values = values + u.T @ (ginv @ (design.T @ gls.a))
        variance = variance + np.einsum("im,im->m", u, ginv @ u)
    mean_bound = np.linalg.norm(cross, axis=0) * np.linalg.norm(resid) / lam_value
    messages = tuple(dict.fromkeys(gls.messages + solves.messages))
    return OperatorKriging(mean=values, variance=np.maximum(variance, 0.0),
                           mean_bound=mean_bound, variance_bound=solves.bound, beta=gls.beta,
                           iterations=gls.iterations + solves.iterations,
                           converged=gls.converged and solves.converged,
                           rigorous=lam is not None, messages=messages)
