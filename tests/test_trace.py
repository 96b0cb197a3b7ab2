"""Stochastic trace estimators against exact dense traces and published variance formulas.

Sources: Hutchinson (1989) and Avron and Toledo (2011, J. ACM 58, Lemma 1) for
E[z'Az] = tr(A) and Var(z'Az) = 2 (||A||_F^2 - sum a_ii^2) with Rademacher z; Meyer,
Musco, Musco and Woodruff (2021, Hutch++, Algorithm 1) for the variance reduction on
matrices with decaying spectra. Exact traces are formed with numpy in the tests.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from threadpoolctl import threadpool_limits

from harness.likelihood.trace import (
    AffineForm,
    AffineReduction,
    ExplicitOperators,
    FactorizationOperators,
    declared_reduction,
    hutchinson,
    hutchpp,
    rademacher_probes,
)


@pytest.fixture(autouse=True)
def _one_blas_thread():
    """Small products on a shared 2-core machine: multithreaded BLAS only adds overhead."""
    with threadpool_limits(1):
        yield


class DenseFactor:
    """Sigma = L L' by numpy with optional square-root members (test reference)."""

    def __init__(self, sigma: np.ndarray, sqrt: bool = True) -> None:
        self.sigma, self.chol = sigma, np.linalg.cholesky(sigma)
        self.n = sigma.shape[0]
        if not sqrt:
            self.solve_sqrt = None
            self.apply_sqrt = None

    def solve(self, b):
        return scipy.linalg.cho_solve((self.chol, True), b)

    def solve_sqrt(self, b):
        return scipy.linalg.solve_triangular(self.chol, b, lower=True)

    def apply_sqrt(self, b):
        return self.chol @ b


@pytest.fixture(scope="module")
def problem():
    """An exponential-kernel Sigma at n = 200 with three derivative matrices."""
    rng = np.random.default_rng(7)
    x = rng.uniform(0, 1, size=(200, 2))
    r = np.sqrt(((x[:, None] - x[None]) ** 2).sum(-1)) / 0.3
    corr = np.exp(-r)
    sigma = 1.5 * corr + 0.1 * np.eye(200)
    derivs = np.stack([1.5 * corr, 1.5 * r * corr, 0.1 * np.eye(200)])
    inv = np.linalg.inv(sigma)
    exact = np.array([np.trace(inv @ d) for d in derivs])
    fisher = np.array([[0.5 * np.trace(inv @ a @ inv @ b) for b in derivs] for a in derivs])
    return sigma, derivs, exact, fisher


def _operators(problem, sqrt=True):
    sigma, derivs, _, _ = problem
    return FactorizationOperators(DenseFactor(sigma, sqrt=sqrt), lambda i, b: derivs[i] @ b, 3)


@pytest.mark.parametrize("sqrt", [True, False], ids=["symmetric", "nonsymmetric"])
@pytest.mark.parametrize("estimator", [hutchinson, hutchpp])
def test_unbiased_over_seeds(problem, estimator, sqrt):
    # source: E[z'Az] = tr(A) (Hutchinson 1989); E[Hutch++ | S] = tr(A) (module docstring)
    runs = [estimator(_operators(problem, sqrt), probes=12, rng=seed, fisher=True)
            for seed in range(300)]
    _assert_unbiased(runs, problem)
    assert runs[0].symmetric is sqrt


def _assert_unbiased(runs, problem):
    """Means over seeds within 3 (traces) and 3.5 (Fisher) standard errors of exact."""
    _, _, exact, fisher = problem
    est = np.array([r.estimate for r in runs])
    se_of_mean = est.std(axis=0, ddof=1) / np.sqrt(len(runs))
    assert np.all(np.abs(est.mean(axis=0) - exact) < 3.0 * se_of_mean)
    fis = np.array([r.fisher for r in runs])
    fis_se = fis.std(axis=0, ddof=1) / np.sqrt(len(runs))
    assert np.all(np.abs(fis.mean(axis=0) - fisher) < 3.5 * fis_se + 1e-12)


def test_hutchinson_rademacher_variance_formula(problem):
    # source: Avron and Toledo 2011, Lemma 1: Var(z'Az) = 2 (||A||_F^2 - sum_i a_ii^2)
    sigma, derivs, _, _ = problem
    chol = np.linalg.cholesky(sigma)
    sym = np.stack([scipy.linalg.solve_triangular(
        chol, scipy.linalg.solve_triangular(chol, d, lower=True).T, lower=True)
        for d in derivs])                                  # L^-1 Sigma_i L^-T
    formula = 2.0 * (np.sum(sym**2, axis=(1, 2)) - np.sum(np.diagonal(sym, 0, 1, 2)**2, 1))
    m = 20000
    big = hutchinson(ExplicitOperators(sym), probes=m, rng=1)
    np.testing.assert_allclose(big.stderr**2 * m, formula, rtol=0.06)
    # the same variance across seeds at m = 16 probes, divided by m
    est = np.array([hutchinson(ExplicitOperators(sym), probes=16, rng=s).estimate
                    for s in range(600)])
    np.testing.assert_allclose(est.var(axis=0, ddof=1), formula / 16, rtol=0.2)


@pytest.mark.parametrize("estimator,probes,low", [(hutchinson, 32, 0.90), (hutchpp, 60, 0.86)])
def test_standard_error_coverage(problem, estimator, probes, low):
    # source: normal-approximation coverage of mean +- 1.96 SE (nominal 0.95)
    _, _, exact, _ = problem
    hits = []
    for seed in range(400):
        r = estimator(_operators(problem), probes=probes, rng=seed)
        hits.append(np.abs(r.estimate - exact) <= 1.96 * r.stderr)
    coverage = np.mean(hits, axis=0)
    assert np.all((coverage > low) & (coverage < 0.995)), coverage


def test_hutchpp_beats_hutchinson_on_decaying_spectrum():
    # source: Meyer et al. 2021 (Hutch++), Theorem 1.1 vs Hutchinson at equal matvecs
    rng = np.random.default_rng(3)
    n = 200
    basis = np.linalg.qr(rng.standard_normal((n, n)))[0]
    a = (basis * (np.arange(1, n + 1) ** -2.0)) @ basis.T
    exact = np.trace(a)
    ops = ExplicitOperators(a)
    err_h = [hutchinson(ops, probes=60, rng=s).estimate[0] - exact for s in range(100)]
    err_pp = [hutchpp(ops, probes=60, rng=s).estimate[0] - exact for s in range(100)]
    assert np.mean(np.square(err_pp)) < np.mean(np.square(err_h)) / 10.0


def test_counts_and_probe_block(problem):
    # counts follow from the algorithms: Hutchinson m products per operator; Hutch++ 3k
    ops = _operators(problem)
    r = hutchinson(ops, probes=10, rng=0)
    assert (r.probes, r.matvecs) == (10, 30)
    assert r.solves == 10 * 2 + 30      # W^-T once (W then Sigma^-1), W^-1 per operator
    r = hutchpp(_operators(problem, sqrt=False), probes=31, rng=0)
    assert (r.probes, r.matvecs) == (30, 90)
    z = rademacher_probes(50, 7, rng=np.random.default_rng(2))
    assert z.shape == (50, 7) and set(np.unique(z)) == {-1.0, 1.0}
    np.testing.assert_array_equal(z, rademacher_probes(50, 7, rng=np.random.default_rng(2)))


def test_bad_probe_counts_refused(problem):
    with pytest.raises(ValueError, match="probes >= 2"):
        hutchinson(_operators(problem), probes=1)
    with pytest.raises(ValueError, match="probes >= 6"):
        hutchpp(_operators(problem), probes=5)


# -- parameters with derivatives affine in Sigma (harness.likelihood.trace.affine) -------
# In ``problem`` Sigma = 1.5 R + 0.1 I, so dSigma/dlog s2 = Sigma - 0.1 I and
# dSigma/dlog tau2 = 0.1 I: A = I - 0.1 Sigma^-1 and A = 0.1 Sigma^-1.
REDUCTION = AffineReduction((AffineForm(1.0, -0.1), None, AffineForm(0.0, 0.1)))


def _base_operators(problem, sqrt=True):
    sigma, derivs, _, _ = problem
    return REDUCTION.base_family(DenseFactor(sigma, sqrt=sqrt), lambda i, b: derivs[i] @ b)


def test_affine_forms_of_the_problem_hold(problem):
    # source: dense numpy algebra, Sigma_i = a Sigma + b I for the two affine parameters
    sigma, derivs, _, _ = problem
    for i, form in enumerate(REDUCTION.forms):
        if form is not None:
            np.testing.assert_allclose(derivs[i], form.sigma * sigma
                                       + form.identity * np.eye(200), atol=1e-14)


@pytest.mark.parametrize("sqrt", [True, False], ids=["symmetric", "nonsymmetric"])
def test_reduced_hutchinson_equals_full_family(problem, sqrt):
    # source: z'(a I + b B) z = a n + b z'Bz for Rademacher z (z'z = n): the reduced
    # estimator is the full one, to rounding, for the same probes; so is the Fisher
    # estimate, formed from the same products (Hutchinson 1989)
    full = hutchinson(_operators(problem, sqrt), probes=24, rng=5, fisher=True)
    reduced = hutchinson(_base_operators(problem, sqrt), probes=24, rng=5, fisher=True,
                         reduction=REDUCTION)
    np.testing.assert_allclose(reduced.estimate, full.estimate, rtol=1e-10)
    np.testing.assert_allclose(reduced.stderr, full.stderr, rtol=1e-8)
    np.testing.assert_allclose(reduced.fisher, full.fisher, rtol=1e-10)
    assert reduced.estimate.shape == (3,) and reduced.symmetric is sqrt
    # one derivative product per probe instead of three (the affine ones are free);
    # the non-symmetric Fisher estimate takes the adjoint products as well
    per_probe = 1 if sqrt else 2
    assert reduced.matvecs == per_probe * 24 and full.matvecs == 3 * per_probe * 24
    assert any("shared operator" in note for note in reduced.notes)


@pytest.mark.parametrize("sqrt", [True, False], ids=["symmetric", "nonsymmetric"])
def test_reduced_hutchpp_unbiased_and_exact_with_a_full_sketch(problem, sqrt):
    # source: E[Hutch++ | S] = tr(A) for any sketch (Meyer et al. 2021, Algorithm 1;
    # module docstring), and a sketch spanning R^n makes tr(Q'AQ) = tr(A) exactly
    runs = [hutchpp(_base_operators(problem, sqrt), probes=12, rng=seed, fisher=True,
                    reduction=REDUCTION) for seed in range(300)]
    _assert_unbiased(runs, problem)
    exact = problem[2]
    whole = hutchpp(_base_operators(problem, sqrt), probes=600, rng=1, reduction=REDUCTION)
    np.testing.assert_allclose(whole.estimate, exact, rtol=1e-9)


def test_reduction_needs_the_base_family(problem):
    with pytest.raises(ValueError, match="base family of 2"):
        hutchinson(_operators(problem), probes=8, rng=0, reduction=REDUCTION)
    with pytest.raises(ValueError, match="at least one affine"):
        AffineReduction((None, None))
    with pytest.raises(ValueError, match="outside"):
        FactorizationOperators(DenseFactor(problem[0]), lambda i, b: b, 2,
                               identity_slots=(2,))


class _Declares(DenseFactor):
    """The problem's dense factor with given derivative_affine answers."""

    def __init__(self, problem, answers):
        super().__init__(problem[0])
        self.derivs, self.answers = problem[1], answers

    def matvec(self, b):
        return self.sigma @ b

    def derivative_matvec(self, i, b):
        return self.derivs[i] @ b

    def derivative_affine(self, i):
        return self.answers[i]


def test_declared_reduction_reads_and_checks_the_solver(problem):
    assert declared_reduction(DenseFactor(problem[0]), 3) is None
    assert declared_reduction(_Declares(problem, [None] * 3), 3) is None
    got = declared_reduction(_Declares(problem, [(1, -0.1), None, np.array([0.0, 0.1])]), 3)
    assert got is not None and got.forms == REDUCTION.forms
    assert got.others == (1,) and got.base_count == 2 and got.slots == (0, 1, 0)
    for bad in ((1.0,), (1.0, float("nan")), "ab", 3.0):
        with pytest.raises(ValueError, match=r"derivative_affine\(0\) must return"):
            declared_reduction(_Declares(problem, [bad, None, None]), 3)
    # a declaration its own products contradict (the nugget's sign flipped) is refused
    with pytest.raises(ValueError, match=r"derivative_affine\(2\) declares .* wrong"):
        declared_reduction(_Declares(problem, [None, None, (0.0, -0.1)]), 3)
