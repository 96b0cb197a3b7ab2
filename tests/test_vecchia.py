"""The Vecchia solver against references computed here with numpy and scipy.

Sources of the checks: the exact Gaussian log-density (scipy.stats.multivariate_normal);
a brute-force O(n^2) maximin ordering and radius pattern written here from their
definitions (Guinness 2018, Technometrics 60; Schafer, Katzfuss and Owhadi 2021, SIAM J.
Sci. Comput. 43(3), eq. 3.3); Vecchia's (1988, JRSS-B 50) conditional normal densities
from numpy solves; central finite differences; a Monte-Carlo covariance of the score;
the dense reference of ``harness.references`` (Mardia and Marshall 1984 Fisher).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import multivariate_normal, norm

from harness.audit.metrics.kl_divergence import (
    KL_NAT,
    kl_divergence_estimate,
    kl_divergence_exact,
    kl_divergence_from_kernel,
)
from harness.model.kernels import Exponential, Matern32
from harness.references.dense_reference import dense_evaluate
from harness.solvers.knobs import DEFAULT_TOL_KNOB, KnobSpec, knob_of
from harness.solvers.registry import resolve_solver
from harness.solvers.vecchia import (
    NEIGHBOURS_KNOB,
    RHO_RANGE,
    StructureCache,
    VecchiaInputError,
    build_structure,
    factorize,
    maximin_order,
)
from harness.solvers.vecchia.sparsity import nearest_pattern, radius_pattern
from harness.solvers.vecchia.vecchia_likelihood import vecchia_evaluate

KERNEL = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)


def _points(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).random((n, 2))


def _draw(points: np.ndarray, kernel, seed: int) -> np.ndarray:
    sigma = kernel.covariance(points)
    return np.linalg.cholesky(sigma) @ np.random.default_rng(seed).standard_normal(
        points.shape[0])


def _brute_maximin(x: np.ndarray, first: int) -> tuple[np.ndarray, np.ndarray]:
    # definition: next point maximizes its distance to the points already picked
    n = x.shape[0]
    dist = np.sqrt(((x - x[first]) ** 2).sum(axis=1))
    perm, lengths = [first], [dist.max()]
    dist[first] = -1.0
    for _ in range(1, n):
        i = int(np.argmax(dist))
        perm.append(i)
        lengths.append(dist[i])
        dist = np.minimum(dist, np.sqrt(((x - x[i]) ** 2).sum(axis=1)))
        dist[perm] = -1.0
    return np.array(perm), np.array(lengths)


# -- ordering and pattern --------------------------------------------------------------

@pytest.mark.parametrize("n", [300, 2000])
def test_maximin_equals_brute_force(n):
    # source: the maximin definition (Guinness 2018, sec. 3), O(n^2) here
    x = _points(n, 3)
    order = maximin_order(x)
    perm, lengths = _brute_maximin(x, int(order.perm[0]))
    np.testing.assert_array_equal(order.perm, perm)
    np.testing.assert_allclose(order.lengths, lengths, rtol=0, atol=1e-14)
    assert np.all(np.diff(order.lengths[1:]) <= 0)


@pytest.mark.parametrize(("n", "m"), [(300, 1), (2000, 7), (500, 600)])
def test_nearest_pattern_equals_brute_force(n, m):
    # source: c(k) = the min(m, k) earlier points nearest to x_k (Vecchia 1988, sec. 3;
    # Guinness 2018, sec. 2), by sorting all earlier distances here; compared as
    # distances so that ties between equidistant points cannot decide the test
    x = _points(n, 4)
    order = maximin_order(x)
    xo = x[order.perm]
    pattern = nearest_pattern(xo, neighbours=m)
    assert pattern.rows.size == sum(min(m, k) for k in range(n)) > 0
    for k in range(n):
        got = pattern.conditioning(k)
        d = ((xo[:k] - xo[k]) ** 2).sum(axis=1)
        assert np.all(np.diff(got) > 0) and np.all(got < k)
        np.testing.assert_array_equal(np.sort(d[got]), np.sort(d)[:min(m, k)])


@pytest.mark.parametrize("rho", [1.5, 3.0, math.inf])
def test_pattern_equals_brute_force(rho):
    # source: c(k) = {j < k : |x_j - x_k| <= rho l_k} (Schafer et al. 2021, eq. 3.3)
    x = _points(800, 4)
    order = maximin_order(x)
    xo = x[order.perm]
    pattern = radius_pattern(xo, order.lengths, rho=rho)
    for k in range(xo.shape[0]):
        d = np.sqrt(((xo[:k] - xo[k]) ** 2).sum(axis=1))
        np.testing.assert_array_equal(pattern.conditioning(k),
                                      np.flatnonzero(d <= rho * order.lengths[k]))


# -- likelihood ------------------------------------------------------------------------

def _full_conditioning(n: int) -> None:
    # source: scipy.stats.multivariate_normal.logpdf of the exact Sigma
    x = _points(n, 5)
    y = _draw(x, KERNEL, 6)
    exact = multivariate_normal(np.zeros(n), KERNEL.covariance(x)).logpdf(y)
    ev = vecchia_evaluate(x, y, KERNEL, rho=math.inf, lam=math.inf, score=False,
                          fisher=False)
    assert abs(ev.loglik - exact) <= 1e-9 * abs(exact)
    f = factorize(x, KERNEL, rho=math.inf, lam=math.inf)
    assert f.nnz == n * (n + 1) // 2
    fact = -0.5 * y @ f.solve(y) - 0.5 * f.logdet() - 0.5 * n * math.log(2 * math.pi)
    assert abs(fact - exact) <= 1e-9 * abs(exact)


def test_full_conditioning_is_exact_small():
    _full_conditioning(400)


def test_all_earlier_neighbours_is_exact():
    # source: scipy.stats.multivariate_normal.logpdf; m = n - 1 conditions every point
    # on all earlier ones, which is the chain rule of the exact density
    n = 300
    x = _points(n, 5)
    y = _draw(x, KERNEL, 6)
    exact = multivariate_normal(np.zeros(n), KERNEL.covariance(x)).logpdf(y)
    ev = vecchia_evaluate(x, y, KERNEL, neighbours=n - 1, score=False, fisher=False)
    assert abs(ev.loglik - exact) <= 1e-9 * abs(exact)


@pytest.mark.slow
def test_full_conditioning_is_exact_2000():
    _full_conditioning(2000)


def test_loglik_is_sum_of_conditional_normals():
    # source: Vecchia (1988) eq. 3: sum_k log N(y_k; b'y_c, d) with b, d by numpy solves
    x = _points(500, 7)
    y = _draw(x, KERNEL, 8)
    rho = 3.0
    structure = build_structure(x, rho=rho, lam=None)
    order = structure.order
    sigma = KERNEL.covariance(x)
    pattern = radius_pattern(x[order.perm], order.lengths, rho=rho)
    total = 0.0
    for k in range(x.shape[0]):
        i = order.perm[k]
        c = order.perm[pattern.conditioning(k)]
        if c.size:
            b = np.linalg.solve(sigma[np.ix_(c, c)], sigma[c, i])
            mu, var = b @ y[c], sigma[i, i] - sigma[i, c] @ b
        else:
            mu, var = 0.0, sigma[i, i]
        total += norm.logpdf(y[i], mu, math.sqrt(var))
    ev = vecchia_evaluate(x, y, KERNEL, rho=rho, lam=None, structure=structure)
    assert abs(ev.loglik - total) <= 1e-10 * abs(total)


@pytest.mark.parametrize("mean", ["zero", "linear"])
def test_score_matches_central_differences(mean):
    # source: central differences of the approximation's own log-likelihood
    x = _points(400, 9)
    y = _draw(x, KERNEL, 10) + 0.5
    cache = StructureCache()
    ev = vecchia_evaluate(x, y, KERNEL, rho=2.5, mean=mean, cache=cache)
    theta, h = KERNEL.theta, 1e-5
    for i in range(theta.size):
        step = h * np.eye(theta.size)[i]
        up = vecchia_evaluate(x, y, KERNEL.with_theta(theta + step), rho=2.5, mean=mean,
                              score=False, fisher=False, cache=cache).loglik
        down = vecchia_evaluate(x, y, KERNEL.with_theta(theta - step), rho=2.5, mean=mean,
                                score=False, fisher=False, cache=cache).loglik
        assert ev.score is not None
        assert abs(ev.score[i] - (up - down) / (2 * h)) <= 1e-6 * max(1.0, abs(ev.score[i]))
    assert cache.hits >= 2 * theta.size


def test_full_conditioning_matches_dense_score_and_fisher():
    # source: harness.references dense_evaluate (exact score and Fisher information)
    x = _points(300, 11)
    y = _draw(x, KERNEL, 12)
    ev = vecchia_evaluate(x, y, KERNEL, rho=math.inf, lam=math.inf, mean="constant")
    ref = dense_evaluate(x, y, KERNEL, mean="constant", fisher=True)
    assert ev.score is not None and ev.fisher is not None and ref.fisher is not None
    np.testing.assert_allclose(ev.score, ref.score, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(ev.fisher, ref.fisher, rtol=1e-9)


def test_fisher_matches_monte_carlo_score_covariance():
    # source: Cov(score) over 2,000 datasets drawn from N(0, Sigma~) itself; the score's
    # data-dependent part is 1/2 a' dSigma~_i a, a = Sigma~^-1 y. Bound: 4 standard errors
    # of a sample covariance, sqrt((F_ii F_jj + F_ij^2) / N) (Gaussian fourth moments).
    n, draws = 200, 2000
    x = _points(n, 13)
    f = factorize(x, KERNEL, rho=3.0)
    z = np.random.default_rng(14).standard_normal((n, draws))
    ys = f.apply_sqrt(z)
    a = f.solve(ys)
    p = KERNEL.n_params
    scores = np.stack([0.5 * np.einsum("ij,ij->j", a, f.derivative_matvec(i, a))
                       for i in range(p)])
    sample = np.cov(scores)
    ev = vecchia_evaluate(x, ys[:, 0], KERNEL, rho=3.0)
    assert ev.fisher is not None
    fisher = ev.fisher
    se = np.sqrt((np.outer(np.diag(fisher), np.diag(fisher)) + fisher ** 2) / draws)
    assert np.all(np.abs(sample - fisher) <= 4 * se), (sample, fisher, se)


# -- factorization ---------------------------------------------------------------------

def test_products_solves_and_square_root():
    # source: identities of Sigma~ = (U U')^-1 = W W' checked to rounding
    x = _points(600, 15)
    f = factorize(x, KERNEL, rho=3.0)
    b = np.random.default_rng(16).standard_normal((600, 3))
    assert np.max(np.abs(f.matvec(f.solve(b)) - b)) <= 1e-10 * np.max(np.abs(b))
    assert np.max(np.abs(f.solve_sqrt(f.apply_sqrt(b)) - b)) <= 1e-10
    w_wt = f.apply_sqrt(f.apply_sqrt_transpose(b))
    np.testing.assert_allclose(w_wt, f.matvec(b), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(f.solve_sqrt_transpose(f.solve_sqrt(b)), f.solve(b),
                               rtol=1e-10, atol=1e-10)
    assert f.nbytes > 0 and f.n == 600


def test_derivative_matvec_matches_central_differences():
    # source: central differences of Sigma~(theta) b
    x = _points(300, 17)
    f = factorize(x, KERNEL, rho=2.5)
    b = np.random.default_rng(18).standard_normal((300, 2))
    theta, h = KERNEL.theta, 1e-5
    for i in range(theta.size):
        step = h * np.eye(theta.size)[i]
        fd = (factorize(x, KERNEL, theta + step, rho=2.5).matvec(b)
              - factorize(x, KERNEL, theta - step, rho=2.5).matvec(b)) / (2 * h)
        assert np.max(np.abs(f.derivative_matvec(i, b) - fd)) <= 1e-6 * np.max(np.abs(fd))


def test_derivative_traces_are_the_log_det_gradient():
    # source: Jacobi's formula d log det A = tr(A^-1 dA) (Magnus and Neudecker 2019,
    # "Matrix Differential Calculus", ch. 8): central differences of numpy's slogdet of
    # the dense Sigma~(theta), and numpy's trace of solve(Sigma~, dSigma~) built column
    # by column from derivative_matvec
    x = _points(300, 21)
    f = factorize(x, KERNEL, neighbours=8)
    traces = f.derivative_traces()
    eye = np.eye(300)
    dense = f.matvec(eye)
    theta, h = KERNEL.theta, 1e-5
    for i in range(theta.size):
        step = h * np.eye(theta.size)[i]
        up = np.linalg.slogdet(factorize(x, KERNEL, theta + step, neighbours=8).matvec(eye))[1]
        down = np.linalg.slogdet(factorize(x, KERNEL, theta - step, neighbours=8).matvec(eye))[1]
        assert traces[i] == pytest.approx((up - down) / (2 * h), rel=1e-6)
        assert traces[i] == pytest.approx(
            np.trace(np.linalg.solve(dense, f.derivative_matvec(i, eye))), rel=1e-9)


def test_registered_and_timed_refactorization():
    x = _points(500, 19)
    solver = resolve_solver("vecchia")
    out = solver.factorize(x, KERNEL, tol=None, rho=3.0)
    assert out.n == 500
    cache = StructureCache()
    first = factorize(x, KERNEL, rho=3.0, cache=cache)
    again = factorize(x, KERNEL, KERNEL.theta + 0.1, rho=3.0, cache=cache)
    assert not first.timings.reused and again.timings.reused
    assert again.timings.structure.total == 0.0 and first.timings.structure.total > 0.0


# -- KL divergence ---------------------------------------------------------------------

def test_kl_matches_dense_numpy():
    # source: 1/2 [tr(S~^-1 S) - n + log det S~ - log det S] with dense numpy inverses
    n = 1000
    x = _points(n, 21)
    sigma = KERNEL.covariance(x)
    f = factorize(x, KERNEL, rho=2.5)
    approx = f.matvec(np.eye(n))
    dense = 0.5 * (np.trace(np.linalg.solve(approx, sigma)) - n
                   + np.linalg.slogdet(approx)[1] - np.linalg.slogdet(sigma)[1])
    exact = kl_divergence_exact(f, sigma=sigma)
    assert abs(exact.value - dense) <= 1e-8 * max(1.0, abs(dense))
    assert exact.to_dict()[KL_NAT] == exact.value
    chol = np.linalg.cholesky(sigma)
    est = kl_divergence_estimate(f, lambda z: sigma @ z, logdet_exact=exact.logdet_exact,
                                 probes=200, rng=np.random.default_rng(22))
    assert abs(est.value - exact.value) <= 4 * est.stderr + 1e-9
    assert kl_divergence_exact(f, cholesky=chol).value == pytest.approx(exact.value,
                                                                      rel=1e-10)
    by_columns = kl_divergence_from_kernel(f, KERNEL, x, logdet_exact=exact.logdet_exact,
                                           block=97)
    assert by_columns.value == pytest.approx(exact.value, rel=1e-10)


def test_kl_falls_with_the_knob():
    x = _points(1000, 23)
    sigma = KERNEL.covariance(x)
    values = [kl_divergence_exact(factorize(x, KERNEL, neighbours=int(m)), sigma=sigma).value
              for m in NEIGHBOURS_KNOB.default_sweep[:3]]
    assert values[0] > values[1] > values[2] > 0
    radius = [kl_divergence_exact(factorize(x, KERNEL, rho=r), sigma=sigma).value
              for r in RHO_RANGE.default_sweep[:2]]
    assert radius[0] > radius[1] > 0


def test_nearest_rule_beats_radius_rule_under_a_nugget():
    # the reason the knob is a count (harness.solvers.vecchia.sparsity): at no more
    # nonzeros per column, the nearest rule's KL is below the radius rule's (measured
    # 0.78 against 13.0 nat at n = 2,048; covaudit's own measurement)
    x = _points(1500, 29)
    sigma = KERNEL.covariance(x)
    radius = factorize(x, KERNEL, rho=6.0, lam=None)
    m = int(radius.structure.nnz_per_column) - 1
    nearest = factorize(x, KERNEL, neighbours=m, lam=None)
    assert nearest.structure.nnz_per_column <= radius.structure.nnz_per_column
    kl_radius = kl_divergence_exact(radius, sigma=sigma).value
    kl_nearest = kl_divergence_exact(nearest, sigma=sigma).value
    assert 0 < kl_nearest < kl_radius / 3


# -- bad input -------------------------------------------------------------------------

def test_duplicates_without_nugget_are_named():
    x = _points(200, 25)
    x[150] = x[40]
    kernel = Exponential(variance=1.0, lengthscale=0.2, nugget=0.0)
    with pytest.raises(VecchiaInputError, match=r"points 40 and 150|points 150 and 40"):
        factorize(x, kernel, rho=3.0)
    f = factorize(x, KERNEL, rho=3.0)  # with a nugget duplicates are legal
    assert np.isfinite(f.logdet())


def test_knob_out_of_range_shows_range():
    x = _points(100, 26)
    with pytest.raises(ValueError, match=r"neighbours = 0 .*\[1, inf\)"):
        factorize(x, KERNEL, neighbours=0)
    with pytest.raises(ValueError, match=r"neighbours = 2\.5"):
        factorize(x, KERNEL, neighbours=2.5)
    with pytest.raises(ValueError, match="exactly one"):
        factorize(x, KERNEL, neighbours=5, rho=3.0)
    with pytest.raises(ValueError, match=r"rho = 0\.5 .*\[1, inf\]"):
        factorize(x, KERNEL, rho=0.5)
    with pytest.raises(ValueError, match=r"nan"):
        factorize(x, KERNEL, rho=float("nan"))


def test_not_positive_definite_block_names_point():
    # a Gaussian kernel without nugget on near-coincident points: local blocks singular
    from harness.model.kernels import Gaussian

    x = _points(300, 27)
    kernel = Gaussian(variance=1.0, lengthscale=0.5, nugget=0.0)
    with pytest.raises(VecchiaInputError, match=r"point \d+ .*nugget"):
        factorize(x, kernel, rho=6.0)


def test_never_nan_silently():
    x = _points(100, 28)
    with pytest.raises(ValueError, match="non-finite"):
        vecchia_evaluate(x, np.full(100, np.nan), KERNEL)


# -- knobs -----------------------------------------------------------------------------

def test_knob_declarations():
    from harness.solvers.hodlr import factorize as hodlr_factorize

    assert knob_of(factorize) is NEIGHBOURS_KNOB
    assert knob_of(hodlr_factorize).name == "tol"
    assert knob_of(lambda *a, **k: None) is DEFAULT_TOL_KNOB
    with pytest.raises(ValueError, match=r"where: knob tol = 2 .*\(0, 1\)"):
        DEFAULT_TOL_KNOB.validate([1e-3, 2], where="where")
    spec = KnobSpec(name="m", kind="int", low=1, high=500, low_closed=True,
                    high_closed=True, more_accurate="larger", default_sweep=(5, 10, 20))
    with pytest.raises(ValueError, match="integer"):
        spec.validate(2.5, where="case x")
    with pytest.raises(ValueError, match="loose to tight"):
        KnobSpec(name="t", kind="float", low=0, high=1, low_closed=False, high_closed=False,
                 more_accurate="smaller", default_sweep=(1e-4, 1e-2))
