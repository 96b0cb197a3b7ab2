"""The state folder of ``check`` (``harness.check.check_state``) and its timestamped
progress lines (``harness.cli.progress.CheckLog``), in process.

Expected values are counted by hand from the inputs (common practice); hashes are
SHA-256 from ``hashlib`` (Python's standard library).
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import re
from pathlib import Path

import pytest

from harness.audit.engine import SeedAudit
from harness.check import CheckOptions
from harness.check.check_state import (
    DATA_FILE_INPUT,
    RESULT_FREE_OPTIONS,
    CheckState,
    changed_inputs,
    file_digest,
    state_folder,
    state_inputs,
    state_key,
)
from harness.cli.progress import HEARTBEAT_SECONDS, CheckLog, CheckProgress, duration_text

READING = {"coords": ["e", "n"], "value": "z", "coord_system": "planar",
           "drop_missing": False, "average_duplicates": False}


def _audit(seed: int = 5) -> SeedAudit:
    return SeedAudit(index=0, seed=seed, loglik=-1.5, metrics=(), judgements=(), seconds=0.25,
                     nbytes=64)


@pytest.fixture
def datafile(tmp_path: Path) -> Path:
    path = tmp_path / "field.csv"
    path.write_text("e,n,z\n0,0,1\n1,0,2\n")
    return path


def test_the_data_file_counts_by_its_contents(datafile: Path, tmp_path: Path) -> None:
    assert file_digest(datafile) == hashlib.sha256(datafile.read_bytes()).hexdigest()
    copy = tmp_path / "renamed.csv"
    copy.write_bytes(datafile.read_bytes())
    options = CheckOptions()
    assert state_inputs(copy, READING, options) == state_inputs(datafile, READING, options)


def test_every_result_option_is_in_the_key_and_only_those(datafile: Path) -> None:
    options = CheckOptions()
    inputs = state_inputs(datafile, READING, options)
    names = {f.name for f in dataclasses.fields(CheckOptions)}
    assert RESULT_FREE_OPTIONS < names
    assert {f"option {n}" for n in names - RESULT_FREE_OPTIONS} <= inputs.keys()
    assert not {f"option {n}" for n in RESULT_FREE_OPTIONS} & inputs.keys()
    base = state_key(inputs)
    # an option that changes no saved result leaves the key alone ...
    same = CheckOptions(solver_timeout=5.0, refit=False)
    assert state_key(state_inputs(datafile, READING, same)) == base
    # ... every other changes it, and is named
    for changed in (CheckOptions(kernel="exponential"), CheckOptions(seed=1),
                    CheckOptions(tolerances=(1e-4,)), CheckOptions(memory_budget=2**20),
                    CheckOptions(fixed_params={"variance": 1.0})):
        other = state_inputs(datafile, READING, changed)
        assert state_key(other) != base
        assert len(changed_inputs(inputs, other)) == 1
    other = state_inputs(datafile, READING | {"value": "w"}, options)
    assert changed_inputs(inputs, other) == ["option value"]


def test_a_unit_round_trips_and_leaves_no_temporary_file(datafile: Path,
                                                          tmp_path: Path) -> None:
    inputs = state_inputs(datafile, READING, CheckOptions())
    folder = state_folder(tmp_path / "out")
    assert folder == tmp_path / ".out.check-state"
    state, line = CheckState.open(folder, inputs)
    assert line is None and not folder.exists()  # nothing written before the first save
    assert state.load(1e-4, 0, 5) is None
    state.save(1e-4, 0, 5, _audit())
    state.save_fit({"theta": [1.0]})
    assert sorted(p.name for p in folder.iterdir()) == [
        "fit.pickle", "inputs.json", "unit-0.0001-0-5.pickle"]
    again, line = CheckState.open(folder, inputs)
    assert line is None
    assert again.load(1e-4, 0, 5) == _audit()
    assert again.load(1e-4, 0, 6) is None and again.load(1e-6, 0, 5) is None
    assert again.load_fit() == {"theta": [1.0]}
    # two knob values x two seeds, one audit saved (counted by hand)
    assert again.saved_units([1e-4, 1e-6], [5, 6]) == (0, 1)
    again.save(1e-4, 1, 6, _audit(6))
    assert again.saved_units([1e-4, 1e-6], [5, 6]) == (1, 2)


def test_a_changed_input_reuses_nothing_and_is_named(datafile: Path, tmp_path: Path) -> None:
    folder = tmp_path / ".out.check-state"
    state, _ = CheckState.open(folder, state_inputs(datafile, READING, CheckOptions()))
    state.save(1e-4, 0, 5, _audit())
    state.save_fit("fit")
    datafile.write_text("e,n,z\n0,0,1\n1,0,3\n")
    inputs = state_inputs(datafile, READING, CheckOptions(kernel="exponential"))
    fresh, line = CheckState.open(folder, inputs)
    assert line is not None
    assert line.endswith(f"{DATA_FILE_INPUT}, option kernel changed"), line
    assert fresh.load(1e-4, 0, 5) is None and fresh.load_fit() is None
    fresh.save(1e-6, 0, 5, _audit())  # the first save starts the folder afresh
    assert sorted(p.name for p in folder.iterdir()) == ["inputs.json",
                                                        "unit-1e-06-0-5.pickle"]


def test_an_unreadable_record_or_unit_is_not_reused(datafile: Path, tmp_path: Path) -> None:
    folder = tmp_path / ".out.check-state"
    inputs = state_inputs(datafile, READING, CheckOptions())
    state, _ = CheckState.open(folder, inputs)
    state.save(1e-4, 0, 5, _audit())
    (folder / "unit-0.0001-0-5.pickle").write_bytes(b"cut off")
    assert CheckState.open(folder, inputs)[0].load(1e-4, 0, 5) is None
    (folder / "inputs.json").write_text("{")
    _, line = CheckState.open(folder, inputs)
    assert line is not None and "unreadable" in line


class _Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


LINE = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ check: (.*)$")


def _texts(stream: io.StringIO) -> list[str]:
    out = []
    for line in stream.getvalue().splitlines():
        match = LINE.match(line)
        assert match, line
        out.append(match[1])
    return out


def test_log_lines_per_finished_unit_with_elapsed_and_estimate() -> None:
    stream, clock = io.StringIO(), _Clock()
    log = CheckLog(knob_values=4, stream=stream, clock=clock)
    log("fitting by dense L-BFGS-B + Fisher scoring at n = 200")  # first stage: no line
    clock.now = 40.0
    log("dense reference at n = 200")
    clock.now = 50.0
    log("tolerance 0.01 (1 solver seed(s))")
    clock.now = 60.0
    log("solver seed 1/1 at tol 0.0001")  # not a finished unit, no 30 s since the last
    log("tolerance 0.0001 (1 solver seed(s))")
    clock.now = 70.0
    log("tolerance 1e-06 (1 solver seed(s))")
    clock.now = 70.0 + HEARTBEAT_SECONDS
    log("solver seed 1/1 at tol 1e-06")  # 30 s without a line: a heartbeat
    log("reusing 1 of 4 knob values")
    log.finish()
    # counted by hand: 1 knob value in 10 s, 3 left -> 30 s; 2 in 20 s, 2 left -> 20 s
    assert _texts(stream) == [
        "reference, elapsed 40s - dense reference at n = 200",
        "knob values 0/4, elapsed 50s - tolerance 0.01 (1 solver seed(s))",
        "knob values 1/4, elapsed 1m00s, eta 30s - tolerance 0.0001 (1 solver seed(s))",
        "knob values 2/4, elapsed 1m10s, eta 20s - tolerance 1e-06 (1 solver seed(s))",
        "knob values 2/4, elapsed 1m40s, eta 50s - solver seed 1/1 at tol 1e-06",
        "reusing 1 of 4 knob values",
        "finished, elapsed 1m40s"]


def test_durations_in_whole_seconds() -> None:
    # counted by hand
    assert [duration_text(s) for s in (0, 59.4, 70, 3599, 3600 + 300)] == [
        "0s", "59s", "1m10s", "59m59s", "1h05m"]


def test_check_progress_writes_lines_off_a_terminal_and_none_on_it() -> None:
    class _Terminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    plain = io.StringIO()
    progress = CheckProgress(tolerances=2, refit=False, stream=plain)
    assert progress.log is not None and not progress.bar.enabled
    for message in ("fitting", "dense reference at n = 30", "tolerance 0.01",
                    "reusing the saved fit (dense)"):
        progress(message)
    progress.finish()
    progress.close()
    text = plain.getvalue()
    assert "\r" not in text and "\x1b" not in text
    assert len(text.splitlines()) == 4 and "reusing the saved fit (dense)" in text
    terminal = _Terminal()
    progress = CheckProgress(tolerances=2, refit=False, stream=terminal)
    assert progress.log is None and progress.bar.enabled
    progress("reusing the saved fit (dense)")  # shown whole above the bar
    progress.finish()
    progress.close()
    assert "check: reusing the saved fit (dense)" in terminal.getvalue()
