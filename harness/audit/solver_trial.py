"""A trial of a solver plugin on a tiny subset of the data, seconds long, before the fit.

A plugin that raises, crashes, hangs or returns garbage should say so before ``check``
spends minutes on the fit. ``trial_solver`` calls it once per knob value on
``TRIAL_POINTS`` points of the data, in a child process (``harness.audit.solver_calls``),
and asks its factorization for everything the audit will use: ``logdet`` and ``solve``
(finite: the plugin adapter, ``harness.solvers.fallback``, refuses NaN and wrong shapes),
``matvec`` and ``derivative_matvec``. It also checks that ``matvec`` (Sigma~) and ``solve``
(Sigma~^-1) are symmetric, as a covariance and its inverse are, by comparing u_i' A v_j
with v_j' A u_i for ``TRIAL_PAIRS`` random vectors u_i, v_j: with P = U' A V, Q = V' A U,

    a = ||P - Q'||_F / (||P||_F + ||Q||_F),

0 for a symmetric A (up to float64 rounding, about 1e-16 sqrt(m)), 1 for an antisymmetric
one, and about ||A - A'||_F / (2 ||A||_F) between (the k^2 pairs average the randomness
out). Above ``ASYMMETRY_WARNING`` (1e-8) the check warns; above ``ASYMMETRY_FAILURE``
(0.1, an antisymmetric part a tenth of the operator's size: no tolerance the audit
offers, the loosest default being 1e-2, explains it) the plugin fails its trial. Both
limits are common practice chosen for covaudit.

A failure is ``SolverFailed``, one line naming the plugin, exit code 3
(``harness.infra.exit_codes``). A numerical breakdown (``numpy.linalg.LinAlgError``) at a
loose knob value is not a failure of the trial: the audit judges it (``unsafe``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from harness.audit.solver_calls import SolverIsolation, call_solver, is_breakdown
from harness.audit.solver_seeds import seeded_options
from harness.model.kernels import Kernel

if TYPE_CHECKING:
    from harness.solvers.registry import ResolvedSolver

#: Points of the trial (fewer when the data have fewer).
TRIAL_POINTS = 64
#: Random vector pairs of the symmetry check (columns of U and V, module docstring).
TRIAL_PAIRS = 8
#: Relative asymmetry above which the trial warns (module docstring).
ASYMMETRY_WARNING = 1e-8
#: Relative asymmetry above which the plugin fails its trial (module docstring).
ASYMMETRY_FAILURE = 1e-1
#: Seconds the whole trial may take, at most (less when the solver's timeout is less).
TRIAL_TIMEOUT = 600.0


class SolverFailed(RuntimeError):
    """The solver under test failed before any audit (its trial): one line naming it."""


@dataclass(frozen=True)
class ValueTrial:
    """What the trial saw at one knob value: the asymmetry of ``matvec`` and of ``solve``
    (module docstring), or the numerical breakdown that stopped it."""

    value: float
    matvec_asymmetry: float
    solve_asymmetry: float
    breakdown: str = ""


def asymmetry(u: np.ndarray, v: np.ndarray, au: np.ndarray, av: np.ndarray) -> float:
    """||P - Q'||_F / (||P||_F + ||Q||_F) with P = U' A V, Q = V' A U, from the blocks
    U, V and the products A U, A V (module docstring); 0 when P = Q = 0."""
    p = np.atleast_2d(np.asarray(u, dtype=float).T @ np.asarray(av, dtype=float))
    q = np.atleast_2d(np.asarray(v, dtype=float).T @ np.asarray(au, dtype=float))
    scale = float(np.linalg.norm(p) + np.linalg.norm(q))
    if scale == 0:
        return 0.0
    return float(np.linalg.norm(p - q.T)) / scale


def trial_values(solver: ResolvedSolver, points: np.ndarray, y: np.ndarray, kernel: Kernel,
                 values: Sequence[float], options: Mapping[str, object], *,
                 seed: int) -> tuple[ValueTrial, ...]:
    """The trial (module docstring) at each of ``values``; runs in the child process.

    Raises whatever the solver raises, and ``ValueError`` naming the knob value and the
    member when a member returns a non-finite number the adapter let through.
    """
    rng = np.random.default_rng(seed)
    m = points.shape[0]
    out = []
    for value in values:
        opts = dict(seeded_options(solver.factory, options, seed)) | solver.knob.arguments(value)
        at = solver.knob.value_text(value)
        try:
            fac = solver.factorize(points, kernel, kernel.theta, **opts)
            logdet = float(fac.logdet())
        except Exception as exc:
            if not is_breakdown(exc):
                raise
            out.append(ValueTrial(float(value), math.nan, math.nan,
                                  breakdown=" ".join(str(exc).split())))
            continue
        if not math.isfinite(logdet):
            raise ValueError(f"logdet() returned {logdet} at {at}")
        u, v = rng.standard_normal((2, m, TRIAL_PAIRS))
        mu, mv = np.asarray(fac.matvec(u)), np.asarray(fac.matvec(v))
        su, sv = np.asarray(fac.solve(u)), np.asarray(fac.solve(v))
        solved_y = np.asarray(fac.solve(y))
        derivative = getattr(fac, "derivative_matvec")  # noqa: B009 - adapted: always there
        products = [np.asarray(derivative(i, v)) for i in range(kernel.n_params)]
        for name, array in (("matvec", mu), ("matvec", mv), ("solve", su), ("solve", sv),
                            ("solve", solved_y), *(("derivative_matvec", p)
                                                   for p in products)):
            if not np.all(np.isfinite(array)):
                raise ValueError(f"{name}() returned non-finite values at {at}")
        out.append(ValueTrial(float(value), asymmetry(u, v, mu, mv),
                              asymmetry(u, v, su, sv)))
    return tuple(out)


def trial_solver(solver: ResolvedSolver, points: np.ndarray, y: np.ndarray, kernel: Kernel,
                 values: Sequence[float], options: Mapping[str, object], *,
                 rng: np.random.Generator, seed: int, isolation: SolverIsolation
                 ) -> list[str]:
    """Run the trial (module docstring) on ``TRIAL_POINTS`` points drawn by ``rng``, in a
    child process; return its warnings.

    Raises
    ------
    SolverFailed
        The plugin raised, crashed, exited, hung past min(``TRIAL_TIMEOUT``, the
        isolation's timeout), returned a non-finite value, or its operator is badly
        asymmetric; one line naming it.
    """
    n = int(y.size)
    idx = np.sort(rng.choice(n, size=min(TRIAL_POINTS, n), replace=False))
    m = int(idx.size)
    limit = TRIAL_TIMEOUT if isolation.timeout is None else min(TRIAL_TIMEOUT,
                                                                isolation.timeout)
    who = f"solver {solver.name!r}"
    where = f"in its trial on {m} points, before the fit"
    call = call_solver(trial_values, solver, points[idx], y[idx], kernel, tuple(values),
                       dict(options), seed=seed, who=who, where=where,
                       isolation=SolverIsolation(limit, isolation.timeout_option))
    if call.failure:
        raise SolverFailed(call.failure)
    warnings: list[str] = []
    for trial in call.value:
        at = solver.knob.value_text(trial.value)
        for member, value in (("matvec", trial.matvec_asymmetry),
                              ("solve", trial.solve_asymmetry)):
            text = (f"{who}: {member}() is not symmetric at {at} on {m} points: "
                    f"|U'AV - (V'AU)'| / (|U'AV| + |V'AU|) = {value:.2g}")
            if value > ASYMMETRY_FAILURE:
                raise SolverFailed(f"{text}, above {ASYMMETRY_FAILURE:g} ({where}): not a "
                                   "covariance operator")
            if value > ASYMMETRY_WARNING:
                warnings.append(f"{text} (a covariance is symmetric; warning above "
                                f"{ASYMMETRY_WARNING:g})")
    return warnings
