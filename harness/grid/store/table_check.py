"""Checking ``results.csv`` and ``timings.csv`` against ``run.json`` and the task records.

The tables are derived data: the runner rewrites them from the task records
(``tasks/KEY.json``) after every task. A table can still be wrong on disk: cut off by a
full disk or a copy interrupted mid-file, trimmed by hand, or older than the records.
Before a table is read, ``trusted_results`` checks

- that its last line is complete (a line end after it) and every row has as many fields
  as the header, so that a half row is never read as data;
- that its rows are the task records' keys, one row each;
- that it holds as many rows as ``run.json`` says the run wrote (``results_rows``), and,
  for a run that completed, at least as many as the run's tasks.

On a mismatch the table is rebuilt from the records, with a notice saying why; when the
records cannot rebuild it (no ``tasks/`` folder, or rows the records lack), the check
refuses with ``TableCheckError``, whose message says how to repair the directory.
"""

from __future__ import annotations

import csv
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.grid.store.run_directory import RunStore
from harness.grid.store.tables import results_frame, timings_frame

#: ``run.json`` key: the number of rows the run last wrote to ``results.csv``.
RESULTS_ROWS_KEY = "results_rows"


class TableCheckError(ValueError):
    """A table that is damaged and cannot be rebuilt from the task records."""


@dataclass(frozen=True)
class TableText:
    """The complete part of a CSV table, and what was wrong with the rest.

    Attributes
    ----------
    text : str
        The header and every complete, well-formed row (each with its line end).
    keys : tuple of str
        The ``key`` field of each row kept (empty when the table has no ``key`` column).
    damage : tuple of str
        Why lines were left out (a last line without its line end, rows with too few or
        too many fields); empty when nothing was.
    """

    text: str
    keys: tuple[str, ...]
    damage: tuple[str, ...]

    @property
    def rows(self) -> int:
        """Rows kept."""
        return len(self.keys)


@dataclass(frozen=True)
class CheckedTable:
    """A table's text fit to parse, and the notice when it was rebuilt.

    Attributes
    ----------
    text : str
        CSV text (the file's own, or rebuilt from the task records).
    notice : str or None
        What was wrong and what was done about it; None when the file was sound.
    """

    text: str
    notice: str | None = None


def complete_rows(path: Path) -> TableText:
    """Read ``path`` and keep only its complete, well-formed rows.

    Parameters
    ----------
    path : Path
        A CSV file with a header line.

    Returns
    -------
    TableText
        The rows kept and, in ``damage``, why others were left out.
    """
    raw = path.read_text(encoding="utf-8")
    damage: list[str] = []
    if raw and not raw.endswith("\n"):
        cut = raw.rfind("\n") + 1
        damage.append(f"its last line is cut off (no line end after {raw[cut:][:40]!r})")
        raw = raw[:cut]
    lines = raw.splitlines(keepends=True)
    if not lines:
        return TableText(text=raw, keys=(), damage=tuple(damage))
    header = next(csv.reader([lines[0]]))
    key_at = header.index("key") if "key" in header else None
    kept = [lines[0]]
    keys: list[str] = []
    bad: list[int] = []
    buffer = ""
    first_line = 2
    for number, line in enumerate(lines[1:], start=2):
        buffer += line
        if buffer.count('"') % 2:  # a quoted field goes on over the line end
            continue
        fields = next(csv.reader([buffer]), [])
        if len(fields) == len(header):
            kept.append(buffer)
            keys.append(fields[key_at] if key_at is not None else "")
        else:
            bad.append(first_line)
        buffer = ""
        first_line = number + 1
    if buffer:
        bad.append(first_line)
    if bad:
        shown = ", ".join(map(str, bad[:5])) + (" ..." if len(bad) > 5 else "")
        damage.append(f"{len(bad)} line(s) without the header's {len(header)} fields "
                      f"(line {shown})")
    return TableText(text="".join(kept), keys=tuple(keys), damage=tuple(damage))


def _quiet_records(store: RunStore) -> tuple[dict[str, dict[str, Any]], int]:
    """The readable task records and how many record files could not be read."""
    files = [p for p in store.tasks_dir.glob("*.json") if not p.name.startswith(".")] \
        if store.tasks_dir.is_dir() else []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        records = store.records()
    return records, len(files) - len(records)


def _meta_problems(rows: int, meta: Mapping[str, Any]) -> list[str]:
    """Disagreements between the row count and ``run.json``."""
    problems: list[str] = []
    written = meta.get(RESULTS_ROWS_KEY)
    if isinstance(written, int) and not isinstance(written, bool) and written != rows:
        problems.append(f"it holds {rows} row(s) where run.json says the run wrote {written}")
    tasks = meta.get("tasks")
    if written is None and meta.get("status") == "complete" and isinstance(tasks, int) \
            and rows < tasks:
        problems.append(f"it holds {rows} row(s) for a completed run of {tasks} task(s) "
                        "(run.json)")
    return problems


def _repair_advice(run_dir: Path, *, records: bool) -> str:
    if records:
        return (f"to repair it, run the same `covaudit run CASEFILE --out {run_dir}` again "
                "(tasks with a record are not redone; the tables are rewritten from tasks/), "
                "or restore the run directory from a complete copy")
    return ("to repair it, restore the run directory (results.csv and tasks/) from a "
            f"complete copy, or compute the tasks again with `covaudit run CASEFILE --out "
            f"{run_dir}`")


def trusted_results(run_dir: Path, meta: Mapping[str, Any]) -> CheckedTable:
    """``results.csv`` of ``run_dir`` checked (module docstring), rebuilt when it must be.

    Parameters
    ----------
    run_dir : Path
        The run directory.
    meta : mapping
        Its parsed ``run.json``.

    Returns
    -------
    CheckedTable
        The text to parse, with a notice when it was rebuilt from the task records.

    Raises
    ------
    TableCheckError
        When the table is damaged or disagrees with ``run.json`` and the task records
        cannot rebuild it; the message names the file and says how to repair it.
    """
    path = run_dir / "results.csv"
    table = complete_rows(path)
    store = RunStore(run_dir)
    records, unreadable = _quiet_records(store)
    problems = list(table.damage) + _meta_problems(table.rows, meta)
    if records:
        have, want = set(table.keys), set(records)
        if want - have:
            problems.append(f"{len(want - have)} of the {len(want)} task records in tasks/ "
                            "have no row in it")
        if len(table.keys) != len(have):
            problems.append(f"{len(table.keys) - len(have)} row(s) repeat a task key")
        lacking = have - want
        if lacking and problems:
            raise TableCheckError(
                f"{path}: {'; '.join(problems)}, and {len(lacking)} of its rows have no "
                f"readable task record in {store.tasks_dir} ({unreadable} unreadable), so it "
                f"cannot be rebuilt without losing them; "
                f"{_repair_advice(run_dir, records=True)}")
    if not problems:
        return CheckedTable(text=table.text)
    if not records:
        raise TableCheckError(
            f"{path}: {'; '.join(problems)}; there are no task records in "
            f"{store.tasks_dir} to rebuild it from, so it is not read; "
            f"{_repair_advice(run_dir, records=False)}")
    text = results_frame(records.values()).to_csv(index=False)
    return CheckedTable(text=text, notice=(
        f"{path}: {'; '.join(problems)}; the table was rebuilt from the {len(records)} task "
        f"records in {store.tasks_dir} (the file on disk is unchanged)"))


def trusted_timings(run_dir: Path) -> CheckedTable:
    """``timings.csv`` of ``run_dir`` without a cut-off last line.

    A damaged file is rebuilt from the task records when there are any; otherwise its
    complete rows are kept and the notice says what was left out (the timings are
    optional: the analysis says what it cannot do without them).

    Parameters
    ----------
    run_dir : Path
        The run directory (``timings.csv`` must exist).

    Returns
    -------
    CheckedTable
    """
    path = run_dir / "timings.csv"
    table = complete_rows(path)
    if not table.damage:
        return CheckedTable(text=table.text)
    records, _ = _quiet_records(RunStore(run_dir))
    if records:
        text = timings_frame(records.values()).to_csv(index=False)
        return CheckedTable(text=text, notice=(
            f"{path}: {'; '.join(table.damage)}; the table was rebuilt from the "
            f"{len(records)} task records in {run_dir / 'tasks'} (the file on disk is "
            "unchanged)"))
    return CheckedTable(text=table.text, notice=(
        f"{path}: {'; '.join(table.damage)}; only its {table.rows} complete row(s) are read"))

