"""The solvers a check audits, each with its knob values, guard and factory options.

``--solver`` may be given several times; ``--sweep SOLVER=V1,V2,...`` sets the knob
values of one listed solver, spelled exactly as it was given. A solver without a sweep
takes ``--knob-values`` (allowed only with a single solver), else ``--tolerances`` when
its knob is ``tol``, else its declared default sweep (``harness.solvers.knobs``). A plugin
that declares no knob has ``tol``.

A problem that concerns one solver (it cannot be loaded, it is listed twice, its sweep
is outside its knob's declared range) refuses that solver only, with one line; the
others are audited and their results written, and the check's exit code says "error"
(``harness.infra.exit_codes``). A ``--sweep`` for a solver that is not listed is refused
the same way. Problems that concern the whole check (``--knob-values`` with several
solvers, bad ``--tolerances``, every solver refused) stop it before any work.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from harness.audit.solver_calls import SolverIsolation
from harness.check.check_options import CheckError, CheckOptions, solver_options
from harness.check.plugin_guard import solver_isolation
from harness.infra.option_specs import OptionError
from harness.solvers.knobs import KnobSpec
from harness.solvers.plugins import SolverLoadError
from harness.solvers.registry import ResolvedSolver, resolve_solver


@dataclass(frozen=True)
class LinedUpSolver:
    """One solver under test: as given, resolved, its knob values (loose to tight), its
    child-process guard (``harness.check.plugin_guard``: None only under the benchmark's
    in-process switch) and its factory's other options."""

    given: str
    solver: ResolvedSolver
    values: tuple[float, ...]
    isolation: SolverIsolation | None
    options: Mapping[str, Any] = field(default_factory=dict)
    index: int = 0

    @property
    def knob(self) -> KnobSpec:
        return self.solver.knob


@dataclass(frozen=True)
class RefusedSolver:
    """A listed solver (or a sweep) that is not audited, and the one line why."""

    given: str
    problem: str


@dataclass(frozen=True)
class Lineup:
    """The audited solvers in the order listed, and the refused ones."""

    solvers: tuple[LinedUpSolver, ...]
    refused: tuple[RefusedSolver, ...] = ()


def _values(given: str, knob: KnobSpec, options: CheckOptions, single: bool
            ) -> tuple[float, ...]:
    """The knob values of one solver (module docstring), validated against its range.

    Raises
    ------
    ValueError
        A value outside the knob's declared range (the message names the option).
    """
    if given in options.sweeps:
        values, flag = options.sweeps[given], f"--sweep {given}="
    elif single and options.knob_values is not None:
        values, flag = options.knob_values, "--knob-values"
    elif knob.is_tol:
        values, flag = options.tolerances, "--tolerances"
    else:
        values, flag = knob.default_sweep, f"the declared sweep of {given!r}"
    spec = knob.option_spec()
    for value in values:
        if (core := spec.problem(value)) is not None:
            raise ValueError(f"{flag}: {core}")
    if not values:
        raise ValueError(f"{flag}: expected at least one {knob.name} value, got none")
    return knob.sorted_loose_to_tight(values)


def line_up(options: CheckOptions, n: int) -> Lineup:
    """The solvers of a check at ``n`` points (module docstring).

    Raises
    ------
    CheckError
        A problem of the whole check, or every listed solver refused.
    """
    names = options.solver_names
    single = len(names) == 1
    if options.knob_values is not None and not single:
        raise CheckError("--knob-values: allowed with a single --solver; with several, give "
                         "each its values with --sweep SOLVER=V1,V2,...")
    audited: list[LinedUpSolver] = []
    refused: list[RefusedSolver] = []
    seen: set[str] = set()
    for given in names:
        if given in seen:
            refused.append(RefusedSolver(given, f"--solver {given!r} is listed twice; it "
                                                "is audited once"))
            continue
        seen.add(given)
        try:
            solver = resolve_solver(given)
            values = _values(given, solver.knob, options, single)
        except (SolverLoadError, TypeError) as exc:
            refused.append(RefusedSolver(given, f"--solver {given!r}: {exc}"))
            continue
        except ValueError as exc:
            refused.append(RefusedSolver(given, f"{exc} (solver {given!r}, knob "
                                                f"{solver.knob.name} in "
                                                f"{solver.knob.range_text()})"))
            continue
        try:
            isolation = solver_isolation(solver, n, options.solver_timeout, values=values,
                                         probes=options.probes)
        except OptionError as exc:
            raise CheckError(str(exc)) from None
        audited.append(LinedUpSolver(given=given, solver=solver, values=values,
                                     isolation=isolation,
                                     options=solver_options(options, solver.name),
                                     index=len(audited)))
    for given, values in options.sweeps.items():
        if given not in seen:
            text = ",".join(f"{v:g}" for v in values)
            refused.append(RefusedSolver(given, f"--sweep {given}={text}: solver {given!r} "
                                                "is not listed; list it with --solver "
                                                f"{given} (spelled the same way)"))
    if not audited:
        raise CheckError("; ".join(r.problem for r in refused) or "no solver to audit")
    return Lineup(solvers=tuple(audited), refused=tuple(refused))
