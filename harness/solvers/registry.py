"""Solver names -> factories: built-ins, then entry points, then ``module:factory`` specs.

Resolution order for a name given on the command line (``--solver NAME``):

1. a built-in: ``dense`` (the certified dense Cholesky; ``tol`` ignored) or ``hodlr``
   (the built-in compressed solver, imported only when asked for);
2. an entry point of that name in the group ``covaudit.solvers``;
3. a spec ``package.module:factory``.

The result is a frozen ``ResolvedSolver`` whose ``factorize`` calls the factory, turns
its exceptions into ``SolverRuntimeError`` naming the solver, and returns the
factorization checked and completed by ``harness.solvers.fallback.adapt``.
"""

from __future__ import annotations

import difflib
import importlib
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from harness._version import __version__
from harness.model.kernels import Kernel
from harness.solvers.fallback import AdaptedFactorization, adapt
from harness.solvers.knobs import KnobSpec, knob_of
from harness.solvers.plugins import (
    ENTRY_POINT_GROUP,
    SolverLoadError,
    entry_point_solvers,
    entry_point_version,
    load_entry_point,
    load_factory,
    module_version,
    parse_spec,
)

#: Built-in solver name -> (module, factory attribute, description).
BUILTIN_SOLVERS: dict[str, tuple[str, str, str]] = {
    "dense": ("harness.solvers.dense_solver", "factorize",
              "dense Cholesky in float64, certified (tol ignored)"),
    "hodlr": ("harness.solvers.hodlr", "factorize",
              "hierarchical off-diagonal low-rank factorization (built-in)"),
    "vecchia": ("harness.solvers.vecchia", "factorize",
                "KL-minimizing sparse inverse Cholesky / Vecchia (built-in; knob neighbours)"),
}


class SolverRuntimeError(RuntimeError):
    """A solver's factory raised while factorizing."""


@dataclass(frozen=True)
class ResolvedSolver:
    """A solver ready to call.

    Attributes
    ----------
    name : str
        As given (``dense``, ``hodlr``, an entry-point name or a ``module:factory`` spec).
    version : str or None
        Version of the distribution providing it, when known.
    factory : callable
        ``factorize(points, kernel, theta, *, tol, **options)``.
    origin : str
        ``builtin``, ``entry point covaudit.solvers (dist)`` or ``module spec``.
    """

    name: str
    version: str | None
    factory: Callable[..., object]
    origin: str

    @property
    def knob(self) -> KnobSpec:
        """The accuracy knob the factory declares (``harness.solvers.knobs.knob_of``)."""
        return knob_of(self.factory)

    def factorize(self, points: np.ndarray, kernel: Kernel, theta: np.ndarray | None = None,
                  *, tol: float | None, **options: object) -> AdaptedFactorization:
        """Factor Sigma(theta) with this solver and return it checked and completed.

        ``kernel`` is the model family; ``theta`` (log scale) sets its parameters
        (``kernel.theta`` when omitted). The returned factorization's kernel is
        ``kernel.with_theta(theta)``.
        """
        theta = kernel.theta if theta is None else np.asarray(theta, dtype=float)
        model = kernel.with_theta(theta)
        try:
            inner = self.factory(points, model, theta, tol=tol, **options)
        except (MemoryError, KeyboardInterrupt):
            raise
        except Exception as exc:
            knob = self.knob
            at = (f"tol = {tol!r}" if knob.is_tol or knob.name not in options
                  else f"{knob.name} = {options[knob.name]!r}")
            raise SolverRuntimeError(
                f"solver {self.name!r} ({self.origin}) raised {type(exc).__name__} while "
                f"factorizing n = {np.asarray(points).shape[0]:,} points at {at}: "
                f"{exc}") from exc
        if inner is None:
            raise SolverRuntimeError(
                f"solver {self.name!r} ({self.origin}) returned None instead of a "
                "Factorization")
        return adapt(inner, points, model, solver=self.name)

    def to_dict(self) -> dict[str, object]:
        factory = getattr(self.factory, "__module__", "?") + ":" + getattr(
            self.factory, "__qualname__", repr(self.factory))
        return {"name": self.name, "version": self.version, "origin": self.origin,
                "factory": factory}


def available_solvers() -> dict[str, str]:
    """Names accepted by ``resolve_solver`` without a spec, with a description each."""
    names = {name: desc for name, (_, _, desc) in BUILTIN_SOLVERS.items()}
    for name, ep in entry_point_solvers().items():
        names.setdefault(name, f"entry point {ep.value}")
    return names


def _builtin(name: str) -> ResolvedSolver:
    module_name, attribute, _ = BUILTIN_SOLVERS[name]
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise SolverLoadError(
            f"built-in solver {name!r} is not available in this installation "
            f"({module_name} failed to import: {exc})") from exc
    factory = getattr(module, attribute, None)
    if not callable(factory):
        raise SolverLoadError(f"built-in solver {name!r}: {module_name} has no callable "
                              f"{attribute!r}")
    return ResolvedSolver(name=name, version=__version__, factory=factory, origin="builtin")


def resolve_solver(name: str) -> ResolvedSolver:
    """Resolve a solver name or spec (see module docstring).

    Raises
    ------
    SolverLoadError
        Unknown name (the message lists the known ones), or a spec/entry point that
        cannot be loaded.
    """
    name = name.strip()
    if name in BUILTIN_SOLVERS:
        return _builtin(name)
    entry_points = entry_point_solvers()
    if name in entry_points:
        ep = entry_points[name]
        factory = load_entry_point(ep)
        dist, version = entry_point_version(ep)
        origin = f"entry point {ENTRY_POINT_GROUP} ({dist or 'unknown distribution'})"
        return ResolvedSolver(name=name, version=version, factory=factory, origin=origin)
    if ":" in name:
        module_name, _ = parse_spec(name)
        factory = load_factory(name)
        _, version = module_version(module_name)
        return ResolvedSolver(name=name, version=version, factory=factory,
                              origin="module spec")
    known = ", ".join(available_solvers())
    close = difflib.get_close_matches(name, list(available_solvers()), n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    raise SolverLoadError(
        f"unknown solver {name!r}{hint}; known solvers: {known}; or give a plugin as "
        "'package.module:factory'")
