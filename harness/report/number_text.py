"""Numbers as the check report prints them: compact values and tolerances in exponent
form."""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def compact(value: Any) -> str:
    """A short number: 3 significant digits, exponent form outside [1e-3, 1e4)."""
    if value is None:
        return ""
    if isinstance(value, list):
        return "(" + ", ".join(compact(v) for v in value) + ")"
    if isinstance(value, bool | str):
        return str(value)
    if isinstance(value, int | np.integer):
        return f"{int(value):,}"
    v = float(value)
    if not math.isfinite(v):
        return "\u2013"
    if v == 0:
        return "0"
    if 1e-3 <= abs(v) < 1e4:
        return f"{v:.3g}"
    mantissa, exponent = f"{v:.1e}".split("e")
    return f"{mantissa.replace('.0', '')}e{int(exponent)}"


def tolerance_text(value: float) -> str:
    """A tolerance in exponent form, ``1e-3``, ``2.5e-7``."""
    if not math.isfinite(value) or value <= 0:
        return compact(value)
    mantissa, exponent = f"{value:.2g}".split("e") if "e" in f"{value:.2g}" else (
        f"{value / 10 ** math.floor(math.log10(value)):.2g}",
        str(math.floor(math.log10(value))))
    mantissa = mantissa.rstrip("0").rstrip(".") if "." in mantissa else mantissa
    return f"{mantissa}e{int(exponent)}"


def knob_value_text(knob_name: str, value: float | None) -> str:
    """A knob value as the report shows it: a tolerance as ``tolerance_text``, another
    knob's value as ``40``; ``exact`` for no value."""
    if value is None:
        return "exact"
    return tolerance_text(value) if knob_name == "tol" else f"{value:g}"
