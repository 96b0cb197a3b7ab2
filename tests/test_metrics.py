"""Metric formulas against closed forms and independent computations."""

from __future__ import annotations

import math

import numpy as np
import pytest

from harness.audit.metrics import (
    FisherError,
    factorization_error,
    kriging_errors,
    microergodic_shift,
    power_norm,
    scalar_error,
    score_errors,
    solve_errors,
    trace_errors,
)

NAMES = ("log_variance", "log_lengthscale", "log_nugget")


def test_scalar_error_closed_form():
    e = scalar_error(10.5, 10.0)
    assert (e.signed, e.absolute, e.relative) == (0.5, 0.5, 0.05)
    assert math.isnan(scalar_error(1.0, 0.0).relative)


def test_score_errors_with_diagonal_fisher_closed_form():
    # F = diag(f): dtheta_i = e_i / f_i, SE_i = 1 / sqrt(f_i), so shift_se_i = e_i / sqrt(f_i)
    # = fisher_units_i, and 1/2 dtheta' F dtheta = 1/2 sum e_i^2 / f_i
    # (harness/audit/metrics/score_errors.py).
    f = np.array([4.0, 25.0, 100.0])
    g = np.array([1.0, -2.0, 3.0])
    e = np.array([0.2, -0.5, 1.0])
    out = score_errors(g + e, g, np.diag(f), NAMES)
    np.testing.assert_allclose(out.fisher_units, e / np.sqrt(f))
    np.testing.assert_allclose(out.shift, e / f)
    np.testing.assert_allclose(out.shift_se, e / np.sqrt(f))
    assert out.shift_nats == pytest.approx(0.5 * np.sum(e ** 2 / f))
    assert out.relative_norm == pytest.approx(np.linalg.norm(e) / np.linalg.norm(g))
    flat = out.to_dict("score")
    assert flat["score_shift_se_max"] == pytest.approx(np.max(np.abs(e / np.sqrt(f))))


def test_score_shift_matches_an_independent_cholesky_computation():
    rng = np.random.default_rng(3)
    a = rng.standard_normal((3, 3))
    f = a @ a.T + 3 * np.eye(3)
    e = rng.standard_normal(3)
    out = score_errors(e, np.zeros(3), f, NAMES)
    chol = np.linalg.cholesky(f)
    w = np.linalg.solve(chol, e)               # 1/2 e' F^-1 e = 1/2 ||L^-1 e||^2
    assert out.shift_nats == pytest.approx(0.5 * w @ w)
    np.testing.assert_allclose(f @ out.shift, e)
    cov = np.linalg.inv(f)
    np.testing.assert_allclose(out.shift_se, out.shift / np.sqrt(np.diag(cov)))


def test_score_errors_refuse_a_fisher_matrix_that_is_not_positive_definite():
    with pytest.raises(FisherError, match="positive definite"):
        score_errors(np.ones(2), np.zeros(2), np.array([[1.0, 2.0], [2.0, 1.0]]), NAMES[:2])


def test_microergodic_shift_closed_form():
    # Zhang (2004): c = s2 / l^(2 nu); a = (1, -2 nu, 0). With F diagonal,
    # a' F^-1 a = 1/F_00 + 4 nu^2 / F_11.
    nu = 1.5
    f = np.diag([4.0, 9.0, 16.0])
    dtheta = np.array([0.1, 0.02, -0.3])
    out = microergodic_shift(dtheta, f, NAMES, nu)
    assert out.shift == pytest.approx(0.1 - 2 * nu * 0.02)
    assert out.standard_error == pytest.approx(math.sqrt(1 / 4 + 4 * nu ** 2 / 9))
    assert out.shift_se == pytest.approx(out.shift / out.standard_error)
    with pytest.raises(ValueError, match="isotropic"):
        microergodic_shift(dtheta, f, ("log_variance", "log_lengthscale_1", "log_nugget"), nu)


def test_trace_errors_and_z_scores():
    out = trace_errors(np.array([10.5, 20.0]), np.array([10.0, 20.0]), np.array([0.25, 0.0]),
                       NAMES[:2])
    np.testing.assert_allclose(out.error, [0.5, 0.0])
    assert out.z[0] == pytest.approx(2.0)
    assert math.isnan(out.z[1])  # zero standard error (an exact trace): no z-score
    assert out.to_dict()["trace_rel_error_max"] == pytest.approx(0.05)


def test_power_norm_matches_the_spectral_norm():
    # numpy.linalg.norm(E, 2) (an SVD) is the independent value; a spectral gap of 2x
    # makes 60 block power steps converge to many digits.
    rng = np.random.default_rng(0)
    q, _ = np.linalg.qr(rng.standard_normal((80, 80)))
    eig = np.concatenate([[-5.0], np.linspace(-2.5, 2.5, 79)])
    e = (q * eig) @ q.T
    est = power_norm(lambda b: e @ b, 80, rng=rng, iterations=60)
    assert est.value == pytest.approx(np.linalg.norm(e, 2), rel=1e-8)


def test_factorization_error_of_a_known_perturbation():
    # Sigma with eigenvalues 100 and 1..50 (a gap, so power iteration converges fast).
    rng = np.random.default_rng(1)
    q, _ = np.linalg.qr(rng.standard_normal((60, 60)))
    sigma = (q * np.concatenate([[100.0], np.linspace(1, 50, 59)])) @ q.T
    u = rng.standard_normal(60)
    u /= np.linalg.norm(u)
    approx = sigma - 1e-3 * np.outer(u, u)   # ||Sigma - Sigma~||_2 = 1e-3 exactly
    out = factorization_error(lambda b: sigma @ b, lambda b: approx @ b, 60, rng=rng,
                              iterations=30)
    assert out.difference_norm == pytest.approx(1e-3, rel=1e-10)
    assert out.relative == pytest.approx(1e-3 / 100.0, rel=1e-8)


def test_solve_errors_backward_error_closed_form():
    # A = diag(1, 2), b = (1, 2): x = (1, 1). x~ = (1.1, 1): r = b - A x~ = (-0.1, 0);
    # Rigal-Gaches: ||r|| / (||A|| ||x~|| + ||b||) with ||A||_2 = 2.
    a = np.diag([1.0, 2.0])
    b = np.array([1.0, 2.0])
    x_approx = np.array([1.1, 1.0])
    out = solve_errors(x_approx, np.array([1.0, 1.0]), b - a @ x_approx, b, 2.0)
    assert out.forward == pytest.approx(0.1 / math.sqrt(2))
    assert out.residual == pytest.approx(0.1 / math.sqrt(5))
    assert out.backward == pytest.approx(0.1 / (2 * math.sqrt(2.21) + math.sqrt(5)))


def test_kriging_errors_closed_form():
    out = kriging_errors(np.array([1.1, 2.0]), np.array([4.4, 1.0]), np.array([1.0, 2.2]),
                         np.array([4.0, 1.0]))
    # |dm| / sqrt(v) = (0.1 / 2, 0.2 / 1); |dv| / v = (0.1, 0)
    assert out.mean_sd_max == pytest.approx(0.2)
    assert out.mean_sd_rms == pytest.approx(math.sqrt((0.05 ** 2 + 0.2 ** 2) / 2))
    assert out.var_rel_max == pytest.approx(0.1)
    assert out.points == 2
