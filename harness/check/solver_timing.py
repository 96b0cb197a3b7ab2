"""The time of one fit evaluation of a solver at each of its knob values.

A fit evaluation is what a maximum-likelihood fit asks of the solver at every step: the
factorization at the fitted parameters, the log-likelihood and its score (Hutch++ traces,
``harness.check.fit_engines.CompressedEngine``, the same path for every solver). Per knob
value one untimed warm-up call comes first (it carries first-call compilation and
caches; its time is reported apart as ``first_call_seconds``, and its peak traced
allocation as ``peak_bytes``), then ``repeats`` timed calls whose median is the point's
time. Repeats are not solver seeds: every call uses the solver's first seed. A value
whose warm-up call breaks down numerically (``harness.audit.solver_calls.is_breakdown``;
its audit already says "unsafe: breakdown") gets no time and no repeats, and the other
values are still timed; any other error is the solver's failure.

The clock is injected (``Stopwatch``): ``ElapsedStopwatch`` reads ``time.perf_counter``;
``ScriptedStopwatch`` returns given durations, so tests know the timings exactly.
``peak_bytes`` is the warm-up's peak traced allocation (``tracemalloc``, which sees
numpy's buffers but not the scratch memory of compiled kernels); the check reports the
larger of it and the factorization's own ``nbytes``.
"""

from __future__ import annotations

import math
import statistics
import time
import tracemalloc
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol, cast

import numpy as np

from harness.audit.solver_calls import is_breakdown
from harness.audit.solver_seeds import solver_seed
from harness.check.fit_engines import CompressedEngine
from harness.model.kernels import Kernel
from harness.solvers.registry import ResolvedSolver

#: Timed repeats per knob value: below ``FEWER_REPEATS_FROM`` points, and from there on.
DEFAULT_REPEATS, LARGE_N_REPEATS, FEWER_REPEATS_FROM = 5, 3, 65_536


def timing_machine() -> dict[str, Any]:
    """Where the times were measured: the CPU and the thread settings of the BLAS and
    numba pools (the same for every solver of a check)."""
    from harness.audit.timing import thread_settings
    from harness.infra.machine import cpu_description

    return {"cpu": cpu_description(), "threads": thread_settings()}


def default_repeats(n: int) -> int:
    """5 timed fit evaluations below 65,536 points, 3 from there (issue contract)."""
    return DEFAULT_REPEATS if n < FEWER_REPEATS_FROM else LARGE_N_REPEATS


class Stopwatch(Protocol):
    """Times one call: ``measure(label, call)`` runs ``call`` and returns its seconds."""

    def measure(self, label: str, call: Callable[[], object]) -> float:
        ...


@dataclass(frozen=True)
class ElapsedStopwatch:
    """Wall-clock seconds of the call (``time.perf_counter``)."""

    def measure(self, label: str, call: Callable[[], object]) -> float:
        start = time.perf_counter()
        call()
        return time.perf_counter() - start


@dataclass(frozen=True)
class ScriptedStopwatch:
    """Returns a scripted duration for each call instead of its elapsed time.

    ``seconds`` maps a label (``"<solver>"`` for every knob value of that solver, or
    ``"<solver>@<value>"`` for one, the more specific winning; ``"exact"`` for the exact
    computation) to the duration each timed call reports; a label without an entry
    reports ``default``. With ``run_calls`` False the calls are not made at all.
    """

    seconds: Mapping[str, float] = field(default_factory=dict)
    default: float = 1.0
    run_calls: bool = True

    def measure(self, label: str, call: Callable[[], object]) -> float:
        if self.run_calls:
            call()
        solver = label.split("@", 1)[0]
        return float(self.seconds.get(label, self.seconds.get(solver, self.default)))


@dataclass(frozen=True)
class PointTiming:
    """Timing of one knob value (module docstring)."""

    repeats: tuple[float, ...]
    first_call_seconds: float
    peak_bytes: int

    @property
    def seconds(self) -> float:
        """Median of the repeats (NaN without any)."""
        return statistics.median(self.repeats) if self.repeats else math.nan

    def to_dict(self) -> dict[str, Any]:
        finite = math.isfinite(self.seconds)
        return {"seconds": self.seconds if finite else None, "repeats": list(self.repeats),
                "first_call_seconds": self.first_call_seconds, "peak_bytes": self.peak_bytes,
                "source": "fit evaluations"}


def time_fit_evaluations(points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                         solver: ResolvedSolver, label: str, values: Sequence[float],
                         options: Mapping[str, object], base_seed: int, repeats: int,
                         stopwatch: Stopwatch | None = None) -> tuple[PointTiming, ...]:
    """One ``PointTiming`` per knob value in ``values`` (module docstring).

    Parameters
    ----------
    points, y : ndarray
        All the check's points and values.
    kernel : Kernel
        The model at the fitted (or fixed) parameters.
    solver : ResolvedSolver
        Its knob reaches the factory as ``KnobSpec.arguments`` says.
    label : str
        The solver as the user spelled it (the stopwatch's label, with ``@value``).
    options : mapping
        The factory's other options (leaf size).
    base_seed : int
        The check's seed; every call uses the solver's first seed.
    repeats : int
        Timed calls per value, at least 1.
    """
    if repeats < 1:
        raise ValueError(f"repeats must be at least 1, got {repeats}")
    watch: Stopwatch = stopwatch or ElapsedStopwatch()
    timings = []
    for value in values:
        arguments = solver.knob.arguments(value)
        engine = CompressedEngine(points, y, kernel, mean=mean,
                                  tol=cast(float, arguments.pop("tol")),
                                  seed=solver_seed(base_seed, 0), solver=solver,
                                  options=dict(options) | arguments)

        def evaluate(engine: CompressedEngine = engine) -> object:
            return engine(kernel.theta)

        tracemalloc.start()
        try:
            first = watch.measure(f"{label}@{value:g}", evaluate)
            _, traced_peak = tracemalloc.get_traced_memory()
        except Exception as exc:
            if not is_breakdown(exc):
                raise
            # a value whose factorization breaks down (its audit says "unsafe:
            # breakdown") has no time; the other values are still timed
            timings.append(PointTiming(repeats=(), first_call_seconds=math.nan, peak_bytes=0))
            continue
        finally:
            tracemalloc.stop()
        timed = tuple(watch.measure(f"{label}@{value:g}", evaluate) for _ in range(repeats))
        timings.append(PointTiming(repeats=timed, first_call_seconds=first,
                                   peak_bytes=int(traced_peak)))
    return tuple(timings)

