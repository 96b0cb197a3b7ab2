"""Universal kriging through any Factorization, at bounded memory.

    m*  = f*' beta + k*' alpha,               alpha = Sigma^-1 (y - F beta),
    v*  = s2 - k*' Sigma^-1 k* + u' (F' Sigma^-1 F)^-1 u,   u = f* - F' Sigma^-1 k*

(Cressie 1993, *Statistics for Spatial Data*, eqs. 3.4.60-3.4.61; Rasmussen and
Williams 2006, eqs. 2.41-2.42 for the same correction with a flat prior on beta; for the
zero mean the last term vanishes: simple kriging, R&W eqs. 2.25-2.26). k* holds the
cross-covariances s2 R(x*, X) without the nugget (distinct observations).

Cost. The means take ONE solve, alpha, plus products with the cross-covariance built
tile by tile (``harness.model.cross_tiles``: n x 64 numbers at a time, never the whole
n x m array); F' Sigma^-1 k* is (Sigma^-1 F)' k*, Sigma^-1 F from the same solve as
alpha (q + 1 right-hand sides). The variances take
one block of solves per tile, at most 64 right-hand sides, and may be asked for at a
subset of the new points only (``variance_at``), since each costs a solve.
A caller that has an exact structured product with the cross-covariance (on a line, in
O(n + m)) passes it as ``cross_product`` and the means skip the tiles.

v* is the variance of the latent field s2 R at x*. A new noisy observation there has
variance v* + tau2 (``observation_variance``); scikit-learn's
``GaussianProcessRegressor.predict(return_std=True)`` with a ``WhiteKernel`` reports the
latter, because its ``WhiteKernel.diag`` adds the noise level. With ``solve_sqrt`` the
reduction k*' Sigma^-1 k* = ||W^-1 k*||^2 is a sum of squares; otherwise k*' (Sigma^-1 k*).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from harness.likelihood.loglik import check_data
from harness.likelihood.whitening import fit_mean, supports_sqrt
from harness.model.cross_tiles import cross_covariance_tiles
from harness.model.evaluation import KrigingPrediction
from harness.model.kernels import Kernel
from harness.model.mean import design_matrix
from harness.solvers.fallback import adapt
from harness.solvers.protocol import Factorization


def _as_points(values: np.ndarray) -> np.ndarray:
    pts = np.asarray(values, dtype=np.float64)
    return pts[:, None] if pts.ndim == 1 else pts


def kriging(factorization: Factorization, points: np.ndarray, y: np.ndarray, kernel: Kernel,
            new_points: np.ndarray, *, mean: str = "zero",
            variance_at: np.ndarray | None = None,
            cross_product: Callable[[np.ndarray], np.ndarray] | None = None
            ) -> KrigingPrediction:
    """Kriging means at ``new_points`` and variances at ``variance_at`` (module docstring).

    Parameters
    ----------
    factorization : Factorization
        Of Sigma~ for ``kernel`` at ``points``.
    points : ndarray, shape (n, d)
    y : ndarray, shape (n,)
    kernel : Kernel
        The model (parameters set; stationary, so the prior variance is ``kernel.variance``).
    new_points : ndarray, shape (m, d)
    mean : {"zero", "constant", "linear"}
    variance_at : ndarray of int, optional
        Indices into ``new_points`` where the variance is wanted (default: every new
        point). The returned ``variance`` and ``observation_variance`` follow this order.
    cross_product : callable, optional
        z -> k(x*, X) z at every new point, for the means; default the tiled product.
        An exact structured product (on a line,
        ``harness.references.line_products.LineCrossProducts``) saves the n x m fills.
    """
    fac = adapt(factorization, points, kernel)
    points, y = check_data(points, y, fac.n)
    new_points = _as_points(new_points)
    m = new_points.shape[0]
    at = np.arange(m) if variance_at is None else np.asarray(variance_at, dtype=np.intp)
    if at.size and (at.min() < 0 or at.max() >= m):
        raise ValueError(f"variance_at: indices must lie in [0, {m}), got "
                         f"[{at.min()}, {at.max()}]")
    design = design_matrix(points, mean)
    new_design = design_matrix(new_points, mean)
    fit, how = fit_mean(fac, y, design, fac.logdet())
    # alpha and Sigma^-1 F from one solve with q + 1 right-hand sides
    solved = np.asarray(fac.solve(np.column_stack([y - design @ fit.beta, design])))
    alpha = solved[:, 0].copy()
    sinv_design = solved[:, 1:] if design.shape[1] else None
    mean_values = new_design @ fit.beta
    if cross_product is not None:
        mean_values += np.asarray(cross_product(alpha)).ravel()
    else:
        for cols, cross in cross_covariance_tiles(kernel, points, new_points):
            mean_values[cols] += cross.T @ alpha
    variance = np.empty(at.size)
    sqrt_path = supports_sqrt(fac)
    for cols, cross in cross_covariance_tiles(kernel, points, new_points[at]):
        if sqrt_path:
            v = np.asarray(fac.solve_sqrt(cross))
            reduction = np.einsum("ij,ij->j", v, v)
        else:
            reduction = np.einsum("ij,ij->j", cross, np.asarray(fac.solve(cross)))
        var = kernel.variance - reduction
        if sinv_design is not None:
            u = new_design[at[cols]].T - sinv_design.T @ cross             # f* - F'S^-1 k*
            var = var + np.einsum("ij,ij->j", u, fit.beta_cov @ u)
        variance[cols] = var
    notes = [how, *fac.notes]
    negative = int(np.sum(variance < 0.0))
    if negative:
        notes.append(f"{negative} latent variance(s) below zero by rounding, clipped at 0 "
                     f"(most negative {variance.min():.3g})")
    variance = np.maximum(variance, 0.0)
    return KrigingPrediction(mean=mean_values, variance=variance,
                             observation_variance=variance + kernel.nugget, beta=fit.beta,
                             notes=tuple(notes))
