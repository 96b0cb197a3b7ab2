"""A solver's accuracy knob: its name, type, valid range, direction and default sweep.

Every solver has one number that trades accuracy for cost: the HODLR solver's ``tol``
(smaller is more accurate), the Vecchia solver's ``neighbours`` (larger is more accurate). A
factory declares it as an attribute, ``factorize.knob = KnobSpec(...)``; ``knob_of``
reads it and gives the default ``tol`` declaration to factories that declare none
(every plugin written against the original protocol).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Literal

from harness.infra.option_specs import OptionSpec, knob_option

KnobKind = Literal["float", "int"]
Direction = Literal["smaller", "larger"]


@dataclass(frozen=True)
class KnobSpec:
    """Declaration of one accuracy knob.

    Attributes
    ----------
    name : str
        The keyword the factory takes it by (``tol``, ``rho``).
    kind : {"float", "int"}
        Its type; an ``int`` knob refuses non-integral values.
    low, high : float
        The valid range's ends (``math.inf`` for an unbounded end).
    low_closed, high_closed : bool
        Whether ``low`` / ``high`` themselves are valid.
    more_accurate : {"smaller", "larger"}
        Which direction of the knob buys accuracy.
    default_sweep : tuple of float
        Values to audit by default, ordered from loose to tight.
    meaning : str
        One line for help texts and reports.
    """

    name: str
    kind: KnobKind
    low: float
    high: float
    low_closed: bool
    high_closed: bool
    more_accurate: Direction
    default_sweep: tuple[float, ...]
    meaning: str = ""

    def __post_init__(self) -> None:
        if self.kind not in ("float", "int"):
            raise ValueError(f"knob {self.name!r}: kind must be 'float' or 'int', "
                             f"got {self.kind!r}")
        if self.more_accurate not in ("smaller", "larger"):
            raise ValueError(f"knob {self.name!r}: more_accurate must be 'smaller' or "
                             f"'larger', got {self.more_accurate!r}")
        if not self.low < self.high:
            raise ValueError(f"knob {self.name!r}: empty range {self.range_text()}")
        self.validate(self.default_sweep, where=f"the default sweep of knob {self.name!r}")
        steps = [b - a for a, b in zip(self.default_sweep, self.default_sweep[1:],
                                       strict=False)]
        tighter = all(s < 0 for s in steps) if self.more_accurate == "smaller" else all(
            s > 0 for s in steps)
        if not tighter:
            raise ValueError(f"knob {self.name!r}: default sweep {self.default_sweep} is "
                             f"not ordered loose to tight ({self.more_accurate} is more "
                             "accurate)")

    def range_text(self) -> str:
        """The range in interval notation, e.g. ``(0, 1)`` or ``[1, inf)``."""
        left = "[" if self.low_closed else "("
        right = "]" if self.high_closed else ")"
        return f"{left}{self.low:g}, {self.high:g}{right}"

    @property
    def is_tol(self) -> bool:
        """Whether this is the protocol's ``tol`` (the factory takes it as ``tol=``)."""
        return self.name == "tol"

    def option_spec(self) -> OptionSpec:
        """The knob as an option specification (``harness.infra.option_specs``): the
        command line's ``--knob-values`` and a case file's ``knob_values`` validate
        through it, and its message shows ``range_text()``."""
        return knob_option(self.name, kind=int if self.kind == "int" else float,
                           low=self.low, high=self.high, low_closed=self.low_closed,
                           high_closed=self.high_closed, default=self.default_sweep,
                           help=self.meaning or f"accuracy knob {self.name}")

    def arguments(self, value: float | None) -> dict[str, float | None]:
        """The keyword arguments that hand ``value`` to the factory.

        The protocol is ``factorize(points, kernel, theta, *, tol, **options)``: a ``tol``
        knob is ``tol=value``; any other knob is the option named after it, with
        ``tol=None`` (``{"tol": None, "rho": 6.0}``). ``value`` None (an exact solver)
        is ``tol=None`` alone.
        """
        if self.is_tol or value is None:
            return {"tol": value}
        return {"tol": None, self.name: float(value)}

    def sorted_loose_to_tight(self, values: Iterable[float]) -> tuple[float, ...]:
        """Distinct ``values`` from the least to the most accurate."""
        distinct = {float(v) for v in values}
        return tuple(sorted(distinct, reverse=self.more_accurate == "smaller"))

    def value_text(self, value: float | None) -> str:
        """``tol 1e-06`` / ``rho = 6``: how terminal output and reports name a value."""
        if value is None:
            return "exact"
        return f"tol {value:g}" if self.is_tol else f"{self.name} = {value:g}"

    def contains(self, value: float) -> bool:
        """Whether ``value`` lies in the declared range (and is integral for ``int``)."""
        if isinstance(value, bool):
            return False
        try:
            v = float(value)
        except (TypeError, ValueError):
            return False
        if math.isnan(v):
            return False
        if self.kind == "int" and not (math.isfinite(v) and v == int(v)):
            return False
        above = v >= self.low if self.low_closed else v > self.low
        below = v <= self.high if self.high_closed else v < self.high
        return above and below

    def validate(self, values: float | Iterable[float], *, where: str) -> None:
        """Refuse any value outside the declared range.

        Raises
        ------
        ValueError
            One line naming ``where``, the knob, the first bad value and the range.
        """
        items = [values] if isinstance(values, int | float) else list(values)
        for value in items:
            if not self.contains(value):
                kind = " (an integer)" if self.kind == "int" else ""
                raise ValueError(f"{where}: knob {self.name} = {value!r} is outside its "
                                 f"valid range {self.range_text()}{kind}")


#: The declaration assumed for a factory that declares no knob: the protocol's ``tol``.
DEFAULT_TOL_KNOB = KnobSpec(
    name="tol", kind="float", low=0.0, high=1.0, low_closed=False, high_closed=False,
    more_accurate="smaller", default_sweep=(1e-2, 1e-4, 1e-6, 1e-8),
    meaning="relative compression tolerance")


def knob_of(factory: object) -> KnobSpec:
    """The ``knob`` a solver factory declares, or ``DEFAULT_TOL_KNOB`` when it has none.

    Raises
    ------
    TypeError
        When the factory's ``knob`` attribute is not a ``KnobSpec``.
    """
    spec = getattr(factory, "knob", None)
    if spec is None:
        return DEFAULT_TOL_KNOB
    if not isinstance(spec, KnobSpec):
        raise TypeError(f"{getattr(factory, '__qualname__', factory)!r}.knob is "
                        f"{type(spec).__name__}, expected a KnobSpec")
    return spec
