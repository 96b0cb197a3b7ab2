"""Reading the check's frontier as ``check.json`` holds it: each solver's points (one per
knob value) with their median time, their errors and their limits.

A point is one entry of ``CheckResult.solvers[i]["points"]`` (``harness.check.frontier``
writes them): a tolerance row's keys plus ``time`` (median of the timing repeats, the
repeats, the first call, the peak memory) and ``nondominated``. A value the JSON holds as
null, or that is not a finite number, reads as None here.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from harness.audit.metric_names import canonical_name

#: The frontier's error panels and table columns, in order.
FRONTIER_METRICS: tuple[str, ...] = ("loglik_error", "param_shift_se", "kriging_mean_sd")
#: Each frontier metric's key in ``CheckResult.thresholds`` (``harness.audit.rule.Thresholds``).
THRESHOLD_KEYS: dict[str, str] = {"loglik_error": "loglik_nats",
                                  "param_shift_se": "param_shift_se",
                                  "kriging_mean_sd": "kriging_mean_sd"}


def finite(value: Any) -> float | None:
    """``value`` as a float, or None when it is missing or not a finite number."""
    if value is None or isinstance(value, bool | str):
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def metric_entry(point: Mapping[str, Any], name: str) -> Mapping[str, Any] | None:
    """The metric's dict of ``point`` under its name or its canonical name, or None."""
    for key in (name, canonical_name(name)):
        entry = point.get(key)
        if isinstance(entry, Mapping):
            return entry
    return None


def metric_value(point: Mapping[str, Any], name: str) -> float | None:
    entry = metric_entry(point, name)
    return None if entry is None else finite(entry.get("value"))


def metric_uncertainty(point: Mapping[str, Any], name: str) -> float | None:
    entry = metric_entry(point, name)
    return None if entry is None else finite(entry.get("uncertainty"))


def _time(point: Mapping[str, Any]) -> Mapping[str, Any]:
    time = point.get("time")
    return time if isinstance(time, Mapping) else {}


def median_seconds(point: Mapping[str, Any]) -> float | None:
    """The median over the timing repeats of one log-likelihood evaluation (s)."""
    return finite(_time(point).get("seconds"))


def repeat_count(point: Mapping[str, Any]) -> int:
    repeats = _time(point).get("repeats")
    return len(repeats) if isinstance(repeats, list) else 0


def first_call_seconds(point: Mapping[str, Any]) -> float | None:
    return finite(_time(point).get("first_call_seconds"))


def peak_bytes(point: Mapping[str, Any]) -> float | None:
    return finite(_time(point).get("peak_bytes"))


def points_of(solver: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    """A solver's points in the order listed (loose to tight); none for a solver refused
    or failed before its first knob value."""
    points = solver.get("points")
    return [p for p in points if isinstance(p, Mapping)] if isinstance(points, list) else []


def knob_name_of(solver: Mapping[str, Any]) -> str:
    knob = solver.get("knob")
    return str(knob.get("name", "tol")) if isinstance(knob, Mapping) else "tol"


def limit_of(solvers: tuple[Mapping[str, Any], ...], thresholds: Mapping[str, Any],
             name: str) -> float | None:
    """The metric's limit: the first point's ``threshold``, else ``thresholds``."""
    for solver in solvers:
        for point in points_of(solver):
            entry = metric_entry(point, name)
            if entry is not None and finite(entry.get("threshold")) is not None:
                return finite(entry.get("threshold"))
    return finite(thresholds.get(THRESHOLD_KEYS.get(name, name)))
