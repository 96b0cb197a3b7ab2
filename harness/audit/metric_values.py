"""One metric's value at one tolerance, with its limit and its uncertainty."""

from __future__ import annotations

import math
from dataclasses import dataclass
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
