"""Solvers under test: the protocol, built-in solvers, plugin loading and adaptation."""

from harness.solvers.fallback import AdaptedFactorization, adapt
from harness.solvers.protocol import Factorization, SolverFactory, SymmetricFactorization
from harness.solvers.registry import ResolvedSolver, available_solvers, resolve_solver

__all__ = [
    "AdaptedFactorization",
    "Factorization",
    "ResolvedSolver",
    "SolverFactory",
    "SymmetricFactorization",
    "adapt",
    "available_solvers",
    "resolve_solver",
]
