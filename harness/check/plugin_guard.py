"""How ``check`` guards itself against the solver under test: which solvers run in a
child process, under which time limit, and the trial before the fit.

A solver plugin (anything not built in) is called only in child processes
(``harness.audit.solver_calls``): each (knob value, seed) audit whole, stopped after
``--solver-timeout`` seconds (default ``harness.infra.solver_timeout.default_solver_timeout``
of n), and first a trial on a tiny subset before the fit (``harness.audit.solver_trial``).
The built-in solvers (dense, hodlr, vecchia) run in this process: a child costs about 5 s
to start and import (5.5 s against 0.01-0.1 s for a warm in-process call at n = 64 and
500, measured on two busy cores), which at the default 5 tolerances x 3 seeds would add
over a minute to a check of a small dataset.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from harness.audit.solver_calls import SolverIsolation
from harness.check.fitting import data_scale, default_starts
from harness.infra.option_specs import SOLVER_TIMEOUT
from harness.infra.solver_timeout import default_solver_timeout
from harness.model.kernels import Kernel, make_kernel
from harness.solvers.registry import ResolvedSolver

#: The command-line option that sets the time limit of one solver call in ``check``.
TIMEOUT_OPTION = "--solver-timeout"


def solver_isolation(solver: ResolvedSolver, n: int, timeout: float | None
                     ) -> SolverIsolation | None:
    """The child-process guard of ``solver`` at ``n`` points, None for a built-in.

    ``timeout`` (seconds, ``--solver-timeout``) is validated by its option specification;
    None takes the default rule of ``harness.infra.solver_timeout``.

    Raises
    ------
    harness.infra.option_specs.OptionError
        When ``timeout`` is outside (0, 7 days].
    """
    if timeout is not None:
        timeout = SOLVER_TIMEOUT.validate(timeout, where=TIMEOUT_OPTION)
    if solver.origin == "builtin":
        return None
    limit = default_solver_timeout(int(n)) if timeout is None else float(timeout)
    return SolverIsolation(timeout=limit, timeout_option=TIMEOUT_OPTION)


def trial_kernel(kernel: str, shape: Mapping[str, float], fixed: Mapping[str, Any] | None,
                 template: Kernel, points: np.ndarray, y: np.ndarray, *, mean: str) -> Kernel:
    """The model of the trial before the fit: the fixed parameters (``--params``) when
    given, else the fit's first starting point (``harness.check.fitting.default_starts``,
    from the data's spread)."""
    if fixed is not None:
        return make_kernel(kernel, dict(shape) | dict(fixed))
    return template.with_theta(default_starts(template, data_scale(points, y, mean=mean))[0])
