"""Universal kriging through any Factorization.

    m*  = f*' beta + k*' Sigma^-1 (y - F beta),
    v*  = s2 - k*' Sigma^-1 k* + u' (F' Sigma^-1 F)^-1 u,   u = f* - F' Sigma^-1 k*

(Cressie 1993, *Statistics for Spatial Data*, eqs. 3.4.60-3.4.61; Rasmussen and
Williams 2006, eqs. 2.41-2.42 for the same correction with a flat prior on beta; for the
zero mean the last term vanishes: simple kriging, R&W eqs. 2.25-2.26). k* holds the
cross-covariances s2 R(x*, X) without the nugget (distinct observations).

v* is the variance of the latent field s2 R at x*. A new noisy observation there has
variance v* + tau2 (``observation_variance``); scikit-learn's
``GaussianProcessRegressor.predict(return_std=True)`` with a ``WhiteKernel`` reports the
latter, because its ``WhiteKernel.diag`` adds the noise level. With ``solve_sqrt`` the
reduction k*' Sigma^-1 k* = ||W^-1 k*||^2 is a sum of squares; otherwise k*' (Sigma^-1 k*).
"""

from __future__ import annotations

import numpy as np

from harness.likelihood.loglik import check_data
from harness.likelihood.whitening import fit_mean, supports_sqrt
from harness.model.evaluation import KrigingPrediction
from harness.model.kernels import Kernel
from harness.model.mean import design_matrix
from harness.solvers.fallback import adapt
from harness.solvers.protocol import Factorization

_COLUMNS = 1024  # new points per block of solves


def kriging(factorization: Factorization, points: np.ndarray, y: np.ndarray, kernel: Kernel,
            new_points: np.ndarray, *, mean: str = "zero") -> KrigingPrediction:
    """Kriging mean and variances at ``new_points`` (module docstring).

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
    """
    fac = adapt(factorization, points, kernel)
    points, y = check_data(points, y, fac.n)
    new_points = np.asarray(new_points, dtype=np.float64)
    new_points = new_points[:, None] if new_points.ndim == 1 else new_points
    design = design_matrix(points, mean)
    new_design = design_matrix(new_points, mean)
    fit, how = fit_mean(fac, y, design, fac.logdet())
    a = fac.solve(y - design @ fit.beta)
    sinv_design = fac.solve(design) if design.shape[1] else None
    m = new_points.shape[0]
    mean_values = np.empty(m)
    variance = np.empty(m)
    sqrt_path = supports_sqrt(fac)
    for c0 in range(0, m, _COLUMNS):
        c1 = min(m, c0 + _COLUMNS)
        cross = kernel.cross_covariance(points, new_points[c0:c1])          # (n, k)
        mean_values[c0:c1] = new_design[c0:c1] @ fit.beta + cross.T @ a
        if sqrt_path:
            v = fac.solve_sqrt(cross)
            reduction = np.einsum("ij,ij->j", v, v)
        else:
            reduction = np.einsum("ij,ij->j", cross, fac.solve(cross))
        var = kernel.variance - reduction
        if sinv_design is not None:
            u = new_design[c0:c1].T - sinv_design.T @ cross                  # f* - F'S^-1 k*
            var = var + np.einsum("ij,ij->j", u, fit.beta_cov @ u)
        variance[c0:c1] = var
    notes = [how, *fac.notes]
    negative = int(np.sum(variance < 0.0))
    if negative:
        notes.append(f"{negative} latent variance(s) below zero by rounding, clipped at 0 "
                     f"(most negative {variance.min():.3g})")
    variance = np.maximum(variance, 0.0)
    return KrigingPrediction(mean=mean_values, variance=variance,
                             observation_variance=variance + kernel.nugget, beta=fit.beta,
                             notes=tuple(notes))
