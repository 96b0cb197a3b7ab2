"""Example covaudit solver plugin: dense Cholesky of a deliberately perturbed Sigma."""

from jittered_solver.solver import JitteredCholesky, factorize

__version__ = "0.1.0"
__all__ = ["JitteredCholesky", "factorize"]
