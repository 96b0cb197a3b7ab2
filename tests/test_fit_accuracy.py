"""The check's reported estimate is the MLE of all the user's points.

The independent MLE below is written with scipy.optimize.minimize (L-BFGS-B) and
numpy/scipy linear algebra only, no project code: the GLS-profiled Gaussian
log-likelihood (Rasmussen and Williams 2006, eq. 2.30 with the mean profiled out,
Mardia and Marshall 1984, eq. 2.2), its score (R&W eq. 5.9), the Matern 3/2 and
exponential correlations (R&W eqs. 4.14 and 4.17) and the expected Fisher information
F_ij = 1/2 tr(S^-1 S_i S^-1 S_j) (Mardia and Marshall 1984, section 4) for the SE unit.

Done-when criterion of issue 9: within 0.01 nat and 0.02 SE of the independent MLE.
Both sizes are on the dense path (``harness.check.fit_plan.DENSE_FIT_MAX_N``); the
default run fits 1,000 points, the slow set the issue's 2,000 (eight times the work).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
from scipy import optimize
from scipy.spatial.distance import cdist

from harness.check import CheckOptions, run_check, validate
from harness.check.datafile import observations_from_arrays

#: The dense fit's time estimate follows the machine's load; a generous budget keeps the
#: test on the dense path it is about (the budget rule itself: test_check.py).
FIT_BUDGET = 7200.0


def _correlation(family: str, r: np.ndarray, ls: float) -> tuple[np.ndarray, np.ndarray]:
    """R and dR/dlog(l) (R&W eqs. 4.14, 4.17)."""
    if family == "matern32":
        a = math.sqrt(3.0) * r / ls
        e = np.exp(-a)
        return (1.0 + a) * e, a * a * e
    e = np.exp(-r / ls)
    return e, (r / ls) * e


class IndependentModel:
    """-L and -g of (log s2, log l, log tau2) with a GLS constant mean."""

    def __init__(self, x: np.ndarray, y: np.ndarray, family: str) -> None:
        self.r = cdist(x, x)
        self.y, self.family, self.n = y, family, y.size

    def parts(self, theta: np.ndarray):
        s2, ls, t2 = np.exp(theta)
        corr, dcorr = _correlation(self.family, self.r, ls)
        sigma = s2 * corr + t2 * np.eye(self.n)
        c = scipy.linalg.cho_factor(sigma, lower=True)
        ones = np.ones(self.n)
        beta = (ones @ scipy.linalg.cho_solve(c, self.y)) / (
            ones @ scipy.linalg.cho_solve(c, ones))
        resid = self.y - beta
        a = scipy.linalg.cho_solve(c, resid)
        logdet = 2.0 * np.sum(np.log(np.diag(c[0])))
        loglik = -0.5 * resid @ a - 0.5 * logdet - 0.5 * self.n * math.log(2 * math.pi)
        derivs = [s2 * corr, s2 * dcorr, t2 * np.eye(self.n)]
        return loglik, a, scipy.linalg.cho_solve(c, np.eye(self.n)), derivs

    def objective(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        loglik, a, sinv, derivs = self.parts(theta)
        grad = np.array([0.5 * a @ d @ a - 0.5 * np.sum(sinv * d) for d in derivs])
        return -loglik, -grad

    def fisher(self, theta: np.ndarray) -> np.ndarray:
        _, _, sinv, derivs = self.parts(theta)
        w = [sinv @ d for d in derivs]
        return np.array([[0.5 * np.sum(wi * wj.T) for wj in w] for wi in w])


def _data(family: str, seed: int, n: int
          ) -> tuple[np.ndarray, np.ndarray, dict[str, float]]:
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 10, (n, 2))
    truth = {"variance": 1.3, "lengthscale": 1.5, "nugget": 0.05}
    corr, _ = _correlation(family, cdist(x, x), truth["lengthscale"])
    sigma = truth["variance"] * corr + truth["nugget"] * np.eye(n)
    y = 2.0 + np.linalg.cholesky(sigma) @ rng.standard_normal(n)
    return x, y, truth


@pytest.mark.parametrize("family, seed, n", [
    ("matern32", 11, 1000),
    # Two minutes and more on a loaded 2-core machine: in the slow set.
    pytest.param("matern32", 11, 2000, marks=pytest.mark.slow),
    pytest.param("exponential", 12, 2000, marks=pytest.mark.slow),
])
def test_reported_estimate_is_the_dense_mle_of_all_points(family, seed, n):
    x, y, truth = _data(family, seed, n)
    model = IndependentModel(x, y, family)
    start = np.log([truth["variance"], truth["lengthscale"], truth["nugget"]])
    res = optimize.minimize(model.objective, start, jac=True, method="L-BFGS-B",
                            options={"maxiter": 500, "ftol": 1e-14, "gtol": 1e-9})
    assert res.success, res.message
    theta_ind, ll_ind = res.x, -res.fun
    se = np.sqrt(np.diag(np.linalg.inv(model.fisher(theta_ind))))

    data = validate(observations_from_arrays(x, y, source="synthetic"))
    options = CheckOptions(kernel=family, tolerances=(1e-8,), solver_seeds=1, refit=False,
                           fit_time_budget=FIT_BUDGET)
    result = run_check(data, options, source="synthetic")
    assert result.fit["plan"]["engine"] == "dense", result.fit["plan"]
    assert result.fit_converged and not result.warnings
    params = result.params
    theta_tool = np.log([params["variance"], params["lengthscale"], params["nugget"]])
    assert abs(result.loglik - ll_ind) <= 0.01
    assert np.max(np.abs(theta_tool - theta_ind) / se) <= 0.02
    assert result.n_fit == n            # all points fitted, none held back
