"""Errors of scalar quantities (log det, quadratic form, log-likelihood)."""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class ScalarError:
    """approx - exact, its absolute value, and the relative error |approx - exact| / |exact|.

    ``relative`` is NaN when exact is 0 (no scale to compare with).
    """

    signed: float
    absolute: float
    relative: float

    def to_dict(self, prefix: str) -> dict[str, float]:
        return {f"{prefix}_error": self.signed, f"{prefix}_abs_error": self.absolute,
                f"{prefix}_rel_error": self.relative}


def scalar_error(approx: float, exact: float) -> ScalarError:
    """Signed, absolute and relative error of ``approx`` against ``exact``."""
    signed = float(approx) - float(exact)
    relative = abs(signed) / abs(exact) if exact != 0 else math.nan
    return ScalarError(signed=signed, absolute=abs(signed), relative=relative)
