"""State-space (Kalman) reference against the dense Gaussian likelihood computed here.

Ground truth: the Matern correlations of Rasmussen and Williams (2006, eq. 4.17) and their
log-length-scale derivatives written out with numpy below, a numpy Cholesky, the GLS /
REML likelihood written from its definition (Harville 1974, eq. 5) and the analytic score
1/2 a' S_i a - 1/2 tr(P S_i) (Rasmussen and Williams 2006, eq. 5.9).
"""

import numpy as np
import pytest
from scipy.linalg import lapack
from threadpoolctl import threadpool_limits

from harness.model.kernels import Exponential, Gaussian, Matern, Matern32, Matern52
from harness.references.statespace import StateSpaceError, StateSpaceReference

SQ3, SQ5 = np.sqrt(3.0), np.sqrt(5.0)


@pytest.fixture(scope="module", autouse=True)
def _one_blas_thread():
    """Dense checks on one BLAS thread: on a shared 2-core machine OpenBLAS threads
    contend and a 2,000 x 2,000 Cholesky ran 25x slower with two threads."""
    with threadpool_limits(limits=1):
        yield


def matern_dense(family, r):
    """(rho, -r rho'(r)) of R&W eq. 4.17, written independently of the package."""
    if family == "exponential":
        e = np.exp(-r)
        return e, r * e
    if family == "matern32":
        a = SQ3 * r
        e = np.exp(-a)
        return (1 + a) * e, a * a * e
    a = SQ5 * r
    e = np.exp(-a)
    return (1 + a + a * a / 3) * e, a * a * (1 + a) * e / 3


def dense_model(family, x, s2, ls, tau2):
    """Sigma and [dSigma/dlog s2, dSigma/dlog l, (dSigma/dlog tau2)] by numpy."""
    r = np.abs(x[:, None] - x[None, :]) / ls
    rho, slope = matern_dense(family, r)
    sigma = s2 * rho + tau2 * np.eye(x.size)
    derivs = [s2 * rho, s2 * slope] + ([tau2 * np.eye(x.size)] if tau2 > 0 else [])
    return sigma, derivs


def design(x, mean):
    n = x.size
    return {"zero": np.empty((n, 0)), "constant": np.ones((n, 1)),
            "linear": np.column_stack([np.ones(n), x])}[mean]


def dense_inverse(chol):
    """(Sigma^-1, log det Sigma) from the lower Cholesky factor (LAPACK dpotri)."""
    inv, info = lapack.dpotri(chol, lower=True)
    if info != 0:
        raise np.linalg.LinAlgError(f"dpotri info {info}")
    inv = np.tril(inv) + np.tril(inv, -1).T
    return inv, 2 * np.sum(np.log(np.diag(chol)))


def dense_loglik_and_score(dense, derivs, y, f, reml):
    """Profile ML / REML log-likelihood and its analytic score, from the definitions."""
    n, p = f.shape
    sinv, logdet = dense
    if p:
        gram = f.T @ sinv @ f
        beta = np.linalg.solve(gram, f.T @ sinv @ y)
        proj = sinv - sinv @ f @ np.linalg.solve(gram, f.T @ sinv)
    else:
        gram, beta, proj = None, np.empty(0), sinv
    r = y - f @ beta
    quad = r @ sinv @ r
    if reml and p:
        ll = -0.5 * (quad + logdet + np.linalg.slogdet(gram)[1] - np.linalg.slogdet(f.T @ f)[1]
                     + (n - p) * np.log(2 * np.pi))
        tr_mat = proj
    else:
        ll = -0.5 * (quad + logdet + n * np.log(2 * np.pi))
        tr_mat = sinv
    a = sinv @ r
    quads = np.array([0.5 * a @ d @ a for d in derivs])
    traces = np.array([0.5 * np.sum(tr_mat * d) for d in derivs])
    return ll, logdet, quads - traces, np.abs(quads) + np.abs(traces)


KERNELS = {"exponential": Exponential, "matern32": Matern32, "matern52": Matern52}


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(20240611)
    n = 2000
    x = rng.random(n) * 3.0
    out = {}
    for fam in KERNELS:
        s2, ls, tau2 = 1.7, 0.3, 0.05
        sigma, derivs = dense_model(fam, x, s2, ls, tau2)
        # data drawn from the model plus a linear trend
        chol = np.linalg.cholesky(sigma)
        y = chol @ rng.standard_normal(n) + 0.4 + 0.2 * x
        out[fam] = (KERNELS[fam](variance=s2, lengthscale=ls, nugget=tau2), dense_inverse(chol),
                    derivs, y)
    return x, out


@pytest.mark.parametrize("family", list(KERNELS))
@pytest.mark.parametrize("mean,reml", [("zero", False), ("constant", False),
                                       ("constant", True), ("linear", False), ("linear", True)])
def test_loglik_matches_dense(problem, family, mean, reml):
    x, models = problem
    kernel, sigma, derivs, y = models[family]
    ll, logdet, _, _ = dense_loglik_and_score(sigma, derivs, y, design(x, mean), reml)
    ev = StateSpaceReference(x, kernel).evaluate(y, mean=mean, reml=reml, score=False)
    assert ev.source == "statespace"
    assert ev.logdet == pytest.approx(logdet, rel=1e-9)
    assert ev.loglik == pytest.approx(ll, rel=1e-9)


@pytest.mark.parametrize("family", list(KERNELS))
@pytest.mark.parametrize("mean,reml", [("zero", False), ("linear", True)])
@pytest.mark.parametrize("method,rtol,note", [("finite_difference", 1e-6, "central differences"),
                                              ("analytic", 1e-9, "sensitivity equations")])
def test_score_matches_dense_analytic(problem, family, mean, reml, method, rtol, note):
    x, models = problem
    kernel, sigma, derivs, y = models[family]
    _, _, score, scale = dense_loglik_and_score(sigma, derivs, y, design(x, mean), reml)
    ev = StateSpaceReference(x, kernel).evaluate(y, mean=mean, reml=reml, score_method=method)
    assert ev.param_names == ("log_variance", "log_lengthscale", "log_nugget")
    # relative to the size of the two terms that cancel in the score
    np.testing.assert_array_less(np.abs(ev.score - score), rtol * scale)
    assert any(note in n for n in ev.notes)


@pytest.mark.parametrize("family", list(KERNELS))
@pytest.mark.parametrize("mean,reml", [("constant", False), ("constant", True)])
def test_analytic_score_equals_finite_differences(problem, family, mean, reml):
    # the Kalman sensitivity recursions against Richardson central differences of the
    # exact log-likelihood (truncation O(h^4), h = 1e-3): agreement to ~1e-9 relative
    x, models = problem
    kernel, _, _, y = models[family]
    ref = StateSpaceReference(x[::-1], kernel)  # unsorted input: sorted internally
    yy = y[::-1]
    analytic = ref.evaluate(yy, mean=mean, reml=reml).score
    fd = ref.evaluate(yy, mean=mean, reml=reml, score_method="finite_difference").score
    np.testing.assert_allclose(analytic, fd, rtol=1e-7, atol=1e-7 * np.abs(fd).max())


def test_analytic_score_without_nugget_and_bad_method():
    # zero nugget: two parameters; the dense score (numpy solve) as the outside check
    x = np.linspace(0.0, 3.0, 60)
    kernel = Matern32(variance=1.3, lengthscale=0.4, nugget=0.0)
    sigma = kernel.covariance(x[:, None])
    idx = np.arange(x.size)
    derivs = kernel.block_with_derivatives(x[:, None], idx, idx)[1]
    y = np.linalg.cholesky(sigma) @ np.random.default_rng(8).standard_normal(x.size)
    alpha = np.linalg.solve(sigma, y)
    inv = np.linalg.inv(sigma)
    dense = [0.5 * alpha @ d @ alpha - 0.5 * np.sum(inv * d) for d in derivs]
    ev = StateSpaceReference(x, kernel).evaluate(y)
    assert ev.param_names == ("log_variance", "log_lengthscale")
    np.testing.assert_allclose(ev.score, dense, rtol=1e-7, atol=1e-8)
    with pytest.raises(StateSpaceError, match="score_method must be"):
        StateSpaceReference(x, kernel).evaluate(y, score_method="adjoint")


def test_unsorted_points_give_the_same_likelihood(problem):
    x, models = problem
    kernel, sigma, derivs, y = models["matern32"]
    perm = np.random.default_rng(1).permutation(x.size)
    ll, _, _, _ = dense_loglik_and_score(sigma, derivs, y, design(x, "linear"), False)
    ev = StateSpaceReference(x[perm], kernel).evaluate(y[perm], mean="linear", score=False)
    assert ev.loglik == pytest.approx(ll, rel=1e-9)


def test_whiten_gives_inverse_quadratic_forms():
    # V' Sigma^-1 U by numpy against (W^-1 V)' (W^-1 U)
    rng = np.random.default_rng(3)
    x = rng.random(300)
    sigma, _ = dense_model("matern52", x, 0.9, 0.2, 0.01)
    v = rng.standard_normal((300, 3))
    ref = StateSpaceReference(x[:, None], Matern52(variance=0.9, lengthscale=0.2, nugget=0.01))
    w = ref.whiten(v)
    np.testing.assert_allclose(w.T @ w, v.T @ np.linalg.solve(sigma, v), rtol=1e-9)
    np.testing.assert_allclose(ref.whiten(v[:, 0]), w[:, 0])


@pytest.mark.parametrize("family,rtol", [("exponential", 1e-10), ("matern32", 1e-9),
                                         ("matern52", 1e-7)])
def test_zero_nugget_on_a_regular_grid(family, rtol):
    # dense Cholesky of the noise-free correlation (moderately conditioned at this spacing)
    x = np.linspace(0.0, 1.0, 200)
    sigma, _ = dense_model(family, x, 1.2, 0.05, 0.0)
    y = np.sin(7 * x)
    chol = np.linalg.cholesky(sigma)
    z = np.linalg.solve(chol, y)
    ll = -0.5 * (z @ z + 2 * np.sum(np.log(np.diag(chol))) + x.size * np.log(2 * np.pi))
    kernel = KERNELS[family](variance=1.2, lengthscale=0.05)
    assert kernel.param_names == ("log_variance", "log_lengthscale")
    ev = StateSpaceReference(x, kernel).evaluate(y, score=False)
    assert ev.loglik == pytest.approx(ll, rel=rtol)


def test_duplicate_points_need_a_nugget():
    x = np.array([0.0, 0.1, 0.1, 0.4])
    with pytest.raises(StateSpaceError, match="singular.*add a nugget"):
        StateSpaceReference(x, Matern32(lengthscale=0.3))
    # with a nugget the duplicates are fine: dense numpy likelihood
    sigma, _ = dense_model("matern32", x, 1.0, 0.3, 0.2)
    y = np.array([0.3, -0.2, 0.1, 0.5])
    ll = -0.5 * (y @ np.linalg.solve(sigma, y) + np.linalg.slogdet(sigma)[1]
                 + 4 * np.log(2 * np.pi))
    ev = StateSpaceReference(x, Matern32(lengthscale=0.3, nugget=0.2)).evaluate(y, score=False)
    assert ev.loglik == pytest.approx(ll, rel=1e-12)


def test_general_matern_with_half_integer_nu_is_accepted():
    # Matern(nu=2.5) is the same model as Matern52: the dense numpy value
    x = np.linspace(0, 1, 50)
    sigma, _ = dense_model("matern52", x, 1.0, 0.3, 0.1)
    y = np.cos(3 * x)
    ll = -0.5 * (y @ np.linalg.solve(sigma, y) + np.linalg.slogdet(sigma)[1]
                 + 50 * np.log(2 * np.pi))
    ref = StateSpaceReference(x, Matern(lengthscale=0.3, nugget=0.1, nu=2.5))
    assert ref.evaluate(y, score=False).loglik == pytest.approx(ll, rel=1e-12)


@pytest.mark.parametrize("points,kernel,message", [
    (np.zeros((5, 2)), Matern32(lengthscale=0.1), "1-dimensional"),
    (np.arange(5.0), Gaussian(lengthscale=0.1), "half-integer Matern"),
    (np.arange(5.0), Matern(lengthscale=0.1, nu=1.0), "half-integer Matern"),
    (np.arange(5.0), Matern32(lengthscale=(0.1, 0.2)), "one length scale"),
])
def test_refusals_name_the_problem(points, kernel, message):
    with pytest.raises(StateSpaceError, match=message):
        StateSpaceReference(points, kernel)


def test_wrong_data_shape_is_refused():
    ref = StateSpaceReference(np.arange(5.0), Exponential(lengthscale=1.0))
    with pytest.raises(StateSpaceError, match=r"expected shape \(5,\)"):
        ref.evaluate(np.zeros(4))


@pytest.mark.parametrize("lam", [0.3, 50.0])
def test_process_noise_integrals_match_scipy_incomplete_gamma(lam):
    # J_k(dt) = k! / (2 lam)^(k+1) P(k+1, 2 lam dt), P = scipy.special.gammainc
    from math import factorial

    from scipy import special

    from harness.references.statespace import _lower_gamma_integrals
    out = np.empty(5)
    for dt in (0.0, 1e-9, 1e-3, 0.019, 0.021, 0.05, 1.0, 30.0):
        _lower_gamma_integrals(lam, dt, out)
        want = [factorial(k) / (2 * lam) ** (k + 1) * special.gammainc(k + 1, 2 * lam * dt)
                for k in range(5)]
        np.testing.assert_allclose(out, want, rtol=1e-13, atol=0)
