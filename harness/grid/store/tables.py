"""Flat tables of a run: one row per task (``results.csv``), one per timed sample
(``timings.csv``)."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
import pandas as pd

from harness.audit.metric_names import METRICS
from harness.grid.store.columns import PHASES, RESULT_COLUMNS
from harness.grid.tasks import knob_fields, pair_key_of

#: Contract columns (``harness.grid.store.columns``) taken directly from a detailed metric.
_CONTRACT_FROM_METRIC = {
    "logdet_abs_err": "logdet_abs_error", "logdet_rel_err": "logdet_rel_error",
    "quad_abs_err": "quadratic_abs_error", "quad_rel_err": "quadratic_rel_error",
    "loglik_abs_err": "loglik_abs_error", "solve_fwd_err": "solve_forward_error",
    "factor_err": "factorization_error", "trace_rel_err_max": "trace_rel_error_max",
    "kriging_mean_err_sd_max": "kriging_mean_sd_max",
    "kriging_var_rel_err_max": "kriging_var_rel_max",
}
#: Contract columns that take the worse of the value at the data-generating
#: parameters and at the perturbed point.
_CONTRACT_WORST_OF = {
    "score_err_fisher_max": ("score_fisher_max", "perturbed_score_fisher_max"),
    "param_shift_se_max": ("score_shift_se_max", "perturbed_score_shift_se_max"),
    "shift_nats": ("score_shift_nats", "perturbed_score_shift_nats"),
}

#: Task fields copied into results.csv, in this order.
TASK_COLUMNS = ("case", "n", "d", "kernel", "separable", "mean", "reml", "solver",
                "solver_version", "tol", "knob_name", "knob_value", "seed", "trace_method",
                "probes")


def result_row(record: Mapping[str, Any]) -> dict[str, Any]:
    task = record.get("task") or {}
    row: dict[str, Any] = {"key": record.get("key"),
                           "pair_key": pair_key_of(task) if task else None,
                           "label": record.get("label"), "status": record.get("status")}
    row["pointset"] = (task.get("pointset") or {}).get("name")
    knob = knob_fields(task)
    for column in TASK_COLUMNS:
        row[column] = knob[column] if column in knob else task.get(column)
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
    row.update(contract_fields(row, record))
    return row


def _number(value: Any) -> float:
    try:
        return float(value)
    except (TypeError, ValueError):
        return float("nan")


def _worst(*values: Any) -> float:
    numbers = [abs(_number(v)) for v in values]
    numbers = [v for v in numbers if not np.isnan(v)]
    return max(numbers) if numbers else float("nan")


def contract_fields(row: Mapping[str, Any], record: Mapping[str, Any]) -> dict[str, Any]:
    """The ``harness.grid.store.columns`` names of a detailed row (added beside the details)."""
    task = record.get("task") or {}
    params = task.get("kernel_params") or {}
    lengthscale = params.get("lengthscale")
    if isinstance(lengthscale, list | tuple):
        lengthscale = ";".join(f"{v:g}" for v in lengthscale)
    shape = params.get("nu", params.get("alpha"))
    result = record.get("result") or {}
    solver = result.get("solver") or {}
    ranks = solver.get("ranks")
    rank_values = _flatten_ranks(ranks)
    rank_mean = _mean_rank(ranks)
    timing = record.get("timing") or {}
    out: dict[str, Any] = {
        "geometry": row.get("pointset"), "variance": params.get("variance"),
        "lengthscale": lengthscale, "nugget": params.get("nugget"),
        "shape": "" if shape is None else shape,
        "repeat": task.get("repeat", 0),
        "reference_certificate": row.get("certificate"),
        "solve_residual": row.get("solve_residual"),
        "microergodic_shift_se": _worst(row.get("microergodic_shift_se")),
        "trace_z_max": row.get("trace_z_max"),
        "nbytes": row.get("factor_nbytes"),
        "peak_rss_bytes": row.get("timing_process_peak_rss_bytes",
                                  row.get("process_peak_rss_bytes")),
        "peak_traced_bytes": row.get("timing_traced_peak_bytes"),
        "rank_max": max(rank_values) if rank_values else float("nan"),
        "rank_mean": rank_mean,
        "threads": task.get("timing_threads"),
        "timing_repeats": task.get("repeats") if timing else float("nan"),
        "notes": "; ".join(result.get("notes") or []),
        "mle_shift_se_max": row.get("mle_shift_se_max"),
    }
    for column, source in _CONTRACT_FROM_METRIC.items():
        out[column] = row.get(source)
    for column, sources in _CONTRACT_WORST_OF.items():
        out[column] = _worst(*(row.get(s) for s in sources))
    for phase in PHASES:
        for suffix, stat in (("", "median"), ("_min", "min"), ("_iqr", "iqr")):
            out[f"t_{phase}{suffix}"] = row.get(f"time_{phase}_{stat}")
    for name in METRICS:        # each metric also under its canonical name (both kept)
        out[name.canonical] = out.get(name.column)
    return out


def _flatten_ranks(ranks: Any) -> list[float]:
    """Per-level maximum ranks from a solver's ``ranks`` report (dict or list)."""
    if ranks is None:
        return []
    if isinstance(ranks, Mapping):
        values = ranks.get("max", ranks.get("max_rank", list(ranks.values())))
    else:
        values = ranks
    flat: list[float] = []
    for value in values if isinstance(values, list | tuple) else [values]:
        if isinstance(value, Mapping):
            value = value.get("max", value.get("max_rank"))
        number = _number(value)
        if not np.isnan(number):
            flat.append(number)
    return flat


def _mean_rank(ranks: Any) -> float:
    """Block-weighted mean rank over levels, from per-level ``{blocks, mean}`` entries."""
    if not isinstance(ranks, list | tuple):
        return float("nan")
    total = count = 0.0
    for level in ranks:
        if isinstance(level, Mapping) and "mean" in level:
            blocks = _number(level.get("blocks", 1))
            total += blocks * _number(level["mean"])
            count += blocks
    return total / count if count else float("nan")


def results_frame(records: Iterable[Mapping[str, Any]]) -> pd.DataFrame:
    rows = [result_row(r) for r in records]
    frame = pd.DataFrame(rows)
    contract = [c for c in RESULT_COLUMNS if c in frame.columns]
    if "pair_key" in frame.columns:  # the version-free pairing key, beside ``key``
        contract.insert(1, "pair_key")
    frame = frame[contract + [c for c in frame.columns if c not in contract]]
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
                             "tol": task.get("tol"), **knob_fields(task), "phase": phase,
                             "repeat": repeat, "seconds": seconds})
    columns = ["key", "label", "n", "solver", "tol", "knob_name", "knob_value", "phase",
               "repeat", "seconds"]
    return pd.DataFrame(rows, columns=columns)
