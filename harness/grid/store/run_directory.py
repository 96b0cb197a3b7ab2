"""A run directory: one JSON file per task, aggregated tables, and run metadata.

Layout::

    DIR/run.json          case file, backend, environment, counts, schema version
    DIR/tasks/KEY.json    one record per task (``grid.store.task_records``), written atomically
    DIR/results.csv       one row per task
    DIR/timings.csv       one row per timed sample

Unreadable task files (truncated, not JSON, unknown schema) are skipped with a
``CorruptRecordWarning`` naming the file and why; the task is then redone.
"""

from __future__ import annotations

import errno
import hashlib
import json
import shutil
import warnings
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from harness.grid.store.atomic import TEMP_PREFIX, atomic_write_json, atomic_write_text
from harness.grid.store.tables import results_frame, timings_frame
from harness.grid.store.task_records import RecordSchemaError, load_record

RUN_SCHEMA = "covaudit.run"
RUN_SCHEMA_VERSION = 1
#: Free bytes an output directory must have before a run starts (records and tables).
MIN_FREE_BYTES = 16 * 2**20


#: Characters kept in a directory name made from a case name; others become "_".
_SAFE_CHARACTERS = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ"
                             "0123456789._-+")
#: Longest directory name made from a case name (common file-system limits are 255 bytes).
MAX_COMPONENT_LENGTH = 100
#: Hexadecimal digits of the hash that keeps non-ASCII case names apart.
NAME_HASH_LENGTH = 8


def safe_path_component(name: str, *, fallback: str = "run") -> str:
    """``name`` as one safe directory name: no separators, no ``..``, no leading dot.

    Every character outside letters, digits and ``._-+`` becomes ``_``, leading and
    trailing dots, dashes and underscores are trimmed and any ``..`` left becomes ``_``
    (so ``../../x`` becomes ``x`` and an absolute path loses its root); the result never
    starts with a dot, is at most
    ``MAX_COMPONENT_LENGTH`` characters, and is ``fallback`` when nothing is left.

    A name holding characters outside ASCII (``"测试"``, ``"Zürich"``) would lose them,
    and two such names could meet in one folder, so it gets ``-`` and a short hash of the
    full name appended (``NAME_HASH_LENGTH`` hexadecimal digits of its SHA-256). ASCII
    names keep the plain form, so the folders of existing runs stay where they were.

    >>> safe_path_component("../../etc/passwd")
    'etc_passwd'
    >>> safe_path_component("测试")
    'run-6aa8f49c'
    """
    text = "".join(c if c in _SAFE_CHARACTERS else "_" for c in str(name))
    text = text.strip("._-")
    while ".." in text:
        text = text.replace("..", "_")
    tag = "" if str(name).isascii() else "-" + name_digest(str(name))
    text = text[:MAX_COMPONENT_LENGTH - len(tag)].strip("._-")
    return (text or fallback) + tag


def name_digest(name: str) -> str:
    """The first ``NAME_HASH_LENGTH`` hexadecimal digits of the SHA-256 of ``name`` (UTF-8)."""
    return hashlib.sha256(name.encode("utf-8")).hexdigest()[:NAME_HASH_LENGTH]


class CorruptRecordWarning(UserWarning):
    """A task file in a run directory could not be read and was skipped."""


class OutputDirectoryError(OSError):
    """The output directory cannot be created or written, or its disk is full."""


class RunStore:
    """The files of one run directory (see module docstring)."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.tasks_dir = self.path / "tasks"

    # -- checks ------------------------------------------------------------------------
    def prepare(self, *, required_bytes: int = MIN_FREE_BYTES) -> None:
        """Create the directory and prove it writable with room to spare, before any work.

        Raises ``OutputDirectoryError`` saying which path failed and what to do.
        """
        try:
            self.tasks_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputDirectoryError(
                exc.errno, f"cannot create output directory {str(self.path)!r}: "
                           f"{exc.strerror}; choose another with --out") from None
        probe = self.tasks_dir / f"{TEMP_PREFIX}probe"
        try:
            atomic_write_text(probe, "probe\n")
            probe.unlink()
        except OSError as exc:
            what = ("the disk is full" if exc.errno in (errno.ENOSPC, errno.EDQUOT)
                    else f"it is not writable ({exc.strerror})")
            raise OutputDirectoryError(
                exc.errno, f"output directory {str(self.path)!r}: {what}; free space or "
                           "choose another with --out") from None
        free = shutil.disk_usage(self.path).free
        if free < required_bytes:
            raise OutputDirectoryError(
                errno.ENOSPC, f"output directory {str(self.path)!r} has {free:,} bytes free; "
                              f"a run needs at least {required_bytes:,}; free space or choose "
                              "another with --out")

    # -- records -----------------------------------------------------------------------
    def record_path(self, key: str) -> Path:
        return self.tasks_dir / f"{key}.json"

    def write_record(self, record: Mapping[str, Any]) -> Path:
        """Store one task record atomically (``OutputDirectoryError`` when it cannot)."""
        path = self.record_path(record["key"])
        try:
            return atomic_write_json(path, dict(record))
        except OSError as exc:
            raise self.write_error(path, exc) from None

    def saved_records(self) -> int:
        """Task record files on disk (temporary files not counted)."""
        if not self.tasks_dir.is_dir():
            return 0
        return sum(1 for p in self.tasks_dir.glob("*.json")
                   if not p.name.startswith(TEMP_PREFIX))

    def write_error(self, path: Path, exc: OSError) -> OutputDirectoryError:
        """``exc``, met writing ``path``, as one line: the path, the cause, what is kept and
        how to resume."""
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):
            cause = "the disk is full"
        elif exc.errno == errno.EROFS:
            cause = "the file system is read-only"
        else:
            cause = f"{exc.strerror or exc}"
        return OutputDirectoryError(
            exc.errno, f"cannot write {str(path)!r}: {cause}; the {self.saved_records()} task "
                       f"record(s) saved before it are kept in {str(self.tasks_dir)!r}; free "
                       "space or make the directory writable, then run the same command "
                       "again to resume (finished tasks are not redone)")

    def read_record(self, key: str) -> dict[str, Any] | None:
        path = self.record_path(key)
        if not path.exists():
            return None
        return self._read(path)

    def _read(self, path: Path) -> dict[str, Any] | None:
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
            return load_record(data, source=str(path))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            warnings.warn(f"{path}: unreadable task record skipped ({type(exc).__name__}: "
                          f"{exc}); the task will be redone", CorruptRecordWarning,
                          stacklevel=3)
        except RecordSchemaError as exc:
            warnings.warn(f"{exc}; skipped", CorruptRecordWarning, stacklevel=3)
        return None

    def records(self) -> dict[str, dict[str, Any]]:
        """Every readable record by key (temporary files ignored, corrupt ones warned about)."""
        out: dict[str, dict[str, Any]] = {}
        if not self.tasks_dir.is_dir():
            return out
        for path in sorted(self.tasks_dir.glob("*.json")):
            if path.name.startswith(TEMP_PREFIX):
                continue
            record = self._read(path)
            if record is not None:
                out[record["key"]] = record
        return out

    def remove_stale_temporaries(self) -> int:
        """Delete temporary files left by a killed writer; returns how many."""
        count = 0
        if self.tasks_dir.is_dir():
            for path in self.tasks_dir.glob(f"{TEMP_PREFIX}*"):
                try:
                    path.unlink()
                    count += 1
                except FileNotFoundError:
                    pass
        return count

    # -- run-level files ---------------------------------------------------------------
    def write_run(self, info: Mapping[str, Any]) -> Path:
        """Store ``run.json`` atomically (``OutputDirectoryError`` when it cannot)."""
        body = {"schema": RUN_SCHEMA, "schema_version": RUN_SCHEMA_VERSION, **info}
        path = self.path / "run.json"
        try:
            return atomic_write_json(path, body)
        except OSError as exc:
            raise self.write_error(path, exc) from None

    def read_run(self) -> dict[str, Any] | None:
        path = self.path / "run.json"
        if not path.exists():
            return None
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            warnings.warn(f"{path}: unreadable ({exc}); ignored", CorruptRecordWarning,
                          stacklevel=2)
            return None
        if data.get("schema_version", 0) > RUN_SCHEMA_VERSION:
            warnings.warn(f"{path}: written by a newer covaudit (run schema "
                          f"{data.get('schema_version')}); ignored", CorruptRecordWarning,
                          stacklevel=2)
            return None
        return data

    def write_tables(self, records: Iterable[Mapping[str, Any]] | None = None) -> int:
        """Rewrite results.csv and timings.csv from the records (atomically).

        Returns the number of rows of results.csv; raises ``OutputDirectoryError`` when a
        table cannot be written.
        """
        records = list(self.records().values() if records is None else records)
        tables = ((self.path / "results.csv", results_frame(records)),
                  (self.path / "timings.csv", timings_frame(records)))
        for path, frame in tables:
            try:
                atomic_write_text(path, frame.to_csv(index=False))
            except OSError as exc:
                raise self.write_error(path, exc) from None
        return len(records)


