"""covaudit: audit compressed Gaussian-process solvers against exact references."""

__version__ = "0.1.0"
