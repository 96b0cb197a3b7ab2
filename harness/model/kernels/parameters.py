"""Declarations of kernel parameters: one record per parameter, read by every consumer.

Each kernel class lists its parameters once (``Kernel.PARAMETERS``): the natural-scale
name, the domain a value must lie in, whether theta holds it on the log scale or it is a
fixed shape parameter, and the fitting bounds as multiples of a data scale. Construction
(``make_kernel``), validation (``Kernel.__post_init__``, case files, ``--param``) and the
MLE driver's bounds all read these records, so a new parameter is declared in one place.
"""

from __future__ import annotations

import math
from dataclasses import dataclass


class KernelParameterError(ValueError):
    """A kernel parameter is missing, non-finite, out of its domain or of the wrong length."""


@dataclass(frozen=True)
class ParameterSpec:
    """One kernel parameter.

    Attributes
    ----------
    name : str
        Natural-scale name, as written in ``--param`` and case files.
    meaning : str
        One line for help texts and reports.
    lower, upper : float
        The domain of the natural-scale value.
    lower_inclusive : bool
        Whether ``lower`` itself is allowed (the nugget may be 0).
    shape : bool
        A fixed shape parameter (Matern nu, rational-quadratic alpha), not part of theta.
    required : bool
        Whether ``make_kernel`` refuses a kernel without it.
    per_coordinate : bool
        One value, or one per coordinate (anisotropic length scales).
    fit_scale : {"variance", "distance", ""}
        The data scale the fitting bounds are relative to (``""``: not fitted).
    fit_range : tuple of float
        Fitting bounds as multiples of that scale (a covaudit heuristic, common practice).
    """

    name: str
    meaning: str
    lower: float
    upper: float = math.inf
    lower_inclusive: bool = False
    shape: bool = False
    required: bool = False
    per_coordinate: bool = False
    fit_scale: str = ""
    fit_range: tuple[float, float] = (math.nan, math.nan)

    @property
    def domain(self) -> str:
        """The domain in words, e.g. ``a finite number > 0``."""
        low = f"{'>=' if self.lower_inclusive else '>'} {self.lower:g}"
        if math.isinf(self.upper):
            return f"a finite number {low}"
        return f"a finite number {low} and <= {self.upper:g}"

    def check(self, value: float, *, label: str | None = None) -> float:
        """``value`` as a float, or ``KernelParameterError`` naming the parameter and domain."""
        label = label or self.name
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise KernelParameterError(f"{label}: expected one number, got {value!r}") from None
        above = number >= self.lower if self.lower_inclusive else number > self.lower
        if not (math.isfinite(number) and above and number <= self.upper):
            raise KernelParameterError(f"{label} must be {self.domain}, got {value!r}")
        return number

    def fit_bounds(self, scale: float) -> tuple[float, float]:
        """Log-scale fitting bounds (log(lo * scale), log(hi * scale))."""
        lo, hi = self.fit_range
        return math.log(lo * scale), math.log(hi * scale)


VARIANCE = ParameterSpec(
    "variance", "marginal variance s2 of the correlated part", 0.0, required=False,
    fit_scale="variance", fit_range=(1e-4, 1e3))
LENGTHSCALE = ParameterSpec(
    "lengthscale", "correlation length l (one, or one per coordinate)", 0.0, required=True,
    per_coordinate=True, fit_scale="distance", fit_range=(1e-4, 1e2))
NUGGET = ParameterSpec(
    "nugget", "independent noise variance tau2 on the diagonal (0: exact interpolation)",
    0.0, lower_inclusive=True, fit_scale="variance", fit_range=(1e-8, 10.0))
