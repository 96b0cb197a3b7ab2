"""The check report's frontier figure: each error against the median time of one fit
evaluation (``harness.check.solver_timing``), one line per solver through its knob
values, with the limits, the safe region, the exact reference's time and the
non-dominated points marked.

Both axes are logarithmic. A log axis cannot show a missing value, a zero error or a
missing time, so such points are left out and counted in the caption (``LeftOut``), never
dropped silently. The log-likelihood error is signed in ``check.json`` (compressed minus
exact); the panel shows its magnitude, as the limit applies to it.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from harness.check.check_records import CheckResult
from harness.report.frontier_points import (
    FRONTIER_METRICS,
    limit_of,
    median_seconds,
    metric_value,
    points_of,
)
from harness.report.labels import metric_label
from harness.report.number_text import compact
from harness.report.style import THRESHOLD_STYLE, figure_rc, log_scale, plain, series_style

SAFE_SHADE: dict[str, Any] = {"color": "#009E73", "alpha": 0.12, "linewidth": 0}
EXACT_STYLE: dict[str, Any] = {"color": "#000000", "linestyle": (0, (1, 2)),
                               "linewidth": 1.4}
#: A ring around a non-dominated point (drawn larger than any series marker).
RING_STYLE: dict[str, Any] = {"marker": "o", "markersize": 13, "markerfacecolor": "none",
                              "markeredgecolor": "#000000", "markeredgewidth": 1.0,
                              "linestyle": "none"}
TIME_LABEL = "median time of one fit evaluation (s)"
#: Decades of margin around the drawn values on each log axis.
MARGIN = 3.0


@dataclass(frozen=True)
class LeftOut:
    """Points of one panel the log axes cannot show: no error value, a zero error, or no
    time (an error but no median time)."""

    no_value: int = 0
    zero: int = 0
    no_time: int = 0

    @property
    def total(self) -> int:
        return self.no_value + self.zero + self.no_time

    def words(self) -> str:
        parts = [f"{count} {what}" for count, what in (
            (self.no_value, "with no value"), (self.zero, "at zero"),
            (self.no_time, "with no time")) if count]
        return ", ".join(parts)


@dataclass(frozen=True)
class Drawn:
    """One solver's drawable points in one panel, in the order listed."""

    seconds: tuple[float, ...]
    errors: tuple[float, ...]
    safe: tuple[bool, ...]
    nondominated: tuple[bool, ...]
    picked: tuple[bool, ...]


@dataclass(frozen=True)
class FrontierFigure:
    """The figure, its caption (which counts every point left out) and the counts."""

    figure: Figure
    caption: str
    left_out: dict[str, LeftOut]


def _pick(result: CheckResult) -> tuple[str, float | None] | None:
    chosen = result.frontier.get("recommended") if result.frontier else None
    if not isinstance(chosen, Mapping):
        return None
    return str(chosen.get("solver")), chosen.get("value")


def _drawable(solver: Mapping[str, Any], name: str,
              pick: tuple[str, float | None] | None) -> tuple[Drawn, LeftOut]:
    seconds, errors, safe, nondominated, picked = [], [], [], [], []
    no_value = zero = no_time = 0
    for point in points_of(solver):
        value = metric_value(point, name)
        time = median_seconds(point)
        if value is None:
            no_value += 1
        elif value == 0:
            zero += 1
        elif time is None or time <= 0:
            no_time += 1
        else:
            seconds.append(time)
            errors.append(abs(value))
            safe.append(point.get("status") == "safe")
            nondominated.append(bool(point.get("nondominated")))
            picked.append(pick is not None and pick[0] == solver.get("given")
                          and pick[1] == point.get("knob_value"))
    return (Drawn(tuple(seconds), tuple(errors), tuple(safe), tuple(nondominated),
                  tuple(picked)), LeftOut(no_value, zero, no_time))


def _draw_solver(ax: Axes, index: int, given: str, drawn: Drawn) -> None:
    style = series_style(index)
    ax.plot(drawn.seconds, drawn.errors, label=plain(given), gid=f"solver:{given}",
            color=style.color, linestyle=style.linestyle, marker=style.marker,
            markersize=6, linewidth=1.3)
    for x, y, safe, ring, picked in zip(drawn.seconds, drawn.errors, drawn.safe,
                                        drawn.nondominated, drawn.picked, strict=True):
        if not safe:
            ax.plot([x], [y], linestyle="none", marker=style.marker, markersize=6,
                    markerfacecolor="white", markeredgecolor=style.color)
        if ring:
            ax.plot([x], [y], **RING_STYLE)
        if picked:
            ax.annotate("pick", xy=(x, y), xytext=(6, 6), textcoords="offset points",
                        fontsize=7, fontweight="bold")


def _limits(values: Sequence[float]) -> tuple[float, float]:
    return min(values) / MARGIN, max(values) * MARGIN


def _panel(ax: Axes, result: CheckResult, name: str,
           pick: tuple[str, float | None] | None) -> tuple[LeftOut, list[float]]:
    """Draw one metric's panel; return what it left out and the times it drew."""
    total = LeftOut()
    errors: list[float] = []
    times: list[float] = []
    for index, solver in enumerate(result.solvers):
        drawn, left = _drawable(solver, name, pick)
        _draw_solver(ax, index, str(solver.get("given", "")), drawn)
        total = LeftOut(total.no_value + left.no_value, total.zero + left.zero,
                        total.no_time + left.no_time)
        errors.extend(drawn.errors)
        times.extend(drawn.seconds)
    limit = limit_of(result.solvers, result.thresholds, name)
    label = metric_label(name).label
    log_scale(ax, "y")
    bottom, top = _limits(errors + ([limit] if limit is not None else []) or [1.0])
    ax.set_ylim(bottom, top)
    if limit is not None:
        ax.axhspan(bottom, limit, gid="safe", **SAFE_SHADE)
        ax.axhline(limit, gid="limit", **THRESHOLD_STYLE)
        ax.annotate(f"limit {limit:g}", xy=(0.005, limit),
                    xycoords=("axes fraction", "data"), ha="left", va="bottom", fontsize=7)
    if not errors:
        ax.text(0.5, 0.5, "nothing to draw: no positive error with a time",
                transform=ax.transAxes, ha="center", va="center", fontsize=8)
    if name == "loglik_error":   # its magnitude: |log-likelihood error| (nats)
        words, _, unit = label.partition(" (")
        label = f"|{words}| ({unit}"
    ax.set_ylabel(label)
    return total, times


def _legend_handles(result: CheckResult, exact: str) -> list[Any]:
    handles: list[Any] = [
        Line2D([], [], label=plain(str(s.get("given", ""))), **series_style(i).kwargs())
        for i, s in enumerate(result.solvers)]
    handles += [Line2D([], [], label="limit", **THRESHOLD_STYLE),
                Patch(label="safe region (under the limit)", **SAFE_SHADE),
                Line2D([], [], label=f"exact reference ({exact})", **EXACT_STYLE),
                Line2D([], [], label="non-dominated", **RING_STYLE),
                Line2D([], [], label="open marker: not safe", marker="o",
                       markerfacecolor="white", markeredgecolor="#444444",
                       linestyle="none")]
    return handles


def _caption(result: CheckResult, left_out: dict[str, LeftOut], exact: str,
             exact_seconds: float | None) -> str:
    repeats = result.frontier.get("timing_repeats") if result.frontier else None
    over = f" over {repeats} repeats" if repeats else ""
    exact_text = (f"The dotted vertical line is the exact reference ({exact}) at "
                  f"{compact(exact_seconds)} s." if exact_seconds is not None else
                  "The exact reference's time was not measured, so no vertical line "
                  "is drawn.")
    missing = [f"{metric_label(n).label}: {c.words()}" for n, c in left_out.items()
               if c.total]
    left = ("Log axes cannot show a missing value, a zero error or a missing time; left "
            "out: " + "; ".join(missing) + "." if missing else
            "No point was left out of the log axes.")
    sources = Counter(str(p["time"]["source"]) for s in result.solvers
                      for p in points_of(s)
                      if isinstance(p.get("time"), Mapping) and p["time"].get("source"))
    other = "".join(f" {count} point(s) show another time than timing repeats: {source}."
                    for source, count in sorted(sources.items()))
    empty = [str(s.get("given", "")) + f" ({s.get('status', '')})" for s in result.solvers
             if not points_of(s)]
    nothing = (" Nothing to draw for " + ", ".join(empty) + "." if empty else "")
    return (f"Each error against the median time of one fit evaluation{over} (the "
            "factorization, the log-likelihood and its score; seconds), both axes "
            "logarithmic; one line per solver through its knob "
            "values, loose to tight. The dashed line is each metric's limit and the "
            "shaded band lies under it (a safe setting also needs its uncertainty under "
            "the limit). Ringed points are non-dominated: no other point of any solver is "
            "both faster and more accurate (accuracy: the largest error as a fraction of "
            "its limit). Open markers are not safe. The "
            f"log-likelihood panel shows the error's magnitude.{other} {exact_text} "
            f"{left}{nothing}")


def frontier_figure(result: CheckResult) -> FrontierFigure | None:
    """The frontier of ``result.solvers`` (None when the check lists no solvers): one panel
    per metric of ``FRONTIER_METRICS``, sharing the time axis."""
    if not result.solvers:
        return None
    frontier = result.frontier or {}
    exact = str(frontier.get("exact") or "exact computation")
    exact_seconds = frontier.get("exact_seconds")
    exact_seconds = (float(exact_seconds) if isinstance(exact_seconds, int | float)
                     and exact_seconds > 0 else None)
    pick = _pick(result)
    left_out: dict[str, LeftOut] = {}
    with figure_rc():
        fig = Figure(figsize=(7.2, 7.6), layout="constrained")
        axes = fig.subplots(len(FRONTIER_METRICS), 1, sharex=True)
        times: list[float] = []
        for ax, name in zip(axes, FRONTIER_METRICS, strict=True):
            left_out[name], drawn = _panel(ax, result, name, pick)
            times.extend(drawn)
        for ax in axes:
            if exact_seconds is not None:
                ax.axvline(exact_seconds, gid="exact", **EXACT_STYLE)
        log_scale(axes[0], "x")
        axes[0].set_xlim(*_limits(times + ([exact_seconds] if exact_seconds else [])
                                  or [1.0]))
        axes[-1].set_xlabel(TIME_LABEL)
        fig.legend(handles=_legend_handles(result, exact), loc="outside upper center",
                   ncols=4, fontsize=7, frameon=False)
    return FrontierFigure(fig, _caption(result, left_out, exact, exact_seconds), left_out)
