"""Methods-section export: scaling and time-to-accuracy tables (LaTeX booktabs and
Markdown), figures (PDF and SVG) and a plain-text paragraph written from the run's own
records.

Nothing in the paragraph is fixed prose with numbers pasted in: hardware, threads,
versions, sizes, tolerances and fitted exponents are read from ``run.json`` and the fits.
A run with too few sizes for a power-law fit (fewer than 3) still gets its scaling tables:
the measured medians per size, under one line that says why no exponent is given; the same
line is among the export's notes for the command line to print.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from harness.analysis.load import RunData, load_run
from harness.analysis.scaling_table import (
    MEMORY_METRICS,
    ScalingRow,
    display_table,
    scaling_rows,
    solver_label,
)
from harness.analysis.time_to_accuracy import (
    TimeToAccuracy,
    default_limit,
    time_to_accuracy,
)
from harness.audit.metric_names import LOGLIK_ERR_NAT
from harness.report import figures
from harness.report.condense import collapse_notes
from harness.report.labels import column_label
from harness.report.run_report import labelled_scaling, thresholds_for
from harness.report.style import figure_bytes
from harness.report.time_to_accuracy_figure import time_to_accuracy_figure
from harness.report.time_to_accuracy_tables import fits_table, points_table, target_text

_LATEX_SPECIAL = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#",
                  "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}",
                  "^": r"\textasciicircum{}", "\u2013": "--", "\u221e": r"$\infty$",
                  "\u00b2": r"\textsuperscript{2}", "\u2264": r"$\leq$"}
PARAGRAPH_METRICS: tuple[str, ...] = ("t_factor", "t_total")
#: Columns of the per-size table written when no scaling fit is possible.
SIZE_COLUMNS: tuple[str, ...] = ("t_factor", "t_total", "nbytes", "peak_rss_bytes")
PHASE_WORDS = {"t_factor": "factorization", "t_total": "total evaluation",
               "t_logdet": "log-determinant", "t_solve": "solve", "t_gradient": "gradient"}


@dataclass(frozen=True)
class ExportResult:
    """The files an export wrote."""

    directory: Path
    files: tuple[Path, ...]
    #: What a reader should know about what was not written (why no scaling fit).
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, object]:
        return {"directory": str(self.directory), "files": [str(f) for f in self.files],
                "notes": list(self.notes)}


def latex_escape(text: object) -> str:
    """Escape LaTeX's special characters in ``text``."""
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in str(text))


def to_latex(table: pd.DataFrame, *, caption: str, label: str) -> str:
    """A booktabs ``table`` environment (needs ``\\usepackage{booktabs}``)."""
    cols = "l" * len(table.columns)
    lines = [r"\begin{table}[htbp]", r"\centering", r"\small",
             rf"\caption{{{latex_escape(caption)}}}", rf"\label{{{label}}}",
             rf"\begin{{tabular}}{{{cols}}}", r"\toprule",
             " & ".join(latex_escape(c) for c in table.columns) + r" \\", r"\midrule"]
    for _, row in table.iterrows():
        lines.append(" & ".join(latex_escape(v) for v in row) + r" \\")
    lines += [r"\bottomrule", r"\end{tabular}", r"\end{table}", ""]
    return "\n".join(lines)


def to_markdown(table: pd.DataFrame) -> str:
    """A GitHub-style pipe table (``|`` in cells escaped)."""
    def cell(v: object) -> str:
        return str(v).replace("|", r"\|").replace("\n", " ")

    lines = ["| " + " | ".join(cell(c) for c in table.columns) + " |",
             "|" + "|".join("---" for _ in table.columns) + "|"]
    lines += ["| " + " | ".join(cell(v) for v in row) + " |" for _, row in table.iterrows()]
    return "\n".join(lines) + "\n"


def _get(meta: Mapping[str, Any], *paths: str) -> str:
    for path in paths:
        node: Any = meta
        for part in path.split("."):
            node = node.get(part) if isinstance(node, Mapping) else None
        if node not in (None, ""):
            return str(node)
    return ""


def _join(items: Sequence[str]) -> str:
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def size_medians(run: RunData) -> pd.DataFrame:
    """The measured medians per solver setting and size (finished tasks), with each
    column's label and unit: what the scaling fit would have used."""
    ok = run.ok
    columns = [c for c in SIZE_COLUMNS if c in ok and ok[c].notna().any()]
    if ok.empty or not columns:
        return pd.DataFrame()
    frame = ok.assign(setting=[
        solver_label(str(s), t, knob_name=str(k) if isinstance(k, str) else "tol",
                     knob_value=v)
        for s, t, k, v in zip(ok["solver"], ok["tol"],
                              ok["knob_name"] if "knob_name" in ok else ["tol"] * len(ok),
                              ok["knob_value"] if "knob_value" in ok else ok["tol"],
                              strict=True)])
    keys = ["setting", "kernel", "geometry", "n"]
    med = frame.groupby(keys, sort=True, dropna=False)[columns].median().reset_index()
    out = pd.DataFrame({"solver": med["setting"], "kernel": med["kernel"],
                        "geometry": med["geometry"],
                        "n": med["n"].map(lambda v: f"{int(v):,}")})
    for c in columns:
        out[column_label(c)] = med[c].map(lambda v: "\u2013" if pd.isna(v) else f"{v:.3g}")
    return out


def no_fit_reason(rows: Sequence[ScalingRow]) -> str:
    """Why no scaling fit was possible, each distinct reason once."""
    reasons = [n.text for n in collapse_notes(r.refused for r in rows if r.refused)]
    return "; ".join(reasons) or "no finished task has a positive time"


def methods_paragraph(run: RunData, rows: Sequence[ScalingRow], *, level: float = 0.95
                      ) -> str:
    """A paragraph describing the measurements, composed from ``run`` and its fits."""
    meta = run.meta
    ok = run.ok
    cpu = _get(meta, "cpu.model", "environment.cpu.model", "cpu_model") or "an unrecorded CPU"
    cores = _get(meta, "cpu.cores", "environment.cpu.physical_cpus",
                 "environment.cpu.logical_cpus", "cores")
    blas = _get(meta, "blas.vendor", "environment.blas.vendor", "blas_vendor")
    threads = _get(meta, "blas.threads", "environment.blas.threads", "blas_threads")
    if not threads and ok["threads"].notna().any():
        threads = f"{int(ok['threads'].max())}"
    env = meta.get("environment")
    versions = meta.get("versions") or (env.get("versions", {}) if isinstance(env, Mapping)
                                        else {})
    soft = [f"{name} {ver}" for name, ver in sorted(versions.items()) if ver] \
        if isinstance(versions, Mapping) else []
    sizes = sorted({int(v) for v in ok["n"].dropna()})
    tols = sorted({float(v) for v in ok["tol"].dropna()})
    repeats = sorted({int(v) for v in ok["timing_repeats"].dropna()})
    parts = [f"Timings were measured on {cpu}" + (f" ({cores} cores)" if cores else "")
             + (f" with the {blas} BLAS" if blas else "")
             + (f" limited to {threads} thread(s)" if threads else "") + "."]
    if soft:
        parts.append(f"Software: {_join(soft)}.")
    if sizes:
        parts.append(f"Problem sizes were n = {_join([str(s) for s in sizes])}"
                     + (f"; compression tolerances {_join([f'{t:g}' for t in tols])}"
                        if tols else "") + ".")
    if repeats:
        parts.append(f"Each phase was timed {_join([str(r) for r in repeats])} times and the "
                     "median kept.")
    fitted = [r for r in rows if r.fit is not None and r.metric in PARAGRAPH_METRICS]
    if fitted:
        parts.append(f"Least-squares fits of log t = a + b log n to the per-size medians "
                     f"gave the exponents b (with {100 * level:g}% Student-t confidence "
                     f"intervals):")
        pieces = []
        for r in fitted:
            f = r.fit
            if f is None:
                continue
            text = (f"{r.label}, {PHASE_WORDS.get(r.metric, r.metric)}: b = {f.slope:.2f} "
                    f"[{f.ci_low:.2f}, {f.ci_high:.2f}]")
            if not math.isnan(f.boot_low):
                text += f" (bootstrap [{f.boot_low:.2f}, {f.boot_high:.2f}])"
            text += f" over {f.k} sizes"
            pieces.append(text)
        parts.append("; ".join(pieces) + ".")
        crosses = [r for r in fitted if r.crossover is not None
                   and math.isfinite(r.crossover.fitted) and r.metric == "t_total"]
        for r in crosses:
            c = r.crossover
            if c is None:
                continue
            ci = "" if math.isnan(c.low) else f" ({100 * level:g}% bootstrap interval " \
                f"{c.low:.3g} to {c.high:.3g})"
            parts.append(f"The fitted total time of {r.label} falls below the dense "
                         f"solver's beyond n = {c.fitted:.3g}{ci}.")
    else:
        parts.append("No scaling fit was possible (fewer than three sizes finished).")
    return " ".join(parts) + "\n"


def time_to_accuracy_texts(result: TimeToAccuracy, *, run_name: str, level: float
                           ) -> tuple[str, str]:
    """``time_to_accuracy.tex`` (two booktabs tables: the points, the fits) and
    ``time_to_accuracy.md`` (the same two pipe tables) of ``result``."""
    target = target_text(result)
    points, fits = points_table(result), fits_table(result, level=level)
    caption = (f"Time to accuracy: per solver and n, the cheapest measured knob value "
               f"with {target} and its {column_label(result.cost)}, median over seeds "
               f"(run {run_name}).")
    fit_caption = (f"Fitted exponents b of time to accuracy = c n^b over the sizes "
                   f"reached, with {100 * level:g}% intervals (run {run_name}).")
    if points.empty:
        return ("% no solver has a measured accuracy\n",
                "No solver has a measured accuracy.\n")
    tex = (to_latex(points, caption=caption, label="tab:time-to-accuracy") + "\n"
           + to_latex(fits, caption=fit_caption, label="tab:time-to-accuracy-fit"))
    md = "\n".join([caption, "", to_markdown(points), fit_caption, "", to_markdown(fits)])
    return tex, md


def export_methods(run_dir: str | Path, *, to: str | Path, seed: int = 0,
                   level: float = 0.95, accuracy_metric: str = LOGLIK_ERR_NAT,
                   accuracy_limit: float | None = None) -> ExportResult:
    """Write ``scaling.tex``, ``scaling.md``, ``time_to_accuracy.tex``,
    ``time_to_accuracy.md``, ``methods.txt`` and each figure as PDF and SVG into ``to``
    (created when absent).

    ``accuracy_metric`` and ``accuracy_limit`` set the target of the time to accuracy
    (``harness.analysis.time_to_accuracy``); the limit defaults to the run's verdict limit
    on that metric."""
    run = load_run(run_dir)
    out = Path(to)
    out.mkdir(parents=True, exist_ok=True)
    rows = scaling_rows(run, level=level, rng=np.random.default_rng(seed))
    th = thresholds_for(run)
    limit = (default_limit(accuracy_metric, th) if accuracy_limit is None
             else accuracy_limit)
    accuracy = time_to_accuracy(run, limit=limit, metric=accuracy_metric, level=level,
                                rng=np.random.default_rng(seed))
    table = display_table(rows)
    written: list[Path] = []

    def write(name: str, data: str | bytes) -> None:
        path = out / name
        if isinstance(data, bytes):
            path.write_bytes(data)
        else:
            path.write_text(data, encoding="utf-8")
        written.append(path)

    notes: list[str] = []
    if table.empty:
        reason = f"No scaling fit: {no_fit_reason(rows)}."
        notes.append(reason)
        sizes = size_medians(run)
        caption = f"Measured medians per size (run {run.path.name})."
        write("scaling.tex", f"% {reason}\n" + (
            to_latex(sizes, caption=f"{caption} {reason}", label="tab:scaling")
            if not sizes.empty else ""))
        write("scaling.md", f"{reason}\n\n" + (
            f"{caption}\n\n{to_markdown(sizes)}" if not sizes.empty else ""))
    else:
        table = labelled_scaling(table)
        caption = (f"Fitted scaling exponents b of t = c n^b with {100 * level:g}% "
                   f"intervals (run {run.path.name}).")
        write("scaling.tex", to_latex(table, caption=caption, label="tab:scaling"))
        write("scaling.md", to_markdown(table))
    tex, md = time_to_accuracy_texts(accuracy, run_name=run.path.name, level=level)
    write("time_to_accuracy.tex", tex)
    write("time_to_accuracy.md", md)
    write("methods.txt", methods_paragraph(run, rows, level=level))
    figs = {"accuracy": figures.accuracy_vs_tolerance(run.results, thresholds=th),
            "error_vs_n": figures.error_vs_n(run.results, thresholds=th),
            "time_vs_n": figures.cost_vs_n(run.results, rows,
                                           metrics=("t_factor", "t_total")),
            "memory_vs_n": figures.cost_vs_n(run.results, rows, metrics=MEMORY_METRICS),
            "trace_vs_probes": figures.trace_vs_probes(run.results),
            "time_to_accuracy": time_to_accuracy_figure(accuracy)}
    for name, fig in figs.items():
        if fig is None:
            continue
        for fmt in ("pdf", "svg"):
            write(f"{name}.{fmt}", figure_bytes(fig, fmt))
    return ExportResult(out, tuple(written), tuple(notes))
