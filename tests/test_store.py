"""The result store: atomic records, resume state, tables, schema checks, bad directories."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pandas as pd
import pytest

from harness.grid.store import (
    SCHEMA_VERSION,
    CorruptRecordWarning,
    OutputDirectoryError,
    RunStore,
    is_complete,
    new_record,
)
from harness.grid.store.atomic import TEMP_PREFIX


def _record(key: str, status: str = "ok", **extra) -> dict:
    record = new_record(key, f"label-{key}", {"n": 10, "solver": "s", "tol": 1e-4},
                        status=status, started="2024-01-01T00:00:00+00:00")
    record.update(extra)
    return record


def test_records_round_trip_and_tables(tmp_path):
    store = RunStore(tmp_path / "run")
    store.prepare()
    timing = {"phases": {"factor": {"samples": [0.1, 0.2], "min": 0.1, "median": 0.15,
                                    "iqr": 0.05}}}
    store.write_record(_record("a", result={"metrics": {"loglik_error": 0.01}},
                               timing=timing, timing_status="ok"))
    store.write_record(_record("b", status="failed",
                               error={"type": "ValueError", "message": "boom", "traceback": ""}))
    records = store.records()
    assert set(records) == {"a", "b"}
    assert records["a"]["schema_version"] == SCHEMA_VERSION
    store.write_tables()
    results = pd.read_csv(tmp_path / "run" / "results.csv")
    assert list(results["key"]) == ["a", "b"]
    assert results.loc[0, "loglik_error"] == 0.01
    assert results.loc[1, "error_type"] == "ValueError"
    timings = pd.read_csv(tmp_path / "run" / "timings.csv")
    assert list(timings["seconds"]) == [0.1, 0.2]


def test_no_temporary_file_survives_a_write(tmp_path):
    store = RunStore(tmp_path)
    store.prepare()
    store.write_record(_record("a"))
    assert [p.name for p in store.tasks_dir.iterdir()] == ["a.json"]


def test_corrupt_and_leftover_files_are_skipped_with_a_warning(tmp_path):
    store = RunStore(tmp_path)
    store.prepare()
    store.write_record(_record("good"))
    (store.tasks_dir / "truncated.json").write_text('{"schema": "covaudit.task", "key": ')
    (store.tasks_dir / f"{TEMP_PREFIX}abc.json").write_text("partial")
    with pytest.warns(CorruptRecordWarning, match="truncated.json"):
        records = store.records()
    assert set(records) == {"good"}
    assert store.remove_stale_temporaries() == 1


def test_newer_schema_is_explained_and_skipped(tmp_path):
    store = RunStore(tmp_path)
    store.prepare()
    newer = _record("new")
    newer["schema_version"] = SCHEMA_VERSION + 1
    (store.tasks_dir / "new.json").write_text(json.dumps(newer))
    with pytest.warns(CorruptRecordWarning, match="newer covaudit"):
        assert store.records() == {}


def test_completeness_rules():
    assert is_complete(_record("a", timing_status="not requested"))
    assert is_complete(_record("a", status="skipped"))
    assert not is_complete(_record("a", timing_status="pending"))
    assert not is_complete(_record("a", status="failed"))


def test_unwritable_output_directory_is_refused_before_work(tmp_path):
    # /sys is a kernel file system: nobody, root included, can create files there.
    target = Path("/sys/covaudit-test-run")
    if not Path("/sys").is_dir():
        pytest.skip("no /sys on this system")
    with pytest.raises(OutputDirectoryError, match="cannot create output directory"):
        RunStore(target).prepare()


def test_full_disk_is_refused_before_work(tmp_path, monkeypatch):
    real = shutil.disk_usage

    def nearly_full(path):
        usage = real(path)
        return type(usage)(usage.total, usage.total - 1000, 1000)

    monkeypatch.setattr(shutil, "disk_usage", nearly_full)
    with pytest.raises(OutputDirectoryError, match="1,000 bytes free"):
        RunStore(tmp_path / "run").prepare()
