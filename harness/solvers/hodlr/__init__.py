"""Built-in compressed solver: HODLR compression and symmetric factorization W W'."""

from harness.solvers.hodlr.compressed import LevelRanks
from harness.solvers.hodlr.factor import CompressionBreakdownError
from harness.solvers.hodlr.solver import HodlrFactorization, HodlrTimings, factorize
from harness.solvers.knobs import KnobSpec

factorize.knob = KnobSpec(name="tol", kind="float", low=0.0, high=1.0, low_closed=False, high_closed=False, more_accurate="smaller", default_sweep=(1e-2, 1e-4, 1e-6, 1e-8), meaning="relative compression tolerance")  # type: ignore[attr-defined]  # noqa: E501

__all__ = [
    "CompressionBreakdownError",
    "HodlrFactorization",
    "HodlrTimings",
    "LevelRanks",
    "factorize",
]
