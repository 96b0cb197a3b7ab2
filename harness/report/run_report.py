"""Assemble the report's content from a run directory and render the HTML template.

Every string that comes from the run (case, solver, kernel and column names, error
messages, run.json values) reaches the HTML either through jinja2 with autoescape on, or
through ``DataFrame.to_html(escape=True)``; only those escaped tables are marked safe.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import jinja2
import numpy as np
import pandas as pd
from markupsafe import Markup

from harness._version import __version__
from harness.analysis.load import RESULTS_FILE, RunData, load_run
from harness.analysis.regression import COMPARISON_FILE, Comparison, load_comparison
from harness.analysis.scaling_table import (
    MEMORY_METRICS,
    display_table,
    scaling_rows,
    solver_label,
)
from harness.analysis.time_to_accuracy import default_limit, time_to_accuracy
from harness.audit.metric_names import LOGLIK_ERR_NAT
from harness.audit.rule import ThresholdError, Thresholds
from harness.audit.verdict import COMMON_PRACTICE, VerdictSet, judge
from harness.report import figures
from harness.report.condense import collapse_notes
from harness.report.labels import TERMS, column_label
from harness.report.run_summary import (
    DOES_NOT_PAY,
    dataset_summary,
    environment_summary,
    fitted_any,
    setting_text,
    speedup_text,
)
from harness.report.style import data_uri
from harness.report.time_to_accuracy_figure import time_to_accuracy_figure
from harness.report.time_to_accuracy_tables import fits_table, points_table, target_text

TEMPLATE = "report.html.j2"
REPORT_FILE = "report.html"
STATUS_TEXT = {"safe": "\u2714 safe", "unsafe": "\u2718 unsafe",
               "incomplete": "? incomplete", "unresolved": "? unresolved",
               "failed": "\u2718 no task finished"}
CASE_TEXT_KEYS = ("case_text", "case_file_text", "case_file")
#: (section id, heading) in the report's order; the table of contents and the numbered
#: headings are both written from this list (``sections``), so they cannot disagree.
TOC = (("summary", "Which tolerance is safe?"), ("accuracy", "Accuracy against tolerance"),
       ("cost", "Time and memory"), ("trace", "Stochastic trace estimates"),
       ("failures", "Failed and skipped tasks"), ("environment", "Environment"),
       ("cautions", "Cautions"), ("results", "Results per dataset"))
COMPARISON_SECTION = ("comparison", "Comparison with a baseline")
#: The unit of a run's coordinates when neither the caller nor the case names one.
DEFAULT_COORD_UNITS = "coordinate units"


def run_coord_units(run: RunData, coord_units: str | None = None) -> str:
    """The unit of the run's coordinates and length scales: ``coord_units`` when given,
    else ``coord_units`` of the case table in ``run.json``, else ``DEFAULT_COORD_UNITS``."""
    case = run.meta.get("case")
    recorded = case.get("coord_units") if isinstance(case, Mapping) else None
    for units in (coord_units, recorded):
        if isinstance(units, str) and units.strip():
            return units.strip()
    return DEFAULT_COORD_UNITS


def sections(*, comparison: bool) -> dict[str, str]:
    """Each section's numbered heading (``"3. Time and memory"``), in the report's order;
    the comparison with a baseline, when there is one, is section 2."""
    order = list(TOC)
    if comparison:
        order.insert(1, COMPARISON_SECTION)
    return {key: f"{i}. {title}" for i, (key, title) in enumerate(order, start=1)}


def _environment() -> jinja2.Environment:
    return jinja2.Environment(loader=jinja2.PackageLoader("harness.report", "templates"),
                              autoescape=True, undefined=jinja2.StrictUndefined,
                              keep_trailing_newline=True)


def _fmt(value: object) -> str:
    if isinstance(value, float | np.floating):
        if math.isnan(value):
            return "\u2013"
        if math.isinf(value):
            return "\u221e" if value > 0 else "-\u221e"
        return f"{value:.3g}"
    return str(value)


def html_table(frame: pd.DataFrame) -> Markup:
    """An escaped HTML table (``to_html(escape=True)``), safe to insert verbatim."""
    if frame.empty:
        return Markup('<p class="empty">(none)</p>')
    shown = frame.copy()
    for column in shown.columns:
        shown[column] = shown[column].map(_fmt)
    return Markup(shown.to_html(index=False, escape=True, border=0, na_rep="\u2013"))


def _dataset_label(dataset: Mapping[str, object]) -> str:
    n = dataset.get("n")
    n_text = f"n={int(n)}" if isinstance(n, int | float) and not math.isnan(n) else ""
    parts = [str(dataset.get(k, "")) for k in ("case", "kernel", "geometry")]
    return " / ".join(p for p in parts if p) + (f" / {n_text}" if n_text else "")


def _recommendations(vs: VerdictSet) -> pd.DataFrame:
    return pd.DataFrame([{
        "dataset": _dataset_label(r.dataset), "solver": r.solver,
        "recommended tol": setting_text(r.tol, r.knob_name, r.knob_value)
        if math.isfinite(r.knob_value) else r.tol, "speed-up": speedup_text(r.speedup),
        "speed-up over": r.speedup_over, "reason": r.reason} for r in vs.recommendations])


def _slow_recommendations(vs: VerdictSet) -> int:
    """How many recommended tolerances are slower than their reference."""
    return sum(1 for r in vs.recommendations
               if math.isfinite(r.speedup) and r.speedup < 1 and math.isfinite(r.knob_value))


def _per_tolerance(vs: VerdictSet) -> pd.DataFrame:
    records: dict[tuple[str, str, float], dict[str, Any]] = {}
    for v in vs.verdicts:
        rec = records.setdefault((v.solver, v.knob_name, v.knob_value), {
            "solver": v.solver, "tol": setting_text(v.tol, v.knob_name, v.knob_value),
            "\u2714 safe": 0, "\u2718 unsafe": 0,
            "? incomplete": 0, "? unresolved": 0, "\u2718 no task finished": 0})
        rec[STATUS_TEXT[v.status]] = int(rec[STATUS_TEXT[v.status]]) + 1
    return pd.DataFrame([records[k] for k in sorted(records)])


def _evidence_text(e: Any) -> str:
    if not e.available:
        return f"not available ({e.note})" if e.note else "not available"
    if e.passed is None:
        return f"unresolved ({e.note})" if e.note else "unresolved"
    verdict = "pass" if e.passed else "FAIL"
    if math.isnan(e.value):
        return f"{verdict} ({e.note})" if e.note else verdict
    op = "\u2264" if e.passed else ">"
    return f"{verdict}: {e.value:.3g} {op} {e.threshold:g}"


def _verdict_detail(vs: VerdictSet) -> pd.DataFrame:
    rows = []
    for v in vs.verdicts:
        rec: dict[str, object] = {"dataset": _dataset_label(v.dataset), "solver": v.solver,
                                  "tol": setting_text(v.tol, v.knob_name, v.knob_value),
                                  "verdict": STATUS_TEXT[v.status],
                                  "tasks ok": v.tasks_ok, "failed": v.tasks_failed}
        for e in v.evidence:
            rec[column_label(e.metric)] = _evidence_text(e)
        rows.append(rec)
    return pd.DataFrame(rows)


def _trace_table(vs: VerdictSet) -> pd.DataFrame:
    return pd.DataFrame([{
        "solver": solver_label(t.solver, t.tol, knob_name=t.knob_name,
                               knob_value=t.knob_value), "method": t.trace_method,
        "probes": int(t.probes) if not math.isnan(t.probes) else t.probes,
        "tasks": t.count, "inside": t.inside, "share": t.fraction, "p-value": t.p_value,
        "flag": "\u2718 SE too small" if t.flagged else "\u2714 ok"} for t in vs.trace])


def _failures(results: pd.DataFrame) -> pd.DataFrame:
    bad = results[results["status"] != "ok"]
    cols = ["status", "case", "solver", "tol", "kernel", "geometry", "n", "seed",
            "error_type", "error_message"]
    out = bad[cols].copy()
    names = bad["knob_name"] if "knob_name" in bad else pd.Series("tol", index=bad.index)
    values = bad["knob_value"] if "knob_value" in bad else bad["tol"]
    out["tol"] = [text if isinstance(text, str) else f"{text:g}"
                  for text in map(setting_text, bad["tol"], names, values)]
    out["n"] = out["n"].map(lambda v: "" if pd.isna(v) else str(int(v)))
    out["seed"] = out["seed"].map(lambda v: "" if pd.isna(v) else str(int(v)))
    return out.sort_values(["status", "solver", "n", "seed"], kind="stable").rename(
        columns={"error_type": "error", "error_message": "message"})


def _flatten(meta: Mapping[str, Any], prefix: str = "") -> list[tuple[str, str]]:
    out: list[tuple[str, str]] = []
    for key in sorted(meta):
        if not prefix and key in CASE_TEXT_KEYS:
            continue
        value = meta[key]
        name = f"{prefix}{key}"
        if isinstance(value, Mapping):
            out.extend(_flatten(value, f"{name}."))
        elif isinstance(value, list):
            out.append((name, ", ".join(map(str, value))))
        else:
            out.append((name, str(value)))
    return out


def _case_text(meta: Mapping[str, Any]) -> str:
    for key in CASE_TEXT_KEYS:
        if isinstance(meta.get(key), str):
            return str(meta[key])
    return ""


def thresholds_for(run: RunData) -> Thresholds:
    """The run's ``[verdict]`` limits: from ``run.json``'s ``case`` table, the case file text,
    or the case file it names; the defaults when none is found or readable."""
    case = run.meta.get("case")
    try:
        if isinstance(case, Mapping) and isinstance(case.get("verdict"), Mapping):
            return Thresholds.from_mapping(case["verdict"], source="run.json case [verdict]")
        text = _case_text(run.meta)
        if text and "\n" not in text and Path(text).suffix == ".toml" and Path(text).is_file():
            return Thresholds.from_case_file(text)
        if text:
            return Thresholds.from_case_text(text)
    except (ThresholdError, OSError):
        return Thresholds()
    return Thresholds()


def _thresholds_table(th: Thresholds) -> pd.DataFrame:
    labels = {"loglik_nats": "|log-likelihood error| (nats)",
              "param_shift_se": "implied parameter shift (SE)",
              "kriging_mean_sd": "kriging mean error (predictive SD)",
              "certificate_max": "dense reference certificate (scaled residual, below)",
              "trace_z_limit": "trace |z| counted as inside",
              "trace_min_fraction": "minimum share of trace z inside",
              "trace_alpha": "binomial test level"}
    return pd.DataFrame([{"limit": labels.get(k, k), "setting": k, "value": v}
                         for k, v in th.to_dict().items()])


def labelled_scaling(table: pd.DataFrame) -> pd.DataFrame:
    """The scaling table (``display_table``) with each metric named by its label."""
    if table.empty or "metric" not in table:
        return table
    return table.assign(metric=table["metric"].map(column_label))


def _comparison_context(comparison: Comparison) -> dict[str, object]:
    findings = pd.DataFrame([{
        "task": f.task, "metric": f.metric, "kind": f.kind, "baseline": f.baseline,
        "new": f.current, "ratio": f.ratio, "limit": f.threshold, "p-value": f.p_value,
        "note": f.note} for f in comparison.findings])
    checks = pd.DataFrame([{k: v for k, v in c.items()} for c in comparison.checks])
    n = len(comparison.findings)
    headline = (f"\u2718 {n} regression(s) against the baseline" if n
                else "\u2714 no regression against the baseline")
    return {"regressed": comparison.regressed, "headline": headline,
            "baseline": Path(comparison.baseline).name, "paired": comparison.paired,
            "findings": html_table(findings) if n else "", "missing": list(comparison.missing),
            "extra": list(comparison.extra), "notes": list(comparison.notes),
            "checks": html_table(checks)}


def _results_table(results: pd.DataFrame) -> pd.DataFrame:
    keep = [c for c in results.columns
            if results[c].notna().any() and not (results[c].astype(str) == "").all()]
    order = [c for c in ("solver", "tol", "n", "seed") if c in keep]
    return results[keep].sort_values(order, kind="stable", na_position="first")


def render_report(run: RunData, *, comparison: Comparison | None = None,
                  thresholds: Thresholds | None = None, level: float = 0.95,
                  seed: int = 0, results_href: str = "results.csv",
                  coord_units: str | None = None) -> str:
    """The report's HTML for ``run`` (same inputs give the same text).

    Parameters
    ----------
    coord_units : str, optional
        The unit of the point sets' coordinates and the kernels' length scales
        (``report --coord-units``); default ``run_coord_units``.
    seed : int
        Seed of the bootstrap stream (fixed so reports can be diffed).
    results_href : str
        Link to the run's ``results.csv``, relative to where the report is written.
    """
    th = thresholds or thresholds_for(run)
    results = run.results
    vs = judge(results, thresholds=th)
    rows = scaling_rows(run, level=level, rng=np.random.default_rng(seed))
    figs = {
        "accuracy": figures.accuracy_vs_tolerance(results, thresholds=th),
        "error_n": figures.error_vs_n(results, thresholds=th),
        "time": figures.cost_vs_n(results, rows, metrics=("t_factor", "t_total")),
        "memory": figures.cost_vs_n(results, rows, metrics=MEMORY_METRICS),
        "trace": figures.trace_vs_probes(results),
    }
    accuracy = time_to_accuracy(run, limit=default_limit(LOGLIK_ERR_NAT, th), level=level,
                                rng=np.random.default_rng(seed))
    figs["time_to_accuracy"] = time_to_accuracy_figure(accuracy)
    cases = sorted(set(results["case"].astype(str)) - {""})
    meta = run.meta
    headings = sections(comparison=comparison is not None)
    context = {
        "version": __version__, "title": ", ".join(cases) or run.path.name,
        "run_name": run.path.name, "n_tasks": len(results),
        "n_ok": int((results["status"] == "ok").sum()),
        "n_failed": int((results["status"] == "failed").sum()),
        "n_skipped": int((results["status"] == "skipped").sum()),
        "started": str(meta.get("started", "")), "finished": str(meta.get("finished", "")),
        "headings": headings, "coord_units": run_coord_units(run, coord_units),
        "section": {key: text.split(".", 1)[0] for key, text in headings.items()},
        "recommendations": html_table(_recommendations(vs))
        if any(v.status != "failed" for v in vs.verdicts) else "",
        "per_tolerance": html_table(_per_tolerance(vs)) if vs.verdicts else "",
        "thresholds_note": "All limits below are " + COMMON_PRACTICE + ". The certificate "
                           "limit is the pass ratio of LAPACK's own test suite.",
        "thresholds_table": html_table(_thresholds_table(th)), "thresholds": th,
        "verdict_detail": html_table(_verdict_detail(vs)) if vs.verdicts else "",
        "figures": {k: (data_uri(f) if f is not None else "") for k, f in figs.items()},
        "level_pct": f"{100 * level:g}",
        "scaling": html_table(labelled_scaling(display_table(rows)))
        if any(r.fit for r in rows) else "",
        "scaling_refused": [note.line() for note in collapse_notes(
            (r.label, str(r.refused)) for r in rows if r.fit is None)],
        "fitted_time": fitted_any(rows, ("t_factor", "t_total")),
        "fitted_memory": fitted_any(rows, tuple(MEMORY_METRICS)),
        "slow_recommendations": _slow_recommendations(vs), "does_not_pay": DOES_NOT_PAY,
        "trace": html_table(_trace_table(vs)) if vs.trace else "",
        "accuracy_target": target_text(accuracy),
        "accuracy_points": html_table(points_table(accuracy)) if accuracy.series else "",
        "accuracy_fits": html_table(fits_table(accuracy, level=level))
        if accuracy.series else "",
        "failures": html_table(_failures(results)) if (results["status"] != "ok").any()
        else "",
        "environment": html_table(environment_summary(meta)),
        "environment_full": html_table(pd.DataFrame(_flatten(meta),
                                                    columns=["setting", "value"])),
        "load_notes": [note.line() for note in collapse_notes(run.notes)],
        "case_text": _case_text(meta),
        "comparison": _comparison_context(comparison) if comparison is not None else None,
        "dataset_summary": html_table(dataset_summary(results)), "terms": TERMS,
        "results": html_table(_results_table(results)), "results_href": results_href,
        "n_columns": int(len(_results_table(results).columns)),
    }
    return _environment().get_template(TEMPLATE).render(**context)


def write_report(run_dir: str | Path, *, out: str | Path | None = None,
                 comparison: Comparison | None = None,
                 thresholds: Thresholds | None = None,
                 coord_units: str | None = None) -> Path:
    """Write the self-contained HTML report of a run directory.

    Parameters
    ----------
    run_dir : path
        The run directory (see ``harness.analysis.load_run``).
    out : path, optional
        Output file; defaults to ``<run_dir>/report.html``.
    comparison : Comparison, optional
        Adds a comparison section; when omitted, ``<run_dir>/comparison.json`` is used if
        present.
    thresholds : Thresholds, optional
        Defaults to the case file's ``[verdict]`` table, else ``Thresholds()``.
    coord_units : str, optional
        The unit of the coordinates and length scales (``render_report``).

    Returns
    -------
    Path
        The file written.
    """
    run = load_run(run_dir)
    if comparison is None and (run.path / COMPARISON_FILE).is_file():
        comparison = load_comparison(run.path / COMPARISON_FILE)
    target = Path(out) if out is not None else run.path / REPORT_FILE
    href = Path(os.path.relpath((run.path / RESULTS_FILE).resolve(),
                                target.resolve().parent)).as_posix()
    html = render_report(run, comparison=comparison, thresholds=thresholds,
                         results_href=href, coord_units=coord_units)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(target.name + ".tmp")
    tmp.write_text(html, encoding="utf-8")
    tmp.replace(target)
    return target
