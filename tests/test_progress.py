"""The command line's progress display: a tqdm bar with elapsed time and an estimate on
standard error, silent under --json or off a terminal; "wrote PATH" lines; the default
folder of ``check``.

Expected values are counted by hand from the inputs (common practice: a bar counts what
it is told)."""

from __future__ import annotations

import argparse
import io
from pathlib import Path

import numpy as np
import pandas as pd

from harness.cli import check_command as check_cli
from harness.cli.progress import (
    CheckProgress,
    GridProgress,
    ProgressBar,
    progress_enabled,
    wrote_lines,
)
from harness.grid.runner.grid_run import GridEvent


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_quiet_off_a_terminal_and_under_json():
    assert not progress_enabled(stream=io.StringIO())
    assert progress_enabled(stream=_Terminal())
    assert not progress_enabled(json_output=True, stream=_Terminal())
    stream = io.StringIO()
    with ProgressBar(total=3, stream=stream) as bar:
        bar.advance()
    assert not bar.enabled
    assert stream.getvalue() == ""


def test_bar_shows_elapsed_time_and_estimate_on_a_terminal():
    stream = _Terminal()
    bar = ProgressBar(total=4, unit="tasks", desc="run", stream=stream)
    assert bar.enabled
    bar.advance(text="accuracy")
    bar.advance(text="accuracy")
    text = stream.getvalue()
    bar.close()
    assert "2/4 tasks" in text and "elapsed" in text and "left" in text
    assert "accuracy" in text


def test_grid_progress_counts_finished_jobs_and_failures():
    stream = _Terminal()
    progress = GridProgress(stream=stream)
    progress(GridEvent(kind="planned", total=3))
    progress(GridEvent(kind="stage", stage="accuracy"))
    progress(GridEvent(kind="done", label="a", status="ok", stage="accuracy"))
    progress(GridEvent(kind="done", label="b", status="failed", stage="accuracy"))
    assert progress.bar.steps == 2 and progress.bar.total == 3
    assert progress.failed == 1 and progress.skipped == 0
    assert "1 failed" in stream.getvalue()
    progress.close()


def test_check_progress_counts_stages_and_grows_past_its_estimate():
    progress = CheckProgress(tolerances=2, refit=False, enabled=False)
    assert progress.bar.total == 4  # fit, reference, two tolerances
    for message in ("fitting by dense L-BFGS-B from 3 starts at n = 200",
                    "dense reference at n = 200", "tolerance 0.01", "tolerance 0.0001",
                    "end-to-end refit with tol 0.01"):
        progress(message)
    progress("a message that only relabels")
    assert progress.bar.steps == 5 and progress.bar.total == 5
    progress.close()


def test_wrote_lines_name_every_file():
    assert wrote_lines(["a/b.html", Path("c.json")]) == ["wrote a/b.html", "wrote c.json"]


def test_check_writes_to_a_folder_named_after_the_data_file(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert check_cli.default_out("data/field_2024.csv") == Path("reports/check-field_2024")
    rng = np.random.default_rng(1)
    pd.DataFrame({"x": rng.uniform(0, 1, 80), "y": rng.uniform(0, 1, 80),
                  "v": rng.normal(size=80)}).to_csv("plot_a.csv", index=False)
    parser = argparse.ArgumentParser()
    check_cli.add_parser(parser.add_subparsers(dest="verb"))
    code = check_cli.run(parser.parse_args([
        "check", "plot_a.csv", "--coords", "x,y", "--value", "v", "--kernel",
        "exponential", "--params", "variance=1", "lengthscale=0.2", "nugget=0.5",
        "--tolerances", "1e-4", "--no-refit"]))
    out = capsys.readouterr().out
    assert code in (0, 1)
    folder = Path("reports/check-plot_a")
    assert (folder / "check.html").is_file() and (folder / "check.json").is_file()
    assert f"wrote {folder / 'check.json'}" in out and f"wrote {folder / 'check.html'}" in out
