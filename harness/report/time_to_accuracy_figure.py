"""The time-to-accuracy figure: per solver, the time of its cheapest knob value meeting the
limit against n on log-log axes, with its fitted power law.

One labelled line per solver (its reached points, joined); the fit is drawn thin and
dashed in the same colour without a legend entry of its own, its exponent and interval
in the solver's legend text. A size where the solver is not reached gets an open
triangle on the top spine in the solver's colour, and the legend text lists those
sizes (``not reached at n = 800``): no point is left out and none is interpolated.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter
from matplotlib.transforms import blended_transform_factory

from harness.analysis.time_to_accuracy import AccuracySeries, TimeToAccuracy
from harness.report.style import figure_rc, log_scale, plain, series_style
from harness.report.time_to_accuracy_tables import not_reached_text, target_text

X_LABEL = "problem size n (points)"
Y_LABEL = "time to accuracy (s)"
#: Height, in axes fractions, of the open triangles that mark sizes not reached: on the
#: top spine, above every measured time.
NOT_REACHED_HEIGHT = 1.0


def _legend_text(label: str, series: AccuracySeries) -> str:
    fit = series.fit
    text = label if fit is None else (
        f"{label}: b = {fit.slope:.2f} [{fit.ci_low:.2f}, {fit.ci_high:.2f}]")
    if series.not_reached:
        text += "; " + not_reached_text(series.not_reached[0])
        text += "".join(f", {n}" for n in series.not_reached[1:])
    return text


def time_to_accuracy_figure(result: TimeToAccuracy) -> Figure | None:
    """The figure of ``result``; None when no solver reached the limit at any size."""
    if not any(p.reached for s in result.series for p in s.points):
        return None
    sizes = sorted({p.n for s in result.series for p in s.points})
    with figure_rc():
        fig = Figure(figsize=(7.2, 3.6), layout="constrained")
        ax = fig.add_subplot()
        top = blended_transform_factory(ax.transData, ax.transAxes)
        for i, (label, series) in enumerate(zip(result.labels(), result.series,
                                                strict=True)):
            style = series_style(i)
            reached = [p for p in series.points if p.reached]
            ax.plot([p.n for p in reached], [p.seconds for p in reached], markersize=4,
                    label=plain(_legend_text(label, series)), **style.kwargs())
            if series.fit is not None:
                grid = np.geomspace(min(series.fit.sizes), max(series.fit.sizes), 20)
                ax.plot(grid, series.fit.predict(grid), color=style.color,
                        linestyle=(0, (2, 2)), linewidth=0.8, label="_fit")
            if series.not_reached:
                ax.plot(series.not_reached, [NOT_REACHED_HEIGHT] * len(series.not_reached),
                        transform=top, linestyle="none", marker="^", markersize=6,
                        markerfacecolor="none", color=style.color, clip_on=False,
                        label="_not reached")
        log_scale(ax, "x")
        log_scale(ax, "y")
        ax.xaxis.set_minor_formatter(NullFormatter())
        if len(sizes) <= 8:
            ax.set_xticks(sizes, [f"{n:g}" for n in sizes])
        ax.set_xlabel(X_LABEL)
        ax.set_ylabel(Y_LABEL)
        ax.set_title(plain(f"cheapest measured knob value with {target_text(result)} "
                           f"({result.cost}, median over seeds)"), fontsize=9, pad=8)
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), frameon=False)
    return fig
