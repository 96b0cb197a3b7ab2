"""The result store: atomic records, resume state, tables, schema checks, bad directories."""

from __future__ import annotations

import io
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


# -- issue 12: run-directory lock, safe folder names, tables after every task ----------

def test_lock_refuses_a_second_holder_naming_the_process(tmp_path):
    # Defect 5. Source of the semantics: flock(2), an exclusive lock per open file.
    import os

    from harness.grid.store import RunDirectoryLocked, RunLock

    with RunLock(tmp_path) as first:
        assert json.loads(first.path.read_text())["pid"] == os.getpid()
        with pytest.raises(RunDirectoryLocked, match=f"in use by process {os.getpid()}"):
            RunLock(tmp_path).acquire()
    assert (tmp_path / ".covaudit.lock").read_text() == ""  # released: no owner
    with RunLock(tmp_path) as again:  # free again after release
        assert again.took_over is None


def test_stale_lock_content_is_taken_over(tmp_path, caplog):
    from harness.grid.store import RunLock

    (tmp_path / ".covaudit.lock").write_text(json.dumps(
        {"pid": 999999999, "host": "elsewhere", "started": "then"}))
    with caplog.at_level("WARNING"), RunLock(tmp_path) as lock:
        assert lock.took_over["pid"] == 999999999
    assert "took over the stale lock of process 999999999" in caplog.text


@pytest.mark.parametrize(("name", "folder"), [
    ("smoke", "smoke"), ("../../x", "x"), ("/etc/passwd", "etc_passwd"), ("a/b\\c", "a_b_c"),
    ("..", "run"), ("", "run"), (".hidden", "hidden"), ("x" * 300, "x" * 100),
    ("tol 1e-4: run!", "tol_1e-4__run"),
])
def test_case_names_become_one_safe_folder_name(name, folder):
    # Defect 4: the default run directory used the case name uncleaned.
    from harness.grid.store import safe_path_component

    out = safe_path_component(name)
    assert out == folder
    assert "/" not in out and "\\" not in out and ".." not in out and not out.startswith(".")


def test_tables_are_rewritten_after_every_task(tmp_path):
    # Defect 9: results.csv was written only at the end of a run.
    from harness.grid.runner.grid_run import _Recorder
    from harness.grid.runner.jobs import Job

    class _Backend:
        name, workers, shared = "serial", 1, False

    store = RunStore(tmp_path)
    store.prepare()
    recorder = _Recorder(store, {}, _Backend(), None)
    recorder.tasks = {"k1": type("T", (), {"timing": False})(),
                      "k2": type("T", (), {"timing": False})()}
    for n, key in enumerate(("k1", "k2"), start=1):
        job = Job(key=key, label=key, stage="accuracy", task={"n": 10, "solver": "s"})
        recorder.accuracy(job, {"status": "ok", "result": {"metrics": {}}})
        assert len(pd.read_csv(tmp_path / "results.csv")) == n


def test_atomic_files_get_the_umask_mode(tmp_path):
    # mkstemp creates 0600; results must be readable like any file written with open().
    import os

    from harness.grid.store import atomic_write_text

    path = atomic_write_text(tmp_path / "t.csv", "a\n")
    mask = os.umask(0)
    os.umask(mask)
    assert path.stat().st_mode & 0o777 == 0o666 & ~mask


def test_complete_rows_keep_quoted_line_ends_and_drop_a_cut_row(tmp_path):
    from harness.grid.store.table_check import complete_rows

    path = tmp_path / "t.csv"
    path.write_text('key,notes\nk1,"two\nlines, quoted"\nk2,plain\n')
    table = complete_rows(path)
    assert table.keys == ("k1", "k2") and not table.damage
    path.write_text('key,notes\nk1,"two\nlines"\nk2,"cut inside\n')
    table = complete_rows(path)
    assert table.keys == ("k1",) and "line 4" in table.damage[0]
    path.write_text("key,notes\nk1,a\nk2,b,extra\nk3")
    table = complete_rows(path)
    assert table.keys == ("k1",)
    assert "cut off" in table.damage[0] and "line 3" in table.damage[1]


def test_a_stale_results_table_is_rebuilt_from_the_records(tmp_path):
    # The table names tasks the records do not, or misses some: the records decide.
    from harness.grid.store.table_check import RESULTS_ROWS_KEY, trusted_results

    store = RunStore(tmp_path)
    store.prepare()
    for key in ("k1", "k2"):
        record = new_record(key, key, {"n": 10, "solver": "s"}, status="ok", started="t")
        store.write_record(record)
    rows = store.write_tables()
    assert rows == 2 and trusted_results(tmp_path, {RESULTS_ROWS_KEY: 2}).notice is None
    store.write_record(new_record("k3", "k3", {"n": 10, "solver": "s"}, status="ok",
                                  started="t"))
    checked = trusted_results(tmp_path, {})
    assert "1 of the 3 task records in tasks/ have no row" in (checked.notice or "")
    assert len(pd.read_csv(io.StringIO(checked.text))) == 3
