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

Cost. The means need no solve per point: a comes from the GLS solve and
F' Sigma^-1 k* = (Sigma^-1 F)' k* from its q solves with the design, so each mean is a
product with one column of the cross-covariance, built ``TILE_COLUMNS`` new points at a
time (``harness.model.cross_tiles``). The variances cost one CG column each; they are
computed at ``variance_at`` only, in blocks of at most ``TILE_COLUMNS`` right-hand sides.
Peak memory: the preconditioner plus O(n x ``TILE_COLUMNS``), never an n x m array.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.model.cross_tiles import cross_covariance_tiles
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
    mean, mean_bound : ndarray, shape (m,)
        Latent predictive mean at every new point, and a bound on its CG error.
    variance, variance_bound : ndarray, shape (v,)
        Latent predictive variance (clipped at 0) at the ``variance_at`` points, and a
        bound on its CG error (the bounds are estimates without a nugget: ``rigorous``
        False).
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
                     progress: bool | None = None,
                     variance_at: np.ndarray | None = None) -> OperatorKriging:
    """Kriging means at ``new_points`` and variances at ``variance_at`` (indices into
    ``new_points``; default every one), with bounds (module docstring)."""
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
    resid_norm = float(np.linalg.norm(yv - design @ gls.beta - op.matvec(gls.a)))
    ginv = np.linalg.inv(gls.gram) if design.shape[1] else np.empty((0, 0))
    m = new.shape[0]
    at = np.arange(m) if variance_at is None else np.asarray(variance_at, dtype=np.intp)
    values = new_design @ gls.beta
    mean_bound = np.empty(m)
    for cols, cross in cross_covariance_tiles(model, pts, new):
        values[cols] += cross.T @ gls.a
        if design.shape[1]:
            u = new_design[cols].T - gls.sinv_design.T @ cross              # (q, k)
            values[cols] += u.T @ (ginv @ (design.T @ gls.a))
        mean_bound[cols] = np.linalg.norm(cross, axis=0) * resid_norm / lam_value
    variance = np.empty(at.size)
    variance_bound = np.empty(at.size)
    iterations, converged = gls.iterations, gls.converged
    messages = list(gls.messages)
    for cols, cross in cross_covariance_tiles(model, pts, new[at]):
        solves = pcg(op.matvec, cross, precondition=precondition, rtol=cg_rtol,
                     max_iterations=max_iterations, lambda_min=lam)
        var = model.variance - solves.quadratic
        if design.shape[1]:
            u = new_design[at[cols]].T - gls.sinv_design.T @ cross
            var = var + np.einsum("im,im->m", u, ginv @ u)
        variance[cols] = var
        variance_bound[cols] = solves.bound
        iterations += solves.iterations
        converged = converged and solves.converged
        messages.extend(solves.messages)
    return OperatorKriging(mean=values, variance=np.maximum(variance, 0.0),
                           mean_bound=mean_bound, variance_bound=variance_bound,
                           beta=gls.beta, iterations=iterations, converged=converged,
                           rigorous=lam is not None,
                           messages=tuple(dict.fromkeys(messages)))
