"""The end-to-end refit: Fisher scoring with the solver under test at its recommended
knob value, from the reference estimate, and the parameter shift it causes in SE units."""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any, cast

import numpy as np

from harness.audit.solver_calls import SolverIsolation, call_solver
from harness.audit.solver_seeds import solver_seed
from harness.check.check_options import CheckOptions, solver_options
from harness.check.check_records import RefitResult
from harness.check.fisher_steps import DECREMENT_TOL_NAT, fisher_scoring
from harness.check.fit_engines import CompressedEngine
from harness.check.fit_records import MleFit
from harness.model.kernels import Kernel, smoothness
from harness.solvers.registry import ResolvedSolver


def isolated_refit(arguments: tuple[Any, ...], isolation: SolverIsolation, name: str,
                    at: str) -> tuple[RefitResult | None, str]:
    """``refit_with_solver(*arguments)`` in a child process (``harness.audit.solver_calls``): one
    call of at most ``fit_max_steps + 1`` times the solver's time limit, as the refit
    evaluates the likelihood at every Fisher-scoring step. Returns the refit, or None and
    the one-line failure of a solver that crashed, hung or raised."""
    options: CheckOptions = arguments[5]
    limit = (None if isolation.timeout is None
             else isolation.timeout * (options.fit_max_steps + 1))
    call = call_solver(refit_with_solver, *arguments, isolation=replace(isolation, timeout=limit),
                       who=f"solver {name!r}",
                       where=f"in the refit at {at} (n = {arguments[1].size:,})")
    if call.failure:
        return None, call.failure
    return call.value, ""


def refit_with_solver(x: np.ndarray, y: np.ndarray, template: Kernel, fit: MleFit, tol: float,
           options: CheckOptions, solver: ResolvedSolver, log_se: np.ndarray,
           fisher: np.ndarray) -> RefitResult:
    """Fisher scoring with the solver under test at ``tol`` (the value of its knob, which
    reaches the factory as ``harness.solvers.knobs.KnobSpec.arguments`` says) from the
    reference estimate."""
    knob = solver.knob
    arguments = knob.arguments(tol)
    # the engine hands ``tol`` on to the factory, whose protocol takes None for a solver
    # whose knob is not tol
    engine = CompressedEngine(x, y, template, mean=options.mean,
                              tol=cast(float, arguments.pop("tol")),
                              seed=solver_seed(options.seed, 0), leaf_size=options.leaf_size,
                              solver=solver,
                              options=solver_options(options, solver.name) | arguments)
    start_ll = engine(fit.theta).loglik
    # the fit's own scoring routine: the Newton-decrement stop for a deterministic
    # solver, the score's noise floor for a stochastic one (harness.check.fisher_steps)
    refit = fisher_scoring(engine, template, fit.theta, bounds=fit.bounds, step_tol_se=1e-3,
                           decrement_tol=DECREMENT_TOL_NAT, max_steps=options.fit_max_steps)
    delta = refit.theta - fit.theta
    shift = delta / log_se
    micro = None
    nu = smoothness(template)
    if nu is not None and template.isotropic:
        a = np.zeros(template.n_params)
        a[0], a[1] = 1.0, -2.0 * nu
        micro = float(a @ delta) / math.sqrt(float(a @ np.linalg.solve(fisher, a)))
    if refit.accepted_steps == 0:
        note = ("the refit accepted no step: " + (refit.starts[0].message if refit.notes
                                                  else "the start already met the score "
                                                       "tolerance")
                + "; the shift is 0 by construction, not a measurement of compression")
    elif not refit.converged:
        note = "the refit did not converge: " + refit.starts[0].message
    else:
        note = refit.starts[0].message
    return RefitResult(tol=tol if knob.is_tol else None, knob_name=knob.name, knob_value=tol,
                       params=refit.kernel.natural_params(),
                       shift_se=dict(zip(template.param_names, shift.tolist(), strict=True)),
                       max_shift_se=float(np.max(np.abs(shift))),
                       loglik_change=float(refit.loglik - start_ll),
                       microergodic_shift_se=micro, evaluations=refit.evaluations,
                       seconds=refit.seconds, accepted_steps=refit.accepted_steps,
                       converged=refit.converged, note=note)
