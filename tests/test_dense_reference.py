"""The dense exact reference against scikit-learn, scipy, numpy and textbook formulas."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process import kernels as sk

from harness.linalg import dense_cholesky as cholesky_module
from harness.linalg import tiled_cholesky
from harness.model import design_matrix
from harness.model.kernels import Exponential, Gaussian, Matern32, Matern52
from harness.references import (
    CertificateError,
    DenseBudgetError,
    DenseCholesky,
    SingularCovarianceError,
    dense_evaluate,
    dense_kriging,
)


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(11)
    points = rng.random((250, 2))
    y = np.sin(6 * points[:, 0]) + 0.3 * rng.standard_normal(250)
    return points, y


def sklearn_gp(kernel, nu):
    corr = sk.Matern(length_scale=kernel.lengthscale[0], nu=nu)
    return (sk.ConstantKernel(kernel.variance) * corr + sk.WhiteKernel(kernel.nugget))


@pytest.mark.parametrize("kernel, nu", [
    (Exponential(1.4, 0.25, 0.05), 0.5),
    (Matern32(0.8, 0.15, 0.02), 1.5),
    (Matern52(2.0, 0.3, 0.1), 2.5),
])
def test_loglik_and_score_equal_sklearn(problem, kernel, nu):
    # Source: scikit-learn GaussianProcessRegressor.log_marginal_likelihood(theta,
    # eval_gradient=True) (R&W 2006 Algorithm 2.1 and eq. 5.9), alpha=0 so no jitter.
    points, y = problem
    sk_kernel = sklearn_gp(kernel, nu)
    gp = GaussianProcessRegressor(sk_kernel, alpha=0.0, optimizer=None).fit(points, y)
    ll, grad = gp.log_marginal_likelihood(sk_kernel.theta, eval_gradient=True)
    ev = dense_evaluate(points, y, kernel)
    assert ev.loglik == pytest.approx(ll, rel=1e-8)
    # sklearn's theta: (log constant, log length scale, log noise) = our order
    np.testing.assert_allclose(ev.score, grad, rtol=1e-8)
    assert ev.certificate < 30


def test_loglik_equals_scipy_logpdf_and_logdet_equals_slogdet(problem):
    # Sources: scipy.stats.multivariate_normal.logpdf; numpy.linalg.slogdet.
    points, y = problem
    kernel = Gaussian(1.0, 0.2, 0.05)
    ev = dense_evaluate(points, y, kernel, score=False)
    sigma = kernel.covariance(points)
    expected = scipy.stats.multivariate_normal(mean=np.zeros(y.size), cov=sigma).logpdf(y)
    assert ev.loglik == pytest.approx(expected, rel=1e-10)
    assert ev.logdet == pytest.approx(np.linalg.slogdet(sigma)[1], rel=1e-11)


@pytest.mark.parametrize("mean", ["constant", "linear"])
@pytest.mark.parametrize("reml", [False, True])
def test_gls_and_reml_equal_direct_formulas(problem, mean, reml):
    # Direct textbook formulas with explicit inverses: GLS beta = (F'S^-1F)^-1 F'S^-1 y
    # (Cressie 1993, eq. 3.4.x); REML = ML - 1/2 log|F'S^-1F| + 1/2 log|F'F| with
    # (n - p)/2 log 2 pi (Harville 1974, eq. 5); score with P in the trace.
    points, y = problem
    kernel = Matern32(1.1, 0.2, 0.05)
    ev = dense_evaluate(points, y, kernel, mean=mean, reml=reml, fisher=True)
    F = design_matrix(points, mean)
    S = kernel.covariance(points)
    Si = np.linalg.inv(S)
    A = F.T @ Si @ F
    beta = np.linalg.solve(A, F.T @ Si @ y)
    r = y - F @ beta
    n, p = F.shape
    ll = -0.5 * r @ Si @ r - 0.5 * np.linalg.slogdet(S)[1] - 0.5 * n * np.log(2 * np.pi)
    proj = Si
    if reml:
        ll += (-0.5 * np.linalg.slogdet(A)[1] + 0.5 * np.linalg.slogdet(F.T @ F)[1]
               + 0.5 * p * np.log(2 * np.pi))
        proj = Si - Si @ F @ np.linalg.solve(A, F.T @ Si)
    np.testing.assert_allclose(ev.beta, beta, rtol=1e-9)
    assert ev.loglik == pytest.approx(ll, rel=1e-10)
    idx = np.arange(y.size)
    _, D = kernel.block_with_derivatives(points, idx, idx)
    a = Si @ r
    score = [0.5 * a @ D[i] @ a - 0.5 * np.trace(proj @ D[i]) for i in range(3)]
    np.testing.assert_allclose(ev.score, score, rtol=1e-8)
    fisher = [[0.5 * np.trace(proj @ D[i] @ proj @ D[j]) for j in range(3)] for i in range(3)]
    np.testing.assert_allclose(ev.fisher, fisher, rtol=1e-9)


def test_kriging_equals_sklearn_predict(problem):
    # Source: GaussianProcessRegressor.predict(return_std=True) (R&W eqs. 2.25-2.26).
    # sklearn's std includes the WhiteKernel noise for new points: latent + nugget.
    points, y = problem
    kernel = Matern52(1.5, 0.2, 0.04)
    new = np.random.default_rng(2).random((30, 2))
    sk_kernel = sklearn_gp(kernel, 2.5)
    gp = GaussianProcessRegressor(sk_kernel, alpha=0.0, optimizer=None).fit(points, y)
    m, s = gp.predict(new, return_std=True)
    pred = dense_kriging(points, y, kernel, new)
    np.testing.assert_allclose(pred.mean, m, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(pred.variance + kernel.nugget, s**2, rtol=1e-8)


def test_universal_kriging_variance_formula(problem):
    # Cressie 1993 eq. 3.4.61 written out with explicit inverses.
    points, y = problem
    kernel = Matern32(1.0, 0.2, 0.05)
    new = np.array([[0.3, 0.4], [0.9, 0.1]])
    pred = dense_kriging(points, y, kernel, new, mean="linear")
    S = kernel.covariance(points)
    Si = np.linalg.inv(S)
    F = design_matrix(points, "linear")
    f0 = design_matrix(new, "linear")
    k = kernel.cross_covariance(points, new)
    A = F.T @ Si @ F
    beta = np.linalg.solve(A, F.T @ Si @ y)
    mean = f0 @ beta + k.T @ Si @ (y - F @ beta)
    u = f0.T - F.T @ Si @ k
    var = kernel.variance - np.einsum("ij,ij->j", k, Si @ k) + np.einsum("ij,ij->j", u,
                                                                        np.linalg.solve(A, u))
    np.testing.assert_allclose(pred.mean, mean, rtol=1e-9)
    np.testing.assert_allclose(pred.variance, var, rtol=1e-8)


def test_factor_methods_agree_with_dense_algebra(problem):
    points, _ = problem
    kernel = Matern32(1.0, 0.2, 0.05)
    chol = DenseCholesky(points, kernel)
    S = kernel.covariance(points)
    b = np.random.default_rng(0).standard_normal((points.shape[0], 3))
    L = np.linalg.cholesky(S)  # numpy's Cholesky as the outside check
    np.testing.assert_allclose(chol.solve(b), np.linalg.solve(S, b), rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(chol.matvec(b), S @ b, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(chol.apply_sqrt(b), L @ b, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(chol.solve_sqrt(b), np.linalg.solve(L, b), rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(chol.inverse(), np.linalg.inv(S), rtol=1e-8, atol=1e-9)
    idx = np.arange(points.shape[0])
    np.testing.assert_allclose(chol.derivative_matvec(1, b),
                               kernel.derivative_block(points, idx, idx, 1) @ b, rtol=1e-12)
    assert chol.nbytes == 8 * points.shape[0] ** 2


def test_certificate_detects_a_corrupted_factor(problem):
    # LAPACK dpot01: a correct factor gives a ratio of order 1; a factor perturbed by
    # 1e-10 relative gives ~1e-10 / (n eps) >> 30.
    points, _ = problem
    chol = DenseCholesky(points[:100], Matern32(1.0, 0.2, 0.05))
    assert chol.certificate < 30
    chol.factor[5, 3] *= 1 + 1e-9
    assert chol.dpot01_ratio() > 30
    assert chol.randomized_ratio(rng=0) > 30


def _corrupting_cholesky(a, **options):
    """The real tiled factorization, then one entry of the factor off by 1e-9 relative."""
    info = tiled_cholesky(a, **options)
    a[7, 2] *= 1.0 + 1e-9
    return info


@pytest.mark.parametrize("method, words", [("dpot01", "full ratio"),
                                           ("randomized", "random probes")])
def test_failed_certificate_is_an_error(problem, monkeypatch, method, words):
    # The factorization itself is corrupted after the probes of the randomized
    # certificate were taken from the assembled matrix: both certificates must see it.
    points, _ = problem
    monkeypatch.setattr(cholesky_module, "tiled_cholesky", _corrupting_cholesky)
    with pytest.raises(CertificateError, match=f"failed its certificate.*{words}"):
        DenseCholesky(points[:50], Matern32(1.0, 0.2, 0.05), certificate_method=method)


def test_duplicate_points_with_zero_nugget_are_reported():
    pts = np.array([[0.1, 0.1], [0.5, 0.5], [0.1, 0.1], [0.9, 0.2]])
    with pytest.raises(SingularCovarianceError, match="duplicate point.*add a nugget"):
        DenseCholesky(pts, Matern32(1.0, 0.3, 0.0))


def test_memory_budget_refuses_before_assembly():
    pts = np.zeros((20_000, 2))
    with pytest.raises(DenseBudgetError, match=r"n = 20,000 needs about .* GiB.*largest n"):
        DenseCholesky(pts, Matern32(1.0, 0.3, 0.1), memory_budget=100 * 2**20)


def test_mismatched_lengths_are_refused():
    with pytest.raises(ValueError, match="3 rows but values have 2"):
        dense_evaluate(np.zeros((3, 2)), np.zeros(2), Matern32(1.0, 0.3, 0.1))


@pytest.mark.parametrize("relative", [0.0, 1e-13, 1e-11, 1e-9, 1e-7])
def test_randomized_certificate_bounds_the_dpot01_ratio(relative):
    # A factor with a known perturbation: L~ = L + delta e_i e_j', so the full DPOT01
    # ratio ||Sigma - L~ L~'||_1 / (n ||Sigma||_1 eps) (LAPACK TESTING/LIN/dpot01.f) is
    # computed exactly by dpot01_ratio; the randomized value must bound it (Halko,
    # Martinsson and Tropp 2011, Lemma 4.1: failure probability 1e-4 per call with 4
    # probes) and not be looser than the worst case sqrt(n) 10 sqrt(2/pi) (+ the
    # rounding floor of forming (L L' - Sigma) Z, below 10 in these units).
    pts = np.random.default_rng(4).random((400, 2))
    chol = DenseCholesky(pts, Matern32(1.0, 0.15, 1e-2), certify=False)
    chol.factor[57, 21] *= 1.0 + relative
    full = chol.dpot01_ratio()
    for seed in range(3):
        bound = chol.randomized_ratio(rng=seed)
        assert np.isfinite(bound) and bound >= full, (relative, full, bound)
        assert bound <= np.sqrt(400) * 10 * np.sqrt(2 / np.pi) * full + 10.0, (full, bound)
    # the two certificates agree on pass / fail away from the threshold
    if full < 1.0:
        assert chol.randomized_ratio(rng=9) < 30
    if full > 30 * np.sqrt(400) * 10:
        assert chol.randomized_ratio(rng=9) > 30


def test_certificate_methods_and_their_options():
    pts = np.random.default_rng(5).random((300, 2))
    kernel = Matern32(1.0, 0.2, 0.05)
    fast = DenseCholesky(pts, kernel)  # default: randomized
    full = DenseCholesky(pts, kernel, certificate_method="dpot01")
    assert fast.certificate_method == "randomized" and full.certificate_method == "dpot01"
    assert full.certificate <= fast.certificate < 30
    assert full.certificate == pytest.approx(full.dpot01_ratio())
    assert set(fast.seconds) >= {"assemble", "factor", "certify"}
    with pytest.raises(ValueError, match="certificate_method must be one of"):
        DenseCholesky(pts, kernel, certificate_method="exact")
    with pytest.raises(ValueError, match="probes must be a positive integer"):
        DenseCholesky(pts, kernel, probes=0)


def test_budget_counts_panel_and_certificate_temporaries():
    # n^2 doubles for the factor (the panel factorization works in place), plus four
    # n x 1,024 certificate blocks; 5% allowance (common practice)
    from harness.references import dense_bytes_needed, largest_dense_n

    n = 16000
    expected = 1.05 * 8 * (n * n + n * 4096)
    assert dense_bytes_needed(n) == int(expected)
    assert dense_bytes_needed(4000) == int(1.05 * 8 * (4000**2 + 4000 * 4000))
    budget = 12 * 2**30
    fits = largest_dense_n(budget)
    assert dense_bytes_needed(fits) <= budget < dense_bytes_needed(fits + 100)
