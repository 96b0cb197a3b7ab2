"""Checking a tolerance on a user's dataset: validation, fit, audits, verdict table."""

from harness.check.check_records import CheckResult, MetricValue, RefitResult, ToleranceResult
from harness.check.data_checks import MIN_POINTS, CheckDataError, ValidatedData, validate
from harness.check.pipeline import (
    DEFAULT_TOLERANCES,
    CheckError,
    CheckOptions,
    recommend,
    run_check,
)

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
