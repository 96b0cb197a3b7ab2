"""Result records of a check: metrics with thresholds, one row per tolerance, the refit
and the whole check."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any


def _num(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(value)


@dataclass(frozen=True)
class MetricValue:
    """One metric at one tolerance; ``threshold`` None for information-only metrics."""

    name: str
    value: float
    threshold: float | None = None
    uncertainty: float | None = None
    note: str = ""

    @property
    def passed(self) -> bool | None:
        if self.threshold is None:
            return None
        return bool(math.isfinite(self.value) and abs(self.value) <= self.threshold)

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "value": _num(self.value), "threshold": self.threshold,
                "passed": self.passed, "uncertainty": _num(self.uncertainty),
                "note": self.note}


@dataclass(frozen=True)
class ToleranceResult:
    """The verdict for one tolerance.

    ``safe`` is True when every metric with a threshold passed and the reference was
    certified; ``error`` holds the reason when the solver failed (e.g. compression
    breakdown), which makes the tolerance unsafe.
    """

    tol: float
    safe: bool
    reference: str
    metrics: tuple[MetricValue, ...]
    seconds: float
    speedup: float | None
    nbytes: int
    error: str = ""

    def metric(self, name: str) -> MetricValue | None:
        return next((m for m in self.metrics if m.name == name), None)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"tol": self.tol, "safe": self.safe, "reference": self.reference,
                               "seconds": _num(self.seconds), "speedup": _num(self.speedup),
                               "nbytes": self.nbytes, "error": self.error or None}
        for m in self.metrics:
            out[m.name] = m.to_dict()
        return out


@dataclass(frozen=True)
class RefitResult:
    """End-to-end refit with the recommended tolerance, compared with the reference fit."""

    tol: float
    params: dict[str, Any]
    shift_se: dict[str, float]
    max_shift_se: float
    loglik_change: float
    microergodic_shift_se: float | None
    evaluations: int
    seconds: float

    def to_dict(self) -> dict[str, Any]:
        return {"tol": self.tol, "params": self.params, "shift_se": self.shift_se,
                "max_shift_se": self.max_shift_se, "loglik_change": self.loglik_change,
                "microergodic_shift_se": _num(self.microergodic_shift_se)
                if self.microergodic_shift_se is not None else None,
                "evaluations": self.evaluations, "seconds": self.seconds}


@dataclass(frozen=True)
class CheckResult:
    """Everything ``covaudit check`` found (``to_dict`` is the JSON output)."""

    source: str
    n: int
    n_fit: int
    n_holdout: int
    d: int
    coord_system: str
    kernel: str
    mean: str
    params: dict[str, Any]
    se: dict[str, Any]
    loglik: float
    reference: str
    fit: dict[str, Any]
    tolerances: tuple[ToleranceResult, ...]
    recommended_tolerance: float | None
    speedup: float | None
    speedup_over: str
    refit: RefitResult | None
    thresholds: dict[str, float]
    growth: dict[str, Any] = field(default_factory=dict)
    holdout: dict[str, Any] = field(default_factory=dict)
    truth: dict[str, Any] | None = None
    seconds: float = 0.0
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "source": self.source, "n": self.n, "n_fit": self.n_fit,
            "n_holdout": self.n_holdout, "d": self.d, "coord_system": self.coord_system,
            "kernel": self.kernel, "mean": self.mean, "params": self.params, "se": self.se,
            "loglik": self.loglik, "reference": self.reference, "fit": self.fit,
            "recommended_tolerance": self.recommended_tolerance,
            "speedup": _num(self.speedup) if self.speedup is not None else None,
            "speedup_over": self.speedup_over,
            "tolerances": [t.to_dict() for t in self.tolerances],
            "refit": self.refit.to_dict() if self.refit else None,
            "thresholds": self.thresholds, "growth": self.growth, "holdout": self.holdout,
            "truth": self.truth, "seconds": self.seconds, "notes": list(self.notes),
        }
