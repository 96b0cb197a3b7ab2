"""covaudit: audit compressed Gaussian-process solvers against exact references.

The few names most scripts need; everything else lives in its own module.
"""

__version__ = "0.1.0"

from harness.likelihood import evaluate_likelihood, kriging  # noqa: E402
from harness.model.kernels import KERNELS, make_kernel  # noqa: E402
from harness.references import DenseCholesky, dense_evaluate, dense_kriging  # noqa: E402
from harness.solvers import resolve_solver  # noqa: E402

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
