"""Generic likelihood, score and kriging against scikit-learn, scipy and dense numpy.

Every expected value is computed outside the project: scikit-learn's
GaussianProcessRegressor.log_marginal_likelihood (value and gradient) and predict,
scipy.stats.multivariate_normal.logpdf, and dense numpy algebra written out here.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from threadpoolctl import threadpool_limits

from harness.likelihood import ExactTraceSizeError, evaluate_likelihood, kriging
from harness.model.kernels import Exponential, Matern32, Matern52


@pytest.fixture(autouse=True)
def _one_blas_thread():
    """Small products on a shared 2-core machine: multithreaded BLAS only adds overhead."""
    with threadpool_limits(1):
        yield


class NumpyCholesky:
    """Sigma = L L' by numpy; the full protocol from dense algebra (test reference)."""

    def __init__(self, sigma: np.ndarray, derivs: np.ndarray | None = None,
                 sqrt: bool = True) -> None:
        self.sigma = sigma
        self.chol = np.linalg.cholesky(sigma)
        self.derivs = derivs
        if not sqrt:
            self.solve_sqrt = None  # hides the square-root path
            self.apply_sqrt = None

    n = property(lambda self: self.sigma.shape[0])
    nbytes = property(lambda self: self.chol.nbytes)

    def logdet(self) -> float:
        return 2.0 * float(np.sum(np.log(np.diag(self.chol))))

    def solve(self, b):
        return scipy.linalg.cho_solve((self.chol, True), b)

    def matvec(self, b):
        return self.sigma @ b

    def solve_sqrt(self, b):
        return scipy.linalg.solve_triangular(self.chol, b, lower=True)

    def apply_sqrt(self, b):
        return self.chol @ b


def _problem(kernel, n=120, d=2, seed=0):
    rng = np.random.default_rng(seed)
    points = rng.uniform(0.0, 1.0, size=(n, d))
    sigma = kernel.covariance(points)
    y = np.linalg.cholesky(sigma) @ rng.standard_normal(n) + 0.3
    return points, y, sigma


# (our kernel, sklearn nu); sklearn's theta = (log constant, log length(s), log noise)
# is in the same order and scale as Kernel.param_names.
CASES = [
    (Exponential(variance=1.3, lengthscale=0.4, nugget=0.05), 0.5),
    (Matern32(variance=0.8, lengthscale=(0.3, 0.6), nugget=0.02), 1.5),
    (Matern52(variance=2.0, lengthscale=0.25, nugget=0.1), 2.5),
]


def _sklearn(kernel, nu, points, y):
    ls = np.array(kernel.lengthscale) if not kernel.isotropic else kernel.lengthscale[0]
    sk = (ConstantKernel(kernel.variance) * Matern(length_scale=ls, nu=nu)
          + WhiteKernel(kernel.nugget))
    gpr = GaussianProcessRegressor(kernel=sk, optimizer=None, normalize_y=False, alpha=0.0)
    return gpr.fit(points, y)


@pytest.mark.parametrize("sqrt", [True, False], ids=["whitened", "solves"])
@pytest.mark.parametrize("kernel,nu", CASES, ids=["exp", "m32-aniso", "m52"])
def test_loglik_and_score_match_sklearn(kernel, nu, sqrt):
    # source: sklearn GaussianProcessRegressor.log_marginal_likelihood(theta, eval_gradient)
    points, y, sigma = _problem(kernel)
    gpr = _sklearn(kernel, nu, points, y)
    assert gpr.kernel_.theta == pytest.approx(kernel.theta, rel=1e-12)
    ref_value, ref_grad = gpr.log_marginal_likelihood(kernel.theta, eval_gradient=True)
    result = evaluate_likelihood(NumpyCholesky(sigma, sqrt=sqrt), points, y, kernel)
    assert result.loglik == pytest.approx(ref_value, rel=1e-8)
    np.testing.assert_allclose(result.score, ref_grad, rtol=1e-8, atol=1e-8 * abs(ref_value))
    np.testing.assert_array_equal(result.trace_stderr, 0.0)
    # source: scipy.stats.multivariate_normal.logpdf
    assert result.loglik == pytest.approx(
        scipy.stats.multivariate_normal(mean=np.zeros(y.size), cov=sigma).logpdf(y), rel=1e-10)


def _dense_reference(points, y, kernel, mean_cols, reml):
    """GLS / REML log-likelihood, score and Fisher by explicit dense algebra."""
    sigma = kernel.covariance(points)
    idx = np.arange(points.shape[0])
    derivs = kernel.block_with_derivatives(points, idx, idx)[1]
    f = mean_cols
    inv = np.linalg.inv(sigma)
    c = np.linalg.inv(f.T @ inv @ f)
    beta = c @ f.T @ inv @ y
    r = y - f @ beta
    n, p = y.size, f.shape[1]
    proj = inv - inv @ f @ c @ f.T @ inv if reml else inv
    sign, logdet = np.linalg.slogdet(sigma)
    value = -0.5 * (r @ inv @ r + logdet + n * np.log(2 * np.pi))
    if reml:  # Harville 1974, eq. 5 form
        value = -0.5 * (r @ inv @ r + logdet + np.linalg.slogdet(f.T @ inv @ f)[1]
                        - np.linalg.slogdet(f.T @ f)[1] + (n - p) * np.log(2 * np.pi))
    a = inv @ r  # = P y under REML
    score = np.array([0.5 * a @ d @ a - 0.5 * np.trace(proj @ d) for d in derivs])
    fisher = np.array([[0.5 * np.trace(proj @ di @ proj @ dj) for dj in derivs]
                       for di in derivs])
    return value, score, fisher, beta


@pytest.mark.parametrize("reml", [False, True], ids=["ml", "reml"])
@pytest.mark.parametrize("sqrt", [True, False], ids=["whitened", "solves"])
def test_linear_trend_gls_score_and_fisher_match_dense_algebra(reml, sqrt):
    # source: dense numpy inverse-based GLS/REML formulas (Harville 1977 score, P form)
    kernel = Matern32(variance=1.1, lengthscale=0.35, nugget=0.04)
    points, y, sigma = _problem(kernel, n=100, seed=3)
    f = np.hstack([np.ones((points.shape[0], 1)), points])
    value, score, fisher, beta = _dense_reference(points, y, kernel, f, reml)
    result = evaluate_likelihood(NumpyCholesky(sigma, sqrt=sqrt), points, y, kernel,
                                 mean="linear", reml=reml, fisher=True)
    assert result.loglik == pytest.approx(value, rel=1e-9)
    np.testing.assert_allclose(result.beta, beta, rtol=1e-8)
    np.testing.assert_allclose(result.score, score, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(result.fisher, fisher, rtol=1e-8)


def test_estimated_traces_unbiased_and_reml_fisher_near_exact():
    # source: exact dense traces tr(P Sigma_i); Hutchinson's estimator is unbiased
    kernel = Exponential(variance=1.0, lengthscale=0.3, nugget=0.1)
    points, y, sigma = _problem(kernel, n=150, seed=5)
    fac = NumpyCholesky(sigma)
    exact = evaluate_likelihood(fac, points, y, kernel, mean="constant", reml=True,
                                fisher=True)
    for method in ("hutchinson", "hutchpp"):
        est = evaluate_likelihood(fac, points, y, kernel, mean="constant", reml=True,
                                  trace=method, probes=90, rng=11, fisher=True)
        z = (est.trace_terms - exact.trace_terms) / est.trace_stderr
        assert np.all(np.abs(z) < 4.0), (method, z)
        assert est.loglik == exact.loglik
        np.testing.assert_allclose(est.fisher, exact.fisher, rtol=0.3)
        assert est.probes == 90 and est.matvecs > 0 and est.solves > 0


def test_exact_trace_refused_beyond_limit():
    kernel = Exponential(variance=1.0, lengthscale=0.3, nugget=0.1)
    points, y, sigma = _problem(kernel, n=60)
    with pytest.raises(ExactTraceSizeError, match="hutchinson"):
        evaluate_likelihood(NumpyCholesky(sigma), points, y, kernel, exact_max_n=50)


@pytest.mark.parametrize("sqrt", [True, False], ids=["whitened", "solves"])
@pytest.mark.parametrize("kernel,nu", CASES, ids=["exp", "m32-aniso", "m52"])
def test_kriging_matches_sklearn_predict(kernel, nu, sqrt):
    # source: sklearn GaussianProcessRegressor.predict(return_std=True); its std includes
    # the WhiteKernel noise, i.e. our observation_variance = latent variance + nugget.
    points, y, sigma = _problem(kernel, n=100, seed=1)
    new = np.random.default_rng(9).uniform(0.0, 1.0, size=(40, 2))
    new[:3] = points[:3]  # at data sites the cross-covariance carries no nugget
    gpr = _sklearn(kernel, nu, points, y)
    mean, std = gpr.predict(new, return_std=True)
    pred = kriging(NumpyCholesky(sigma, sqrt=sqrt), points, y, kernel, new)
    np.testing.assert_allclose(pred.mean, mean, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(pred.observation_variance, std**2, rtol=1e-8)
    np.testing.assert_allclose(pred.variance, std**2 - kernel.nugget, rtol=1e-6, atol=1e-10)


def test_universal_kriging_variance_matches_dense_formula():
    # source: Cressie 1993 eqs. 3.4.60-3.4.61 written out with numpy
    kernel = Matern52(variance=1.5, lengthscale=0.3, nugget=0.01)
    points, y, sigma = _problem(kernel, n=90, seed=2)
    new = np.random.default_rng(4).uniform(0.0, 1.0, size=(25, 2))
    f = np.hstack([np.ones((90, 1)), points])
    fs = np.hstack([np.ones((25, 1)), new])
    inv = np.linalg.inv(sigma)
    c = np.linalg.inv(f.T @ inv @ f)
    beta = c @ f.T @ inv @ y
    k = kernel.cross_covariance(points, new)
    mean = fs @ beta + k.T @ inv @ (y - f @ beta)
    u = fs.T - f.T @ inv @ k
    var = kernel.variance - np.sum(k * (inv @ k), axis=0) + np.sum(u * (c @ u), axis=0)
    pred = kriging(NumpyCholesky(sigma), points, y, kernel, new, mean="linear")
    np.testing.assert_allclose(pred.mean, mean, rtol=1e-8)
    np.testing.assert_allclose(pred.variance, var, rtol=1e-7)
    np.testing.assert_allclose(pred.beta, beta, rtol=1e-8)
