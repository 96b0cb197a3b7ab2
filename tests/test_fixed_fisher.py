"""The Fisher information at fixed parameters (``check --fixed-params``) beyond the dense
fit's limit: the deterministic Vecchia information, as the at-scale fit uses
(``harness.check.fit_plan.plan_fixed_fisher``, ``harness.check.vecchia_fit``).

With at least n - 1 neighbours the Vecchia likelihood is the exact one (Vecchia 1988,
J. R. Stat. Soc. B 50; Guinness 2021, Stat. Comput. 31, sec. 2), so its Fisher
information must equal the Gaussian one, F_ij = 1/2 tr(Sigma^-1 Sigma_i Sigma^-1
Sigma_j) (Mardia and Marshall 1984, Biometrika 71, eq. 5), here with Sigma and its
derivatives in log parameters from scikit-learn's kernels (``eval_gradient=True``).
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

from harness.check import CheckOptions
from harness.check.cost_plan import plan_check
from harness.check.fit_stage import fixed_parameters
from harness.check.vecchia_fit import FIT_NEIGHBOURS

PARAMS = {"variance": 1.3, "lengthscale": 0.3, "nugget": 0.05}


def _data(n: int, seed: int = 2):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 1.0, size=(n, 2))
    return x, rng.standard_normal(n)


def test_beyond_the_dense_limit_the_fisher_is_the_vecchia_one_and_exact_at_full_conditioning():
    n = FIT_NEIGHBOURS          # every point conditions on all earlier ones: exact
    x, y = _data(n)
    options = CheckOptions(fixed_params=PARAMS, tolerances=(1e-6,), mean="zero",
                           dense_fit_max_n=0)
    outcome = fixed_parameters(x, y, options, 2)
    assert outcome.info["fisher_engine"] == "vecchia"
    assert any("Vecchia approximation" in note for note in outcome.notes)
    kernel = (ConstantKernel(PARAMS["variance"]) * Matern(PARAMS["lengthscale"], nu=1.5)
              + WhiteKernel(PARAMS["nugget"]))
    sigma, derivatives = kernel(x, eval_gradient=True)   # d/d log(variance, l, nugget)
    solved = [np.linalg.solve(sigma, derivatives[:, :, i]) for i in range(3)]
    expected = np.array([[0.5 * np.trace(a @ b) for b in solved] for a in solved])
    assert outcome.fisher == pytest.approx(expected, rel=1e-8)


def test_within_the_dense_limit_the_fisher_stays_dense():
    x, y = _data(200)
    options = CheckOptions(fixed_params=PARAMS, tolerances=(1e-6,), mean="zero")
    assert fixed_parameters(x, y, options, 2).info["fisher_engine"] == "dense"


def test_the_plan_prices_the_vecchia_fisher_at_fixed_parameters():
    # no dense n x n array in the fit stage: the Vecchia pass's O(n m) numbers
    x, y = _data(500)
    options = CheckOptions(fixed_params=PARAMS, tolerances=(1e-6,), refit=False,
                           dense_fit_max_n=0)
    plan = plan_check(x, y, options, rng=np.random.default_rng(0))
    fit = next(stage for stage in plan.stages if stage.stage == "fit")
    assert plan.fit is None and plan.fixed_fisher is not None
    assert plan.fixed_fisher.engine == "vecchia"
    assert plan.to_dict()["fixed_fisher"]["engine"] == "vecchia"
    assert fit.peak_bytes == 8 * 500 * FIT_NEIGHBOURS * (3 + 2)
    assert "Vecchia Fisher information" in fit.detail and fit.seconds > 0
    dense = plan_check(x, y, CheckOptions(fixed_params=PARAMS, tolerances=(1e-6,),
                                          refit=False), rng=np.random.default_rng(0))
    assert dense.fixed_fisher is not None and dense.fixed_fisher.engine == "dense"
