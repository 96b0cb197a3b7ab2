"""covaudit: audit compressed Gaussian-process solvers against exact references.

The few names most scripts need; everything else lives in its own module.
"""

from harness._version import __version__
from harness.likelihood import evaluate_likelihood, kriging
from harness.model.kernels import KERNELS, make_kernel
from harness.references import DenseCholesky, dense_evaluate, dense_kriging
from harness.solvers import resolve_solver

__all__ = [
    "KERNELS",
    "DenseCholesky",
    "__version__",
    "dense_evaluate",
    "dense_kriging",
    "evaluate_likelihood",
    "kriging",
    "make_kernel",
    "resolve_solver",
]
