"""The result store: one atomic JSON record per task, tables and run metadata."""

from harness.grid.store.atomic import atomic_write_json, atomic_write_text
from harness.grid.store.run_directory import (
    CorruptRecordWarning,
    OutputDirectoryError,
    RunStore,
    safe_path_component,
)
from harness.grid.store.run_lock import LOCK_FILE, RunDirectoryLocked, RunLock
from harness.grid.store.task_records import (
    SCHEMA_VERSION,
    RecordSchemaError,
    error_summary,
    is_complete,
    load_record,
    new_record,
)

__all__ = [
    "LOCK_FILE",
    "RunDirectoryLocked",
    "RunLock",
    "SCHEMA_VERSION",
    "CorruptRecordWarning",
    "OutputDirectoryError",
    "RecordSchemaError",
    "RunStore",
    "atomic_write_json",
    "atomic_write_text",
    "error_summary",
    "is_complete",
    "load_record",
    "new_record",
    "safe_path_component",
]
