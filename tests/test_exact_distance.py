"""The at-scale fit's distance to the exact MLE, from the exact score at the estimate
(``harness.check.exact_distance``).

Checked against scikit-learn's Gaussian-process log marginal likelihood and its gradient
(``GaussianProcessRegressor.log_marginal_likelihood(theta, eval_gradient=True)``, theta
the log of the constant, the length scale and the white noise: the same log parameters as
covaudit's variance, length scale and nugget) and scipy's optimizer for the exact MLE:
the one-step estimate F^-1 g from a point near the MLE lands on the MLE to second order
(Lehmann and Casella 1998, *Theory of Point Estimation*, sec. 6.4), and g' F^-1 g / 2 is
the log-likelihood gained (the quadratic model), with F the observed information from
central differences of scikit-learn's gradient.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

from harness.check.exact_distance import BEYOND, UNRESOLVED, WITHIN, exact_distance

NAMES = ("log_variance", "log_lengthscale", "log_nugget")


def _sklearn_problem(n: int = 300, seed: int = 4):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 1.0, size=(n, 2))
    kernel = (ConstantKernel(1.0, "fixed") * Matern(0.2, "fixed", nu=1.5)
              + WhiteKernel(0.05, "fixed"))
    y = rng.multivariate_normal(np.zeros(n), kernel(x))
    free = (ConstantKernel(1.0, (1e-3, 1e3)) * Matern(0.2, (1e-3, 1e3), nu=1.5)
            + WhiteKernel(0.05, (1e-5, 1e1)))
    gp = GaussianProcessRegressor(free, optimizer=None, normalize_y=False).fit(x, y)

    def loglik(theta):
        return gp.log_marginal_likelihood(theta, eval_gradient=True)

    best = scipy.optimize.minimize(lambda t: tuple(-v for v in loglik(t)),
                                   np.log([1.0, 0.2, 0.05]), jac=True, method="BFGS",
                                   options={"gtol": 1e-10})
    return loglik, best.x


def _observed_information(loglik, theta, h=1e-4):
    p = theta.size
    out = np.empty((p, p))
    for i in range(p):
        step = np.zeros(p)
        step[i] = h
        out[:, i] = -(loglik(theta + step)[1] - loglik(theta - step)[1]) / (2 * h)
    return 0.5 * (out + out.T)


def test_one_step_lands_on_the_exact_mle_and_states_the_gap():
    loglik, mle = _sklearn_problem()
    info = _observed_information(loglik, mle)
    se = np.sqrt(np.diag(np.linalg.inv(info)))
    offset = np.array([0.1, -0.08, 0.1]) * se              # a tenth of an SE away
    start = mle + offset
    value, gradient = loglik(start)
    info_start = _observed_information(loglik, start)
    found = exact_distance(gradient, np.zeros(3), info_start, param_names=NAMES,
                           tolerance_se=0.02, probes=16)
    step = np.array(found.shift_se) * np.sqrt(np.diag(np.linalg.inv(info_start)))
    # second order: the step misses the MLE by O(offset^2), here under 0.01 SE each
    assert np.all(np.abs(step + offset) <= 0.01 * se)
    assert found.loglik_gap_nat == pytest.approx(loglik(mle)[0] - value, rel=0.05)
    assert found.uncertainty_se == (0.0, 0.0, 0.0) and found.status == BEYOND


def test_statuses_and_the_probes_that_would_resolve():
    fisher = np.array([[4.0, 1.0], [1.0, 9.0]])
    names = ("a", "b")
    at_mle = exact_distance(np.zeros(2), np.full(2, 0.01), fisher, param_names=names,
                            tolerance_se=0.02, probes=16)
    assert at_mle.status == WITHIN and at_mle.probes_needed == 16
    far = exact_distance(np.array([2.0, 0.0]), np.full(2, 0.01), fisher, param_names=names,
                         tolerance_se=0.02, probes=16)
    assert far.status == BEYOND and "beyond 0.02 SE" in far.sentence()
    noisy = exact_distance(np.array([0.03, 0.0]), np.full(2, 0.1), fisher, param_names=names,
                           tolerance_se=0.02, probes=16)
    assert noisy.status == UNRESOLVED and noisy.probes_needed > 16
    assert f"from 16 probes; about {noisy.probes_needed:,} would be needed" in noisy.sentence()
    # with that many probes the score's SE falls by sqrt(16 / needed): resolved
    scaled = np.full(2, 0.1) * np.sqrt(16 / noisy.probes_needed)
    again = exact_distance(np.array([0.03, 0.0]), scaled, fisher, param_names=names,
                           tolerance_se=0.02, probes=noisy.probes_needed)
    assert again.status in (WITHIN, BEYOND)
    # the noise's share of g' F^-1 g / 2 is taken out: pure noise gives a gap near 0
    rng = np.random.default_rng(0)
    gaps = [exact_distance(rng.normal(0.0, 0.5, 2), np.full(2, 0.5), fisher,
                           param_names=names, tolerance_se=0.02, probes=16).loglik_gap_nat
            for _ in range(4000)]
    assert abs(np.mean(gaps)) < 4 * np.std(gaps) / np.sqrt(len(gaps))


def test_no_distance_without_a_finite_score_or_a_positive_definite_fisher():
    with pytest.raises(ValueError, match="not finite"):
        exact_distance(np.array([np.nan]), np.ones(1), np.eye(1), param_names=("a",),
                       tolerance_se=0.02, probes=16)
    with pytest.raises(ValueError, match="positive definite"):
        exact_distance(np.ones(2), np.ones(2), -np.eye(2), param_names=("a", "b"),
                       tolerance_se=0.02, probes=16)


def test_a_check_beyond_the_dense_score_states_the_distance():
    # A Vecchia fit with no exact refinement (the dense score over a shrunk budget) and
    # the exact operator as the reference: the check measures the distance at the
    # reference's exact score and says so in check.json's fit and notes.
    from harness.check import CheckOptions, run_check, validate
    from harness.check.datafile import observations_from_arrays

    rng = np.random.default_rng(8)
    x = rng.uniform(0.0, 10.0, size=(600, 2))
    kernel = Matern(1.5, nu=1.5)
    y = rng.multivariate_normal(np.zeros(600), kernel(x) + 0.05 * np.eye(600))
    data = validate(observations_from_arrays(x, y, source="synthetic"))
    options = CheckOptions(kernel="matern32", tolerances=(1e-8,), solver_seeds=1,
                           refit=False, dense_fit_max_n=0, pilot_n=300,
                           reference="operator", memory_budget=6 * 2**20)
    result = run_check(data, options, source="synthetic")
    fit = result.fit
    assert fit["plan"]["engine"] == "vecchia" and not fit["plan"]["exact_score_fits"]
    distance = fit["exact_distance"]
    assert distance["status"] in (WITHIN, BEYOND, UNRESOLVED)
    assert len(distance["shift_se"]) == 3 and all(np.isfinite(distance["shift_se"]))
    assert all(u > 0 for u in distance["uncertainty_se"])
    # the probes behind the reference's score SE (the operator's own), not the solver's
    described = result.reference_detail["description"]
    assert f"{distance['probes']} probes," in described
    assert any(note.startswith("distance of the estimate to the exact MLE")
               for note in result.notes)
