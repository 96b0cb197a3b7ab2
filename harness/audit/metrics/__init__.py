"""Accuracy metrics of a solver under test against an exact reference (DEVELOPERS.md,
"How to add a metric")."""

from harness.audit.metrics.factor_error import (
    FactorizationError,
    NormEstimate,
    factorization_error,
    power_norm,
)
from harness.audit.metrics.prediction_errors import (
    KrigingErrors,
    SolveErrors,
    kriging_errors,
    solve_errors,
)
from harness.audit.metrics.scalar_errors import ScalarError, scalar_error
from harness.audit.metrics.score_errors import (
    FisherError,
    MicroergodicShift,
    ScoreErrors,
    microergodic_shift,
    score_errors,
)
from harness.audit.metrics.trace_errors import TraceErrors, trace_errors

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
