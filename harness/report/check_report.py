"""Self-contained HTML report of a check, answer first (inline CSS, figures embedded,
every user string escaped).

Order: the answer (recommended tolerance, its speed-up, the reference and compressed
times in seconds, or a plain sentence when no tolerance pays), warnings, then, when the
check audited solvers side by side (``result.solvers``, even one), the comparison across
them: the recommendation in words, the frontier figure (error against time,
``harness.report.frontier_figure``) and one row per (solver, knob value) point
(``harness.report.frontier_section``); then the verdict
table (compact numbers; the failing metric of an unsafe row marked by colour, a symbol
and bold), a legend of every label (``harness.report.labels``), figures, then the fit,
the spread over seeds and the notes. Rendered with jinja2 and ``autoescape=True``. The
report states that the thresholds are common practice, not a published standard, and
that the audit checks numerical agreement with the exact model, not whether the model
suits the data (DEVELOPERS.md, "The verdict rule"; README, "Cautions").
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import jinja2
import numpy as np

from harness.audit.verdict import COMMON_PRACTICE
from harness.check.check_records import UNCONVERGED_REMEDY, CheckResult, ToleranceResult
from harness.infra.option_specs import PROBES
from harness.report import check_figures
from harness.report.condense import collapse_notes, per_seed_failures
from harness.report.frontier_figure import frontier_figure
from harness.report.frontier_section import frontier_rows, frontier_summary
from harness.report.labels import (
    COLUMN_LABELS,
    METRIC_LABELS,
    TERMS,
    MetricLabel,
    metric_label,
)
from harness.report.number_text import compact, knob_value_text
from harness.report.run_summary import DOES_NOT_PAY
from harness.report.style import data_uri

TEMPLATE = "check.html.j2"
#: The unit of planar coordinates when the caller names none (``check --coord-units``).
DEFAULT_COORD_UNITS = "coordinate units"
#: A ``lonlat`` check reads degrees and measures distance along chords of the Earth
#: sphere in km (``harness.geometry.geodesy``), whatever the caller says.
LONLAT_UNITS = ("degrees", "chordal km")
#: What the observed values' unit is called (the report does not know it).
VALUE_UNITS = "units of the observed values"
SOLVER_FAILED = "solver failed: "
#: Metrics with a limit first, then the information-only ones, in table order.
TABLE_ORDER: tuple[str, ...] = ("loglik_error", "loglik_error_extrapolated",
                                "param_shift_se", "kriging_mean_sd",
                                "microergodic_shift_se", "kriging_var_ratio", "mloe", "mmom")


@dataclass(frozen=True)
class Cell:
    """One metric cell: text, and ``state`` fail / unresolved / ok / info."""

    text: str
    uncertainty: str
    state: str


def _metric_state(row: ToleranceResult, name: str) -> str:
    statuses = [s.get("status", {}).get(name) for s in row.seeds if isinstance(s, dict)]
    if "unsafe" in statuses:
        return "fail"
    if "unresolved" in statuses:
        return "unresolved"
    if "safe" in statuses:
        return "ok"
    m = row.metric(name)
    if m is None or m.threshold is None:
        return "info"
    return "ok" if m.passed else "fail"


def _cells(row: ToleranceResult, names: list[str]) -> list[Cell]:
    cells = []
    for name in names:
        m = row.metric(name)
        if m is None:
            cells.append(Cell("", "", "info"))
            continue
        unc = compact(m.uncertainty) if m.uncertainty else ""
        cells.append(Cell(compact(m.value), unc, _metric_state(row, name)))
    return cells


def knob_text(result: CheckResult, value: float | None) -> str:
    """A knob value of the recommended solver as the report shows it (``1e-6``, ``40``)."""
    return knob_value_text(result.knob_name, value)


def knob_noun(result: CheckResult) -> str:
    """``tolerance`` for a ``tol`` solver, else the knob's name (``rho``)."""
    return "tolerance" if result.knob_name == "tol" else result.knob_name


def _knob_columns(result: CheckResult) -> dict[str, MetricLabel]:
    """``COLUMN_LABELS`` with the first column named after the solver's knob."""
    if result.knob_name == "tol":
        return dict(COLUMN_LABELS)
    name = result.knob_name
    tighter = "larger" if result.knob.get("more_accurate") == "larger" else "smaller"
    return dict(COLUMN_LABELS) | {"tol": MetricLabel(
        "tol", name, f"{name}, the solver's accuracy knob",
        f"the value of the solver's accuracy knob {name} (valid range "
        f"{result.knob.get('range', '?')}); {tighter} is more accurate")}


def no_pick_advice(result: CheckResult, values: str) -> str:
    """What to do when nothing is safe, and only what can be done: the exact computation
    only where it ran (the dense reference within the memory budget, or an exact
    structured reference); beyond it, tighter values, more probes when a verdict was
    unresolved (4 x the count used), and a converged fit first when the fit did not
    converge."""
    statuses = {r.status for r in result.tolerances}
    used = result.score_probes or PROBES.default
    more = (f" For the unresolved verdicts, more probes shrink the standard errors as "
            f"1/sqrt(probes): --probes {4 * used} (4 x the {used} used) halves them."
            if "unresolved" in statuses else "")
    if not result.fit_converged:
        more += f" The fit did not converge, so no verdict can be safe: {UNCONVERGED_REMEDY}."
    if result.reference == "dense":
        return f"Use the exact computation at this size, or audit tighter {values}s.{more}"
    tighter = (f"audit tighter {values}s (--tolerances or --knob-values) or another solver "
               f"(--solver).{more}")
    structured = {"statespace": "Kalman filter", "kronecker": "Kronecker algebra"}
    if result.reference in structured:
        return (f"The exact computation by the {structured[result.reference]} ran at "
                f"{result.n:,} points (it serves these data exactly): use it, or {tighter}")
    return (f"At {result.n:,} points the exact computation is beyond the memory budget: "
            f"{tighter}")


def coordinate_units(result: CheckResult, coord_units: str | None) -> tuple[str, str]:
    """(unit of the coordinates as given, unit of distances and length scales).

    ``lonlat`` data are degrees, and distances chordal km; planar data are in
    ``coord_units`` (default ``DEFAULT_COORD_UNITS``), distances too.
    """
    if result.coord_system == "lonlat":
        return LONLAT_UNITS
    units = (coord_units or "").strip() or DEFAULT_COORD_UNITS
    return units, units


def parameter_units(result: CheckResult, distance_units: str) -> dict[str, str]:
    """The unit of each fitted parameter: length scales in distance units, variance and
    nugget in squared value units, shape parameters (nu, alpha) without unit."""
    units = {"lengthscale": distance_units, "variance": f"({VALUE_UNITS})\u00b2",
             "nugget": f"({VALUE_UNITS})\u00b2", "mean": VALUE_UNITS}
    return {name: units.get(name, "no unit") for name in result.params}


def _reasons(row: ToleranceResult, *, message_shown: bool) -> list[str]:
    """The rule's reasons with the solver's failures said once (the seeds named); when
    the verdict table already shows the message, only a pointer to it."""
    failed = [r.removeprefix(SOLVER_FAILED) for r in row.reasons
              if r.startswith(SOLVER_FAILED)]
    out = [r for r in row.reasons if not r.startswith(SOLVER_FAILED)]
    if failed:
        out.insert(0, "solver failed (the message is in the verdict table)" if message_shown
                   else SOLVER_FAILED + per_seed_failures("; ".join(failed)))
    return out


def _headline(result: CheckResult) -> dict[str, Any]:
    picked = result.recommended_value
    rec = next((r for r in result.tolerances if picked is not None and r.value == picked),
               None)
    over = result.speedup_over or "the reference"
    noun = knob_noun(result)
    if rec is None:
        reason = str(result.recommendation.get("reason", "")) if result.recommendation \
            else ""
        values = "tolerance" if noun == "tolerance" else f"{noun} value"
        return {"found": False, "noun": noun,
                "text": f"No {values} in the list is safe for these data.",
                "advice": no_pick_advice(result, values), "reason": reason}
    speedup = rec.speedup if rec.speedup is not None else result.speedup
    compressed = rec.seconds
    reference = (compressed * speedup if speedup is not None and math.isfinite(compressed)
                 and math.isfinite(speedup) else float("nan"))
    pays = speedup is not None and math.isfinite(speedup) and speedup >= 1
    return {"found": True, "noun": noun, "tol": knob_text(result, rec.value),
            "speedup": compact(speedup),
            "pays": pays, "over": over, "reference_seconds": compact(reference),
            "compressed_seconds": compact(compressed),
            "text": "", "advice": "" if pays else
            f"It is accurate enough but {DOES_NOT_PAY}: the {over} computation is faster "
            "here. Compression pays only at larger n.",
            "reason": str(result.recommendation.get("reason", ""))
            if result.recommendation else ""}


def render_check_report(result: CheckResult, *, points: np.ndarray | None = None,
                        holdout: np.ndarray | None = None,
                        coord_units: str | None = None) -> str:
    """The HTML text of the report.

    Parameters
    ----------
    points : array (n, d), optional
        The data points, for the map (2D only).
    holdout : array of int, optional
        Indices of the kriging holdout among ``points``.
    coord_units : str, optional
        The unit of planar coordinates (``check --coord-units``, e.g. ``m``); the axes of
        the map and the length scales carry it. Default ``DEFAULT_COORD_UNITS``; a
        ``lonlat`` check is always degrees and chordal km.
    """
    given_units, distance_units = coordinate_units(result, coord_units)
    present = {m.name for row in result.tolerances for m in row.metrics}
    names = [n for n in TABLE_ORDER if n in present] + sorted(
        present - set(TABLE_ORDER))
    limits: dict[str, float] = {}
    for row in result.tolerances:
        for m in row.metrics:
            if m.threshold is not None:
                limits.setdefault(m.name, m.threshold)
    error_notes: list[str] = []
    rows = []
    loose_first = result.knob.get("more_accurate", "smaller") == "smaller"
    for row in sorted(result.tolerances, key=lambda r: float(r.value or 0.0),
                      reverse=loose_first):
        cells = _cells(row, names)
        error = per_seed_failures(row.error) if row.error else ""
        # a row with no metric shows its whole message across the metric columns; a row
        # with some metrics gets it as a numbered note under the table
        in_cell = bool(error) and not any(c.text for c in cells)
        note_index = None
        if error and not in_cell:
            error_notes.append(f"{knob_noun(result)} {knob_text(result, row.value)}: "
                               f"{error}")
            note_index = len(error_notes)
        rows.append({"tol": knob_text(result, row.value),
                     "verdict": check_figures.verdict_of(row),
                     "cells": cells, "seconds": compact(row.seconds),
                     "speedup": compact(row.speedup),
                     "slow": row.speedup is not None and math.isfinite(row.speedup)
                     and row.speedup < 1,
                     "error": error if in_cell else "", "note_index": note_index,
                     "reasons": _reasons(row, message_shown=bool(error))})
    figures = {
        "errors": check_figures.error_vs_tolerance(result),
        "speedup": check_figures.speedup_vs_tolerance(result),
        "map": check_figures.points_map(points, holdout, units=given_units),
    }
    notes = [n.line() for n in collapse_notes(result.notes)]
    frontier = frontier_figure(result)
    frontier_table, frontier_notes = frontier_rows(result)
    env = jinja2.Environment(loader=jinja2.PackageLoader("harness.report", "templates"),
                             autoescape=True, undefined=jinja2.StrictUndefined)
    return env.get_template(TEMPLATE).render(
        r=result, fmt=compact, params=list(result.params.items()),
        se=result.se.get("natural", {}), truth=dict(result.truth) if result.truth else None,
        names=names, labels={n: metric_label(n) for n in names}, limits=limits,
        rows=rows, error_notes=error_notes, headline=_headline(result),
        columns=_knob_columns(result), legend=[metric_label(n) for n in names],
        knob_noun=knob_noun(result),
        refit_at=None if result.refit is None else knob_text(
            result, result.refit.tol if result.refit.knob_value is None
            else result.refit.knob_value),
        terms=TERMS, practice=COMMON_PRACTICE, notes=notes,
        unconverged_remedy=UNCONVERGED_REMEDY,
        coord_units=given_units, distance_units=distance_units,
        param_units=parameter_units(result, distance_units), value_units=VALUE_UNITS,
        figures={k: (data_uri(f) if f is not None else "") for k, f in figures.items()},
        all_labels=METRIC_LABELS, frontier=frontier_summary(result) if result.solvers
        else None, frontier_table=frontier_table, frontier_notes=frontier_notes,
        frontier_figure="" if frontier is None else data_uri(frontier.figure),
        frontier_caption="" if frontier is None else frontier.caption)
