"""Figures of the check report, drawn with matplotlib's object API (``Figure``, no pyplot
state): error against tolerance per metric with the limits and the recommendation marked,
speed-up against tolerance, and a map of the points with the kriging holdout marked.

Readable in grey scale: verdicts differ by marker shape and fill, lines by dash pattern,
and every reference line is labelled in words. Every axis label ends with its unit in
parentheses. A knob value whose solver broke down (no metric, no time) is not dropped: it
is marked at the top of every panel by a down-pointing triangle labelled ``broke down``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter

from harness.check.check_records import CheckResult, ToleranceResult
from harness.report.labels import metric_label
from harness.report.style import THRESHOLD_STYLE, figure_rc, log_scale

#: Marker of each verdict: shape and fill differ, so grey-scale prints keep them apart.
VERDICT_MARKERS: dict[str, dict[str, Any]] = {
    "safe": {"marker": "o", "markerfacecolor": "#0072B2", "markeredgecolor": "#0072B2"},
    "unsafe": {"marker": "X", "markerfacecolor": "#D55E00", "markeredgecolor": "#000000"},
    "unresolved": {"marker": "s", "markerfacecolor": "white",
                   "markeredgecolor": "#444444"},
}
RECOMMENDED_STYLE: dict[str, Any] = {"color": "#000000", "linestyle": (0, (1, 2)), "linewidth": 1.4}
#: A knob value without a value to draw (the solver broke down): at the top of the panel.
BROKEN_STYLE: dict[str, Any] = {"marker": "v", "markersize": 8, "linestyle": "none",
                                "markerfacecolor": "#D55E00", "markeredgecolor": "#000000"}
BROKEN_LABEL = "broke down"
#: Height of the broken-down marker, in axes fractions.
BROKEN_HEIGHT = 0.93
#: Metrics drawn against tolerance (those with a limit, then the microergodic shift).
ERROR_METRICS: tuple[str, ...] = ("loglik_error", "loglik_error_extrapolated",
                                  "param_shift_se", "kriging_mean_sd",
                                  "microergodic_shift_se")


def verdict_of(row: ToleranceResult) -> str:
    """``safe``, ``unsafe`` or ``unresolved`` (older records carry only ``safe``)."""
    if row.status in VERDICT_MARKERS:
        return row.status
    return "safe" if row.safe else "unsafe"


def _mark_recommended(ax: Axes, tol: float | None) -> None:
    if tol is None or not math.isfinite(tol):
        return
    ax.axvline(tol, **RECOMMENDED_STYLE)
    ax.annotate("recommended", xy=(tol, 0.98), xycoords=("data", "axes fraction"),
                ha="right", va="top", rotation=90, fontsize=7)


def _log_x(ax: Axes, tolerances: Sequence[float]) -> None:
    log_scale(ax, "x")
    if tolerances:
        # a factor 3 of margin, so a single tolerance still gets a proper axis
        ax.set_xlim(min(tolerances) / 3, max(tolerances) * 3)
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("compression tolerance (relative; looser \u2192)")


def _knob_x(ax: Axes, result: CheckResult, values: Sequence[float]) -> None:
    """The x axis of a knob: log tolerance for a ``tol`` solver, else the knob's values on
    a linear axis named after it, with the direction that buys accuracy."""
    if result.knob_name == "tol":
        _log_x(ax, values)
        return
    if values:
        span = max(values) - min(values) or max(abs(max(values)), 1.0)
        ax.set_xlim(min(values) - 0.1 * span, max(values) + 0.1 * span)
    tighter = "larger" if result.knob.get("more_accurate") == "larger" else "smaller"
    unit = "count" if all(float(v).is_integer() for v in values) else "the solver's scale"
    ax.set_xlabel(f"{result.knob_name}, {tighter} is more accurate ({unit})")


def _values(result: CheckResult) -> list[ToleranceResult]:
    """The rows with a finite knob value (``rho = inf`` has no place on an axis), in
    increasing value."""
    return sorted((r for r in result.tolerances
                   if r.value is not None and math.isfinite(r.value)),
                  key=lambda r: float(r.value or 0.0))


def _legend_for_verdicts(ax: Axes, seen: Sequence[str]) -> None:
    handles = [ax.plot([], [], linestyle="none", markersize=6, label=v,
                       **VERDICT_MARKERS[v])[0] for v in VERDICT_MARKERS if v in seen]
    handles += [line for line in ax.get_lines() if line.get_label() == BROKEN_LABEL][:1]
    if handles:
        ax.legend(handles=handles, loc="lower right", fontsize=7)


def _mark_broken(ax: Axes, values: Sequence[float]) -> None:
    """A triangle at the top of the panel at each knob value with nothing to draw."""
    if values:
        ax.plot(list(values), [BROKEN_HEIGHT] * len(values),
                transform=ax.get_xaxis_transform(), label=BROKEN_LABEL, clip_on=False,
                **BROKEN_STYLE)


def error_vs_tolerance(result: CheckResult) -> Figure | None:
    """|error| of the deciding seed against tolerance, one panel per metric, with its
    limit (dashed), 2-SE bars where the metric is estimated, and the recommendation."""
    panels = [m for m in ERROR_METRICS
              if any(r.metric(m) is not None and math.isfinite(r.metric(m).value)  # type: ignore[union-attr]
                     for r in result.tolerances)]
    if not panels:
        return None
    with figure_rc():
        cols = min(2, len(panels))
        rows = math.ceil(len(panels) / cols)
        fig = Figure(figsize=(7.2, 2.7 * rows), layout="constrained")
        for i, name in enumerate(panels):
            ax = fig.add_subplot(rows, cols, i + 1)
            seen: list[str] = []
            tols, values, broken = [], [], []
            limit = None
            for row in _values(result):
                m = row.metric(name)
                if m is None or not math.isfinite(m.value):
                    if row.error:
                        broken.append(float(row.value or 0.0))
                    continue
                value = max(abs(m.value), 1e-16)
                verdict = verdict_of(row)
                seen.append(verdict)
                limit = m.threshold if m.threshold is not None else limit
                err = 2 * m.uncertainty if m.uncertainty and math.isfinite(
                    m.uncertainty) else None
                yerr = None if err is None else np.array([[0.0], [err]])
                ax.errorbar([float(row.value or 0.0)], [value], yerr=yerr,
                            linestyle="none", color="#444444", capsize=2, markersize=6,
                            **VERDICT_MARKERS[verdict])
                tols.append(float(row.value or 0.0))
                values.append(value)
            ax.plot(tols, values, color="#777777", linewidth=0.8, zorder=0)
            if limit is not None:
                ax.axhline(limit, **THRESHOLD_STYLE)
                ax.annotate(f"limit {limit:g}", xy=(0.01, limit),
                            xycoords=("axes fraction", "data"), ha="left", va="bottom",
                            fontsize=7)
            log_scale(ax, "y")
            _knob_x(ax, result, tols + broken)
            _mark_broken(ax, broken)
            _mark_recommended(ax, result.recommended_value)
            label = metric_label(name)
            ax.set_title(label.label, fontsize=9)
            ax.set_ylabel(f"|{label.short}| {label.unit}")
            _legend_for_verdicts(ax, seen)
    return fig


def speedup_vs_tolerance(result: CheckResult) -> Figure | None:
    """Speed-up over the reference against tolerance, with break-even at 1 and the
    recommendation marked."""
    rows = [r for r in _values(result)
            if r.speedup is not None and math.isfinite(r.speedup) and r.speedup > 0]
    if not rows:
        return None
    broken = [float(r.value or 0.0) for r in _values(result) if r.error and r not in rows]
    speedups = [float(r.speedup or 0.0) for r in rows]
    with figure_rc():
        fig = Figure(figsize=(7.2, 2.6), layout="constrained")
        ax = fig.add_subplot()
        ax.plot([float(r.value or 0.0) for r in rows], speedups, color="#0072B2",
                linewidth=1.0, zorder=0)
        seen = []
        for r, speedup in zip(rows, speedups, strict=True):
            verdict = verdict_of(r)
            seen.append(verdict)
            ax.plot([float(r.value or 0.0)], [speedup], linestyle="none", markersize=7,
                    **VERDICT_MARKERS[verdict])
        ax.axhline(1.0, **THRESHOLD_STYLE)
        ax.annotate("break-even: below this line the reference is faster",
                    xy=(0.01, 1.0), xycoords=("axes fraction", "data"), ha="left",
                    va="bottom", fontsize=7)
        ax.set_ylim(bottom=0, top=1.15 * max(1.0, *speedups))
        _knob_x(ax, result, [float(r.value or 0.0) for r in rows] + broken)
        _mark_broken(ax, broken)
        _mark_recommended(ax, result.recommended_value)
        ax.set_ylabel(f"speed-up over {result.speedup_over} (\u00d7)")
        ax.set_title("How much faster the compressed solver is", fontsize=9)
        _legend_for_verdicts(ax, seen)
    return fig


def points_map(points: np.ndarray | None, holdout: np.ndarray | None, *,
               units: str = "coordinate units") -> Figure | None:
    """The data points (2D only), with the kriging holdout marked by open triangles; both
    axes in ``units``, the unit of the coordinates as the user gave them."""
    if points is None:
        return None
    pts = np.asarray(points, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 2 or len(pts) == 0:
        return None
    with figure_rc():
        fig = Figure(figsize=(5.6, 4.2), layout="constrained")
        ax = fig.add_subplot()
        ax.plot(pts[:, 0], pts[:, 1], linestyle="none", marker=".", markersize=2,
                color="#777777", label=f"all {len(pts):,} points (the fit uses all)")
        if holdout is not None and len(holdout):
            idx = np.asarray(holdout, dtype=int)
            ax.plot(pts[idx, 0], pts[idx, 1], linestyle="none", marker="^", markersize=5,
                    markerfacecolor="none", markeredgecolor="#000000",
                    label=f"{len(idx):,} held out for the kriging evaluation")
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_xlabel(f"first coordinate ({units})")
        ax.set_ylabel(f"second coordinate ({units})")
        ax.set_title("Where the data are", fontsize=9)
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.15), fontsize=7,
                  frameon=False)
    return fig
