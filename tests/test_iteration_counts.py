"""The operator's preconditioned iteration counts (``harness.references.operator.
iteration_counts``), which the cost plan prices the exact-operator reference by.

Checks against outside facts:

- with P = Sigma (the dense Cholesky factor) CG is exact after one step and C = I, so
  Lanczos needs one step (exact arithmetic; Saad 2003, *Iterative Methods for Sparse
  Linear Systems*, Algorithm 9.1);
- with a rough preconditioner the CG count obeys the Chebyshev bound (Saad 2003,
  Theorem 6.29): ||e_k||_A <= 2 rho^k ||e_0||_A with rho = (sqrt(kappa) - 1) /
  (sqrt(kappa) + 1), kappa the condition number of P^-1 Sigma (here from scipy's
  generalized symmetric eigensolver); turned into the reference's residual test with
  ||r||_2 <= sqrt(lambda_max) ||e||_A and ||e_0||_A <= ||r_0||_2 / sqrt(lambda_min).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.linalg

from harness.model.kernels import make_kernel
from harness.references.operator.iteration_counts import CG_RTOL, measure_iteration_counts
from harness.solvers.registry import resolve_solver


def _problem(n: int = 400, seed: int = 5):
    rng = np.random.default_rng(seed)
    points = rng.uniform(0.0, 1.0, size=(n, 2))
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 0.15, "nugget": 0.05})
    return points, kernel


def test_an_exact_preconditioner_takes_one_step():
    points, kernel = _problem()
    dense = resolve_solver("dense")
    factor = dense.factorize(points, kernel, kernel.theta, **dense.knob.arguments(None))
    counts = measure_iteration_counts(points, kernel, factor, rng=np.random.default_rng(0))
    assert counts.converged and counts.n == 400 and counts.probes == 16
    assert counts.cg_iterations == 1
    assert counts.lanczos_steps <= 2


def test_a_rough_preconditioner_stays_within_the_chebyshev_bound():
    points, kernel = _problem()
    vecchia = resolve_solver("vecchia")
    factor = vecchia.factorize(points, kernel, kernel.theta, **vecchia.knob.arguments(3))
    counts = measure_iteration_counts(points, kernel, factor, rng=np.random.default_rng(0))
    sigma = kernel.covariance(points)
    p_inverse = np.asarray(factor.solve(np.eye(points.shape[0])))
    p_matrix = np.linalg.inv(0.5 * (p_inverse + p_inverse.T))
    pencil = scipy.linalg.eigh(sigma, 0.5 * (p_matrix + p_matrix.T), eigvals_only=True)
    kappa = pencil[-1] / pencil[0]
    rho = (math.sqrt(kappa) - 1.0) / (math.sqrt(kappa) + 1.0)
    spectrum = np.linalg.eigvalsh(sigma)
    amplify = 2.0 * math.sqrt(spectrum[-1] / spectrum[0])
    bound = math.ceil(math.log(CG_RTOL / amplify) / math.log(rho))
    assert counts.converged and kappa > 1.5             # the preconditioner is rough
    assert 2 <= counts.cg_iterations <= bound
    assert 1 <= counts.lanczos_steps <= points.shape[0]
