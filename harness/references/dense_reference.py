"""Dense exact reference: log-likelihood, score with exact traces, Fisher information,
kriging, for zero, constant and linear-trend means (GLS), with REML as an option.

Formulas (Rasmussen and Williams 2006, eqs. 2.30 and 5.9; Mardia and Marshall 1984,
Biometrika 71, for the spatial GLS likelihood and its Fisher information):

    L   = -1/2 r' Sigma^-1 r - 1/2 log det Sigma - n/2 log(2 pi),  r = y - F beta_GLS
    g_i = 1/2 a' Sigma_i a - 1/2 tr(Sigma^-1 Sigma_i),  a = Sigma^-1 r
    F_ij = 1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j)

With REML (Harville 1974) every Sigma^-1 inside a trace becomes the projection
P = Sigma^-1 - Sigma^-1 F (F' Sigma^-1 F)^-1 F' Sigma^-1, and a = P y = Sigma^-1 r still.
"""

from __future__ import annotations

import time

import numpy as np

from harness.linalg.dense_cholesky import _BLOCK, DenseCholesky
from harness.model.cross_tiles import cross_covariance_tiles
from harness.model.evaluation import KrigingPrediction, ModelEvaluation
from harness.model.gls import gls_loglik
from harness.model.kernels import Kernel
from harness.model.mean import design_matrix

__all__ = ["DenseCholesky", "dense_evaluate", "dense_kriging"]


def _check_data(points: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    points = np.asarray(points, dtype=float)
    points = points[:, None] if points.ndim == 1 else points
    y = np.asarray(y, dtype=float).ravel()
    if points.shape[0] != y.size:
        raise ValueError(
            f"coordinates have {points.shape[0]} rows but values have {y.size}; they must match"
        )
    return points, y


def dense_evaluate(points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str = "zero",
                   reml: bool = False, score: bool = True, fisher: bool = False,
                   memory_budget: int | None = None, certify: bool = True
                   ) -> ModelEvaluation:
    """Exact evaluation of the Gaussian likelihood at the kernel's parameters.

    Parameters
    ----------
    points : ndarray, shape (n, d)
    y : ndarray, shape (n,)
    kernel : Kernel
    mean : {"zero", "constant", "linear"}
    reml : bool
        Restricted likelihood (Harville 1974) instead of the profile likelihood.
    score, fisher : bool
        Compute the score (needs Sigma^-1: a second n x n array) and the expected
        Fisher information (p further n x n arrays, O(p n^3)).
    memory_budget : int, optional
        Bytes; the evaluation is refused before any assembly when it would not fit.

    Returns
    -------
    ModelEvaluation
        ``source="dense"`` with the DPOT01 certificate.
    """
    points, y = _check_data(points, y)
    p = kernel.n_params
    extra = (1 + p) if fisher else (1 if score else 0)
    chol = DenseCholesky(points, kernel, memory_budget=memory_budget, certify=certify,
                         extra_squares=extra)
    seconds = dict(chol.seconds)
    start = time.perf_counter()
    design = design_matrix(points, mean)
    whitened = chol.solve_sqrt(np.column_stack([y, design]))
    logdet = chol.logdet()
    fit = gls_loglik(logdet, whitened[:, 0], whitened[:, 1:], design, reml=reml)
    a = chol.solve_sqrt_transpose(fit.whitened_residual)
    seconds["loglik"] = time.perf_counter() - start

    score_vec = trace_terms = fisher_mat = None
    if score or fisher:
        start = time.perf_counter()
        inv = chol.inverse()
        projector_cols = None
        if reml and design.shape[1]:
            sinv_f = inv @ design                       # Sigma^-1 F
            projector_cols = (sinv_f, fit.beta_cov)     # P = Sigma^-1 - S F C F' S
        n = chol.n
        idx = np.arange(n)
        trace_terms = np.zeros(p)
        quad = np.zeros(p)
        reml_correction = np.zeros(p)
        products = [np.empty((n, n)) for _ in range(p)] if fisher else []
        for r0 in range(0, n, _BLOCK):
            r1 = min(n, r0 + _BLOCK)
            _, derivs = kernel.block_with_derivatives(points, idx[r0:r1], idx)
            for i in range(p):
                d_i = derivs[i]
                trace_terms[i] += float(np.einsum("ij,ij->", inv[r0:r1], d_i))
                quad[i] += float(a[r0:r1] @ (d_i @ a))
                if projector_cols is not None:
                    sf, cov = projector_cols
                    reml_correction[i] += float(np.trace(cov @ (sf[r0:r1].T @ (d_i @ sf))))
                if fisher:
                    # rows r0:r1 of Sigma_i Sigma^-1 (Sigma_i and Sigma^-1 symmetric)
                    products[i][r0:r1] = d_i @ inv
        trace_terms = trace_terms - reml_correction
        score_vec = 0.5 * quad - 0.5 * trace_terms
        seconds["score"] = time.perf_counter() - start
        if fisher:
            start = time.perf_counter()
            if projector_cols is not None:
                sf, cov = projector_cols
                # Sigma_i P = Sigma_i Sigma^-1 - (Sigma_i S F) C (S F)'
                for i in range(p):
                    products[i] -= (products[i] @ design) @ (cov @ sf.T)
            fisher_mat = np.empty((p, p))
            for i in range(p):
                for j in range(i, p):
                    # tr(A_i A_j) with A_i = Sigma_i P: sum of A_i * A_j'
                    value = 0.5 * float(np.einsum("ij,ji->", products[i], products[j]))
                    fisher_mat[i, j] = fisher_mat[j, i] = value
            seconds["fisher"] = time.perf_counter() - start
        del inv
    notes = ("traces exact through Sigma^-1 (dpotri)",) if score or fisher else ()
    return ModelEvaluation(
        source="dense", n=chol.n, param_names=kernel.param_names, loglik=fit.loglik,
        logdet=logdet, quadratic=fit.quadratic, beta=fit.beta, score=score_vec,
        trace_terms=trace_terms, fisher=fisher_mat, certificate=chol.certificate,
        seconds=seconds, notes=notes,
    )


def dense_kriging(points: np.ndarray, y: np.ndarray, kernel: Kernel, new_points: np.ndarray,
                  *, mean: str = "zero", memory_budget: int | None = None,
                  factorization: DenseCholesky | None = None) -> KrigingPrediction:
    """Universal-kriging mean and variance of the latent field at ``new_points``.

    m* = f*' beta + k*' Sigma^-1 (y - F beta),
    v* = s2 - k*' Sigma^-1 k* + u' (F' Sigma^-1 F)^-1 u,  u = f* - F' Sigma^-1 k*
    (Cressie 1993, *Statistics for Spatial Data*, eqs. 3.4.60-3.4.61; with the zero mean
    the last term vanishes and this is simple kriging, R&W 2006 eqs. 2.25-2.26). The
    cross-covariance k* is formed ``TILE_COLUMNS`` new points at a time
    (``harness.model.cross_tiles``), never as one n x m array.
    """
    points, y = _check_data(points, y)
    new_points = np.asarray(new_points, dtype=float)
    new_points = new_points[:, None] if new_points.ndim == 1 else new_points
    chol = factorization or DenseCholesky(points, kernel, memory_budget=memory_budget)
    design = design_matrix(points, mean)
    new_design = design_matrix(new_points, mean)
    whitened = chol.solve_sqrt(np.column_stack([y, design]))
    fit = gls_loglik(chol.logdet(), whitened[:, 0], whitened[:, 1:], design)
    a = chol.solve_sqrt_transpose(fit.whitened_residual)
    mean_values = new_design @ fit.beta
    variance = np.empty(new_points.shape[0])
    for cols, cross in cross_covariance_tiles(kernel, points, new_points):     # (n, k)
        mean_values[cols] += cross.T @ a
        v = chol.solve_sqrt(cross)                                 # L^-1 k*
        var = kernel.variance - np.einsum("ij,ij->j", v, v)
        if design.shape[1]:
            u = new_design[cols].T - whitened[:, 1:].T @ v         # f* - G' L^-1 k*
            var = var + np.einsum("ij,ij->j", u, fit.beta_cov @ u)
        variance[cols] = var
    variance = np.maximum(variance, 0.0)
    return KrigingPrediction(mean=mean_values, variance=variance,
                             observation_variance=variance + kernel.nugget, beta=fit.beta)
