"""Calls into the solver under test, each in a child process with a time limit.

Everything the audit asks of the solver under test at one (tolerance, seed) (``factorize``,
then ``logdet``, ``solve``, ``matvec`` and ``derivative_matvec`` of its factorizations, and
the metrics against the reference) happens in one function of the engine. ``check`` runs
it through ``call_solver`` in a child process (``harness.infra.child_process``) under a
``SolverIsolation``: only the audited numbers come back (the engine's ``SeedAudit``:
metric values, judgements, seconds, ``nbytes``, notes), never a factorization. A crash,
an exit without a result, a hang past the limit or an exception of the solver becomes a
``SolverCall`` with a one-line ``failure``; the engine then gives the tolerance the status
"solver failed" (``harness.audit.rule.SOLVER_FAILED``, exit code 3). A ``run`` task makes
the same calls in its worker process, which is already that boundary.

A ``numpy.linalg.LinAlgError`` (raised by the solver, or the cause of the registry's
``SolverRuntimeError``) is a numerical breakdown: the compressed matrix lost positive
definiteness at this tolerance. That is a finding about the tolerance (``unsafe``), not a
failed solver, and ``SolverCall.breakdown`` says so.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from harness.infra.child_process import ChildCrashed, ChildTimeout, call_in_child

#: Characters of an exception's message kept in a one-line failure reason.
REASON_CHARS = 300
#: The name of a solver call's child for the crash-injection hook of the tests
#: (``harness.infra.child_process.CRASH_STAGE_VARIABLE``).
SOLVER_STAGE = "the solver under test"


@dataclass(frozen=True)
class SolverIsolation:
    """How ``check`` calls the solver under test: each (tolerance, seed) audit in a child
    process, stopped after ``timeout`` seconds (None: no limit;
    ``harness.infra.solver_timeout`` gives the default); ``timeout_option`` is the option
    that sets it, quoted when a call times out."""

    timeout: float | None
    timeout_option: str = "--solver-timeout"


@dataclass(frozen=True)
class SolverCall:
    """What one call into the solver under test gave: ``value``, or a one-line
    ``failure`` (``breakdown`` when it was a numerical breakdown, module docstring)."""

    value: Any = None
    failure: str = ""
    breakdown: bool = False

    @property
    def failed_solver(self) -> bool:
        """The solver failed: crashed, exited, timed out, or raised other than a
        numerical breakdown."""
        return bool(self.failure) and not self.breakdown


def one_line(exc: BaseException) -> str:
    """``Type: message`` on one line, at most ``REASON_CHARS`` characters of message (the
    registry's ``SolverRuntimeError`` already names the solver and what it raised)."""
    from harness.solvers.registry import SolverRuntimeError

    text = " ".join(str(exc).split())
    if len(text) > REASON_CHARS:
        text = text[:REASON_CHARS - 3] + "..."
    return text if isinstance(exc, SolverRuntimeError) else f"{type(exc).__name__}: {text}"


def is_breakdown(exc: BaseException) -> bool:
    """A numerical breakdown (module docstring), raised or the cause of what was raised."""
    return isinstance(exc, np.linalg.LinAlgError) or isinstance(exc.__cause__,
                                                                np.linalg.LinAlgError)


def guarded(fn: Callable[..., Any], *args: Any, **kwargs: Any) -> SolverCall:
    """``fn(*args, **kwargs)`` as a ``SolverCall``, run in the child: every exception
    (``SystemExit`` too: a plugin's ``sys.exit(0)`` must not become the command's exit)
    becomes its one-line failure, classified here, where its cause is still attached (an
    exception's cause does not survive the way back from a child process)."""
    try:
        return SolverCall(value=fn(*args, **kwargs))
    except BaseException as exc:  # noqa: BLE001 - in the child, anything raised is the solver's
        return SolverCall(failure=one_line(exc), breakdown=is_breakdown(exc))


def call_solver(fn: Callable[..., Any], *args: Any, isolation: SolverIsolation, who: str,
                where: str, **kwargs: Any) -> SolverCall:
    """``guarded(fn, *args, **kwargs)`` in a child process under ``isolation``.

    A crash, an exit without a result or a timeout is a one-line failure naming ``who``
    and ``where``: ``solver 'pkg.mod:f' crashed with signal 11 (SIGSEGV) at tol 1e-06,
    seed 0 (n = 2,000)``.
    """
    try:
        outcome = call_in_child(guarded, fn, *args, timeout=isolation.timeout,
                                what=f"{who} {where}", stage=SOLVER_STAGE,
                                timeout_option=isolation.timeout_option, **kwargs)
    except ChildCrashed as exc:
        return SolverCall(failure=f"{who} {exc.cause} {where}")
    except ChildTimeout:
        return SolverCall(failure=f"{who} timed out after {isolation.timeout:g} s {where} "
                                  f"and was stopped ({isolation.timeout_option} allows "
                                  "longer)")
    if not isinstance(outcome, SolverCall):
        return SolverCall(failure=f"{who} returned {type(outcome).__name__} {where}, "
                                  "not a result")
    if outcome.failure:
        verb = "broke down" if outcome.breakdown else "failed"
        return SolverCall(failure=f"{who} {verb} {where}: {outcome.failure}",
                          breakdown=outcome.breakdown)
    return outcome
