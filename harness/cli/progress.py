"""Progress display of the command line: a tqdm bar on a terminal, timestamped lines
elsewhere.

On a terminal the bar shows the steps done, the elapsed time and tqdm's estimate of the
time left; it stays silent when the verb prints JSON (standard output is then for
machines). When standard error is not a terminal (a batch job's log, CI) ``check`` writes
plain lines instead, with no carriage return or escape code: the UTC time, the stage, the
count done of the stage, the elapsed time and an estimate of the time left
(``2026-12-04T15:01:02Z check: knob values 2/5, elapsed 1m10s, eta 2m30s``), one line when
a unit finishes and otherwise at most one every ``HEARTBEAT_SECONDS``. Library code never
draws anything: it calls back (``harness.grid.runner.run_grid``'s ``progress`` with grid
events, ``harness.check.run_check``'s ``progress`` with stage messages) and these
adapters turn the calls into a bar or lines.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import IO, Any

from tqdm import tqdm

#: Elapsed time, then tqdm's estimate of the time left.
BAR_FORMAT = "{desc}: {n_fmt}/{total_fmt} {unit} [{elapsed} elapsed, about {remaining} left]"
#: Stage messages of ``run_check`` that start a counted step (the others only relabel).
CHECK_STEPS: tuple[str, ...] = ("fitting", "pilot fit", "dense reference", "tolerance",
                                "knob value", "end-to-end refit")
#: Messages of ``run_check`` about its saved state (``harness.check.check_state``): shown
#: whole, as a line of their own, in every display.
CHECK_NOTICES: tuple[str, ...] = ("reusing", "saving each finished stage")
#: A timestamped line at least this often while a stage runs (when nothing finishes).
HEARTBEAT_SECONDS = 30.0
#: Stage names of the timestamped lines, by the start of ``run_check``'s messages.
CHECK_STAGES: tuple[tuple[str, str], ...] = (
    ("trial of solver", "solver trial"), ("fitting", "fit"), ("pilot fit", "fit"),
    ("Fisher scoring", "fit"), ("subsample audit", "growth audit"),
    ("tolerance", "knob values"), ("knob value", "knob values"),
    ("solver seed", "knob values"), ("auditing solver", "knob values"),
    ("timing", "timing"), ("end-to-end refit", "refit"))


def progress_enabled(*, json_output: bool = False, stream: IO[str] | None = None) -> bool:
    """Whether to draw a bar: not under ``--json`` and only on a terminal."""
    stream = sys.stderr if stream is None else stream
    isatty = getattr(stream, "isatty", None)
    return not json_output and bool(isatty and isatty())


class ProgressBar:
    """A tqdm bar of ``total`` steps on ``stream`` (standard error), drawn only when
    ``enabled``.

    Parameters
    ----------
    total : int
        Steps expected (the bar grows if more arrive).
    unit : str
        What a step is ("task", "stage").
    desc : str
        Initial label.
    enabled : bool, optional
        Defaults to ``progress_enabled()``.
    stream : file, optional
        Defaults to ``sys.stderr``.
    """

    def __init__(self, *, total: int = 0, unit: str = "step", desc: str = "",
                 enabled: bool | None = None, stream: IO[str] | None = None) -> None:
        stream = sys.stderr if stream is None else stream
        on = progress_enabled(stream=stream) if enabled is None else enabled
        self.steps = 0
        self.total = total
        self._bar = tqdm(total=total, unit=unit, desc=desc or unit, file=stream,
                         disable=not on, dynamic_ncols=True, bar_format=BAR_FORMAT,
                         leave=False)

    @property
    def enabled(self) -> bool:
        return not self._bar.disable

    def reset(self, total: int) -> None:
        """Start over with ``total`` steps."""
        self.total, self.steps = total, 0
        self._bar.reset(total=total)

    def describe(self, text: str) -> None:
        """Change the label without counting a step."""
        self._bar.set_description_str(text, refresh=True)

    def advance(self, steps: int = 1, *, text: str | None = None) -> None:
        """Count ``steps`` done (the total grows if they exceed it)."""
        self.steps += steps
        if self.steps > self.total:
            self.total = self.steps
            self._bar.total = self.total
        self._bar.update(steps)
        if text is not None:  # a new stage: show it at once (tqdm throttles plain updates)
            self._bar.set_description_str(text, refresh=True)

    def close(self) -> None:
        self._bar.close()

    def __enter__(self) -> ProgressBar:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class GridProgress:
    """``run_grid``'s progress callback: one step per finished job (accuracy or timing),
    with the failed and skipped counts beside the bar."""

    def __init__(self, *, enabled: bool | None = None, stream: IO[str] | None = None) -> None:
        self.bar = ProgressBar(unit="jobs", desc="run", enabled=enabled, stream=stream)
        self.failed = 0
        self.skipped = 0

    def __call__(self, event: Any) -> None:
        kind = getattr(event, "kind", "")
        if kind == "planned":
            self.bar.reset(int(event.total))
        elif kind == "stage":
            self.bar.describe(str(event.stage))
        elif kind == "done":
            self.failed += event.status == "failed"
            self.skipped += event.status == "skipped"
            extra = f" ({self.failed} failed, {self.skipped} skipped)" if (
                self.failed or self.skipped) else ""
            self.bar.advance(text=f"{event.stage or 'run'}{extra}")

    def close(self) -> None:
        self.bar.close()


def duration_text(seconds: float) -> str:
    """``45s``, ``1m10s`` or ``2h05m``: a duration in whole seconds for a log line."""
    whole = max(0, round(seconds))
    hours, rest = divmod(whole, 3600)
    minutes, secs = divmod(rest, 60)
    if hours:
        return f"{hours}h{minutes:02d}m"
    return f"{minutes}m{secs:02d}s" if minutes else f"{secs}s"


def check_stage(message: str) -> str | None:
    """The stage a ``run_check`` message belongs to (``CHECK_STAGES``; any reference is
    ``reference``), or None for a message that names none."""
    for start, stage in CHECK_STAGES:
        if message.startswith(start):
            return stage
    return "reference" if " reference at n = " in message else None


class CheckLog:
    """Timestamped progress lines of ``check`` for a stream that is not a terminal
    (module docstring).

    Parameters
    ----------
    knob_values : int
        How many knob values the check audits (the count of the ``knob values`` stage).
    stream : file
        Where the lines go (standard error).
    clock : callable, optional
        Seconds of a monotonic clock (``time.monotonic``; tests pass their own).
    """

    def __init__(self, *, knob_values: int, stream: IO[str],
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.knob_values = knob_values
        self.stream = stream
        self.clock = clock
        self.start = clock()
        self.last_line = self.start
        self.stage: str | None = None
        self.knob_done = -1  # knob values finished: one less than those started
        self.knob_start = self.start

    def write(self, text: str) -> None:
        """One line: the UTC time, ``check:`` and ``text``."""
        stamp = datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        self.stream.write(f"{stamp} check: {text}\n")
        self.stream.flush()
        self.last_line = self.clock()

    def status(self) -> str:
        """``knob values 2/5, elapsed 1m10s, eta 2m30s`` (the count and the estimate only
        for the knob values, from the mean time of those finished)."""
        now = self.clock()
        text = self.stage or "starting"
        if self.stage == "knob values":
            done = max(self.knob_done, 0)
            text += f" {done}/{self.knob_values}"
            if done:
                left = (now - self.knob_start) / done * max(self.knob_values - done, 0)
                text += f", elapsed {duration_text(now - self.start)}, eta "
                return text + duration_text(left)
        return text + f", elapsed {duration_text(now - self.start)}"

    def __call__(self, message: str) -> None:
        if message.startswith(CHECK_NOTICES):
            self.write(message)
            return
        stage = check_stage(message)
        # a new stage means the one before finished (the first has nothing before it)
        finished = None not in (stage, self.stage) and stage != self.stage
        if stage == "knob values" and not message.startswith(("solver seed",
                                                              "auditing solver")):
            if self.knob_done < 0:
                self.knob_start = self.clock()
            self.knob_done += 1
            finished = finished or self.knob_done > 0
        self.stage = stage or self.stage
        if finished or self.clock() - self.last_line >= HEARTBEAT_SECONDS:
            self.write(f"{self.status()} - {message}")

    def finish(self) -> None:
        """The last line: everything finished, the total time."""
        self.stage = "finished"
        self.write(self.status())


class CheckProgress:
    """``run_check``'s progress callback: on a terminal, stage messages become steps of a
    bar whose total is the fit, the reference and one step per tolerance (and the refit);
    elsewhere, timestamped lines (``CheckLog``). Messages about the saved state
    (``CHECK_NOTICES``) are shown whole in either, and even when the bar is off.

    Parameters
    ----------
    tolerances : int
        How many tolerances the check audits.
    refit : bool
        Whether an end-to-end refit follows.
    enabled : bool, optional
        Whether to draw the bar (defaults to ``progress_enabled()``).
    stream : file, optional
        Defaults to ``sys.stderr``.
    lines : bool, optional
        Whether to write timestamped lines (default: when ``stream`` is not a terminal).
    """

    def __init__(self, *, tolerances: int, refit: bool, enabled: bool | None = None,
                 stream: IO[str] | None = None, lines: bool | None = None) -> None:
        stream = sys.stderr if stream is None else stream
        total = 2 + tolerances + (1 if refit else 0)
        isatty = getattr(stream, "isatty", None)
        self.log = (CheckLog(knob_values=tolerances, stream=stream)
                    if (not (isatty and isatty()) if lines is None else lines) else None)
        self.bar = ProgressBar(total=total, unit="stages", desc="check",
                               enabled=False if self.log else enabled, stream=stream)
        self.stream = stream
        self.messages: list[str] = []

    def __call__(self, message: str) -> None:
        self.messages.append(message)
        if self.log is not None:
            self.log(message)
        elif message.startswith(CHECK_NOTICES):
            tqdm.write(f"check: {message}", file=self.stream)
        if message.startswith(CHECK_STEPS):
            self.bar.advance(text=message)
        elif not message.startswith(CHECK_NOTICES):
            self.bar.describe(message)

    def finish(self) -> None:
        """The check finished: the last timestamped line (none on a terminal)."""
        if self.log is not None:
            self.log.finish()

    def close(self) -> None:
        self.bar.close()


def wrote_lines(paths: Sequence[str | Path]) -> list[str]:
    """``wrote PATH`` for every file written, in the order given."""
    return [f"wrote {Path(p)}" for p in paths]
