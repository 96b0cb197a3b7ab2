"""HODLR solver against dense numpy/scipy references computed here.

References: numpy.linalg.cholesky / scipy.linalg.cho_solve of the dense Sigma from
``Kernel.covariance`` (log det = 2 sum log diag L; Sigma^-1 y; y' Sigma^-1 y), the dense
derivative from ``Kernel.block_with_derivatives`` and numpy's SVD for block ranks.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sl

from harness.geometry.pointsets import clustered, uniform
from harness.geometry.tree import build_tree
from harness.model.kernels import Exponential, Gaussian, Kernel, Matern, Matern32, Matern52
from harness.solvers.hodlr import CompressionBreakdownError, HodlrFactorization, factorize
from harness.solvers.hodlr.aca import ACA_BLOCK, aca_compiled, recompress
from harness.solvers.hodlr.orth import thin_qr
from harness.solvers.hodlr.parallel import for_each_node, node_pool
from harness.solvers.protocol import SymmetricFactorization

TOLS = (1e-4, 1e-6, 1e-8, 1e-10)


class Reference:
    """Dense exact quantities of one problem (numpy Cholesky)."""

    def __init__(self, points: np.ndarray, kernel: Kernel, rng: np.random.Generator) -> None:
        self.points, self.kernel = points, kernel
        self.sigma = kernel.covariance(points)
        self.chol = np.linalg.cholesky(self.sigma)
        self.logdet = 2.0 * float(np.sum(np.log(np.diag(self.chol))))
        self.y = self.chol @ rng.standard_normal(points.shape[0])  # a draw from the model
        self.alpha = sl.cho_solve((self.chol, True), self.y)
        self.quad = float(self.y @ self.alpha)

    def loglik(self, logdet: float, quad: float) -> float:
        n = self.points.shape[0]
        return -0.5 * quad - 0.5 * logdet - 0.5 * n * np.log(2 * np.pi)


def _errors(ref: Reference, f: HodlrFactorization) -> tuple[float, float, float]:
    x = f.solve(ref.y)
    return (abs(f.logdet() - ref.logdet) / abs(ref.logdet),
            float(np.linalg.norm(x - ref.alpha) / np.linalg.norm(ref.alpha)),
            abs(float(ref.y @ x) - ref.quad) / ref.quad)


KERNELS = {
    "matern32": lambda ls: Matern32(variance=1.0, lengthscale=ls, nugget=1e-2),
    "exponential": lambda ls: Exponential(variance=1.0, lengthscale=ls, nugget=1e-2),
    "gaussian": lambda ls: Gaussian(variance=1.0, lengthscale=ls, nugget=1e-2),
}


@pytest.fixture(scope="module")
def points_1500() -> np.ndarray:
    return uniform(1500, 2, rng=np.random.default_rng(11))


@pytest.mark.parametrize("family", sorted(KERNELS))
@pytest.mark.parametrize("lengthscale", [0.05, 0.2])
def test_errors_shrink_with_tolerance(points_1500: np.ndarray, family: str,
                                      lengthscale: float) -> None:
    ref = Reference(points_1500, KERNELS[family](lengthscale), np.random.default_rng(1))
    # rows: tol; cols: logdet, solve, quadratic form; the largest over three ACA seeds
    # (one seed's error can cancel by chance: the Gaussian kernel at l = 0.2 gave a
    # quadratic-form error of 1.1e-8 at tol 1e-6 and 7.8e-8 at 1e-8)
    errs = np.array([np.max([_errors(ref, factorize(points_1500, ref.kernel, None, tol=t,
                                                    rng=seed)) for seed in range(3)], axis=0)
                     for t in TOLS])
    floor = 1e-10  # round-off level of the dense reference itself (n = 1500)
    for col, name in enumerate(("logdet", "solve", "quadratic form")):
        e = np.maximum(errs[:, col], floor)
        assert np.all(np.diff(e) <= 0), f"{name} error not shrinking with tol: {e}"
        assert e[-1] <= max(1e-4 * e[0], floor), f"{name}: {e}"
    # log det relative error of the order of the tolerance or below
    assert np.all(errs[:, 0] <= 10 * np.array(TOLS)), errs[:, 0]


def _check_1e8(n: int) -> None:
    points = uniform(n, 2, rng=np.random.default_rng(5))
    ref = Reference(points, Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2),
                    np.random.default_rng(2))
    f = factorize(points, ref.kernel, None, tol=1e-8, rng=0)
    x = f.solve(ref.y)
    rel_logdet = abs(f.logdet() - ref.logdet) / abs(ref.logdet)
    dl = abs(ref.loglik(f.logdet(), float(ref.y @ x)) - ref.loglik(ref.logdet, ref.quad))
    assert rel_logdet < 1e-8, rel_logdet
    assert dl < 1e-2, dl


def test_accuracy_tol_1e8_n4000() -> None:
    _check_1e8(4000)


@pytest.mark.slow
def test_accuracy_tol_1e8_n8000() -> None:
    _check_1e8(8000)


def _power_norm(apply, n: int, rng: np.random.Generator, iters: int = 30) -> float:
    """||A||_2 of a symmetric operator by power iteration."""
    v = rng.standard_normal(n)
    v /= np.linalg.norm(v)
    lam = 0.0
    for _ in range(iters):
        w = apply(v)
        lam = float(np.linalg.norm(w))
        if lam == 0.0:
            return 0.0
        v = w / lam
    return lam


@pytest.fixture(scope="module")
def problem_3000() -> tuple[Reference, HodlrFactorization]:
    rng = np.random.default_rng(9)
    points = clustered(3000, 2, rng=rng)
    ref = Reference(points, Matern32(variance=2.0, lengthscale=(0.08, 0.15), nugget=1e-2), rng)
    return ref, factorize(points, ref.kernel, None, tol=1e-6, rng=3)


def test_factorization_error_of_order_tol(problem_3000) -> None:
    ref, f = problem_3000
    rng = np.random.default_rng(0)
    n = ref.points.shape[0]
    norm = _power_norm(lambda v: ref.sigma @ v, n, rng)
    err_ww = _power_norm(lambda v: ref.sigma @ v - f.apply_sqrt(f.apply_sqrt_transpose(v)),
                         n, rng) / norm
    err_mv = _power_norm(lambda v: ref.sigma @ v - f.matvec(v), n, rng) / norm
    assert err_ww < 10 * f.tol, err_ww
    assert err_mv < 10 * f.tol, err_mv


def test_square_root_consistency(problem_3000) -> None:
    ref, f = problem_3000
    b = np.random.default_rng(4).standard_normal((ref.points.shape[0], 3))
    mv = f.matvec(b)
    # W W' b = Sigma~ b (factor vs compressed blocks: independent code paths)
    np.testing.assert_allclose(f.apply_sqrt(f.apply_sqrt_transpose(b)), mv,
                               rtol=0, atol=1e-10 * np.abs(mv).max())
    # W^-1 W b = b and Sigma~ Sigma~^-1 b = b
    np.testing.assert_allclose(f.solve_sqrt(f.apply_sqrt(b)), b, rtol=0, atol=1e-10)
    np.testing.assert_allclose(f.matvec(f.solve(b)), b, rtol=0, atol=1e-9)
    # W^-T W^-1 b = Sigma~^-1 b and W' W^-T b = b
    np.testing.assert_allclose(f.solve_sqrt_transpose(f.solve_sqrt(b)), f.solve(b),
                               rtol=0, atol=1e-10 * np.abs(f.solve(b)).max())
    np.testing.assert_allclose(f.apply_sqrt_transpose(f.solve_sqrt_transpose(b)), b,
                               rtol=0, atol=1e-10)
    # b' Sigma~^-1 b = ||W^-1 b||^2
    np.testing.assert_allclose(np.sum(b * f.solve(b), axis=0),
                               np.sum(f.solve_sqrt(b) ** 2, axis=0), rtol=1e-10)
    # vector and block inputs agree, shapes preserved
    assert f.solve(b[:, 0]).shape == (ref.points.shape[0],)
    np.testing.assert_allclose(f.solve(b[:, 0]), f.solve(b)[:, 0], rtol=1e-10, atol=0)


def test_results_do_not_depend_on_threads(problem_3000) -> None:
    # The nodes of a level run on worker threads (disjoint row ranges): one thread and
    # two must give the same bits, factorization and every operator.
    ref, _ = problem_3000
    one, two = (factorize(ref.points, ref.kernel, None, tol=1e-6, rng=3, threads=t)
                for t in (1, 2))
    assert one.logdet() == two.logdet()
    b = np.random.default_rng(5).standard_normal((ref.points.shape[0], 4))
    for name in ("solve", "matvec", "solve_sqrt", "apply_sqrt", "apply_sqrt_transpose",
                 "solve_sqrt_transpose"):
        assert np.array_equal(getattr(one, name)(b), getattr(two, name)(b)), name
    assert np.array_equal(one.derivative_matvec(1, b), two.derivative_matvec(1, b))


def test_derivative_matvec_matches_dense(problem_3000) -> None:
    ref, f = problem_3000
    idx = np.arange(ref.points.shape[0])
    _, derivs = ref.kernel.block_with_derivatives(ref.points, idx, idx)
    b = np.random.default_rng(6).standard_normal((idx.size, 2))
    assert f.kernel.n_params == 4  # log s2, log l_1, log l_2, log tau2
    for i in range(f.kernel.n_params):
        exact = derivs[i] @ b
        got = f.derivative_matvec(i, b)
        rel = np.linalg.norm(got - exact) / np.linalg.norm(exact)
        assert rel < 10 * f.tol, (f.kernel.param_names[i], rel)
    with pytest.raises(IndexError, match="out of range"):
        f.derivative_matvec(4, b)


def test_derivative_affine_matches_its_products(problem_3000) -> None:
    # source: Sigma = s2 R + tau2 I, so dSigma/dlog s2 = Sigma - tau2 I and
    # dSigma/dlog tau2 = tau2 I (kernels module; closed form), checked on the solver's
    # own products: derivative_matvec(i, b) = a Sigma~ b + b_i b
    ref, f = problem_3000
    b = np.random.default_rng(8).standard_normal((ref.points.shape[0], 3))
    declared = [f.derivative_affine(i) for i in range(f.kernel.n_params)]
    assert declared[1] is None and declared[2] is None  # the two length scales
    assert declared[0] == (1.0, -1e-2) and declared[3] == (0.0, 1e-2)
    for i in (0, 3):
        a, c = declared[i]
        expect = a * f.matvec(b) + c * b
        np.testing.assert_allclose(f.derivative_matvec(i, b), expect, rtol=0,
                                   atol=1e-13 * np.abs(expect).max())


def test_shared_trace_operator_agrees_with_exact_traces() -> None:
    # source: exact traces tr(Sigma~^-1 Sigma~_i) from the solver's own products on the
    # identity (numpy trace); the reduced Hutch++ must sit within 4 standard errors, and
    # the identity tr(Sigma~^-1 (Sigma~ - tau2 I)) = n - tau2 tr(Sigma~^-1) behind the
    # reduction must hold for the factor to far below one standard error
    from harness.likelihood import evaluate_likelihood

    rng = np.random.default_rng(21)
    points = uniform(1200, 2, rng=rng)
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    y = rng.standard_normal(1200)
    f = factorize(points, kernel, None, tol=1e-6, rng=1)
    exact = evaluate_likelihood(f, points, y, kernel, trace="exact")
    est = evaluate_likelihood(f, points, y, kernel, trace="hutchpp", probes=60, rng=2)
    z = (est.trace_terms - exact.trace_terms) / est.trace_stderr
    assert np.all(np.abs(z) < 4.0), z
    identity_gap = abs(exact.trace_terms[0] - (1200 - exact.trace_terms[2]))
    assert identity_gap < 1e-3 * est.trace_stderr[0], (identity_gap, est.trace_stderr)
    # variance and nugget share one operator: 60 products of W^-T and W^-1 cover both
    assert est.matvecs < 3 * 60


def test_protocol_and_metadata(problem_3000) -> None:
    ref, f = problem_3000
    n = ref.points.shape[0]
    assert isinstance(f, SymmetricFactorization)
    assert f.n == n
    assert 0 < f.nbytes < 8 * n * n
    ranks = f.ranks
    assert len(ranks) == f.tree.depth
    assert all(r.max >= r.mean > 0 and r.blocks == 2 ** r.level for r in ranks)
    # same seed, same factorization
    g = factorize(ref.points, ref.kernel, None, tol=1e-6, rng=3)
    assert g.logdet() == f.logdet()


@pytest.mark.parametrize("kernel, d", [
    (Matern(nu=0.8, lengthscale=0.2, nugget=1e-3), 2),   # numpy path (no compiled form)
    (Matern52(lengthscale=0.3, nugget=1e-4), 1),
    (Exponential(lengthscale=0.3, nugget=1e-3), 3),
])
def test_other_kernels_and_dimensions(kernel: Kernel, d: int) -> None:
    points = uniform(700, d, rng=np.random.default_rng(8))
    ref = Reference(points, kernel, np.random.default_rng(1))
    f = factorize(points, kernel, None, tol=1e-8, leaf_size=64, rng=0)
    rel_logdet, rel_solve, _ = _errors(ref, f)
    assert rel_logdet < 1e-8
    assert rel_solve < 1e-4


def test_theta_overrides_kernel(points_1500: np.ndarray) -> None:
    base = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    theta = np.log([2.0, 0.05, 1e-3])
    ref = Reference(points_1500, base.with_theta(theta), np.random.default_rng(0))
    f = factorize(points_1500, base, theta, tol=1e-8, rng=0)
    assert f.kernel.variance == pytest.approx(2.0)
    assert abs(f.logdet() - ref.logdet) / abs(ref.logdet) < 1e-8


def test_breakdown_raises_named_error() -> None:
    # smooth Gaussian kernel, tiny nugget: Sigma is numerically singular, and a loose
    # tolerance leaves an indefinite compressed matrix
    points = uniform(1500, 2, rng=np.random.default_rng(0))
    with pytest.raises(CompressionBreakdownError, match=r"tree level \d+ of \d+") as info:
        factorize(points, Gaussian(lengthscale=0.5, nugget=1e-8), None, tol=1e-1, rng=0)
    assert isinstance(info.value, np.linalg.LinAlgError)
    assert "tighter tol" in str(info.value) and "larger nugget" in str(info.value)
    assert 0 <= info.value.level <= info.value.depth


@pytest.mark.parametrize("tol", [0.0, 1.0, -1e-6, float("nan")])
def test_bad_tolerance(tol: float) -> None:
    with pytest.raises(ValueError, match="tol"):
        factorize(np.zeros((10, 2)), Matern32(), None, tol=tol)


def test_bad_vector_shape(problem_3000) -> None:
    _, f = problem_3000
    with pytest.raises(ValueError, match=r"expected an array of shape \(3000,\)"):
        f.solve(np.zeros(10))


# -- building blocks ---------------------------------------------------------------

@pytest.fixture(scope="module")
def touching_block() -> tuple[np.ndarray, int, np.ndarray, np.ndarray]:
    """The root's two touching halves of a 2D tree (scaled points, split index), their
    exact cross-covariance block and its singular values, shared by every tolerance."""
    kernel = Matern32(lengthscale=0.1)
    points = uniform(2400, 2, rng=np.random.default_rng(2))
    tree = build_tree(points, leaf_size=128)
    xs = kernel.scale_points(points[tree.perm])
    mid = int(tree.bounds[1][1])
    block = kernel.cross_covariance(points[tree.perm[:mid]], points[tree.perm[mid:]])
    return xs, mid, block, np.linalg.svd(block, compute_uv=False)


@pytest.mark.parametrize("tol", [1e-4, 1e-7, 1e-10])
def test_aca_touching_block_meets_tolerance(touching_block, tol: float) -> None:
    # the two halves of the root of a 2D tree touch along a line: the hard case for ACA
    xs, mid, block, s = touching_block
    checks = np.random.default_rng(0).integers(0, mid, size=(8, 8))
    a, b, gram_a, gram_b, _ = aca_compiled(1, xs[:mid], xs[mid:], 0.0, 1.0, 0, 0.5 * tol,
                                           mid, checks, ACA_BLOCK, np.empty(0))
    np.testing.assert_allclose(gram_a, a @ a.T, rtol=1e-12, atol=1e-12 * np.abs(gram_a).max())
    low = recompress(a, b, tol=0.5 * tol, gram_a=gram_a, gram_b=gram_b)
    err = np.linalg.norm(block - low.u @ low.v.T) / np.linalg.norm(block)
    assert err <= 3 * tol, err  # the ACA half of the bound is an estimate (random rows)
    # optimal rank for the same Frobenius error (s: the block's singular values)
    tail = np.sqrt(np.cumsum((s * s)[::-1])[::-1])
    optimal = int(np.count_nonzero(tail > tol * np.linalg.norm(s)))
    assert low.rank <= 1.5 * optimal + 5, (low.rank, optimal)


@pytest.mark.parametrize("decay", [0.0, 4.0, 12.0])
def test_thin_qr(decay: float) -> None:
    # well conditioned, badly scaled columns, and numerically rank-deficient inputs
    rng = np.random.default_rng(1)
    x = rng.standard_normal((500, 40)) @ np.diag(np.logspace(0, -decay, 40))
    x[:, 5] = x[:, 3] * (1 + 1e-15) if decay > 10 else x[:, 5]
    q, r = thin_qr(x)
    np.testing.assert_allclose(q.T @ q, np.eye(40), atol=1e-12)
    np.testing.assert_allclose(q @ r, x, atol=1e-13 * np.abs(x).max())
    assert np.allclose(np.tril(r, -1), 0.0)


@pytest.mark.parametrize("condition", [1e4, 1e7, 1e10, 1e13])
def test_thin_qr_on_ill_conditioned_columns(condition: float,
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    # Columns that are nearly dependent (not just badly scaled): X = U diag(s) V' with
    # s log-spaced to 1/condition. CholeskyQR2 holds up to cond ~ 1e7, shifted
    # CholeskyQR3 beyond (Fukaya et al., SIAM J. Sci. Comput. 42 (2020) A477, Thm 5.3:
    # orthogonality and residual of order eps); numpy's Householder QR is the reference
    # for the residual, and must not be what thin_qr fell back to.
    rng = np.random.default_rng(2)
    m, k = 3000, 80
    u, _ = np.linalg.qr(rng.standard_normal((m, k)))
    v, _ = np.linalg.qr(rng.standard_normal((k, k)))
    x = (u * np.logspace(0, -np.log10(condition), k)) @ v.T
    q_house, r_house = np.linalg.qr(x)
    residual_house = np.linalg.norm(q_house @ r_house - x) / np.linalg.norm(x)

    def no_householder(*args, **kwargs):
        raise AssertionError("thin_qr fell back to Householder QR")

    monkeypatch.setattr(np.linalg, "qr", no_householder)
    q, r = thin_qr(x)
    monkeypatch.undo()
    assert np.linalg.norm(q.T @ q - np.eye(k)) < 1e-12
    residual = np.linalg.norm(q @ r - x) / np.linalg.norm(x)
    assert residual < max(1e-14, 10 * residual_house), (residual, residual_house)
    assert np.allclose(np.tril(r, -1), 0.0)


# -- the tolerance controls the likelihood error (issue 11) ------------------------------

def _median_loglik_errors(n: int, tols: tuple[float, ...], seeds: int
                          ) -> dict[str, np.ndarray]:
    """Median over ACA seeds of |L_hodlr - L_dense| for two data vectors on one problem.

    The dense side is the certified LAPACK Cholesky of ``harness.references``
    (independent code: assembled entry by entry, factored by dpotrf, DPOT01-style
    certificate); L = -1/2 y'S^-1 y - 1/2 log det S - n/2 log 2 pi (Rasmussen and
    Williams, *Gaussian Processes for Machine Learning*, 2006, eq. 2.30).
    """
    from harness.references import DenseCholesky

    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    rng = np.random.default_rng(0)
    points = uniform(n, 2, rng=rng)
    dense = DenseCholesky(points, kernel)
    data = {"white noise": rng.standard_normal(n),  # hardest case for the quadratic term
            "smooth field": dense.apply_sqrt(rng.standard_normal(n))}  # a draw from the model

    def loglik(quad: float, logdet: float) -> float:
        return -0.5 * quad - 0.5 * logdet - 0.5 * n * np.log(2 * np.pi)

    exact = {k: loglik(float(y @ dense.solve(y)), dense.logdet()) for k, y in data.items()}
    errs: dict[str, list[list[float]]] = {k: [] for k in data}
    for tol in tols:
        rows: dict[str, list[float]] = {k: [] for k in data}
        for seed in range(seeds):
            f = factorize(points, kernel, None, tol=tol, rng=seed)
            for k, y in data.items():
                rows[k].append(abs(loglik(float(y @ f.solve(y)), f.logdet()) - exact[k]))
        for k in data:
            errs[k].append(rows[k])
    return {k: np.median(np.array(v), axis=1) for k, v in errs.items()}


def _check_monotone(med: dict[str, np.ndarray], tols: tuple[float, ...]) -> None:
    for name, e in med.items():
        assert np.all(np.isfinite(e)) and e.size == len(tols), (name, e)
        # strictly smaller median error at every tighter tolerance, by at least 3x per
        # factor 100 in tol (the error is linear in the compression error: 100x is typical)
        assert np.all(e[1:] < e[:-1] / 3.0), f"{name}: median |dL| {e} at tol {tols}"


def test_loglik_error_follows_tolerance_down_to_1e12() -> None:
    # n = 3,072 (the root block takes about ten blocked-ACA steps), 3 seeds; ~15 s
    tols = (1e-4, 1e-6, 1e-8, 1e-10, 1e-12)
    med = _median_loglik_errors(3072, tols, seeds=3)
    _check_monotone(med, tols)
    # at 1e-12 the whole error is far below a nat on both data vectors (measured
    # 6.5e-7 and 8e-10 nat at n = 4,096; the ceilings leave 10x room)
    assert med["white noise"][-1] < 1e-5, med
    assert med["smooth field"][-1] < 1e-7, med


@pytest.mark.slow
def test_loglik_error_follows_tolerance_n16000_five_seeds(request: pytest.FixtureRequest
                                                          ) -> None:
    # the setting: n = 16,000, 5 ACA seeds, white noise and a smooth field
    # (about 6 minutes on 2 loaded cores; runs only when selected with -m slow)
    if "slow" not in (request.config.getoption("markexpr") or ""):
        pytest.skip("n = 16,000 x 5 seeds: select with -m slow")
    tols = (1e-6, 1e-8, 1e-10)
    _check_monotone(_median_loglik_errors(16000, tols, seeds=5), tols)


def test_factorization_is_exact_for_the_compressed_matrix() -> None:
    # The likelihood error is the compression's alone: W W' reproduces the compressed
    # Sigma~ (from its own blocks) to rounding. Iterative refinement on Sigma~ gives
    # Sigma~^-1 y to working precision (Higham, *Accuracy and Stability of Numerical
    # Algorithms*, 2002, sec. 12.1); the factor's own solve must agree with it.
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    rng = np.random.default_rng(3)
    points = uniform(4096, 2, rng=rng)
    y = rng.standard_normal(4096)
    for tol in (1e-6, 1e-10):
        f = factorize(points, kernel, None, tol=tol, rng=0)
        x = f.solve(y)
        refined = x.copy()
        for _ in range(3):
            refined += f.solve(y - f.matvec(refined))
        quad = float(y @ refined)
        assert abs(float(y @ x) - quad) <= 1e-11 * abs(quad), (tol, float(y @ x), quad)


def test_one_basis_helper_orthogonality_and_thresholds() -> None:
    from harness.solvers.hodlr.orth import apply_basis, basis_factor, rcond_for

    eps = np.finfo(float).eps
    # the two first-order bounds of Cholesky QR (Yamamoto et al., ETNA 44, 2015)
    assert rcond_for(orthogonality=1e-2, rounding=1.0) == pytest.approx(np.sqrt(eps / 1e-2))
    assert rcond_for(orthogonality=1.0, rounding=1e-12) == pytest.approx(eps / 1e-12)
    assert rcond_for(orthogonality=1e-30, rounding=1.0) == 0.5
    rng = np.random.default_rng(2)
    x = rng.standard_normal((400, 30)) @ np.triu(rng.standard_normal((30, 30)))
    x[:, 7] = x[:, 6] + 1e-9 * x[:, 5]  # cond ~ 1e9: needs an explicit Q
    for min_rcond in (1e-12, 0.5):
        basis = basis_factor(x, min_rcond=min_rcond)
        t = rng.standard_normal((30, 4))
        qt = apply_basis(x, basis, t)
        # cond ~ 1e9 passes rcond 1e-12 implicitly, but not 0.5: then Cholesky QR
        # passes form Y, and Q = Y S^-1 must be orthonormal to about 4 eps (S's
        # rcond >= 0.5; Yamamoto et al. 2015) and reproduce X = Q R
        assert (basis.explicit is None) == (min_rcond < 1e-6)
        if basis.explicit is not None:
            q = apply_basis(x, basis, np.eye(30))
            np.testing.assert_allclose(q.T @ q, np.eye(30), atol=1e-13)
            np.testing.assert_allclose(q @ basis.r, x, atol=1e-13 * np.abs(x).max())
            # Q t has the norm of t when Q has orthonormal columns
            np.testing.assert_allclose(np.linalg.norm(qt, axis=0), np.linalg.norm(t, axis=0),
                                       rtol=1e-12)
    wide = rng.standard_normal((5, 8))
    basis = basis_factor(wide, min_rcond=0.5)
    np.testing.assert_allclose(apply_basis(wide, basis, np.eye(5)) @ basis.r, wide)


def test_basis_factor_stops_its_passes_when_the_next_may_stay_implicit() -> None:
    # X of condition 1e7 (rcond of its scaled Gram factor below a threshold of 1e-4):
    # one explicit Cholesky QR pass leaves Y of condition ~ 1 + eps cond^2 ~ 1 + 1e-2,
    # whose Gram factor passes, so Q = Y S^-1 stays implicit (CholeskyQR2 without its
    # last solve; Yamamoto et al., ETNA 44, 2015). Q must still be orthonormal to the
    # threshold's bound eps / rcond^2 and give X = Q R (checked against numpy's
    # Householder QR up to column signs).
    from harness.solvers.hodlr.orth import apply_basis, basis_factor

    rng = np.random.default_rng(8)
    u, _ = np.linalg.qr(rng.standard_normal((3000, 60)))
    v, _ = np.linalg.qr(rng.standard_normal((60, 60)))
    x = (u * np.logspace(0, -7, 60)) @ v.T
    basis = basis_factor(x, min_rcond=1e-4)
    assert basis.explicit is not None
    assert not np.allclose(basis.last, np.eye(60))  # the last pass stayed implicit
    q = apply_basis(x, basis, np.eye(60))
    eps = np.finfo(float).eps
    assert np.abs(q.T @ q - np.eye(60)).max() <= 100 * eps / 1e-4**2
    np.testing.assert_allclose(q @ basis.r, x, atol=1e-13)
    _, r_householder = np.linalg.qr(x)  # R is unique up to the signs of its rows
    np.testing.assert_allclose(np.abs(basis.r), np.abs(r_householder), rtol=1e-6,
                               atol=1e-12)


def test_row_block_products_equal_numpy() -> None:
    # The in-place dgemm calls on row blocks of a C-ordered array against NumPy's
    # products of the same blocks (the reference: numpy.matmul on copies).
    from harness.solvers.hodlr.row_blocks import cross_product, subtract_product

    rng = np.random.default_rng(5)
    a = rng.standard_normal((300, 90))
    rows, own, ancestors = slice(40, 217), slice(60, 83), slice(0, 57)
    np.testing.assert_allclose(cross_product(a, rows, own, ancestors),
                               a[rows, own].T @ a[rows, ancestors], rtol=1e-13, atol=1e-12)
    coefficients = rng.standard_normal((23, 57))
    expected = a.copy()
    expected[rows, ancestors] -= a[rows, own] @ coefficients
    subtract_product(a, rows, ancestors, own, coefficients)
    np.testing.assert_allclose(a, expected, rtol=1e-13, atol=1e-12)
    empty = cross_product(a, slice(5, 5), own, ancestors)
    assert empty.shape == (23, 57) and not empty.any()
    with pytest.raises(ValueError, match="overlap"):
        subtract_product(a, rows, slice(50, 70), own, rng.standard_normal((23, 20)))
    with pytest.raises(ValueError, match="C-ordered"):
        cross_product(np.asfortranarray(a), rows, own, ancestors)
    with pytest.raises(ValueError, match="not a block"):
        cross_product(a, slice(0, 400), own, ancestors)


def test_inverse_maps_equal_the_substitutions() -> None:
    # W_p^-1 and W_p'^-1 applied through the two r x r maps equal the step-by-step
    # triangular substitutions of the node factor's definition (arXiv 1405.0223,
    # Lemma 3.1: t = R^-T U' x, w = L_22^-1 (t_b - G' t_a), x_b -= U_b R_b^-1 (t_b - w)),
    # written out here with SciPy's solve_triangular; and W_p W_p^-1 = I with W_p from
    # ``_forward_update``.
    from harness.solvers.hodlr.factor import (
        NodeFactor,
        _forward_update,
        _inverse_transpose_update,
        _inverse_update,
    )

    rng = np.random.default_rng(6)
    r, m = 12, 40
    ua, ub = rng.standard_normal((m, r)), rng.standard_normal((m, r))
    ra, rb = np.linalg.qr(ua, mode="r"), np.linalg.qr(ub, mode="r")
    g = 0.3 * rng.standard_normal((r, r)) / np.sqrt(r)
    l22 = np.linalg.cholesky(np.eye(r) - g.T @ g)
    f = NodeFactor.build(r, g, l22, ra, rb)
    xa, xb = rng.standard_normal((m, 7)), rng.standard_normal((m, 7))

    def qt(u, rr, x):
        return sl.solve_triangular(rr, u.T @ x, trans="T", lower=False)

    def q(u, rr, t):
        return u @ sl.solve_triangular(rr, t, lower=False)

    ta, tb = qt(ua, ra, xa), qt(ub, rb, xb)
    w = sl.solve_triangular(l22, tb - g.T @ ta, lower=True)
    expected_b = xb - q(ub, rb, tb - w)
    got_a, got_b = xa.copy(), xb.copy()
    _inverse_update(f, ua, ub, got_a, got_b)
    np.testing.assert_array_equal(got_a, xa)
    np.testing.assert_allclose(got_b, expected_b, rtol=1e-12, atol=1e-12)
    _forward_update(f, ua, ub, got_a, got_b)
    np.testing.assert_allclose(got_b, xb, rtol=1e-12, atol=1e-12)
    # transpose: w = L_22^-T t_b, x_a -= Q_a G w, x_b -= Q_b (t_b - w)
    w = sl.solve_triangular(l22, tb, lower=True, trans="T")
    expected_a, expected_b = xa - q(ua, ra, g @ w), xb - q(ub, rb, tb - w)
    got_a, got_b = xa.copy(), xb.copy()
    _inverse_transpose_update(f, ua, ub, got_a, got_b)
    np.testing.assert_allclose(got_a, expected_a, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(got_b, expected_b, rtol=1e-12, atol=1e-12)


_SPLIT = r"""
import sys
import numpy as np
from numba.core import event
from harness.solvers.hodlr import aca
from harness.solvers.hodlr.aca_compile import SHARES, prepare_aca

class Seen(event.Listener):
    def __init__(self):
        self.names = []
    def on_start(self, ev):
        self.names.append(ev.data["dispatcher"].py_func.__module__ + "."
                          + ev.data["dispatcher"].py_func.__name__)
    def on_end(self, ev):
        pass

xs = np.random.default_rng(0).random((200, 2))
checks = np.zeros((2, 8), dtype=np.int64)
if sys.argv[1] == "plain":
    from harness.model.kernels.rows import fill_block
    aca.aca_compiled(1, xs, xs + 2.0, 0.0, 1.0, 0, 1e-6, 100, checks, 16, np.empty(10))
    fill_block(1, xs, xs, 0.0, 1.0, 0, np.empty((200, 200)))
    for share in SHARES.values():
        for kernel, signature in share:
            print(kernel.py_func.__name__, tuple(signature) in kernel.signatures)
else:
    prepare_aca()
    seen = Seen()
    with event.install_listener("numba:compile", seen):
        aca.aca_compiled(1, xs, xs + 2.0, 0.0, 1.0, 0, 1e-6, 100, checks, 16, np.empty(10))
    print(" ".join(name for name in seen.names if name.startswith("harness.")))
"""


def _fresh_cache_run(mode: str, cache) -> str:
    import os
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", _SPLIT, mode], capture_output=True, text=True,
                          env={**os.environ, "NUMBA_CACHE_DIR": str(cache)}, timeout=600,
                          check=False)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_the_split_compilation_names_the_signatures_the_kernel_uses(tmp_path):
    # harness.solvers.hodlr.aca_compile: each share's signature is the one a plain
    # compilation of aca_compiled (and of the leaves' fill) produces
    lines = _fresh_cache_run("plain", tmp_path / "plain").split("\n")
    found = dict(line.split() for line in lines if line)
    assert found and all(flag == "True" for flag in found.values()), found


def test_after_the_split_compilation_the_kernel_compiles_no_callee(tmp_path):
    # The two shares leave only aca_compiled itself to compile: every callee is loaded
    # from numba's cache (the helper's share) or was compiled in this process (the main's)
    compiled = _fresh_cache_run("split", tmp_path / "split").split()
    assert compiled == ["harness.solvers.hodlr.aca.aca_compiled"], compiled


def test_level_nodes_run_in_contiguous_runs_each_node_once():
    # One task per thread, each a run of consecutive nodes (parallel module docstring):
    # every node once, and what each thread did is one or more whole runs, in order.
    import threading

    for count in (2, 7, 781):
        seen: list[tuple[int, int]] = []

        def record(k: int, seen: list[tuple[int, int]] = seen) -> None:
            seen.append((threading.get_ident(), k))

        with node_pool(2) as pool:
            assert pool is not None and pool.threads == 2
            for_each_node(pool, record, list(range(count)))
        assert sorted(k for _, k in seen) == list(range(count))
        by_thread: dict[int, list[int]] = {}
        for ident, k in seen:
            by_thread.setdefault(ident, []).append(k)
        assert 1 <= len(by_thread) <= 2
        for done in by_thread.values():
            assert done == sorted(done)


def test_blocks_map_in_runs_of_enough_rows_in_order():
    # Source: parallel.map_in_runs's contract (module docstring): the results keep the
    # items' order; with a pool, each task is a run of consecutive items covering at
    # least MIN_TASK_ROWS rows (but the last), so a big block is a task of its own; without
    # a pool, everything runs on the calling thread.
    import threading

    from harness.solvers.hodlr.parallel import MIN_TASK_ROWS, map_in_runs

    rows = [4 * MIN_TASK_ROWS] + [MIN_TASK_ROWS // 8] * 35  # one big block, many small
    tasks: list[tuple[int, int]] = []

    def work(k: int) -> tuple[int, int]:
        return threading.get_ident(), 2 * k

    with node_pool(2) as pool:
        assert pool is not None
        original = pool.executor.map

        def counted_map(fn, runs):
            runs = list(runs)
            tasks.extend((run[0], len(run)) for run in runs)
            return original(fn, runs)

        pool.executor.map = counted_map  # type: ignore[method-assign]
        done = map_in_runs(pool, work, range(len(rows)), rows=lambda k: rows[k])
    assert [v for _, v in done] == [2 * k for k in range(len(rows))]
    assert tasks[0] == (0, 1)  # the big block alone
    assert [length for _, length in tasks[1:]] == [8, 8, 8, 8, 3]
    assert [start for start, _ in tasks] == [0, 1, 9, 17, 25, 33]
    inline = map_in_runs(None, work, range(5), rows=lambda k: rows[k])
    assert {ident for ident, _ in inline} == {threading.get_ident()}
    assert [v for _, v in inline] == [0, 2, 4, 6, 8]


def test_thin_factorizations_run_their_products_on_one_thread():
    # Source: the rule of harness.solvers.hodlr.solver.serial_if_thin; the result does not
    # depend on the thread count (parallel module docstring), so both give the same bits.
    from harness.solvers.hodlr.solver import SERIAL_MAX_RANK

    rng = np.random.default_rng(2)
    kernel = Matern32(variance=1.0, lengthscale=0.5, nugget=0.01)
    line = np.sort(rng.uniform(0.0, 40.0, 3000))[:, None]
    thin = factorize(line, kernel, tol=1e-6, rng=0, threads=2)
    assert max(level.max for level in thin.ranks) <= SERIAL_MAX_RANK
    assert thin._threads == 1
    one = factorize(line, kernel, tol=1e-6, rng=0, threads=1)
    b = rng.standard_normal((3000, 5))
    assert np.array_equal(thin.solve(b), one.solve(b)) and thin.logdet() == one.logdet()
    plane = rng.random((3000, 2))
    wide = factorize(plane, Matern32(variance=1.0, lengthscale=0.3, nugget=0.01),
                     tol=1e-8, rng=0, threads=2)
    assert max(level.max for level in wide.ranks) > SERIAL_MAX_RANK and wide._threads == 2
