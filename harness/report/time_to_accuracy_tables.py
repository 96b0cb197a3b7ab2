"""The time-to-accuracy tables as text: one row per (solver, n) with the knob value chosen
and its time, and one row per solver with its fitted exponent; shared by the run report
and the methods export (``harness.analysis.time_to_accuracy`` computes them).

A point whose knob values all miss the limit reads ``not reached at n = ...`` in the knob
column, with the reason beside it; no row is left out.
"""

from __future__ import annotations

import math
from collections import Counter

import pandas as pd

from harness.analysis.time_to_accuracy import (
    AccuracyPoint,
    AccuracySeries,
    TimeToAccuracy,
    knob_text,
)
from harness.report.labels import metric_label

DASH = "\u2013"


def target_text(result: TimeToAccuracy) -> str:
    """The accuracy target in words: ``log-likelihood error (nats) <= 0.1``."""
    return f"{metric_label(result.metric).label} \u2264 {result.limit:g}"


def not_reached_text(n: int) -> str:
    """How a point none of whose knob values meets the limit is shown."""
    return f"not reached at n = {n}"


def _chosen_text(series: AccuracySeries, point: AccuracyPoint) -> str:
    """The knob value chosen at a point; with the seeds counted when they chose apart."""
    if not point.reached:
        return not_reached_text(point.n)
    counts = Counter(point.knob_values)
    if len(counts) == 1:
        return knob_text(series.knob_name, point.knob_values[0])
    return ", ".join(f"{knob_text(series.knob_name, value)} ({count} of {point.seeds} seeds)"
                     for value, count in sorted(counts.items()))


def points_table(result: TimeToAccuracy) -> pd.DataFrame:
    """One row per solver and size: the knob value chosen, the median time, the seeds."""
    rows = []
    for label, series in zip(result.labels(), result.series, strict=True):
        for point in series.points:
            rows.append({"solver": label, "n": str(point.n),
                         "knob value": _chosen_text(series, point),
                         "time (s)": f"{point.seconds:.3g}" if point.reached else DASH,
                         "seeds": f"{point.seeds_reached} of {point.seeds}",
                         "note": point.reason})
    return pd.DataFrame(rows, columns=["solver", "n", "knob value", "time (s)", "seeds",
                                       "note"])


def _interval(low: float, high: float) -> str:
    return DASH if math.isnan(low) else f"[{low:.2f}, {high:.2f}]"


def fits_table(result: TimeToAccuracy, *, level: float) -> pd.DataFrame:
    """One row per solver: the exponent b of time to accuracy = c n^b with its intervals
    over the reached sizes, and the sizes not reached."""
    ci = f"{100 * level:g}% CI"
    rows = []
    for label, series in zip(result.labels(), result.series, strict=True):
        fit = series.fit
        missed = ", ".join(str(n) for n in series.not_reached)
        rows.append({
            "solver": label,
            "sizes fitted": DASH if fit is None else
            f"{int(min(fit.sizes))}-{int(max(fit.sizes))} ({fit.k})",
            "exponent b": DASH if fit is None else f"{fit.slope:.2f}",
            ci: DASH if fit is None else _interval(fit.ci_low, fit.ci_high),
            "bootstrap": DASH if fit is None else _interval(fit.boot_low, fit.boot_high),
            "not reached at n": missed or DASH,
            "note": series.refused})
    return pd.DataFrame(rows, columns=["solver", "sizes fitted", "exponent b", ci,
                                       "bootstrap", "not reached at n", "note"])
