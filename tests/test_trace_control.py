"""Shared probes against the Kalman reference (issue 22, item 6): exact O(n) products on a
line, the exact side of the control, its combination with Hutch++, and ``check`` on a
line resolving the parameter shift."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.linalg as sl
import sklearn.gaussian_process.kernels as sk

from harness.audit.line_trace_control import line_trace_control
from harness.audit.shared_probes import (
    merge,
    own_score_error,
    shared_score_error,
    solver_quadratics,
)
from harness.infra.exit_codes import ExitCode
from harness.likelihood import evaluate_likelihood
from harness.likelihood.trace.control import TraceControl, combine_estimates, probe_quadratics
from harness.linalg.rademacher import rademacher_probes
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky
from harness.references.line_products import (
    LineProductError,
    LineProducts,
    lengthscale_polynomial,
    matern_polynomial,
)
from harness.solvers.fallback import adapt
from harness.solvers.registry import resolve_solver
from tests.test_statespace_kriging import FIXED, _line_file, _plane_file, _run

NU = {"exponential": 0.5, "matern32": 1.5, "matern52": 2.5}


def test_matern_polynomials_match_the_closed_forms():
    # Source: Rasmussen and Williams 2006, eq. 4.17: 1 + s and 1 + s + s^2 / 3.
    np.testing.assert_allclose(matern_polynomial(0), [1.0])
    np.testing.assert_allclose(matern_polynomial(1), [1.0, 1.0])
    np.testing.assert_allclose(matern_polynomial(2), [1.0, 1.0, 1.0 / 3.0])
    # d/d log l of e^-s (1 + s) is e^-s s^2 (s = sqrt(3) r / l): s (P - P') = s^2.
    np.testing.assert_allclose(lengthscale_polynomial(matern_polynomial(1)), [0.0, 0.0, 1.0])


@pytest.mark.parametrize("family", sorted(NU))
def test_line_products_equal_sklearn_and_the_kernels_derivatives(family):
    # Source: scikit-learn's Matern kernel (covariance) and its eval_gradient (the
    # derivative in log length scale), on unsorted points with a nugget.
    rng = np.random.default_rng(4)
    x = rng.uniform(0.0, 15.0, 400)
    kernel = make_kernel(family, {"variance": 1.7, "lengthscale": 0.8, "nugget": 0.03})
    skl = sk.ConstantKernel(1.7) * sk.Matern(length_scale=0.8, nu=NU[family])
    cov, grad = skl(x[:, None], eval_gradient=True)     # grad: d/d log c, d/d log l
    v = rng.standard_normal((400, 3))
    products = LineProducts(x, kernel)
    np.testing.assert_allclose(products.matvec(v), cov @ v + 0.03 * v, rtol=0, atol=1e-11)
    np.testing.assert_allclose(products.derivative_matvec(0, v), grad[:, :, 0] @ v,
                               rtol=0, atol=1e-11)
    np.testing.assert_allclose(products.derivative_matvec(1, v), grad[:, :, 1] @ v,
                               rtol=0, atol=1e-11)
    np.testing.assert_allclose(products.derivative_matvec(2, v), 0.03 * v, rtol=0, atol=0)


def test_line_products_refuse_what_they_do_not_cover():
    with pytest.raises(LineProductError, match="line"):
        LineProducts(np.ones((5, 2)), make_kernel("matern32", {"lengthscale": 1.0}))
    with pytest.raises(LineProductError, match="half-integer"):
        LineProducts(np.arange(5.0), make_kernel("gaussian", {"lengthscale": 1.0}))


def _dense_operators(x, kernel):
    n = x.size
    factor = sl.cho_factor(kernel.covariance(x[:, None]))
    _, derivs = kernel.block_with_derivatives(x[:, None], np.arange(n), np.arange(n))
    return [sl.cho_solve(factor, d) for d in derivs]


def test_the_control_is_the_exact_operator_on_its_probes():
    # Source: scipy's dense Cholesky: tr(Sigma^-1 Sigma_i) and z' Sigma^-1 Sigma_i z,
    # within the control's stated rounding bound (plus the filter's own rounding).
    rng = np.random.default_rng(8)
    x = rng.uniform(0.0, 20.0, 500)
    kernel = make_kernel("matern32", {"variance": 1.3, "lengthscale": 0.7, "nugget": 0.02})
    z = rademacher_probes(500, 8, np.random.default_rng(1))
    control, note = line_trace_control(x, kernel, z)
    assert control is not None, note
    dense = _dense_operators(x, kernel)
    np.testing.assert_allclose(control.exact, [np.trace(s) for s in dense], rtol=1e-9)
    for i, s in enumerate(dense):
        truth = np.einsum("nk,nk->k", z, s @ z)
        assert np.max(np.abs(control.per_probe[i] - truth)) <= control.bound[i] + 1e-8
    assert "shared-probe control" in note and "8 probes" in note


def test_no_nugget_control_on_distinct_points_and_none_without_probes_or_when_singular():
    # Source: scipy's dense Cholesky, as above, for a kernel without a nugget.
    x = np.linspace(0.0, 10.0, 50)
    kernel = make_kernel("matern32", {"lengthscale": 1.0})
    z = rademacher_probes(50, 4, np.random.default_rng(2))
    control, note = line_trace_control(x, kernel, z)
    assert control is not None, note
    for i, s in enumerate(_dense_operators(x, kernel)):
        np.testing.assert_allclose(control.per_probe[i], np.einsum("nk,nk->k", z, s @ z),
                                   rtol=1e-8, atol=1e-8)
    control, note = line_trace_control(np.r_[x, x[:3]], kernel, np.ones((53, 4)))
    assert control is None and "singular" in note
    kernel = make_kernel("matern32", {"lengthscale": 1.0, "nugget": 0.1})
    control, note = line_trace_control(x, kernel, np.ones((50, 1)))
    assert control is None and "fewer than 2" in note


def test_combined_estimate_weighs_by_inverse_variance():
    # Closed form: equal SEs give the plain mean with SE / sqrt(2); a zero SE wins whole.
    mean, se = combine_estimates(np.array([1.0, 5.0]), np.array([2.0, 0.0]),
                                 np.array([3.0, 7.0]), np.array([2.0, 1.0]))
    np.testing.assert_allclose(mean, [2.0, 5.0])
    np.testing.assert_allclose(se, [np.sqrt(2.0), 0.0])
    mean, se = combine_estimates(np.array([0.0]), np.array([1.0]), np.array([10.0]),
                                 np.array([3.0]))
    np.testing.assert_allclose(mean, [1.0])                  # weights 9/10 and 1/10
    np.testing.assert_allclose(se, [np.sqrt(0.9)])


def test_an_exact_solver_on_shared_probes_has_no_score_error():
    # Source: the dense score with exact traces (scipy's Cholesky inside DenseCholesky)
    # as the reference; the dense factorization as the "solver": on shared probes the
    # differences vanish, so the error is 0 within the control's bound, far inside the
    # SE of the solver's own Hutch++ estimate.
    rng = np.random.default_rng(3)
    x = np.sort(rng.uniform(0.0, 30.0, 400))
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 1.5, "nugget": 0.05})
    fac = adapt(DenseCholesky(x[:, None], kernel), x[:, None], kernel)
    y = fac.apply_sqrt(rng.standard_normal(400))
    control, _ = line_trace_control(x, kernel, rademacher_probes(400, 16, rng))
    assert isinstance(control, TraceControl)
    exact = evaluate_likelihood(fac, x[:, None], y, kernel, mean="constant", trace="exact")
    np.testing.assert_allclose(control.exact, exact.trace_terms, rtol=1e-9)
    alone = evaluate_likelihood(fac, x[:, None], y, kernel, mean="constant",
                                trace="hutchpp", probes=64, rng=2)
    quadratics = solver_quadratics(fac, x[:, None], y, kernel, mean="constant",
                                   beta=exact.beta)
    shared = shared_score_error(fac, quadratics, exact.score, control, None)
    own = own_score_error(alone.score, alone.trace_stderr, exact.score,
                          np.zeros(kernel.n_params))
    np.testing.assert_allclose(shared.error, 0.0, atol=1e-6)
    assert np.all(shared.stderr < 1e-3 * own.stderr)
    merged = merge(shared, own, control)
    np.testing.assert_allclose(merged.error, shared.error, atol=1e-6)
    assert "inverse-variance" in merged.note


@pytest.mark.parametrize("reference, data, coords, source, note", [
    # Against the Kalman reference on a line the solver's score shares the audit's
    # probes with the exact side (with Hutch++ alone the shift's uncertainty was about
    # 1 SE)
    ("statespace", "line", "t", "shared-probe control", "shared with"),
    # In the plane the exact operator's own score probes are shared with the solver: its
    # trace noise cancels (with each side's probes on their own it was of order 1 SE)
    ("operator", "plane", "e,n", "exact operator's score probes",
     "shared with the exact operator"),
])
def test_check_shares_the_reference_probes_and_resolves_the_shift(tmp_path, capsys, reference,
                                                                   data, coords, source,
                                                                   note):
    # The shift's uncertainty falls far below the 0.1 SE limit, so the tight tolerance
    # is judged safe on every metric
    path = (_line_file(tmp_path, n=600) if data == "line" else _plane_file(tmp_path, n=300))
    code = _run([str(path), "--coords", coords, "--value", "z", "--tolerances", "1e-8",
                 *FIXED, "--reference", reference, "--solver-seeds", "2", "--json",
                 "--out", str(tmp_path / "o"), "--no-refit"])
    result = json.loads(capsys.readouterr().out)
    assert code == ExitCode.OK
    assert source in result["reference_by_metric"]["score"]["shared_probes"]
    (row,) = result["tolerances"]
    assert row["status"] == "safe"
    assert row["param_shift_se"]["uncertainty"] < 0.01
    assert note in row["param_shift_se"]["note"]


def test_probe_quadratics_take_the_declared_affine_form_and_match_the_dense_values():
    # Source: the definition z' Sigma^-1 Sigma_i z with numpy's dense Sigma and the
    # kernel's derivative blocks (Sigma_s2 = Sigma - tau2 I, Sigma_tau2 = tau2 I, the
    # length scale's from scikit-learn's Matern eval_gradient); the HODLR factor at tol
    # 1e-12 declares the affine forms, a plain adapter does not.
    rng = np.random.default_rng(5)
    x = np.sort(rng.uniform(0.0, 6.0, 300))[:, None]
    kernel = make_kernel("matern32", {"variance": 1.4, "lengthscale": 0.7, "nugget": 0.05})
    z = rademacher_probes(300, 6, np.random.default_rng(1))
    skl = sk.ConstantKernel(1.4) * sk.Matern(length_scale=0.7, nu=1.5)
    cov, grad = skl(x, eval_gradient=True)
    sigma = cov + 0.05 * np.eye(300)
    blocks = [cov, grad[:, :, 1], 0.05 * np.eye(300)]
    expected = np.array([np.einsum("nk,nk->k", z, np.linalg.solve(sigma, b @ z))
                         for b in blocks])
    hodlr = resolve_solver("hodlr").factorize(x, kernel, kernel.theta, tol=1e-12, rng=0)
    calls: list[int] = []
    adapted = adapt(hodlr, x, kernel)
    original = adapted.derivative_matvec

    def counting(i, v):
        calls.append(i)
        return original(i, v)

    adapted.derivative_matvec = counting  # type: ignore[method-assign]
    got = probe_quadratics(adapted, 3, z, block=4)
    np.testing.assert_allclose(got, expected, rtol=1e-8, atol=1e-8)
    assert set(calls) <= {0, 1, 2} and calls.count(1) >= 2     # the length scale, per block
    assert calls.count(0) <= 1 and calls.count(2) <= 1         # only the declaration check
    dense = probe_quadratics(adapt(DenseCholesky(x, kernel), x, kernel), 3, z)
    np.testing.assert_allclose(dense, expected, rtol=1e-9, atol=1e-9)
