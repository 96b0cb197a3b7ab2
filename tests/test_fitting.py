"""The MLE driver against scikit-learn's GaussianProcessRegressor fit of the same model."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

from harness.check.fitting import (
    DenseEngine,
    data_scale,
    default_bounds,
    default_starts,
    fisher_scoring,
    fit_mle,
    standard_errors,
)
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky, dense_evaluate


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(7)
    x = rng.uniform(0, 10, (120, 2))
    truth = make_kernel("matern32", {"variance": 1.5, "lengthscale": 2.0, "nugget": 0.1})
    y = DenseCholesky(x, truth).apply_sqrt(rng.standard_normal(120))
    template = make_kernel("matern32", {"lengthscale": 1.0, "nugget": 1.0})
    scale = data_scale(x, y, mean="zero")
    fit = fit_mle(DenseEngine(x, y, template, mean="zero"), template,
                  starts=default_starts(template, scale), bounds=default_bounds(template, scale))
    return x, y, template, scale, fit


def _sklearn_fit(x, y):
    kernel = (ConstantKernel(1.0, (1e-4, 1e3)) * Matern(1.0, (1e-3, 1e3), nu=1.5)
              + WhiteKernel(0.1, (1e-8, 10.0)))
    gpr = GaussianProcessRegressor(kernel, alpha=1e-12, n_restarts_optimizer=4,
                                   random_state=0, normalize_y=False).fit(x, y)
    k = gpr.kernel_
    return gpr.log_marginal_likelihood_value_, (k.k1.k1.constant_value,
                                                k.k1.k2.length_scale, k.k2.noise_level)


def test_zero_mean_fit_matches_sklearn(problem):
    # Source: scikit-learn GaussianProcessRegressor maximizes the same zero-mean
    # likelihood (R&W 2006 eq. 2.30) over the same parameters.
    x, y, _, _, fit = problem
    ll_sk, (s2, ls, tau2) = _sklearn_fit(x, y)
    assert abs(fit.loglik - ll_sk) < 1e-3
    p = fit.kernel.natural_params()
    assert math.isclose(p["variance"], s2, rel_tol=2e-2)
    assert math.isclose(p["lengthscale"], ls, rel_tol=2e-2)
    assert math.isclose(p["nugget"], tau2, rel_tol=2e-2)
    assert fit.bounds_hit == ()


def test_fisher_scoring_reaches_the_same_maximum(problem):
    # Source: at an interior maximum of a smooth likelihood, Fisher scoring and L-BFGS-B
    # converge to the same root of the score equation (Mardia and Marshall 1984).
    x, y, template, scale, fit = problem
    engine = DenseEngine(x, y, template, mean="zero")
    start = fit.theta + np.array([0.3, -0.2, 0.2])
    polished = fisher_scoring(engine, template, start, bounds=default_bounds(template, scale))
    assert abs(polished.loglik - fit.loglik) < 1e-4
    se = standard_errors(fit.kernel, polished.fisher).log_se
    assert np.all(np.abs(polished.theta - fit.theta) / se < 5e-2)


def test_microergodic_se_by_delta_method(problem):
    # Source: delta method, Var(log c) = a' F^-1 a with a = (1, -2 nu, 0) (Zhang 2004).
    x, y, _, _, fit = problem
    f = dense_evaluate(x, y, fit.kernel, mean="zero", fisher=True).fisher
    se = standard_errors(fit.kernel, f)
    a = np.array([1.0, -3.0, 0.0])
    c = fit.kernel.variance / fit.kernel.lengthscale[0] ** 3
    assert math.isclose(se.microergodic, c, rel_tol=1e-12)
    assert math.isclose(se.microergodic_se, c * math.sqrt(a @ np.linalg.solve(f, a)),
                        rel_tol=1e-10)
