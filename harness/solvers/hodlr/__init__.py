"""Built-in compressed solver: HODLR compression and symmetric factorization W W'."""

from harness.solvers.hodlr.compressed import LevelRanks
from harness.solvers.hodlr.factor import CompressionBreakdownError
from harness.solvers.hodlr.solver import HodlrFactorization, HodlrTimings, factorize

__all__ = [
    "CompressionBreakdownError",
    "HodlrFactorization",
    "HodlrTimings",
    "LevelRanks",
    "factorize",
]
