"""One knob value of one solver through the audit engine, on 60 points against the dense
reference: the problem shared by the tests of how a solver's error is classified, in
this process and in a child."""

from __future__ import annotations

import numpy as np

from harness.audit.solver_calls import SolverIsolation
from harness.solvers.registry import ResolvedSolver


def audit_one_value(solver: ResolvedSolver, *, isolation: SolverIsolation | None = None):
    """The engine's audit of ``solver`` at tol 1e-6 on one seed (its ``ToleranceAudit``)."""
    from harness.audit import engine
    from harness.audit.audit_references import build_reference
    from harness.audit.audit_sampling import audit_draws
    from harness.model.kernels import make_kernel

    rng = np.random.default_rng(5)
    points = rng.uniform(size=(60, 2))
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 0.3, "nugget": 1e-2})
    y = np.linalg.cholesky(kernel.covariance(points)) @ rng.normal(size=60)
    hold, probes = audit_draws(60, holdout=6, probes=4, seed=1)
    data = engine.AuditData(points=points, y=y, kernel=kernel, mean="constant",
                            holdout=hold, fisher=None, probes=probes)
    reference = build_reference("dense", data, solver=solver, solver_options={},
                                base_seed=0, memory_budget=None, ladder_factor=100.0,
                                probes=4, isolate=False)
    result = engine.audit_tolerances(data, solver, (1e-6,), reference, seeds=(1,),
                                     isolation=isolation)
    (audit,) = result.tolerances
    return audit
