"""Task result records: the schema, construction, and upgrade-or-explain on load.

One JSON object per task::

    schema          "covaudit.task"
    schema_version  SCHEMA_VERSION
    key, label      the task's stable key and readable name
    task            Task.to_dict()
    status          "ok" | "failed" | "skipped"
    result          audit_accuracy's body (status ok)
    timing          audit_timing's body, or null when not (yet) timed
    timing_status   "not requested" | "pending" | "ok" | "failed"
    timing_context  how the timing was taken: concurrent tasks, backend, warnings
    error           {type, message, traceback} (status failed; timing_error for timings)
    skip_reason     why the task was skipped (status skipped)
    worker          host and process id that ran it; started, finished (UTC ISO 8601)
    environment     library versions and thread settings on the worker

``load_record`` upgrades older schema versions through ``UPGRADES`` (one function per
step, version v -> v + 1) and refuses newer ones with an explanation.
"""

from __future__ import annotations

import datetime as _dt
import os
import platform
import traceback
from collections.abc import Callable, Mapping
from typing import Any

SCHEMA = "covaudit.task"
SCHEMA_VERSION = 1
STATUSES = ("ok", "failed", "skipped")
#: Frames kept in a stored traceback summary (the innermost ones).
TRACEBACK_FRAMES = 8

#: UPGRADES[v] turns a version-v record into a version-(v + 1) record.
UPGRADES: dict[int, Callable[[dict[str, Any]], dict[str, Any]]] = {}


class RecordSchemaError(ValueError):
    """A stored record that this version of covaudit cannot read."""


def now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds")


def worker_identity() -> dict[str, Any]:
    return {"host": platform.node(), "pid": os.getpid()}


def error_summary(exc: BaseException) -> dict[str, Any]:
    """Exception type, message and the innermost ``TRACEBACK_FRAMES`` frames as text."""
    frames = traceback.extract_tb(exc.__traceback__)[-TRACEBACK_FRAMES:]
    return {"type": type(exc).__name__, "message": str(exc),
            "traceback": "".join(traceback.format_list(frames)).rstrip()}


def new_record(key: str, label: str, task: Mapping[str, Any], *, status: str,
               started: str) -> dict[str, Any]:
    if status not in STATUSES:
        raise ValueError(f"status must be one of {STATUSES}, got {status!r}")
    return {"schema": SCHEMA, "schema_version": SCHEMA_VERSION, "key": key, "label": label,
            "task": dict(task), "status": status, "result": None, "timing": None,
            "timing_status": "not requested", "timing_context": None, "error": None,
            "timing_error": None, "skip_reason": None, "worker": worker_identity(),
            "started": started, "finished": now(), "environment": None}


def is_complete(record: Mapping[str, Any]) -> bool:
    """Finished for good: ok with its timing done (or not requested), or skipped."""
    if record.get("status") == "skipped":
        return True
    return record.get("status") == "ok" and record.get("timing_status") in ("ok",
                                                                           "not requested")


def load_record(data: Any, *, source: str) -> dict[str, Any]:
    """Check and upgrade a parsed record; raise ``RecordSchemaError`` explaining why not."""
    if not isinstance(data, dict) or data.get("schema") != SCHEMA:
        raise RecordSchemaError(f"{source}: not a covaudit task record (no schema "
                                f"{SCHEMA!r}); it was not written by covaudit")
    version = data.get("schema_version")
    if not isinstance(version, int) or version < 1:
        raise RecordSchemaError(f"{source}: schema_version {version!r} is not a positive "
                                f"integer")
    if version > SCHEMA_VERSION:
        raise RecordSchemaError(
            f"{source}: written by a newer covaudit (schema version {version}; this one "
            f"reads up to {SCHEMA_VERSION}); upgrade covaudit to read it")
    while version < SCHEMA_VERSION:
        step = UPGRADES.get(version)
        if step is None:
            raise RecordSchemaError(f"{source}: schema version {version} has no upgrade to "
                                    f"{version + 1}; rerun the task (it will be redone)")
        data = step(data)
        version += 1
        data["schema_version"] = version
    for key in ("key", "status", "task"):
        if key not in data:
            raise RecordSchemaError(f"{source}: required field {key!r} is missing")
    if data["status"] not in STATUSES:
        raise RecordSchemaError(f"{source}: status {data['status']!r} is not one of "
                                f"{STATUSES}")
    return data
