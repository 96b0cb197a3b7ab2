"""Iteration counts of the preconditioned exact operator, measured on a few points.

The time of the operator reference is its number of exact products, and that number is
set by how fast preconditioned CG and Lanczos converge: a preconditioner P close to Sigma
clusters the spectrum of P^-1 Sigma near 1, and CG's error then falls by about the
spread of that cluster per step (the Chebyshev bound of CG, Saad 2003, *Iterative Methods
for Sparse Linear Systems*, Theorem 6.29; the Gauss quadrature of Lanczos converges at
the same rate, Golub and Meurant 2010, *Matrices, Moments and Quadrature with
Applications*, ch. 6). The counts depend on the preconditioner and on the conditioning of
Sigma, not on n as such: at a fixed density of points Sigma's spectrum, and a
compressed P's relative error, stay about the same as n grows. So the counts measured on
a window of the data (the nearest points of one point, at the data's density) stand for
those at n, as the Vecchia pilot assumes
(``harness.audit.operator_preconditioner.pilot_neighbours``).

``measure_iteration_counts`` runs, with the reference's own stopping rules
(``operator_evaluate``'s defaults), one block PCG on Rademacher probes and one Lanczos
quadrature of z' log(C) z on the same probes, C = W^-1 Sigma W^-T with P = W W'.
Development measurement on windows of the 65,536 scattered points of the plane
benchmark (Matern 3/2 at the fitted parameters; ``benchmarks/check_at_scale.py``): with
HODLR at tol 1e-10 as P, 2 CG iterations and 2 Lanczos steps on 2,048, 4,096 and 8,192
points alike; with the Vecchia factor of 40 neighbours 10, 11 and 11 iterations and 5
steps; with 10 neighbours 24, 29 and 32 iterations and 10, 12 and 14 steps. The whole
reference at 65,536 points with HODLR made 7 iterations for its GLS solve, Lanczos runs
and probe solves together (the reference's detail in the check.json of that benchmark's
run, not kept in the repository).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from harness.linalg.rademacher import rademacher_probes
from harness.model.kernels import Kernel
from harness.references.operator.lanczos import slq_logdet
from harness.references.operator.pcg import pcg
from harness.references.operator.products import KernelOperator
from harness.references.operator.reference import (
    CG_RTOL,
    LANCZOS_STEPS,
    LANCZOS_TOL,
    MAX_ITERATIONS,
    sqrt_maps,
)
from harness.solvers.protocol import Factorization


@dataclass(frozen=True)
class IterationCounts:
    """Preconditioned CG iterations and Lanczos steps of one probe block at n points.

    Attributes
    ----------
    cg_iterations : int
        Block PCG iterations to the reference's relative residual (``CG_RTOL``).
    lanczos_steps : int
        The most Lanczos steps a probe took to ``LANCZOS_TOL`` (the block runs that long);
        the CG count when P has no symmetric factor (Lanczos on Sigma itself is then not
        measured: the reference prices that case as CG).
    n : int
        Points measured on.
    probes : int
    converged : bool
        Both runs met their stopping rule within their budgets.
    """

    cg_iterations: int
    lanczos_steps: int
    n: int
    probes: int
    converged: bool

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


def measure_iteration_counts(points: np.ndarray, kernel: Kernel, preconditioner: Factorization,
                             *, rng: np.random.Generator, probes: int = 16) -> IterationCounts:
    """Counts of one block PCG and one Lanczos run on ``probes`` Rademacher probes at
    ``points`` (module docstring), with ``preconditioner`` a factorization of the same
    Sigma."""
    x = np.asarray(points, dtype=float)
    x = x[:, None] if x.ndim == 1 else x
    n = int(x.shape[0])
    op = KernelOperator(x, kernel, progress=False)
    z = rademacher_probes(n, probes, rng)

    def precondition(b: np.ndarray) -> np.ndarray:
        return np.asarray(preconditioner.solve(b)).reshape(b.shape)

    lam = kernel.nugget if kernel.nugget > 0 else None
    solved = pcg(op.matvec, z, precondition=precondition, rtol=CG_RTOL,
                 max_iterations=MAX_ITERATIONS, lambda_min=lam)
    maps = sqrt_maps(preconditioner)
    if maps is None:
        return IterationCounts(cg_iterations=solved.iterations, lanczos_steps=solved.iterations,
                               n=n, probes=probes, converged=solved.converged)
    w_inv, w_inv_t = maps

    def apply_c(v: np.ndarray) -> np.ndarray:
        return np.asarray(w_inv(op.matvec(np.asarray(w_inv_t(v)).reshape(v.shape)))
                          ).reshape(v.shape)

    slq = slq_logdet(apply_c, z, max_steps=LANCZOS_STEPS, step_tol=LANCZOS_TOL)
    return IterationCounts(cg_iterations=int(solved.iterations),
                           lanczos_steps=int(slq.steps.max()), n=n, probes=probes,
                           converged=bool(solved.converged and slq.converged.all()))
