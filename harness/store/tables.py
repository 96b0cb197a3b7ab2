"""Flat tables of a run: one row per task (``results.csv``), one per timed sample
(``timings.csv``)."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

import pandas as pd

#: Task fields copied into results.csv, in this order.
TASK_COLUMNS = ("case", "n", "d", "kernel", "separable", "mean", "reml", "solver",
                "solver_version", "tol", "seed", "trace_method", "probes")


def result_row(record: Mapping[str, Any]) -> dict[str, Any]:
    task = record.get("task") or {}
    row: dict[str, Any] = {"key": record.get("key"), "label": record.get("label"),
                           "status": record.get("status")}
    row["pointset"] = (task.get("pointset") or {}).get("name")
    for column in TASK_COLUMNS:
        row[column] = task.get(column)
    result = record.get("result") or {}
    reference = result.get("reference") or {}
    row["reference"] = reference.get("kind")
    row["certificate"] = reference.get("certificate")
    row.update(result.get("metrics") or {})
    solver = result.get("solver") or {}
    row["factor_nbytes"] = solver.get("nbytes")
    memory = result.get("memory") or {}
    row.update(memory)
    timing = record.get("timing") or {}
    for phase, stats in (timing.get("phases") or {}).items():
        for stat in ("min", "median", "iqr"):
            row[f"time_{phase}_{stat}"] = stats.get(stat)
    row.update({f"timing_{k}": v for k, v in (timing.get("memory") or {}).items()})
    row["timing_status"] = record.get("timing_status")
    context = record.get("timing_context") or {}
    row["timed_concurrently"] = context.get("concurrent_tasks", 1) > 1 if context else None
    error = record.get("error") or {}
    row["error_type"] = error.get("type")
    row["error_message"] = error.get("message") or record.get("skip_reason")
    return row


def results_frame(records: Iterable[Mapping[str, Any]]) -> pd.DataFrame:
    rows = [result_row(r) for r in records]
    frame = pd.DataFrame(rows)
    if not frame.empty:
        frame = frame.sort_values(["label", "key"], kind="stable").reset_index(drop=True)
    return frame


def timings_frame(records: Iterable[Mapping[str, Any]]) -> pd.DataFrame:
    rows = []
    for record in records:
        timing = record.get("timing") or {}
        task = record.get("task") or {}
        for phase, stats in (timing.get("phases") or {}).items():
            for repeat, seconds in enumerate(stats.get("samples") or []):
                rows.append({"key": record.get("key"), "label": record.get("label"),
                             "n": task.get("n"), "solver": task.get("solver"),
                             "tol": task.get("tol"), "phase": phase, "repeat": repeat,
                             "seconds": seconds})
    columns = ["key", "label", "n", "solver", "tol", "phase", "repeat", "seconds"]
    return pd.DataFrame(rows, columns=columns)
