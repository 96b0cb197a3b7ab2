"""Checking a tolerance on a user's dataset: validation, fit, audits, verdict table."""

from harness.checking.pipeline import (
    DEFAULT_TOLERANCES,
    CheckError,
    CheckOptions,
    recommend,
    run_check,
)
from harness.checking.result import CheckResult, MetricValue, RefitResult, ToleranceResult
from harness.checking.validate import MIN_POINTS, CheckDataError, ValidatedData, validate

__all__ = [
    "DEFAULT_TOLERANCES",
    "MIN_POINTS",
    "CheckDataError",
    "CheckError",
    "CheckOptions",
    "CheckResult",
    "MetricValue",
    "RefitResult",
    "ToleranceResult",
    "ValidatedData",
    "recommend",
    "run_check",
    "validate",
]
