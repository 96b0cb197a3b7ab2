"""The exact operator's stated uncertainty covers its error (issue 22 item 6), at small n.

Truth: scipy's dense Cholesky log-likelihood (Rasmussen and Williams 2006, eq. 2.30),
whose own rounding is checked against the long-double Kalman filter on the same points.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.linalg import cho_factor, solve_triangular

from harness.audit.operator_preconditioner import PreconditionerSpec, build_operator_preconditioner
from harness.model.kernels import Matern32, assemble_lower
from harness.references.operator import operator_evaluate
from harness.references.operator.products import KernelOperator
from harness.references.operator.rounding import ENTRY_ULPS, UNIT_ROUNDOFF
from harness.references.statespace_longdouble import longdouble_loglik

N = 800
TERMS = ("probes", "lanczos", "cg", "rounding_dots", "rounding_products",
         "rounding_entries_q", "rounding_entries_ld", "rounding_pivots")


def _dense_loglik(k: np.ndarray, y: np.ndarray) -> float:
    c, _ = cho_factor(k, lower=True)
    u = solve_triangular(c, y, lower=True)
    return -0.5 * (float(u @ u) + 2 * float(np.sum(np.log(np.diag(c))))
                   + y.size * math.log(2 * math.pi))


@pytest.fixture(scope="module")
def problem():
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    x = np.sort(np.random.default_rng(0).random(N))
    k = assemble_lower(kernel, x[:, None])
    k = np.tril(k) + np.tril(k, -1).T
    pre = build_operator_preconditioner(x[:, None], kernel, PreconditionerSpec(knob=1e-6),
                                        rng=np.random.default_rng(0)).factorization
    return kernel, x, k, pre


def test_stated_uncertainty_covers_the_dense_loglik(problem):
    kernel, x, k, pre = problem
    inside = 0
    seeds = 6
    for seed in range(seeds):
        y = np.random.default_rng(50 + seed).multivariate_normal(np.zeros(N), k)
        dense = _dense_loglik(k, y)
        truth = float(longdouble_loglik(x, y, kernel).loglik[0])
        dense_error = abs(dense - truth)  # the dense value's own rounding, stated
        ev = operator_evaluate(x[:, None], y, kernel, preconditioner=pre, rng=seed,
                               score=False)
        terms = ev.uncertainty
        for name in TERMS:
            assert name in terms and terms[name]["kind"] in ("estimate", "bound")
            assert terms[name]["value"] > 0 and math.isfinite(terms[name]["value"])
            assert terms[name]["source"]
        assert ev.loglik_se > 0 and ev.loglik_bound > 0
        inside += abs(ev.loglik - dense) <= 2 * ev.loglik_se + ev.loglik_bound + dense_error
    assert inside >= seeds - 1


def test_entries_within_the_stated_model(problem):
    kernel, x, _, _ = problem
    sub = x[::8]
    entries = KernelOperator(sub[:, None], kernel, progress=False).matvec(np.eye(sub.size))
    xl = sub.astype(np.longdouble)
    t = np.sqrt(np.longdouble(3)) * np.abs(xl[:, None] - xl[None, :]) / np.longdouble(0.1)
    exact = (1 + t) * np.exp(-t)
    exact[np.diag_indices(sub.size)] += np.longdouble(1e-2)
    rel = np.abs((entries.astype(np.longdouble) - exact) / exact).astype(float)
    assert rel.max() <= ENTRY_ULPS * UNIT_ROUNDOFF
