"""Load one run directory (``results.csv``, ``timings.csv``, ``run.json``) into frames.

The loader is tolerant of what the analysis can live without and strict about what it
cannot. Tables are verified before they are trusted (``harness.grid.store.table_check``):
a ``results.csv`` cut off mid-line, or one that disagrees with ``run.json`` or the task
records, is rebuilt from the records with a warning (also kept in ``RunData.notes``), or
refused with repair instructions when the records cannot rebuild it; a half row is never
read. A missing or malformed ``results.csv`` or ``run.json`` raises ``RunDirError``
naming the file; a missing ``timings.csv`` gives an empty timing frame and a note (the
bootstrap intervals and significance tests then say they are unavailable). Columns of
``RESULT_COLUMNS`` absent from an older file are added as missing values, so every
consumer can index them.
"""

from __future__ import annotations

import io
import json
import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from harness.audit.metric_names import with_canonical_columns
from harness.grid.store.columns import (
    OPTIONAL_COLUMNS,
    RESULT_COLUMNS,
    SCHEMA_VERSION,
    TIMING_COLUMNS,
)
from harness.grid.store.table_check import TableCheckError, trusted_results, trusted_timings

logger = logging.getLogger(__name__)

RESULTS_FILE = "results.csv"
TIMINGS_FILE = "timings.csv"
RUN_FILE = "run.json"

#: Columns read as text; every other column of the contract is numeric.
TEXT_COLUMNS: frozenset[str] = frozenset({
    "key", "case", "solver", "solver_version", "kernel", "shape", "geometry", "mean",
    "lengthscale", "trace_method", "reference", "status", "error_type", "error_message",
    "notes", "knob_name",
})
BOOL_COLUMNS: frozenset[str] = frozenset({"timed_concurrently"})


class RunDirError(ValueError):
    """A run directory, or one of its files, cannot be read."""


@dataclass(frozen=True)
class RunData:
    """The contents of one run directory.

    Attributes
    ----------
    path : Path
        The run directory.
    results : DataFrame
        One row per task; every column of ``RESULT_COLUMNS`` present (missing ones as NA),
        plus any extra columns the file holds.
    timings : DataFrame
        Long format ``key, phase, repeat, seconds``; empty when ``timings.csv`` is absent.
    meta : dict
        The parsed ``run.json``.
    notes : tuple of str
        What was missing or repaired while loading.
    """

    path: Path
    results: pd.DataFrame
    timings: pd.DataFrame
    meta: dict[str, Any] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    @property
    def ok(self) -> pd.DataFrame:
        """Rows whose status is ``ok``."""
        return self.results[self.results["status"] == "ok"]

    def to_dict(self) -> dict[str, object]:
        return {"path": str(self.path), "tasks": int(len(self.results)),
                "timing_rows": int(len(self.timings)), "notes": list(self.notes)}


def _read_csv(path: Path, *, dtype: type[str] | dict[str, Any] | None = None,
              text: str | None = None) -> pd.DataFrame:
    """``path`` as a frame (``text``, when given, is read in place of the file)."""
    source: Path | io.StringIO = path if text is None else io.StringIO(text)
    try:
        return pd.read_csv(source, dtype=dtype, keep_default_na=True)
    except pd.errors.EmptyDataError as exc:
        raise RunDirError(f"{path}: the file is empty (expected a CSV header line)") from exc
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
        raise RunDirError(f"{path}: not a readable CSV file ({exc})") from exc


def _coerce_results(frame: pd.DataFrame, path: Path, notes: list[str]) -> pd.DataFrame:
    if "key" not in frame.columns:
        raise RunDirError(f"{path}: no 'key' column; expected the columns of "
                          "harness.grid.store.columns.RESULT_COLUMNS")
    missing = [c for c in RESULT_COLUMNS if c not in frame.columns
               and c not in OPTIONAL_COLUMNS]
    if missing:
        notes.append(f"{RESULTS_FILE} lacks {len(missing)} contract column(s): "
                     + ", ".join(missing[:8]) + ("..." if len(missing) > 8 else ""))
    out = frame.copy()
    for column in RESULT_COLUMNS:
        if column in TEXT_COLUMNS:
            values = out[column] if column in out else pd.Series(pd.NA, index=out.index)
            out[column] = values.astype("string").fillna("")
        elif column in BOOL_COLUMNS:
            values = out[column] if column in out else pd.Series(False, index=out.index)
            out[column] = values.astype(str).str.lower().isin({"true", "1", "yes"})
        else:
            values = out[column] if column in out else pd.Series(np.nan, index=out.index)
            out[column] = pd.to_numeric(values, errors="coerce").astype(float)
    # a run written before the knob columns is all tol solvers (harness.grid.store.columns)
    out.loc[out["knob_name"] == "", "knob_name"] = "tol"
    mirrored = (out["knob_name"] == "tol") & out["knob_value"].isna()
    out.loc[mirrored, "knob_value"] = out.loc[mirrored, "tol"]
    if (out["status"] == "").all() and len(out):
        notes.append(f"{RESULTS_FILE} has no status values; rows taken as ok")
        out["status"] = "ok"
    return out


def _read_timings(path: Path, notes: list[str]) -> pd.DataFrame:
    empty = pd.DataFrame({"key": pd.Series(dtype="string"), "phase": pd.Series(dtype="string"),
                          "repeat": pd.Series(dtype=float), "seconds": pd.Series(dtype=float)})
    if not path.is_file():
        notes.append(f"{TIMINGS_FILE} not found: bootstrap intervals and speed "
                     "significance tests are unavailable")
        return empty
    try:
        checked = trusted_timings(path.parent)
    except (OSError, UnicodeDecodeError) as exc:
        raise RunDirError(f"{path}: cannot be read ({exc})") from None
    if checked.notice:
        _warn_once(checked.notice)
        notes.append(checked.notice)
    frame = _read_csv(path, dtype={"key": str, "phase": str}, text=checked.text)
    absent = [c for c in TIMING_COLUMNS if c not in frame.columns]
    if absent:
        raise RunDirError(f"{path}: missing column(s) {', '.join(absent)}; expected "
                          f"{', '.join(TIMING_COLUMNS)}")
    frame = frame[list(TIMING_COLUMNS)].copy()
    frame["key"] = frame["key"].astype("string")
    frame["phase"] = frame["phase"].astype("string")
    frame["repeat"] = pd.to_numeric(frame["repeat"], errors="coerce")
    frame["seconds"] = pd.to_numeric(frame["seconds"], errors="coerce")
    bad = int(frame["seconds"].isna().sum())
    if bad:
        notes.append(f"{TIMINGS_FILE}: {bad} row(s) without a numeric 'seconds' dropped")
        frame = frame.dropna(subset=["seconds"])
    return frame.reset_index(drop=True)


def _read_meta(path: Path) -> dict[str, Any]:
    if not path.is_file():
        raise RunDirError(f"{path}: not found (every run directory holds a run.json)")
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise RunDirError(f"{path}: not valid JSON ({exc})") from exc
    if not isinstance(meta, dict):
        raise RunDirError(f"{path}: expected a JSON object, got {type(meta).__name__}")
    version = meta.get("schema_version", SCHEMA_VERSION)
    if not isinstance(version, int) or version > SCHEMA_VERSION:
        raise RunDirError(f"{path}: schema_version {version!r} is newer than this covaudit "
                          f"understands ({SCHEMA_VERSION}); upgrade covaudit")
    return meta


#: Warnings already given in this process (a command may load one run more than once).
_WARNED: set[str] = set()


def _warn_once(message: str) -> None:
    """Log ``message`` as a warning the first time this process meets it."""
    if message not in _WARNED:
        _WARNED.add(message)
        logger.warning("%s", message)


def load_run(run_dir: str | Path) -> RunData:
    """Read a run directory.

    Parameters
    ----------
    run_dir : path
        A directory holding ``results.csv`` and ``run.json`` (``timings.csv`` optional).

    Returns
    -------
    RunData

    Raises
    ------
    RunDirError
        When the directory or a required file is missing or malformed; the message names
        the file.
    """
    path = Path(run_dir)
    if not path.is_dir():
        raise RunDirError(f"{path}: not a directory (expected a run directory holding "
                          f"{RESULTS_FILE} and {RUN_FILE})")
    notes: list[str] = []
    results_path = path / RESULTS_FILE
    if not results_path.is_file():
        raise RunDirError(f"{results_path}: not found (a run writes it as tasks finish)")
    meta = _read_meta(path / RUN_FILE)
    try:
        checked = trusted_results(path, meta)
    except TableCheckError as exc:
        raise RunDirError(str(exc)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RunDirError(f"{results_path}: cannot be read ({exc})") from None
    if checked.notice:
        _warn_once(checked.notice)
        notes.append(checked.notice)
    results = _coerce_results(_read_csv(results_path, dtype=str, text=checked.text),
                              results_path, notes)
    timings = _read_timings(path / TIMINGS_FILE, notes)
    for note in notes:
        if note not in _WARNED:
            logger.info("%s: %s", path, note)
    # runs written before the canonical metric names gain their columns
    results = with_canonical_columns(results)
    return RunData(path=path, results=results.reset_index(drop=True), timings=timings,
                   meta=meta, notes=tuple(notes))
