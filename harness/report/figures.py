"""The report's figures, drawn with matplotlib's object API (``Figure``, no pyplot state).

Each function takes the results (and fits) and returns a ``Figure``, or None when the run
holds nothing to draw. Worst cases over seeds are plotted, as the verdicts use them. Every
axis label ends with its unit in parentheses (``METRIC_TITLES``, ``TOLERANCE_LABEL``,
``N_LABEL``, ``PROBES_LABEL``). A tolerance whose tasks failed where none finished is
marked at the top of every accuracy panel (``FAILED_LABEL``), not dropped.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter

from harness.analysis.scaling_table import ScalingRow, solver_label
from harness.audit.rule import Thresholds
from harness.report.labels import RESULT_COLUMN_LABELS
from harness.report.style import THRESHOLD_STYLE, figure_rc, log_scale, plain, series_style

#: Each plotted column's label with its unit (one set, ``harness.report.labels``).
METRIC_TITLES: dict[str, str] = RESULT_COLUMN_LABELS
TOLERANCE_LABEL = "compression tolerance (relative)"
N_LABEL = "problem size n (points)"
PROBES_LABEL = "probes p (vectors)"
FAILED_LABEL = "failed, nothing measured"
#: A tolerance with failed tasks and nothing measured: at the top of the panel.
FAILED_STYLE: dict[str, object] = {"marker": "v", "markersize": 7, "linestyle": "none",
                                   "markerfacecolor": "#D55E00", "markeredgecolor": "#000000"}


def _ok(results: pd.DataFrame) -> pd.DataFrame:
    return results[results["status"] == "ok"]


def _positive(frame: pd.DataFrame, column: str) -> pd.DataFrame:
    return frame[frame[column].notna() & (frame[column] > 0)]


def failed_tolerances(results: pd.DataFrame) -> list[float]:
    """Tolerances where a (solver, n) has failed tasks and no finished one."""
    keys = ["solver", "n", "tol"]
    tried = results[results["tol"].notna()]
    done = set(_ok(tried)[keys].itertuples(index=False, name=None))
    failed = tried[tried["status"] == "failed"]
    return sorted({float(t) for s, n, t in zip(failed["solver"], failed["n"], failed["tol"],
                                               strict=True) if (s, n, t) not in done})


def _mark_failed(ax: Axes, tolerances: Sequence[float]) -> None:
    if tolerances:
        ax.plot(list(tolerances), [0.93] * len(tolerances), transform=ax.get_xaxis_transform(),
                label=FAILED_LABEL, clip_on=False, **FAILED_STYLE)  # type: ignore[arg-type]


def _threshold(ax: Axes, value: float, label: str) -> None:
    ax.axhline(value, **THRESHOLD_STYLE)
    ax.annotate(plain(label), xy=(0.01, value), xycoords=("axes fraction", "data"),
                ha="left", va="bottom", fontsize=7, color=THRESHOLD_STYLE["color"])


def _log_axes(ax: Axes, *, y: bool = True) -> None:
    """Log scales (``style.log_scale``); no minor x labels (the measured values are
    labelled instead), y keeps matplotlib's minor labels, drawn only when the range is
    under a decade."""
    log_scale(ax, "x")
    ax.xaxis.set_minor_formatter(NullFormatter())
    if y:
        log_scale(ax, "y")


def _value_ticks(ax: Axes, values: object) -> None:
    """Label the x axis at the measured values (n or probes) in plain numbers."""
    ticks = sorted({float(v) for v in np.asarray(values, dtype=float) if v > 0})
    if 0 < len(ticks) <= 8:
        ax.set_xticks(ticks, [f"{v:g}" for v in ticks])


def _grid(n_panels: int, *, width: float = 7.2, height: float = 2.8) -> tuple[Figure,
                                                                             list[Axes]]:
    cols = min(2, n_panels)
    rows = math.ceil(n_panels / cols)
    fig = Figure(figsize=(width, height * rows), layout="constrained")
    axes = [fig.add_subplot(rows, cols, i + 1) for i in range(n_panels)]
    return fig, axes


def accuracy_vs_tolerance(results: pd.DataFrame, *, thresholds: Thresholds) -> Figure | None:
    """Worst error over seeds against tolerance, one series per (solver, n), threshold
    lines at the verdict limits (and at |z| = limit for trace z-scores)."""
    ok = _ok(results)
    ok = ok[ok["tol"].notna()]
    panels = [("loglik_abs_err", thresholds.loglik_nats, "safe limit"),
              ("param_shift_se_max", thresholds.param_shift_se, "safe limit"),
              ("kriging_mean_err_sd_max", thresholds.kriging_mean_sd, "safe limit"),
              ("trace_z_max", thresholds.trace_z_limit, f"|z| = {thresholds.trace_z_limit:g}")]
    panels = [p for p in panels if not _positive(ok, p[0]).empty]
    if not panels:
        return None
    failed = failed_tolerances(results)
    with figure_rc():
        fig, axes = _grid(len(panels))
        for ax, (metric, limit, label) in zip(axes, panels, strict=True):
            data = _positive(ok, metric)
            if metric == "trace_z_max":
                _z_strip(ax, data)
            else:
                worst = data.groupby(["solver", "n", "tol"])[metric].max().reset_index()
                for i, ((solver, n), g) in enumerate(worst.groupby(["solver", "n"])):
                    g = g.sort_values("tol")
                    ax.plot(g["tol"], g[metric], label=plain(f"{solver} n={int(n)}"),
                            markersize=4, **series_style(i).kwargs())
                log_scale(ax, "y")
                ax.yaxis.set_minor_formatter(NullFormatter())
            _threshold(ax, limit, label)
            _mark_failed(ax, failed)
            log_scale(ax, "x")
            ax.xaxis.set_minor_formatter(NullFormatter())
            ax.set_xlabel(TOLERANCE_LABEL)
            ax.set_ylabel(METRIC_TITLES.get(metric, metric))
        axes[0].legend(loc="best")
    return fig


def _z_strip(ax: Axes, data: pd.DataFrame) -> None:
    """Every task's |z| against tolerance (one marker per task, offset by probe count)."""
    for i, (probes, g) in enumerate(data.groupby("probes", sort=True)):
        style = series_style(i)
        offset = 1.15 ** (i - 1)
        ax.plot(g["tol"] * offset, g["trace_z_max"], linestyle="none", marker=style.marker,
                color=style.color, markersize=3, alpha=0.8,
                label=plain(f"{int(probes)} probes"))
    ax.set_ylim(bottom=0)
    ax.legend(loc="upper right", fontsize=6)


def error_vs_n(results: pd.DataFrame, *, thresholds: Thresholds) -> Figure | None:
    """Worst log-likelihood error and parameter shift against n, per (solver, tolerance)."""
    ok = _ok(results)
    ok = ok[ok["tol"].notna()]
    panels = [(m, lim) for m, lim in (("loglik_abs_err", thresholds.loglik_nats),
                                      ("param_shift_se_max", thresholds.param_shift_se))
              if not _positive(ok, m).empty]
    if not panels:
        return None
    with figure_rc():
        fig, axes = _grid(len(panels))
        for ax, (metric, limit) in zip(axes, panels, strict=True):
            worst = _positive(ok, metric).groupby(["solver", "tol", "n"])[metric].max()
            worst = worst.reset_index()
            for i, ((solver, tol), g) in enumerate(worst.groupby(["solver", "tol"],
                                                                 sort=True)):
                g = g.sort_values("n")
                ax.plot(g["n"], g[metric], label=plain(solver_label(solver, tol)),
                        markersize=4, **series_style(i).kwargs())
            _threshold(ax, limit, "safe limit")
            _log_axes(ax)
            _value_ticks(ax, worst["n"])
            ax.set_xlabel(N_LABEL)
            ax.set_ylabel(METRIC_TITLES.get(metric, metric))
        axes[0].legend(loc="best")
    return fig


def cost_vs_n(results: pd.DataFrame, rows: Sequence[ScalingRow], *,
              metrics: Sequence[str]) -> Figure | None:
    """Per-size medians on log-log axes with the fitted power law; the legend gives each
    fitted exponent with its confidence interval."""
    ok = _ok(results)
    panels = [m for m in metrics if m in ok and not _positive(ok, m).empty]
    if not panels:
        return None
    fits = {(r.label, r.metric): r for r in rows}
    with figure_rc():
        fig, axes = _grid(len(panels), height=3.2)
        for ax, metric in zip(axes, panels, strict=True):
            med = _positive(ok, metric).groupby(["solver", "tol", "n"], dropna=False)[metric]
            med = med.median().reset_index()
            for i, ((solver, tol), g) in enumerate(med.groupby(["solver", "tol"],
                                                               dropna=False, sort=True)):
                label = solver_label(solver, tol)
                style = series_style(i)
                g = g.sort_values("n")
                row = fits.get((label, metric))
                fit = row.fit if row is not None else None
                text = label if fit is None else (
                    f"{label}: b={fit.slope:.2f} [{fit.ci_low:.2f}, {fit.ci_high:.2f}]")
                ax.plot(g["n"], g[metric], color=style.color, marker=style.marker,
                        linestyle="none", markersize=4, label=plain(text))
                if fit is not None:
                    grid = np.geomspace(min(fit.sizes), max(fit.sizes), 20)
                    ax.plot(grid, fit.predict(grid), color=style.color,
                            linestyle=style.linestyle, linewidth=1.0)
            _log_axes(ax)
            _value_ticks(ax, med["n"])
            ax.set_xlabel(N_LABEL)
            ax.set_ylabel(METRIC_TITLES.get(metric, metric))
            ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), frameon=False)
    return fig


def trace_vs_probes(results: pd.DataFrame) -> Figure | None:
    """Worst relative trace error against the number of probes, with the p^-1/2
    (Hutchinson) and p^-1 (Hutch++; Meyer, Musco, Musco & Woodruff, SOSA 2021) rates
    drawn through the first point for reference."""
    ok = _ok(results)
    data = _positive(ok[~ok["trace_method"].isin(["", "exact"])], "trace_rel_err_max")
    data = data[data["probes"].notna() & (data["probes"] > 0)]
    if data.empty:
        return None
    worst = data.groupby(["trace_method", "solver", "tol", "probes"], dropna=False)[
        "trace_rel_err_max"].max().reset_index()
    with figure_rc():
        fig = Figure(figsize=(7.2, 3.2), layout="constrained")
        ax = fig.add_subplot()
        for i, ((method, solver, tol), g) in enumerate(
                worst.groupby(["trace_method", "solver", "tol"], dropna=False, sort=True)):
            g = g.sort_values("probes")
            ax.plot(g["probes"], g["trace_rel_err_max"],
                    label=plain(f"{method}, {solver_label(solver, tol)}"), markersize=4,
                    **series_style(i).kwargs())
        p = np.geomspace(worst["probes"].min(), worst["probes"].max(), 10)
        first = worst.sort_values("probes")["trace_rel_err_max"].iloc[0]
        for rate, style in ((0.5, (0, (1, 2))), (1.0, (0, (4, 2, 1, 2)))):
            ax.plot(p, first * (p / p[0]) ** -rate, color="#444444", linestyle=style,
                    linewidth=1.0, label=f"rate p^-{rate:g}")
        _log_axes(ax)
        _value_ticks(ax, worst["probes"])
        ax.set_xlabel(PROBES_LABEL)
        ax.set_ylabel(METRIC_TITLES["trace_rel_err_max"])
        ax.legend(loc="best", ncols=2)
    return fig
