"""``check --kl``: the KL divergence beyond the dense limit, estimated against the exact
operator reference, agrees with the exact KL the dense reference measures.

KL(N(0, Sigma) || N(0, Sigma~)) = 1/2 [tr(Sigma~^-1 Sigma) - n + log det Sigma~ -
log det Sigma] (Schafer, Katzfuss and Owhadi 2021, SIAM J. Sci. Comput. 43(3), eq. 2.1);
beyond the dense limit the trace is Hutchinson's estimate with exact products (Hutchinson
1989, Commun. Statist. Simul. Comput. 18: unbiased, so the estimate lies within a few of
its standard errors of the exact value) and log det Sigma the operator's Lanczos estimate
with its own SE.
"""

from __future__ import annotations

import numpy as np
import pytest

from harness.audit.audit_references import operator_available
from harness.check import CheckOptions, run_check, validate
from harness.infra.data_files import Observations
from harness.model.kernels import Matern32

pytestmark = pytest.mark.skipif(not operator_available(),
                                reason="the exact operator reference is not installed")

N = 400
FIXED = {"variance": 1.0, "lengthscale": 0.15, "nugget": 0.05}


def _data():
    rng = np.random.default_rng(11)
    x = rng.uniform(0, 1, (N, 2))
    kernel = Matern32(**FIXED)
    y = np.linalg.cholesky(kernel.covariance(x)) @ rng.standard_normal(N)
    return validate(Observations(points=x, values=y, coords=("e", "n"), value="z",
                                 source="planted", rows=np.arange(N) + 2))


def _kl(result) -> list[tuple[float, float]]:
    return [(row.metric("kl_nat").value, row.metric("kl_nat").uncertainty or 0.0)
            for row in result.tolerances]


def test_operator_kl_estimate_agrees_with_the_dense_exact_kl():
    data = _data()
    common = dict(fixed_params=FIXED, solver="vecchia", knob_values=(5.0, 20.0),
                  solver_seeds=1, refit=False, holdout_points=20, variance_points=5)
    exact = run_check(data, CheckOptions(**common, reference="dense"), source="planted")
    estimated = run_check(data, CheckOptions(**common, reference="operator", kl=True),
                          source="planted")
    assert estimated.reference == "operator"
    for (value, se), (truth, truth_se) in zip(_kl(estimated), _kl(exact), strict=True):
        assert truth_se == 0.0 and truth > 0.0
        assert se > 0.0
        # within 4 stated SE (common practice for a Monte-Carlo check)
        assert abs(value - truth) <= 4.0 * se, (value, truth, se)
        # and the SE is honest in scale: not a thousand times the real error's size
        assert se <= max(abs(value - truth), 1e-3 * truth) * 1e3


def test_without_kl_the_operator_reference_measures_none():
    data = _data()
    result = run_check(data, CheckOptions(fixed_params=FIXED, solver="vecchia",
                                          knob_values=(10.0,), solver_seeds=1, refit=False,
                                          holdout_points=20, variance_points=5,
                                          reference="operator"), source="planted")
    assert all(row.metric("kl_nat") is None for row in result.tolerances)
