"""Readable digests of a run for its report: one row per dataset and solver setting, and
the environment as a short table (the full records stay in ``results.csv`` and
``run.json``)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

#: (column, label, how to combine over seeds) of the per-dataset summary.
SUMMARY_METRICS: tuple[tuple[str, str, str], ...] = (
    ("loglik_abs_err", "worst |\u0394L| (nats)", "max"),
    ("param_shift_se_max", "worst shift (SE)", "max"),
    ("kriging_mean_err_sd_max", "worst kriging (SD)", "max"),
    ("t_total", "median time (s)", "median"),
    ("peak_rss_bytes", "median peak memory", "median"),
)

#: The speed-up text of a tolerance slower than its reference.
DOES_NOT_PAY = "does not pay at this size"


def speedup_text(speedup: float) -> str:
    """``"3.1\u00d7 faster"``, or ``"0.26\u00d7: does not pay at this size"`` below 1; a dash when
    unknown."""
    if speedup is None or not math.isfinite(float(speedup)):
        return "\u2013"
    if speedup < 1:
        return f"{speedup:.2g}\u00d7: {DOES_NOT_PAY}"
    return f"{speedup:.3g}\u00d7 faster"


def setting_text(tol: Any, knob_name: Any = "tol", knob_value: Any = None) -> Any:
    """A solver setting as the report shows it: a ``tol`` solver's tolerance as given (the
    text of earlier reports), another knob as ``rho = 6``, an exact solver as ``exact``."""
    name = "tol" if not isinstance(knob_name, str) or not knob_name else knob_name
    if name == "tol":
        return "exact" if tol is None or pd.isna(tol) else tol
    if knob_value is None or pd.isna(knob_value):
        return "exact"
    return f"{name} = {float(knob_value):g}"


def _bytes(value: float) -> str:
    if not math.isfinite(value):
        return "\u2013"
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if value >= size:
            return f"{value / size:.3g} {unit}"
    return f"{value:.0f} B"


def _number(value: float) -> str:
    return "\u2013" if not math.isfinite(value) else f"{value:.3g}"


def dataset_summary(results: pd.DataFrame) -> pd.DataFrame:
    """One row per dataset (case, kernel, geometry, n) and solver setting: tasks finished
    out of planned, the worst accuracy metrics over seeds and the median cost."""
    if results.empty:
        return pd.DataFrame()
    frame = results.copy()
    names = frame["knob_name"] if "knob_name" in frame else pd.Series("tol", index=frame.index)
    values = frame["knob_value"] if "knob_value" in frame else frame["tol"]
    frame["tol_text"] = [text if isinstance(text, str) else f"{text:g}"
                         for text in map(setting_text, frame["tol"], names, values)]
    keys = ["case", "kernel", "geometry", "n", "solver", "tol_text"]
    rows = []
    for values, g in frame.groupby(keys, sort=True, dropna=False):
        case, kernel, geometry, n, solver, tol = values
        ok = g[g["status"] == "ok"]
        n_text = "" if pd.isna(n) else f"{int(n):,}"
        row: dict[str, Any] = {
            "dataset": " / ".join(str(p) for p in (case, kernel, geometry) if str(p)),
            "n": n_text, "solver": solver, "tol": tol,
            "tasks ok": f"{len(ok)} of {len(g)}"}
        for column, label, how in SUMMARY_METRICS:
            series = pd.to_numeric(ok[column], errors="coerce").dropna() if column in ok \
                else pd.Series(dtype=float)
            value = float("nan") if series.empty else float(
                series.max() if how == "max" else series.median())
            row[label] = _bytes(value) if column == "peak_rss_bytes" else _number(value)
        rows.append(row)
    out = pd.DataFrame(rows)
    # a metric column without any value says nothing: leave it out
    empty = [label for _, label, _ in SUMMARY_METRICS if (out[label] == "\u2013").all()]
    return out.drop(columns=empty)


def _blas(threads: Any) -> str:
    if not isinstance(threads, Mapping):
        return ""
    blas = threads.get("blas")
    if isinstance(blas, list) and blas:
        seen = []
        for lib in blas:
            if isinstance(lib, Mapping):
                text = f"{lib.get('api', '?')} {lib.get('version', '')}".strip() + \
                    f", {lib.get('threads', '?')} threads"
                if text not in seen:
                    seen.append(text)
        return "; ".join(seen)
    return str(blas or "")


def environment_summary(meta: Mapping[str, Any]) -> pd.DataFrame:
    """The few settings a reader needs to judge the timings: machine, threads, versions,
    backend, git commit and when the run took place."""
    env: Mapping[str, Any] = meta.get("environment") or {}
    if not isinstance(env, Mapping):
        env = {}
    cpu: Mapping[str, Any] = env["cpu"] if isinstance(env.get("cpu"), Mapping) else {}
    versions: Mapping[str, Any] = env["versions"] if isinstance(env.get("versions"),
                                                                Mapping) else {}
    backend: Mapping[str, Any] = meta["backend"] if isinstance(meta.get("backend"),
                                                               Mapping) else {}
    memory = cpu.get("memory_bytes")
    rows = [
        ("machine", " ".join(str(cpu.get(k, "")) for k in ("model", "machine")).strip()),
        ("cores (physical / logical)",
         f"{cpu.get('physical_cpus', '?')} / {cpu.get('logical_cpus', '?')}" if cpu else ""),
        ("memory", _bytes(float(memory)) if isinstance(memory, int | float) else ""),
        ("operating system", str(cpu.get("system", ""))),
        ("BLAS", _blas(env.get("threads"))),
        ("backend", ", ".join(f"{k} {v}" for k, v in backend.items()) if backend else ""),
        ("covaudit / python / numpy / scipy",
         " / ".join(str(versions.get(k, "?")) for k in ("covaudit", "python", "numpy",
                                                         "scipy")) if versions else ""),
        ("git commit", str(env.get("git_commit") or "")[:12]),
        ("started / finished", f"{meta.get('started', '')} / {meta.get('finished', '')}"
         if meta.get("started") else ""),
    ]
    return pd.DataFrame([r for r in rows if r[1] and r[1] != "?"],
                        columns=["setting", "value"])


def fitted_any(rows: Any, metrics: tuple[str, ...]) -> bool:
    """Whether any scaling row of ``metrics`` has a fit (a line on the cost figure)."""
    return bool(np.any([r.fit is not None for r in rows if r.metric in metrics]))
