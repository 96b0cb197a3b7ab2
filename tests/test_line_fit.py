"""The exact fit on a line (Kalman filter likelihood, L-BFGS-B and a Newton polish with
the observed information) against the dense MLE, and the plan that takes it."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from harness.check import CheckOptions, run_check, validate
from harness.check.datafile import observations_from_arrays
from harness.check.fit_engines import StateSpaceEngine, positive_definite
from harness.check.fit_plan import DENSE_FIT_MAX_N, line_applies, plan_fit
from harness.check.fitting import data_scale, default_bounds, default_starts, fit_dense
from harness.check.line_fit import fit_on_line
from harness.model.kernels import make_kernel
from harness.references import dense_evaluate

TEMPLATE = make_kernel("matern32", {"lengthscale": 1.0, "nugget": 1.0})


def _line_field(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """n points uniform on [0, 20], a smooth signal plus noise."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 20.0, (n, 1))
    y = 3.0 + np.sin(x[:, 0]) + 0.5 * np.cos(2.3 * x[:, 0]) + 0.3 * rng.standard_normal(n)
    return x, y


def test_positive_definite_keeps_a_definite_matrix_and_flips_negative_eigenvalues():
    # Source: Nocedal and Wright 2006, sec. 3.4 (eigenvalue modification), closed form.
    q, _ = np.linalg.qr(np.random.default_rng(0).standard_normal((3, 3)))
    definite = (q * [3.0, 2.0, 0.5]) @ q.T
    same, modified = positive_definite(definite)
    assert not modified and np.allclose(same, definite)
    fixed, modified = positive_definite((q * [3.0, -2.0, 0.5]) @ q.T)
    assert modified
    np.testing.assert_allclose(np.linalg.eigvalsh(fixed), [0.5, 2.0, 3.0], rtol=1e-12)


@pytest.mark.parametrize("family", ["exponential", "matern32", "matern52"])
def test_line_engine_score_and_information_match_the_dense_likelihood(family):
    # Source: the dense Cholesky likelihood (R&W 2006 eq. 5.9 score, itself checked
    # against scikit-learn in test_fitting.py); the observed information against scipy's
    # finite differences (scipy.optimize.approx_fprime) of that dense score.
    x, y = _line_field(300, 1)
    kernel = make_kernel(family, {"variance": 0.8, "lengthscale": 1.3, "nugget": 0.09})
    engine = StateSpaceEngine(x, y, kernel, mean="constant")
    ev = engine(kernel.theta, fisher=True)
    dense = dense_evaluate(x, y, kernel, mean="constant", score=True, certify=False)
    assert ev.loglik == pytest.approx(dense.loglik, abs=1e-8)
    np.testing.assert_allclose(ev.score, dense.score, rtol=1e-7, atol=1e-7)

    def dense_score(theta):
        return np.asarray(dense_evaluate(x, y, kernel.with_theta(theta), mean="constant",
                                         score=True, certify=False).score)

    hessian = optimize.approx_fprime(kernel.theta, dense_score, 1e-5)
    observed = -0.5 * (hessian + hessian.T)
    np.testing.assert_allclose(engine.observed_information(kernel.theta), observed,
                               rtol=1e-4, atol=1e-3 * np.abs(observed).max())
    if not engine.modified_at(kernel.theta):
        np.testing.assert_allclose(ev.fisher, 0.5 * (engine.observed_information(
            kernel.theta) + engine.observed_information(kernel.theta).T), rtol=1e-12)


@pytest.mark.parametrize("seed", [3, 4])
def test_fit_on_the_line_is_the_dense_mle(seed):
    # Source: harness's dense fit (fit_dense, checked against scikit-learn and an
    # independent scipy MLE elsewhere): the same maximum to 1e-6 nat and 1e-3 SE, the SEs
    # from the observed information within 25% of the expected information's (covaudit's
    # choice; Efron and Hinkley 1978 for their agreement at the MLE).
    x, y = _line_field(800, seed)
    scale = data_scale(x, y, mean="constant")
    kw = dict(mean="constant", starts=default_starts(TEMPLATE, scale),
              bounds=default_bounds(TEMPLATE, scale))
    line = fit_on_line(x, y, TEMPLATE, **kw)
    dense = fit_dense(x, y, TEMPLATE, **kw)
    assert line.converged and line.engine == "statespace"
    se = np.sqrt(np.diag(np.linalg.inv(np.asarray(dense.fisher))))
    assert abs(line.loglik - dense.loglik) <= 1e-6
    assert np.max(np.abs(line.theta - dense.theta) / se) <= 1e-3
    line_se = np.sqrt(np.diag(np.linalg.inv(np.asarray(line.fisher))))
    np.testing.assert_allclose(line_se, se, rtol=0.25)


def test_plan_takes_the_line_fit_only_on_a_line_above_the_dense_limit():
    # Source: the plan's contract (harness.check.fit_plan): dense within its limit, the
    # exact line fit beyond it where the state-space reference applies.
    big = 64 * 2 ** 30
    kw = dict(family="matern32", time_budget=60.0, memory_budget=big)
    assert line_applies(1, TEMPLATE) and not line_applies(2, TEMPLATE)
    assert not line_applies(1, make_kernel("gaussian", {"lengthscale": 1.0}))
    assert plan_fit(DENSE_FIT_MAX_N, 3, on_line=True, **kw).engine == "dense"
    line = plan_fit(DENSE_FIT_MAX_N + 1, 3, on_line=True, **kw)
    assert line.engine == "statespace" and "Kalman" in line.reason
    assert plan_fit(DENSE_FIT_MAX_N + 1, 3, **kw).engine == "vecchia"


def test_check_on_a_line_fits_exactly_and_reports_the_exact_loglik():
    # Source: the check's record of its fit (check.json "fit"), against the dense MLE's
    # log-likelihood at the same data.
    x, y = _line_field(700, 5)
    data = validate(observations_from_arrays(x, y, source="synthetic"))
    options = CheckOptions(kernel="matern32", tolerances=(1e-8,), solver_seeds=1,
                           refit=False, dense_fit_max_n=0)
    result = run_check(data, options, source="synthetic")
    assert result.fit["plan"]["engine"] == "statespace"
    assert result.fit["engine"] == "statespace" and result.fit_converged
    scale = data_scale(x, y, mean=options.mean)
    dense = fit_dense(x, y, TEMPLATE, mean=options.mean,
                      starts=default_starts(TEMPLATE, scale),
                      bounds=default_bounds(TEMPLATE, scale))
    assert result.loglik == pytest.approx(dense.loglik, abs=1e-6)
    assert any("observed information" in note for note in result.notes)
