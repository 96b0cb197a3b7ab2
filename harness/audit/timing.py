"""Wall-clock timing of task phases and memory measurement.

Timing follows common benchmarking practice: ``warmup`` untimed calls (JIT compilation,
caches, page faults), then ``repeats`` timed calls with ``time.perf_counter``; the
minimum is the least-disturbed run, the median and interquartile range show the spread.

Memory: ``tracemalloc`` peak of the Python-tracked allocations during one call (numpy
arrays are tracked through ``PyTraceMalloc_Track``; memory allocated inside BLAS/LAPACK
or numba-compiled code that bypasses numpy's allocator is not), and the process peak
resident set size from ``resource.getrusage`` (``ru_maxrss``: the high-water mark of the
whole process since it started, so in a reused worker it is an upper bound).
"""

from __future__ import annotations

import resource
import sys
import time
import tracemalloc
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np

T = TypeVar("T")


@dataclass(frozen=True)
class PhaseTiming:
    """Seconds of ``repeats`` timed calls of one phase, after ``warmup`` untimed ones."""

    phase: str
    samples: tuple[float, ...]
    warmup: int

    @property
    def minimum(self) -> float:
        return float(min(self.samples))

    @property
    def median(self) -> float:
        return float(np.median(self.samples))

    @property
    def iqr(self) -> float:
        """Interquartile range, numpy's default (linear) percentile interpolation."""
        q75, q25 = np.percentile(self.samples, [75, 25])
        return float(q75 - q25)

    def to_dict(self) -> dict[str, Any]:
        return {"phase": self.phase, "samples": list(self.samples), "warmup": self.warmup,
                "min": self.minimum, "median": self.median, "iqr": self.iqr}


def time_phase(phase: str, fn: Callable[[], T], *, repeats: int, warmup: int
               ) -> tuple[PhaseTiming, T]:
    """Time ``fn``; returns the timing and the result of the last call."""
    if repeats < 1:
        raise ValueError(f"repeats must be >= 1, got {repeats!r}")
    result: T | None = None
    for _ in range(warmup):
        result = fn()
    samples = []
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()
        samples.append(time.perf_counter() - start)
    return PhaseTiming(phase=phase, samples=tuple(samples), warmup=warmup), result  # type: ignore[return-value]


@dataclass(frozen=True)
class MemoryUse:
    """Peak traced bytes during one call and the process peak RSS after it (bytes)."""

    traced_peak: int
    process_peak_rss: int

    def to_dict(self) -> dict[str, int]:
        return {"traced_peak_bytes": self.traced_peak,
                "process_peak_rss_bytes": self.process_peak_rss}


def peak_rss() -> int:
    """Process peak resident set size in bytes (``ru_maxrss`` is KiB on Linux, bytes on macOS)."""
    value = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(value if sys.platform == "darwin" else value * 1024)


def measure_memory(fn: Callable[[], T]) -> tuple[MemoryUse, T]:
    """Run ``fn`` under ``tracemalloc`` and report its peak (see module docstring)."""
    already = tracemalloc.is_tracing()
    if not already:
        tracemalloc.start()
    tracemalloc.reset_peak()
    base, _ = tracemalloc.get_traced_memory()
    try:
        result = fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        if not already:
            tracemalloc.stop()
    return MemoryUse(traced_peak=max(0, peak - base), process_peak_rss=peak_rss()), result


def thread_settings() -> dict[str, Any]:
    """BLAS/OpenMP thread pools (threadpoolctl) and numba's thread count, as set now."""
    from threadpoolctl import threadpool_info

    pools = [{"api": p.get("internal_api"), "threads": p.get("num_threads"),
              "version": p.get("version")} for p in threadpool_info()]
    try:
        import numba

        numba_threads = int(numba.get_num_threads())
    except ImportError:
        numba_threads = None
    return {"blas": pools, "numba": numba_threads}
