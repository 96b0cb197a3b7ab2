"""How ``check`` guards itself against the solver under test: which solvers run in a
child process, under which time limit, the fork server their children start from, and
the trial before the fit.

Every solver under test, plugin or built-in (dense, hodlr, vecchia), is called only in
child processes (``harness.audit.solver_calls``): each (knob value, seed) audit whole, its
timing and its refit, stopped after ``--solver-timeout`` seconds. Without it the limit
is 10 x the call's cost estimate + 60 s for the built-in dense and HODLR solvers
(``call_estimate``, the cost model's evaluation of ``harness.infra.solver_cost``), else
``harness.infra.solver_timeout.default_solver_timeout`` of n. So every solver is audited
and timed in the same layout, and a crash, an exception, an early exit or a hang of a
built-in is "solver failed" (exit code 3) like a plugin's; a numerical breakdown stays a
finding (``harness.audit.solver_calls.is_breakdown``). A plugin alone is first tried on a
tiny subset before the fit (``harness.audit.solver_trial``): a built-in is known to
answer the protocol.

The children are forked from the fork server (``harness.infra.child_process``), which
``prepare_solver_children`` starts at the beginning of a check with the check's modules
and the built-in solvers' compiled kernels loaded once
(``harness.solvers.compiled_preload``), so that a child costs tens of milliseconds
instead of loading its kernels from numba's cache (0.5-2 s per child).

``IN_PROCESS_VARIABLE`` is internal, for ``benchmarks/isolation_overhead.py`` only: set to
1, the built-in solvers run in the calling process as before, so that the benchmark can
measure what the isolation costs. It is no option of the command line and no test or
user should set it.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np

from harness.audit.solver_calls import SolverIsolation
from harness.check.fitting import data_scale, default_starts
from harness.infra.child_process import prepare_server
from harness.infra.option_specs import SOLVER_TIMEOUT
from harness.infra.solver_cost import DENSE_FLOPS, evaluation_flops
from harness.infra.solver_timeout import solver_call_timeout
from harness.model.kernels import Kernel, make_kernel
from harness.solvers.registry import ResolvedSolver

#: The command-line option that sets the time limit of one solver call in ``check``.
TIMEOUT_OPTION = "--solver-timeout"


#: Internal (module docstring): "1" runs the built-in solvers in the calling process.
IN_PROCESS_VARIABLE = "COVAUDIT_BENCHMARK_BUILTINS_IN_PROCESS"
#: Built-in solvers the cost model has an estimate for (``call_estimate``).
ESTIMATED_SOLVERS = frozenset({"dense", "hodlr"})
#: Likelihood-and-gradient evaluations the cost model counts for one (knob value, seed)
#: audit: at the estimate and at the perturbed point, as for a grid task.
AUDIT_EVALUATIONS = 2
#: Parameters assumed by the estimate (variance, one lengthscale, nugget); the model's
#: dependence on them is weak (1 + probes p / 50).
ESTIMATE_PARAMS = 3
#: Modules every solver child needs, preloaded by the fork server (the check's pipeline
#: imports them all; the audit engine, the timing and the refit are what children run).
CHILD_MODULES = ("harness.check.pipeline",)
#: The module whose import loads the built-in solvers' compiled kernels.
WARM_MODULE = "harness.solvers.compiled_preload"
#: The module whose import loads the audit's own compiled kernels (on a line).
AUDIT_WARM_MODULE = "harness.audit.line_kernel_preload"


def builtins_in_process() -> bool:
    """Whether the internal benchmark switch (module docstring) is set."""
    return os.environ.get(IN_PROCESS_VARIABLE) == "1"


def call_estimate(solver: ResolvedSolver, n: int, values: Iterable[float], *,
                  probes: int, evaluations: int = AUDIT_EVALUATIONS,
                  params: int = ESTIMATE_PARAMS) -> float | None:
    """Seconds of one call of ``solver`` at its costliest knob value among ``values`` by
    the cost model (``evaluations`` likelihood-and-gradient evaluations, by default those
    of one (knob value, seed) audit, at the assumed dense rate), None where the model has
    no estimate (a plugin, Vecchia)."""
    if solver.origin != "builtin" or solver.name not in ESTIMATED_SOLVERS:
        return None
    tols = [float(v) for v in values]
    tol = None if solver.name == "dense" or not tols else min(tols)
    flops, _ = evaluation_flops(int(n), int(params), dense=solver.name == "dense",
                                tol=tol, probes=int(probes))
    return evaluations * flops / DENSE_FLOPS


def solver_isolation(solver: ResolvedSolver, n: int, timeout: float | None, *,
                     values: Iterable[float] = (), probes: int = 0
                     ) -> SolverIsolation | None:
    """The child-process guard of ``solver`` at ``n`` points (module docstring); None only
    for a built-in under the benchmark's switch (``IN_PROCESS_VARIABLE``).

    ``timeout`` (seconds, ``--solver-timeout``) is validated by its option specification;
    None takes the default: from ``call_estimate`` at the knob ``values`` with ``probes``
    trace probes where it has one, else the rule of n
    (``harness.infra.solver_timeout.solver_call_timeout``).

    Raises
    ------
    harness.infra.option_specs.OptionError
        When ``timeout`` is outside (0, 7 days].
    """
    if timeout is not None:
        timeout = SOLVER_TIMEOUT.validate(timeout, where=TIMEOUT_OPTION)
    if solver.origin == "builtin" and builtins_in_process():
        return None
    limit = (solver_call_timeout(int(n), call_estimate(solver, n, values, probes=probes))
             if timeout is None else float(timeout))
    return SolverIsolation(timeout=limit, timeout_option=TIMEOUT_OPTION)


def prepare_solver_children(solvers: Iterable[ResolvedSolver]) -> bool:
    """Start the fork server for the solvers' children now (module docstring), with the
    check's modules and, when a built-in solver is among them, its compiled kernels;
    False where it had started already (``harness.infra.child_process.prepare_server``).
    A plugin's own module is never imported there: the server must not run its code."""
    builtin = any(s.origin == "builtin" for s in solvers) and not builtins_in_process()
    return prepare_server(CHILD_MODULES + ((WARM_MODULE,) if builtin else ())
                          + (AUDIT_WARM_MODULE,))


def trial_kernel(kernel: str, shape: Mapping[str, float], fixed: Mapping[str, Any] | None,
                 template: Kernel, points: np.ndarray, y: np.ndarray, *, mean: str) -> Kernel:
    """The model of the trial before the fit: the fixed parameters (``--params``) when
    given, else the fit's first starting point (``harness.check.fitting.default_starts``,
    from the data's spread)."""
    if fixed is not None:
        return make_kernel(kernel, dict(shape) | dict(fixed))
    return template.with_theta(default_starts(template, data_scale(points, y, mean=mean))[0])
