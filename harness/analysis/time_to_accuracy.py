"""Time to accuracy: for each solver and size, the time of its cheapest knob value that
meets an accuracy limit, and the growth of that time in n.

A run sweeps each solver along its accuracy knob (``tol`` for hodlr, ``neighbours`` for
vecchia; ``harness.solvers.knobs``). Which value to compare across solvers is a question
of the accuracy wanted, so the comparison is made at a limit on one metric (by default
the log-likelihood error against the run's ``[verdict]`` limit, 0.1 nat):

1. at each (solver, dataset, n, seed), the knob values whose task finished with a
   measured |error| <= limit are the candidates; the cheapest of them by the cost column
   (``t_total``, the median total evaluation time over the timing repeats) is chosen;
2. the point (solver, dataset, n) is reached when every seed measured there has a
   choice, and its time is the median over seeds of the chosen times;
3. each series' reached points are fitted with the project's one power-law fit
   (``harness.model.power_law.fit_power_law``: OLS of log t on log n over the per-size
   medians, Student-t interval on the exponent; the bootstrap resamples the chosen tasks'
   per-repeat timings of ``timings.csv``).

Only measured knob values count: nothing is interpolated between knob values or between
sizes. A point none of whose knob values meets the limit (on some seed) is kept as *not
reached*, with the reason, never dropped; the fit then covers the reached sizes only.
The error compared is the measured point estimate; the verdicts' uncertainty band
(``harness.audit.rule``) stays with the verdicts.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from harness.analysis.load import RunData
from harness.analysis.scaling import MIN_SIZES, PowerLawFit, ScalingError, fit_power_law
from harness.audit.metric_names import LOGLIK_ERR_NAT, canonical_name
from harness.audit.rule import Thresholds
from harness.audit.verdict import DATASET_COLUMNS, LIMITED_COLUMNS

#: The dataset columns that tell series apart (every one but the size).
SERIES_COLUMNS: tuple[str, ...] = tuple(c for c in DATASET_COLUMNS if c != "n")
#: The default cost: the median total evaluation time over the timing repeats (seconds).
DEFAULT_COST = "t_total"


class TimeToAccuracyError(ValueError):
    """The metric, limit or cost of a time-to-accuracy analysis cannot be used."""


@dataclass(frozen=True)
class AccuracyPoint:
    """One solver at one size: the cheapest knob value meeting the limit.

    Attributes
    ----------
    n : int
        The problem size.
    seconds : float
        Median over seeds of the chosen knob value's cost; NaN when not reached.
    knob_values : tuple of float
        The chosen knob value at each seed that has one, in seed order (NaN for an exact
        solver, which has no knob).
    seeds : int
        Seeds with a task of this solver at this size.
    seeds_reached : int
        Seeds whose chosen knob value exists.
    reason : str
        Why the point is not reached; empty when it is.
    """

    n: int
    seconds: float
    knob_values: tuple[float, ...]
    seeds: int
    seeds_reached: int
    reason: str = ""

    @property
    def reached(self) -> bool:
        """Every seed measured at this size has a knob value meeting the limit."""
        return self.seeds > 0 and self.seeds_reached == self.seeds

    def to_dict(self) -> dict[str, object]:
        return {"n": self.n, "seconds": self.seconds, "knob_values": list(self.knob_values),
                "seeds": self.seeds, "seeds_reached": self.seeds_reached,
                "reached": self.reached, "reason": self.reason}


@dataclass(frozen=True)
class AccuracySeries:
    """One solver on one dataset family: its points over n and their power-law fit.

    ``fit`` is None when fewer than three sizes were reached; ``refused`` then says why.
    ``dataset`` maps each of ``SERIES_COLUMNS`` to the series' value.
    """

    solver: str
    knob_name: str
    dataset: tuple[tuple[str, str], ...]
    points: tuple[AccuracyPoint, ...]
    fit: PowerLawFit | None
    refused: str = ""

    @property
    def not_reached(self) -> tuple[int, ...]:
        """The sizes at which no knob value met the limit on every seed."""
        return tuple(p.n for p in self.points if not p.reached)

    def to_dict(self) -> dict[str, object]:
        return {"solver": self.solver, "knob_name": self.knob_name,
                "dataset": dict(self.dataset),
                "points": [p.to_dict() for p in self.points],
                "fit": None if self.fit is None else self.fit.to_dict(),
                "refused": self.refused}


@dataclass(frozen=True)
class TimeToAccuracy:
    """Every series of a run at one accuracy limit.

    Attributes
    ----------
    metric : str
        The canonical name of the limited metric (``harness.audit.metric_names``).
    limit : float
        The largest |error| that meets the target.
    cost : str
        The results column the cheapest knob value is chosen by (seconds).
    series : tuple of AccuracySeries
        Sorted by dataset, then solver.
    """

    metric: str
    limit: float
    cost: str
    series: tuple[AccuracySeries, ...]

    def labels(self) -> tuple[str, ...]:
        """Each series' name: its solver, followed by the dataset values that differ
        between series when the run holds more than one dataset family."""
        varying = [i for i, column in enumerate(SERIES_COLUMNS)
                   if len({s.dataset[i][1] for s in self.series}) > 1]
        out = []
        for s in self.series:
            parts = [s.dataset[i][1] for i in varying if s.dataset[i][1]]
            out.append(s.solver + (f" ({', '.join(parts)})" if parts else ""))
        return tuple(out)

    def to_dict(self) -> dict[str, object]:
        return {"metric": self.metric, "limit": self.limit, "cost": self.cost,
                "series": [s.to_dict() for s in self.series]}


def knob_text(knob_name: str, value: float) -> str:
    """``tol = 1e-06``, ``neighbours = 40``; ``exact`` for a solver without a knob value."""
    if not math.isfinite(value):
        return "exact"
    return f"{knob_name or 'tol'} = {value:g}"


def default_limit(metric: str, thresholds: Thresholds) -> float:
    """The verdicts' limit on ``metric`` (any of its names) in ``thresholds``.

    Raises
    ------
    TimeToAccuracyError
        When the verdicts put no limit on the metric.
    """
    wanted = canonical_name(metric)
    for column, attribute in LIMITED_COLUMNS:
        if canonical_name(column) == wanted:
            return float(getattr(thresholds, attribute))
    limited = ", ".join(canonical_name(c) for c, _ in LIMITED_COLUMNS)
    raise TimeToAccuracyError(f"time to accuracy: the verdicts set no limit on metric "
                              f"{metric!r}; give a limit or use one of {limited}")


def _series_label_columns(results: pd.DataFrame) -> pd.DataFrame:
    frame = results.copy()
    for column in SERIES_COLUMNS:
        values = frame[column] if column in frame else pd.Series("", index=frame.index)
        frame[column] = ["" if pd.isna(v) else str(v) for v in values]
    return frame


def _repeats(run: RunData, keys: Sequence[tuple[int, str]], cost: str
             ) -> dict[float, list[float]] | None:
    """Per-repeat timings of the chosen tasks, pooled per size (None when not recorded)."""
    if not cost.startswith("t_") or run.timings.empty or not keys:
        return None
    phase = cost[2:]
    chosen = pd.DataFrame(keys, columns=["n", "key"])
    timed = run.timings[run.timings["phase"] == phase].merge(chosen, on="key")
    if timed.empty:
        return None
    return {float(n): g["seconds"].tolist() for n, g in timed.groupby("n")}


def _point(n: int, frame: pd.DataFrame, metric: str, limit: float, cost: str
           ) -> tuple[AccuracyPoint, list[tuple[float, str]]]:
    """The point at size ``n`` from all its tasks, and each seed's (seconds, key)."""
    seed = frame["seed"].astype(float).fillna(-1.0)        # a run without seeds: one
    seeds = sorted(set(seed))
    ok = frame[(frame["status"] == "ok").to_numpy()]
    error = pd.to_numeric(ok[metric], errors="coerce").abs()
    seconds = pd.to_numeric(ok[cost], errors="coerce")
    meets = (error <= limit).to_numpy()
    timed = meets & (seconds > 0).to_numpy()
    chosen: list[tuple[float, str]] = []
    values: list[float] = []
    for s in seeds:
        at_seed = timed & (seed[ok.index] == s).to_numpy()
        if not at_seed.any():
            continue
        candidates = pd.DataFrame({"seconds": seconds[at_seed], "knob": ok["knob_value"]
                                   [at_seed].astype(float), "key": ok["key"][at_seed]})
        best = candidates.sort_values(["seconds", "knob"], kind="stable").iloc[0]
        chosen.append((float(best["seconds"]), str(best["key"])))
        values.append(float(best["knob"]))
    reached = len(chosen)
    reason = ""
    if reached < len(seeds):
        if ok.empty:
            statuses = ", ".join(sorted(set(frame["status"].astype(str)) - {""}))
            reason = f"no task finished at n = {n} ({statuses or 'no status'})"
        elif not meets.any():
            reason = f"no knob value met the limit at n = {n}"
        elif not timed.any():
            reason = f"the knob values meeting the limit at n = {n} were not timed"
        else:
            reason = f"met the limit at n = {n} on {reached} of {len(seeds)} seeds"
    median = float(np.median([s for s, _ in chosen])) if chosen and not reason else math.nan
    return AccuracyPoint(n=n, seconds=median, knob_values=tuple(values), seeds=len(seeds),
                         seeds_reached=reached, reason=reason), chosen


def time_to_accuracy(
    run: RunData,
    *,
    limit: float,
    metric: str = LOGLIK_ERR_NAT,
    cost: str = DEFAULT_COST,
    level: float = 0.95,
    n_boot: int = 500,
    rng: np.random.Generator | None = None,
) -> TimeToAccuracy:
    """The time to accuracy of every solver of ``run`` (see the module docstring).

    Parameters
    ----------
    run : RunData
        A loaded run (``harness.analysis.load.load_run``).
    limit : float
        The largest |error| of ``metric`` that meets the target (positive).
    metric : str
        Any name of the metric (``harness.audit.metric_names``); the canonical column
        ``loglik_err_nat`` by default.
    cost : str
        The results column to minimize, in seconds (``t_total`` by default).
    level : float
        Confidence level of the fits' intervals.
    n_boot : int
        Bootstrap replicates of each fit.
    rng : numpy.random.Generator, optional
        The bootstrap stream, shared in series order.

    Raises
    ------
    TimeToAccuracyError
        When the limit is not a positive number or a column is not in the results.
    """
    if not (isinstance(limit, int | float) and math.isfinite(limit) and limit > 0):
        raise TimeToAccuracyError(f"time to accuracy: the limit must be a positive number, "
                                  f"got {limit!r}")
    column = canonical_name(metric)
    results = run.results
    for name, wanted in (("metric", column), ("cost", cost)):
        if wanted not in results:
            raise TimeToAccuracyError(f"time to accuracy: {run.path}: results.csv has no "
                                      f"column {wanted!r} (the {name})")
    gen = np.random.default_rng(rng)
    frame = _series_label_columns(results)
    series: list[AccuracySeries] = []
    keys = ["solver", "knob_name", *SERIES_COLUMNS]
    for group, sub in frame.groupby(keys, sort=True, dropna=False):
        solver, knob_name, *dataset = (str(v) for v in group)
        points: list[AccuracyPoint] = []
        fitted: list[tuple[int, float]] = []
        chosen_keys: list[tuple[int, str]] = []
        for n, at_n in sub.groupby("n", sort=True):
            point, chosen = _point(int(n), at_n, column, float(limit), cost)
            points.append(point)
            if point.reached:
                fitted += [(point.n, seconds) for seconds, _ in chosen]
                chosen_keys += [(point.n, key) for _, key in chosen]
        fit, refused = None, ""
        reached = sorted({n for n, _ in fitted})
        if len(reached) < MIN_SIZES:
            refused = (f"no fit: reached at {len(reached)} size(s)"
                       + (f" ({', '.join(str(n) for n in reached)})" if reached else "")
                       + f"; a power-law fit needs {MIN_SIZES}")
        else:
            try:
                fit = fit_power_law([n for n, _ in fitted], [s for _, s in fitted],
                                    repeats=_repeats(run, chosen_keys, cost), level=level,
                                    n_boot=n_boot, rng=gen)
            except ScalingError as exc:
                refused = str(exc)
        series.append(AccuracySeries(solver=solver, knob_name=knob_name,
                                     dataset=tuple(zip(SERIES_COLUMNS, dataset,
                                                       strict=True)),
                                     points=tuple(points), fit=fit, refused=refused))
    return TimeToAccuracy(metric=column, limit=float(limit), cost=cost,
                          series=tuple(series))
