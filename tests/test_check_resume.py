"""``check`` resumes after an interruption, and its progress survives redirection.

Real processes: ``covaudit check`` is killed with SIGKILL after its fit and its first
knob value were saved (the test hook ``COVAUDIT_TEST_KILL_AFTER_SAVES``,
``harness.check.check_state``); the rerun must reuse both (it says so, and the fit cannot
run: ``COVAUDIT_TEST_CRASH_STAGE`` crashes the dense fit if it starts) and give the
verdicts of an uninterrupted run; a changed data file reuses nothing and is named. Its
standard error, a file, holds timestamped progress lines (``harness.cli.progress``).

Expected values: the uninterrupted run of the same command (same seeds, same data), and
counts of the saved units by hand from the options (common practice).
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from harness.check.check_state import (
    KILL_AFTER_SAVES_VARIABLE,
    STATE_SUFFIX,
    state_folder,
)
from harness.infra.child_process import CRASH_STAGE_VARIABLE

TOLERANCES = "1e-4,1e-6,1e-10"
ARGS = ["--coords", "e,n", "--value", "z", "--tolerances", TOLERANCES, "--solver-seeds",
        "1", "--no-refit"]
#: ``2026-12-04T15:01:02Z check: knob values 2/5, elapsed 1m10s, eta 2m30s - ...``
LINE = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ check: "
                  r"(?:(?P<notice>reusing .*)|(?P<stage>[a-z ]+?)(?: (?P<done>\d+)/(?P<total>\d+))?"
                  r", elapsed (?:\d+h\d\dm|\d+m\d\ds|\d+s)(?:, eta \S+)?(?: - .+)?)$")


def _write_field(path: Path, *, n: int = 120, change: bool = False) -> Path:
    rng = np.random.default_rng(7)
    x = rng.uniform(0, 1, (n, 2))
    z = np.sin(4 * x[:, 0]) + np.cos(3 * x[:, 1]) + 0.1 * rng.standard_normal(n)
    if change:
        z[0] += 0.5
    pd.DataFrame({"e": x[:, 0], "n": x[:, 1], "z": z}).to_csv(path, index=False)
    return path


#: Starts ``python -m harness`` with SIGINT handled as in a fresh terminal (default
#: disposition, not blocked), whatever the test process passes on: an ignored or blocked
#: SIGINT is inherited across exec, and the Ctrl-C test must not depend on what an earlier
#: test left in a long-lived pytest-xdist worker.
_LAUNCH = ("import os, signal, sys; signal.signal(signal.SIGINT, signal.SIG_DFL); "
           "signal.pthread_sigmask(signal.SIG_UNBLOCK, [signal.SIGINT]); "
           "os.execv(sys.executable, [sys.executable, '-m', 'harness', *sys.argv[1:]])")


def _check(workspace: Path, data: str, out: str, *, label: str,
           env: dict[str, str] | None = None, extra: tuple[str, ...] = ()
           ) -> tuple[subprocess.CompletedProcess, str]:
    """Run ``covaudit check`` with standard error to a file ``<label>.stderr``; return
    the process and that file's text."""
    err = workspace / f"{label}.stderr"
    with open(err, "w", encoding="utf-8") as stream:
        proc = subprocess.run([sys.executable, "-c", _LAUNCH, "check", data, *ARGS, *extra,
                               "--out", out], cwd=workspace,
                              env=dict(os.environ, OPENBLAS_NUM_THREADS="1", **(env or {})),
                              stdout=subprocess.PIPE, stderr=stream, text=True,
                              timeout=600, check=False)
    return proc, err.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[Any, str]]:
    workspace = tmp_path_factory.mktemp("resume")
    _write_field(workspace / "field.csv")
    out: dict[str, tuple[Any, str]] = {}
    out["full"] = _check(workspace, "field.csv", "full", label="full")
    # killed after its 2nd save: the fit, then the first knob value's one seed
    out["killed"] = _check(workspace, "field.csv", "cut", label="killed",
                           env={KILL_AFTER_SAVES_VARIABLE: "2"})
    out["units_after_kill"] = (None, " ".join(
        sorted(p.name for p in state_folder(workspace / "cut").glob("unit-*"))))
    out["output_after_kill"] = (None, " ".join(
        sorted(p.name for p in (workspace / "cut").glob("*"))))
    # the fit must not run again: it would crash on purpose
    out["resumed"] = _check(workspace, "field.csv", "cut", label="resumed",
                            env={CRASH_STAGE_VARIABLE: "the dense fit"})
    _write_field(workspace / "field.csv", change=True)
    out["changed"] = _check(workspace, "field.csv", "cut", label="changed")
    out["workspace"] = (None, str(workspace))
    return out


def _verdicts(workspace: str, out: str) -> tuple[list[tuple[object, ...]], dict[str, float]]:
    """The (knob value, status) pairs with the recommendation, and every metric value."""
    data = json.loads((Path(workspace) / out / "check.json").read_text())
    rows = data["tolerances"]
    verdicts = [(row["knob_value"], row["status"]) for row in rows]
    metrics = {f"{row['knob_value']!r} {name}": value for row in rows
               for name, value in row["seeds"][0]["metrics"].items()}
    return verdicts + [("recommended", data["recommended_knob"])], metrics


def test_a_killed_check_lost_only_the_unit_in_flight(runs):
    proc, _ = runs["killed"]
    assert proc.returncode == -signal.SIGKILL
    workspace = Path(runs["workspace"][1])
    assert runs["output_after_kill"][1] == ""  # no check.json, no report
    assert (state_folder(workspace / "cut") / "fit.pickle").is_file()
    # one unit saved (the loosest tolerance's one seed; counted by hand from ARGS)
    assert runs["units_after_kill"][1].startswith("unit-0.0001-0-")
    assert len(runs["units_after_kill"][1].split()) == 1
    assert state_folder(workspace / "cut").name == f".cut{STATE_SUFFIX}"


def test_the_rerun_reuses_the_fit_and_the_knob_value_and_agrees(runs):
    proc, err = runs["resumed"]
    assert proc.returncode in (0, 1), err
    assert "reusing the saved fit" in err
    assert "reusing 1 of 3 knob values (1 of 3 (knob value, seed) audits)" in err
    assert CRASH_STAGE_VARIABLE not in err  # the fit never started
    workspace = runs["workspace"][1]
    full, full_metrics = _verdicts(workspace, "full")
    resumed, resumed_metrics = _verdicts(workspace, "cut")
    assert len(full) == 4 and len(full_metrics) >= 3 * 3  # three knob values, >= 3 metrics
    # the same command, uninterrupted: identical verdicts ...
    assert resumed == full
    # ... and the same metric values up to rounding between processes (common practice:
    # the values near 0 here are differences of nearly equal log-likelihoods)
    assert resumed_metrics.keys() == full_metrics.keys()
    for name, value in full_metrics.items():
        assert np.isfinite(value), name
        assert resumed_metrics[name] == pytest.approx(value, rel=1e-6, abs=1e-9), name


def test_a_changed_data_file_reuses_nothing_and_says_why(runs):
    proc, err = runs["changed"]
    assert proc.returncode in (0, 1), err
    assert "reusing nothing from" in err and "the data file changed" in err
    assert "option" not in err.split("reusing nothing from", 1)[1].splitlines()[0]
    assert "reusing the saved fit" not in err and "knob values (" not in err


def test_progress_to_a_file_is_timestamped_lines(runs):
    proc, err = runs["full"]
    assert proc.returncode in (0, 1), err
    assert "\r" not in err and "\x1b" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert lines and all(LINE.match(line) for line in lines), err
    stages = {m["stage"] for m in map(LINE.match, lines) if m and m["stage"]}
    assert {"reference", "knob values", "finished"} <= stages, stages
    counts = [(int(m["done"]), int(m["total"])) for m in map(LINE.match, lines)
              if m and m["done"]]
    # one line per knob value as it starts: 0, 1 and 2 of 3 done (counted by hand)
    assert counts == [(0, 3), (1, 3), (2, 3)], counts


def test_a_warning_is_printed_once(tmp_path):
    _write_field(tmp_path / "field.csv")
    # --reference ladder always warns (harness.check.reference_kind.reference_kind)
    proc, err = _check(tmp_path, "field.csv", "ladder", label="ladder",
                       extra=("--reference", "ladder", "--params", "variance=1",
                              "lengthscale=0.5", "nugget=0.01"))
    assert proc.returncode in (0, 1), err
    warned = [line for line in proc.stdout.splitlines()
              if line.startswith("WARNING: --reference ladder")]
    assert len(warned) == 1, proc.stdout


def test_ctrl_c_keeps_what_was_saved(tmp_path):
    _write_field(tmp_path / "field.csv")
    # Ctrl-C (SIGINT) right after the fit was saved: exit code 130 (ExitCode.INTERRUPTED)
    proc, err = _check(tmp_path, "field.csv", "out", label="interrupted",
                       env={KILL_AFTER_SAVES_VARIABLE: "1:SIGINT"})
    assert proc.returncode == 130, err
    assert (state_folder(tmp_path / "out") / "fit.pickle").is_file()
    assert not list(state_folder(tmp_path / "out").glob("*.tmp"))
    proc, err = _check(tmp_path, "field.csv", "out", label="after",
                       env={CRASH_STAGE_VARIABLE: "the dense fit"})
    assert proc.returncode in (0, 1), err
    assert "reusing the saved fit" in err and "knob values (" not in err
