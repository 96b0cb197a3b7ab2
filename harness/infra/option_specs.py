"""Option specifications: one declaration per option, one validator, one core message.

An option that exists in more than one of the command line, a case file and the check
pipeline is declared here once (``OptionSpec``: name, type, range, default, help). The
command line takes its ``argparse`` type from the spec (``OptionSpec.argparse_type``), the
case-file reader and the pipeline call ``OptionSpec.validate`` with where the value came
from, so one bad value gives the same core message whichever way it arrives:

    --solver-seeds: expected an integer in [1, 1000], got 0
    case.toml:reference.ladder_factor: expected a number > 1, got 0.5

The constraints follow the model of scikit-learn's declared ``_parameter_constraints``
(``Interval(Real, 0, None, closed="neither")``, ``StrOptions({...})``). ``check_values``
validates a list of values against an interval with the same message, for declarations
that are not options of their own (a solver's knob values).

This module is infrastructure, the lowest layer: it imports nothing from ``harness``.
"""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any, Literal

__all__ = [
    "HOLDOUT_FRACTION", "HOLDOUT_POINTS", "IGNORE_BELOW", "LADDER_FACTOR", "MAX_RATIO",
    "MISSING_TASKS", "PRECONDITIONER", "PROBES", "SOLVER_SEEDS", "SOLVER_TIMEOUT", "SPECS",
    "SPEED_CHECKS", "TOLERANCE", "VARIANCE_POINTS", "Interval", "KnobRange",
    "OptionError", "OptionSpec", "StrOptions", "check_values", "knob_option",
]

Closed = Literal["both", "left", "right", "neither"]


class OptionError(ValueError):
    """A value outside its option's specification; ``str`` is ``where: core message``."""

    def __init__(self, where: str, core: str) -> None:
        super().__init__(f"{where}: {core}" if where else core)
        self.where = where
        self.core = core


@dataclass(frozen=True)
class Interval:
    """Numbers (``kind`` int or float) between ``low`` and ``high`` (None: unbounded).

    ``closed`` says which ends belong to the interval, as in scikit-learn's ``Interval``;
    ``noun`` names a value in messages (default "an integer" or "a number").
    """

    kind: type
    low: float | None
    high: float | None
    closed: Closed = "both"
    noun: str | None = None

    def describe(self) -> str:
        noun = self.noun or ("an integer" if self.kind is int else "a number")
        low_in = self.closed in ("both", "left")
        high_in = self.closed in ("both", "right")
        if self.low is not None and self.high is not None:
            return (f"{noun} in {'[' if low_in else '('}{self.low:g}, {self.high:g}"
                    f"{']' if high_in else ')'}")
        if self.low is not None:
            return f"{noun} {'>=' if low_in else '>'} {self.low:g}"
        if self.high is not None:
            return f"{noun} {'<=' if high_in else '<'} {self.high:g}"
        return f"{noun}"

    def problem(self, value: object) -> str | None:
        """The core message for ``value``, or None when it belongs to the interval."""
        expected = f"expected {self.describe()}, got {value!r}"
        if isinstance(value, bool) or not isinstance(value, int | float):
            return expected
        if not math.isfinite(value) or (self.kind is int and value != int(value)):
            return expected
        low_in = self.closed in ("both", "left")
        high_in = self.closed in ("both", "right")
        if self.low is not None and (value < self.low or (value == self.low and not low_in)):
            return expected
        if self.high is not None and (value > self.high
                                      or (value == self.high and not high_in)):
            return expected
        return None


@dataclass(frozen=True)
class KnobRange:
    """The values of a solver's accuracy knob: ``name`` in a range written in interval
    notation (``[1, inf]``, ``(0, 1)``), either end possibly infinite and included.

    Unlike ``Interval`` an infinite end may belong to the range (``rho = inf``, the
    exact likelihood); NaN never does. ``kind`` int refuses non-integral values.
    """

    name: str
    kind: type
    low: float
    high: float
    low_closed: bool
    high_closed: bool

    def range_text(self) -> str:
        """The range as ``[low, high)`` and the like (the same text as
        ``harness.solvers.knobs.KnobSpec.range_text``)."""
        return (f"{'[' if self.low_closed else '('}{self.low:g}, {self.high:g}"
                f"{']' if self.high_closed else ')'}")

    def describe(self) -> str:
        noun = "an integer" if self.kind is int else "a number"
        return f"{self.name} as {noun} in {self.range_text()}"

    def problem(self, value: object) -> str | None:
        expected = f"expected {self.describe()}, got {value!r}"
        if isinstance(value, bool) or not isinstance(value, int | float) or math.isnan(value):
            return expected
        if self.kind is int and not (math.isfinite(value) and value == int(value)):
            return expected
        above = value >= self.low if self.low_closed else value > self.low
        below = value <= self.high if self.high_closed else value < self.high
        return None if above and below else expected


@dataclass(frozen=True)
class StrOptions:
    """One of a fixed set of strings."""

    options: frozenset[str]

    def describe(self) -> str:
        return "one of " + ", ".join(sorted(self.options))

    def problem(self, value: object) -> str | None:
        if isinstance(value, str) and value in self.options:
            return None
        return f"expected {self.describe()}, got {value!r}"


@dataclass(frozen=True)
class OptionSpec:
    """One option: its name, type, range, default and help.

    Attributes
    ----------
    name : str
        The option's name (the pipeline's field).
    kind : type
        ``int``, ``float`` or ``str``.
    constraint : Interval or StrOptions
        The values it accepts.
    default : object
        Its default.
    help : str
        One line for ``--help`` and the documentation.
    """

    name: str
    kind: type
    constraint: Interval | KnobRange | StrOptions
    default: Any
    help: str

    def problem(self, value: object) -> str | None:
        """The core message for ``value`` (None when it is valid)."""
        return self.constraint.problem(value)

    def validate(self, value: Any, *, where: str) -> Any:
        """``value`` when valid, else ``OptionError`` prefixed by ``where`` (the flag, or
        ``file.toml:key``)."""
        core = self.problem(value)
        if core is not None:
            raise OptionError(where, core)
        return float(value) if self.kind is float else value

    def parse(self, text: str) -> Any:
        """``text`` converted to ``kind`` (text that is not a number stays text, so the
        core message shows it as given) and validated; ``OptionError`` without a prefix."""
        value: Any = text
        if self.kind in (int, float):
            try:
                number = float(text)
                value = int(number) if self.kind is int and number == int(number) else number
            except (ValueError, OverflowError):
                value = text
        return self.validate(value, where="")

    def argparse_type(self) -> Callable[[str], Any]:
        """An ``argparse`` ``type=``: argparse prefixes the flag to the core message."""
        def convert(text: str) -> Any:
            try:
                return self.parse(text)
            except OptionError as exc:
                raise argparse.ArgumentTypeError(exc.core) from None

        convert.__name__ = f"{self.name} value"
        return convert

    def parse_list(self, text: str, *, where: str) -> tuple[Any, ...]:
        """Comma-separated values, each validated; ``OptionError`` prefixed by ``where``."""
        items = [t.strip() for t in text.split(",") if t.strip()]
        if not items:
            raise OptionError(where, f"expected a comma-separated list of "
                                     f"{self.constraint.describe()} values, got {text!r}")
        try:
            return tuple(self.parse(t) for t in items)
        except OptionError as exc:
            raise OptionError(where, exc.core) from None


def check_values(values: Iterable[object], interval: Interval, *, where: str
                 ) -> list[object]:
    """Every value of ``values`` in ``interval``, else ``OptionError`` prefixed by
    ``where`` naming the first bad one (for lists of knob values and the like)."""
    out = list(values)
    for value in out:
        core = interval.problem(value)
        if core is not None:
            raise OptionError(where, core)
    return out


def knob_option(name: str, *, kind: type, low: float, high: float, low_closed: bool,
                high_closed: bool, default: Any, help: str) -> OptionSpec:
    """The option specification of a solver's accuracy knob (``--knob-values``, a case
    file's ``knob_values``): its core message names the knob and shows its range::

        --knob-values: expected rho as a number in [1, inf], got 0.5
    """
    return OptionSpec(name, kind, KnobRange(name, kind, float(low), float(high), low_closed,
                                            high_closed), default, help)


#: Seeds of the solver's randomness per tolerance (``check --solver-seeds``).
SOLVER_SEEDS = OptionSpec(
    "solver_seeds", int, Interval(int, 1, 1000), 3,
    "seeds of the solver's randomness per tolerance; the worst decides")
#: Timed fit evaluations per (solver, knob value) on the frontier (``check
#: --timing-repeats``); the default (None) is 5 below 65,536 points and 3 from there.
TIMING_REPEATS = OptionSpec(
    "timing_repeats", int, Interval(int, 1, 100), None,
    "timed fit evaluations per (solver, knob value), after an untimed warm-up")
#: Fraction of the points held out for the kriging evaluation (``check --holdout``).
HOLDOUT_FRACTION = OptionSpec(
    "holdout", float, Interval(float, 0.0, 0.5, closed="right"), 0.1,
    "fraction of the points held out for kriging")
#: A compression tolerance (``--tolerances``, ``evaluate --tol``, a case file's
#: ``[[solvers]] tolerances``).
TOLERANCE = OptionSpec(
    "tolerance", float, Interval(float, 0.0, 1.0, closed="neither", noun="a tolerance"),
    1e-8,
    "compression tolerance")
#: The ladder reference is the solver at tol / ladder_factor.
LADDER_FACTOR = OptionSpec(
    "ladder_factor", float, Interval(float, 1.0, None, closed="neither"), 100.0,
    "ladder reference: the solver at tol / factor")
#: Rademacher probe vectors of a stochastic trace estimate.
PROBES = OptionSpec(
    "probes", int, Interval(int, 1, None), 16,
    "probe vectors of a stochastic trace estimate")
#: Most held-out points of the kriging evaluation, whatever the fraction (``check
#: --holdout-points``): each costs one product with a cross-covariance column.
HOLDOUT_POINTS = OptionSpec(
    "holdout_points", int, Interval(int, 1, None), 2000,
    "most points held out for kriging (means), whatever --holdout says")
#: Most held-out points that also get a kriging variance (``check --variance-points``):
#: each costs one solve.
VARIANCE_POINTS = OptionSpec(
    "variance_points", int, Interval(int, 1, None), 256,
    "most held-out points whose kriging variance is computed (one solve each)")

#: Seconds one call into the solver under test may take in its child process (``check
#: --solver-timeout``, ``evaluate --task-timeout``); the default (None) is chosen from n by
#: ``harness.infra.solver_timeout.default_solver_timeout``.
SOLVER_TIMEOUT = OptionSpec(
    "solver_timeout", float,
    Interval(float, 0.0, 7 * 86400.0, closed="right", noun="a number of seconds"), None,
    "seconds one call into the solver under test may take (default: from n)")

#: The regression gate (``compare``): the largest ratio new / baseline a metric may reach
#: (``--max-ratio METRIC=R``; default per metric, 2 for errors, 1.25 for times).
MAX_RATIO = OptionSpec(
    "max_ratio", float, Interval(float, 1.0, None, noun="a ratio"), None,
    "largest allowed ratio new / baseline of one metric")
#: The regression gate: an error below this value never counts as a regression
#: (``--ignore-below METRIC=VALUE``; default per metric, round-off level).
IGNORE_BELOW = OptionSpec(
    "ignore_below", float, Interval(float, 0.0, None, noun="an error value"), None,
    "error value under which a metric never counts as a regression")
#: The regression gate: when speed and memory are compared (``--speed-checks``).
SPEED_CHECKS = OptionSpec(
    "speed_checks", str, StrOptions(frozenset({"same-machine", "off", "any-machine"})),
    "same-machine",
    "compare speed and memory: same-machine (only when the machine fingerprints match), "
    "off, or any-machine")
#: The regression gate: what baseline tasks absent from the new run are (``--missing-tasks``).
MISSING_TASKS = OptionSpec(
    "missing_tasks", str, StrOptions(frozenset({"fail", "list"})), "fail",
    "baseline tasks absent from the new run: fail (a regression) or list (reported only)")
#: The built-in solver that preconditions the exact-operator reference (``check
#: --preconditioner``; ``harness.audit.operator_preconditioner``).
PRECONDITIONER = OptionSpec(
    "preconditioner", str, StrOptions(frozenset({"vecchia", "hodlr"})), "hodlr",
    "the exact-operator reference's preconditioner: hodlr (tol 1e-10) or vecchia "
    "(neighbours chosen by a pilot; less memory, more iterations)")

SPECS: Sequence[OptionSpec] = (SOLVER_SEEDS, HOLDOUT_FRACTION, TOLERANCE, LADDER_FACTOR,
                               PROBES, HOLDOUT_POINTS, VARIANCE_POINTS, SOLVER_TIMEOUT,
                               MAX_RATIO, IGNORE_BELOW, SPEED_CHECKS, MISSING_TASKS,
                               PRECONDITIONER)
