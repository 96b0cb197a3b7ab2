"""Accuracy metrics of a solver under test against an exact reference (DESIGN section 4)."""

from harness.metrics.operator import (
    FactorizationError,
    NormEstimate,
    factorization_error,
    power_norm,
)
from harness.metrics.prediction import KrigingErrors, SolveErrors, kriging_errors, solve_errors
from harness.metrics.scalar import ScalarError, scalar_error
from harness.metrics.score import (
    FisherError,
    MicroergodicShift,
    ScoreErrors,
    microergodic_shift,
    score_errors,
)
from harness.metrics.trace import TraceErrors, trace_errors

__all__ = [
    "FactorizationError",
    "FisherError",
    "KrigingErrors",
    "MicroergodicShift",
    "NormEstimate",
    "ScalarError",
    "ScoreErrors",
    "SolveErrors",
    "TraceErrors",
    "factorization_error",
    "kriging_errors",
    "microergodic_shift",
    "power_norm",
    "scalar_error",
    "score_errors",
    "solve_errors",
    "trace_errors",
]
