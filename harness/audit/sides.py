"""What one factorization (exact or compressed) says at the fitted parameters.

For the audit both the reference and the solver under test are reduced to the same
quantities at the same theta, the same data and the same probe vectors Z:

* L, beta, a = Sigma^-1 r (GLS, ``harness.likelihood.whitening.fit_mean``);
* q_i = a' Sigma_i a, the quadratic part of the score (R&W 2006, eq. 5.9);
* S_i Z = Sigma^-1 Sigma_i Z for Rademacher probes Z, so that the *difference* of the
  trace terms tr(S~_i - S_i) is estimated by Hutchinson's estimator on the difference
  operator (common random numbers). Its variance 2 ||S~_i - S_i||_F^2 / k (Hutchinson
  1990, Commun. Statist. Simul. 19) is that of the small difference, not of the whole
  trace, so the compression error of the score is resolved far below the estimator
  noise of a trace estimate made on its own;
* kriging (``kriging_side``): a second factorization of the points *other than* the
  held-out ones, at the same parameters, predicts at the held-out points: means at every
  one, latent variances at a subset (``AuditData.variance_at``), both through
  ``harness.likelihood.kriging`` at bounded memory. The loss-of-efficiency criteria
  (``efficiency``) need the universal-kriging weights of the variance points; they are
  formed 64 columns at a time (``predictor_mse``), never as one n x m array. The
  likelihood pieces use all n points.

For the dense reference the derivative products Sigma_i [a, Z] come from one pass over
row blocks of the kernel's derivative blocks (all parameters at once).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from harness.audit.metrics.efficiency import predictor_mse_terms
from harness.likelihood import kriging
from harness.likelihood.whitening import fit_mean
from harness.linalg.rademacher import rademacher_probes
from harness.model import design_matrix
from harness.model.cross_tiles import column_blocks
from harness.model.kernels import Kernel
from harness.references import DenseCholesky
from harness.references.line_products import LineCrossProducts, LineProductError
from harness.solvers.protocol import Factorization

_ROWS = 1024


@dataclass(frozen=True)
class Side:
    """Likelihood quantities of one factorization of all n points (module docstring).

    ``seconds`` holds ``factor`` (building the factorization), ``loglik`` (log det and
    the GLS fit) and ``extras`` (score pieces); ``logdet`` is log det of the factorized
    matrix (the KL divergence needs the exact side's).
    """

    name: str
    loglik: float
    beta: np.ndarray
    quad: np.ndarray
    sinv_deriv_probes: np.ndarray      # (p, n, k)
    seconds: dict[str, float]
    nbytes: int
    logdet: float = math.nan

    @property
    def loglik_seconds(self) -> float:
        """Time for one log-likelihood: factorization plus log det and GLS fit."""
        return self.seconds["factor"] + self.seconds["loglik"]


@dataclass(frozen=True)
class KrigingSide:
    """Kriging at the held-out points from a factorization of the other points.

    ``mean`` has one entry per held-out point, ``variance`` one per entry of
    ``variance_at`` (positions among the held-out points).
    """

    name: str
    mean: np.ndarray                   # (m,)
    variance: np.ndarray               # (len(variance_at),)
    variance_at: np.ndarray            # (v,) int


#: The one Rademacher generator (``harness.linalg.rademacher``) under the name the
#: check pipeline imports; it draws the same entries from the same generator as before.
rademacher = rademacher_probes


def _dense_derivative_products(points: np.ndarray, kernel: Kernel, vectors: np.ndarray
                               ) -> np.ndarray:
    """Sigma_i @ vectors for every parameter i, shape (p, n, c), by row blocks."""
    n = points.shape[0]
    idx = np.arange(n)
    out = np.empty((kernel.n_params, n, vectors.shape[1]))
    for r0 in range(0, n, _ROWS):
        r1 = min(n, r0 + _ROWS)
        _, derivs = kernel.block_with_derivatives(points, idx[r0:r1], idx)
        out[:, r0:r1] = derivs @ vectors
    return out


def kriging_weights(fac: Factorization, points: np.ndarray, kernel: Kernel, new_points: np.ndarray,
                    *, mean: str) -> np.ndarray:
    """Universal-kriging weights lambda (n x m) of the factorization's model.

    lambda = Sigma^-1 k* + Sigma^-1 F (F' Sigma^-1 F)^-1 (f* - F' Sigma^-1 k*)
    (Cressie 1993, eq. 3.4.59; the second term vanishes for the zero mean). An n x m
    array: callers pass at most ``TILE_COLUMNS`` new points (``predictor_mse``).
    """
    cross = kernel.cross_covariance(points, new_points)
    lam = np.asarray(fac.solve(cross))
    design = design_matrix(points, mean)
    if design.shape[1]:
        sf = np.asarray(fac.solve(design))
        gram = design.T @ sf
        u = design_matrix(new_points, mean).T - design.T @ lam
        lam = lam + sf @ np.linalg.solve(gram, u)
    return lam


def predictor_mse(fac: Factorization, points: np.ndarray, kernel: Kernel,
                  new_points: np.ndarray, *, mean: str,
                  matvec: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """E_at: the mean squared error, under the model whose Sigma product is ``matvec``,
    of the kriging predictor with ``fac``'s weights, at each new point.

    E_at = c00 - 2 lambda' c + lambda' Sigma lambda (``harness.audit.metrics.efficiency``),
    with lambda from ``kriging_weights`` and c = k(X, x*), ``TILE_COLUMNS`` new points at
    a time, so that no n x m array is formed.
    """
    new = np.asarray(new_points, dtype=float)
    new = new[:, None] if new.ndim == 1 else new
    out = np.empty(new.shape[0])
    for cols in column_blocks(new.shape[0]):
        block = new[cols]
        lam = kriging_weights(fac, points, kernel, block, mean=mean)
        cross = kernel.cross_covariance(points, block)
        out[cols] = predictor_mse_terms(lam, cross, np.asarray(matvec(lam)), kernel.variance)
    return out


def evaluate_side(name: str, fac: Factorization, points: np.ndarray, y: np.ndarray, kernel: Kernel,
                  *, mean: str, probes: np.ndarray, factor_seconds: float) -> Side:
    """Reduce ``fac`` (of Sigma at ``kernel``'s parameters, all points) to a ``Side``."""
    seconds = {"factor": factor_seconds}
    t0 = time.perf_counter()
    logdet = float(fac.logdet())
    design = design_matrix(points, mean)
    fit, _ = fit_mean(fac, y, design, logdet)
    seconds["loglik"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    a = np.asarray(fac.solve(y - design @ fit.beta))
    stacked = np.column_stack([a, probes])
    if isinstance(fac, DenseCholesky):
        prods = _dense_derivative_products(points, kernel, stacked)
    else:
        # Solvers come adapted (harness.solvers.fallback), which always offers it.
        derivative_matvec = getattr(fac, "derivative_matvec")  # noqa: B009
        prods = np.stack([np.asarray(derivative_matvec(i, stacked))
                          for i in range(kernel.n_params)])
    quad = prods[:, :, 0] @ a
    p, n, k = kernel.n_params, points.shape[0], probes.shape[1]
    solved = np.asarray(fac.solve(
        np.moveaxis(prods[:, :, 1:], 0, 1).reshape(n, p * k)))
    sinv = np.moveaxis(solved.reshape(n, p, k), 1, 0)
    seconds["extras"] = time.perf_counter() - t0
    return Side(name=name, loglik=fit.loglik, beta=fit.beta, quad=np.asarray(quad),
                sinv_deriv_probes=sinv, seconds=seconds,
                nbytes=int(getattr(fac, "nbytes", 0)), logdet=logdet)


def line_cross_product(points: np.ndarray, new_points: np.ndarray, kernel: Kernel
                       ) -> LineCrossProducts | None:
    """The exact O(n + m) product with the cross-covariance for 1D points and a
    half-integer Matern kernel (``LineCrossProducts``), else None (the tiled product)."""
    try:
        return LineCrossProducts(points, new_points, kernel)
    except LineProductError:
        return None


def kriging_side(name: str, fac: Factorization, points: np.ndarray, y: np.ndarray, kernel: Kernel,
                 new_points: np.ndarray, *, mean: str,
                 variance_at: np.ndarray | None = None) -> KrigingSide:
    """Kriging at ``new_points`` by ``fac``, a factorization of Sigma at ``points`` (the
    points other than the held-out ones): means at every new point, variances at
    ``variance_at`` (positions among the new points; default every one)."""
    m = np.asarray(new_points).shape[0]
    at = np.arange(m) if variance_at is None else np.asarray(variance_at, dtype=np.intp)
    pred = kriging(fac, points, y, kernel, new_points, mean=mean, variance_at=at,
                   cross_product=line_cross_product(points, new_points, kernel))
    return KrigingSide(name=name, mean=pred.mean, variance=pred.variance, variance_at=at)
