"""Kronecker reference against dense numpy on the same separable (product) model.

Ground truth: the product of 1D Matern correlations (Rasmussen and Williams 2006,
eq. 4.17) and its log-scale derivatives written out with numpy below, then dense
numpy linear algebra: log det, solves, tr(P S_i), 1/2 tr(P S_i P S_j) and the score
1/2 a' S_i a - 1/2 tr(P S_i) (R&W eq. 5.9; REML projection P as in Harville 1977).
"""

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from harness.geometry.pointsets import tensor_grid
from harness.model.kernels import Exponential, Gaussian, Matern32
from harness.references.gridcheck import NotAGridError, detect_grid
from harness.references.kronecker import (
    KroneckerError,
    KroneckerReference,
    SeparableKernel,
    separable_block_with_derivatives,
    separable_covariance,
)

SQ3 = np.sqrt(3.0)


@pytest.fixture(scope="module", autouse=True)
def _one_blas_thread():
    """Dense checks on one BLAS thread: on a shared 2-core machine OpenBLAS threads
    contend and a 2,000 x 2,000 Cholesky ran 25x slower with two threads."""
    with threadpool_limits(limits=1):
        yield


def factor_1d(family, r):
    if family == "exponential":
        e = np.exp(-r)
        return e, r * e
    a = SQ3 * r  # matern32
    e = np.exp(-a)
    return (1 + a) * e, a * a * e


def dense_product(family, pts, s2, ls, tau2, isotropic):
    """Sigma and its log-scale derivatives of the product model, by numpy."""
    n, d = pts.shape
    rhos, slopes = [], []
    for k in range(d):
        r = np.abs(pts[:, None, k] - pts[None, :, k]) / ls[k]
        rho, s = factor_1d(family, r)
        rhos.append(rho)
        slopes.append(s)
    corr = np.prod(rhos, axis=0)
    per_axis = [s2 * slopes[k] * np.prod([rhos[j] for j in range(d) if j != k], axis=0)
                for k in range(d)]
    derivs = [s2 * corr] + ([sum(per_axis)] if isotropic else per_axis)
    if tau2 > 0:
        derivs.append(tau2 * np.eye(n))
    return s2 * corr + tau2 * np.eye(n), derivs


def dense_truth(sigma, derivs, y, f, reml, cache=None):
    """Dense numpy truth; ``cache`` keeps Sigma^-1 and Sigma^-1 S_i between calls."""
    n, p = f.shape
    cache = {} if cache is None else cache
    if "sinv" not in cache:
        cache["sinv"] = np.linalg.inv(sigma)
        cache["ml_products"] = [cache["sinv"] @ d for d in derivs]
    sinv = cache["sinv"]
    logdet = np.linalg.slogdet(sigma)[1]
    if p:
        gram = f.T @ sinv @ f
        beta = np.linalg.solve(gram, f.T @ sinv @ y)
    else:
        gram, beta = None, np.empty(0)
    proj = sinv - sinv @ f @ np.linalg.solve(gram, f.T @ sinv) if (reml and p) else sinv
    a = sinv @ (y - f @ beta)
    quad = (y - f @ beta) @ a
    if reml and p:
        ll = -0.5 * (quad + logdet + np.linalg.slogdet(gram)[1] - np.linalg.slogdet(f.T @ f)[1]
                     + (n - p) * np.log(2 * np.pi))
    else:
        ll = -0.5 * (quad + logdet + n * np.log(2 * np.pi))
    ps = [proj @ d for d in derivs] if (reml and p) else cache["ml_products"]
    traces = np.array([np.trace(m) for m in ps])
    score = np.array([0.5 * a @ d @ a for d in derivs]) - 0.5 * traces
    fisher = np.array([[0.5 * np.sum(pi * pj.T) for pj in ps] for pi in ps])
    return dict(ll=ll, logdet=logdet, sinv=sinv, traces=traces, score=score, fisher=fisher)


def linear_design(pts):
    return np.column_stack([np.ones(len(pts)), pts])


@pytest.fixture(scope="module")
def grid40x50():
    rng = np.random.default_rng(7)
    pts = tensor_grid((40, 50), extent=(2.0, 3.0))[rng.permutation(2000)]
    s2, ls, tau2 = 1.4, (0.3, 0.7), 0.02
    sigma, derivs = dense_product("matern32", pts, s2, ls, tau2, isotropic=False)
    y = np.linalg.cholesky(sigma) @ rng.standard_normal(2000) + 1.0 + 0.3 * pts[:, 0]
    kernel = SeparableKernel(Matern32(variance=s2, lengthscale=ls, nugget=tau2))
    return pts, kernel, sigma, derivs, y, {}


@pytest.mark.parametrize("mean,reml", [("zero", False), ("linear", False), ("linear", True)])
def test_matches_dense_on_40x50_grid(grid40x50, mean, reml):
    pts, kernel, sigma, derivs, y, cache = grid40x50
    f = linear_design(pts) if mean == "linear" else np.empty((2000, 0))
    truth = dense_truth(sigma, derivs, y, f, reml, cache)
    ref = KroneckerReference(pts, kernel)
    ev = ref.evaluate(y, mean=mean, reml=reml, fisher=True)
    assert ev.source == "kronecker"
    assert ev.logdet == pytest.approx(truth["logdet"], rel=1e-10)
    assert ev.loglik == pytest.approx(truth["ll"], rel=1e-10)
    np.testing.assert_allclose(ev.trace_terms, truth["traces"], rtol=1e-10)
    np.testing.assert_allclose(ev.fisher, truth["fisher"], rtol=1e-10)
    np.testing.assert_allclose(ev.score, truth["score"], rtol=1e-10,
                               atol=1e-10 * np.abs(truth["traces"]).max())
    b = np.random.default_rng(0).standard_normal((2000, 2))
    # solves compared normwise (entrywise relative error is cancellation-limited)
    exact = truth["sinv"] @ b
    assert np.linalg.norm(ref.solve(b) - exact) <= 1e-10 * np.linalg.norm(exact)


def test_whiten_matvec_and_derivative_products(grid40x50):
    pts, kernel, sigma, derivs, _, _ = grid40x50
    ref = KroneckerReference(pts, kernel)
    v = np.random.default_rng(1).standard_normal((2000, 3))
    w = ref.whiten(v)
    np.testing.assert_allclose(w.T @ w, v.T @ np.linalg.solve(sigma, v), rtol=1e-10)
    np.testing.assert_allclose(ref.matvec(v), sigma @ v, rtol=1e-12, atol=1e-12)
    for i, d in enumerate(derivs):
        np.testing.assert_allclose(ref.derivative_matvec(i, v[:, 0]), d @ v[:, 0],
                                   rtol=1e-11, atol=1e-11)


def test_dense_helpers_match_the_product_formula(grid40x50):
    pts, kernel, sigma, derivs, _, _ = grid40x50
    idx = np.arange(0, 2000, 7)
    np.testing.assert_allclose(separable_covariance(pts[:300], kernel), sigma[:300, :300],
                               rtol=1e-14, atol=1e-15)
    value, got = separable_block_with_derivatives(pts, idx, idx[::-1], kernel)
    np.testing.assert_allclose(value, sigma[np.ix_(idx, idx[::-1])], rtol=1e-14, atol=1e-15)
    for i, d in enumerate(derivs):
        np.testing.assert_allclose(got[i], d[np.ix_(idx, idx[::-1])], rtol=1e-13, atol=1e-15)


def test_three_dimensional_isotropic_grid():
    rng = np.random.default_rng(11)
    pts = tensor_grid((5, 6, 7), extent=(1.0, 1.5, 2.0))[rng.permutation(210)]
    sigma, derivs = dense_product("exponential", pts, 0.8, (0.4,) * 3, 0.1, isotropic=True)
    y = rng.standard_normal(210)
    truth = dense_truth(sigma, derivs, y, np.ones((210, 1)), True)
    kernel = SeparableKernel(Exponential(variance=0.8, lengthscale=0.4, nugget=0.1))
    ev = KroneckerReference(pts, kernel).evaluate(y, mean="constant", reml=True, fisher=True)
    assert ev.param_names == ("log_variance", "log_lengthscale", "log_nugget")
    assert ev.loglik == pytest.approx(truth["ll"], rel=1e-11)
    np.testing.assert_allclose(ev.score, truth["score"], rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(ev.fisher, truth["fisher"], rtol=1e-10)


def test_zero_nugget_small_grid():
    pts = tensor_grid((6, 8))
    sigma, derivs = dense_product("matern32", pts, 1.0, (0.3, 0.2), 0.0, isotropic=False)
    y = np.linspace(-1, 1, 48)
    truth = dense_truth(sigma, derivs, y, np.empty((48, 0)), False)
    ev = KroneckerReference(pts, SeparableKernel(Matern32(lengthscale=(0.3, 0.2)))).evaluate(
        y, fisher=True)
    assert ev.loglik == pytest.approx(truth["ll"], rel=1e-9)
    np.testing.assert_allclose(ev.fisher, truth["fisher"], rtol=1e-8)


def test_separable_gaussian_is_the_anisotropic_gaussian():
    # exp(-d1^2/2l1^2) exp(-d2^2/2l2^2) = exp(-(d1^2/l1^2 + d2^2/l2^2)/2): closed form
    pts = np.random.default_rng(2).random((30, 2))
    ls = np.array([0.3, 0.5])
    diff = (pts[:, None, :] - pts[None, :, :]) / ls
    expected = 2.0 * np.exp(-0.5 * np.sum(diff ** 2, axis=2))
    got = separable_covariance(pts, Gaussian(variance=2.0, lengthscale=tuple(ls)))
    np.testing.assert_allclose(got, expected, rtol=1e-13)


def test_separable_matern_differs_from_isotropic_matern():
    # the product of 1D Matern 3/2 factors is a different model from the 2D Matern 3/2
    pts = np.array([[0.0, 0.0], [0.3, 0.4]])  # distance 0.5
    r = 0.5 / 0.5
    iso = (1 + SQ3 * r) * np.exp(-SQ3 * r)
    prod = np.prod([(1 + SQ3 * t) * np.exp(-SQ3 * t) for t in (0.6, 0.8)])
    got = separable_covariance(pts, Matern32(lengthscale=0.5))[0, 1]
    assert got == pytest.approx(prod, rel=1e-14)
    assert abs(got - iso) > 1e-2


def test_not_a_grid_is_refused_with_the_reason():
    pts = tensor_grid((3, 7))[:20]
    with pytest.raises(NotAGridError,
                       match="3 distinct x values x 7 distinct y values = 21 != 20 points"):
        KroneckerReference(pts, SeparableKernel(Matern32(lengthscale=0.2)))
    with pytest.raises(NotAGridError, match="more than once"):
        detect_grid(np.vstack([tensor_grid((2, 2))[:3], tensor_grid((2, 2))[:1]]))


def test_grid_layout_round_trips():
    pts = tensor_grid((3, 4))[::-1]
    layout = detect_grid(pts)
    assert layout.shape == (3, 4)
    v = np.arange(12.0)
    np.testing.assert_array_equal(layout.from_grid(layout.to_grid(v)), v)
    # grid[i, j] holds the value at the point (axes[0][i], axes[1][j])
    g = layout.to_grid(pts[:, 0] * 10 + pts[:, 1])
    np.testing.assert_allclose(g, layout.axes[0][:, None] * 10 + layout.axes[1][None, :])


def test_plain_kernel_is_refused():
    with pytest.raises(KroneckerError, match="SeparableKernel"):
        KroneckerReference(tensor_grid((3, 3)), Matern32(lengthscale=0.2))
