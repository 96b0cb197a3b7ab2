"""Progress display of the command line: a tqdm bar on standard error.

The bar shows the steps done, the elapsed time and tqdm's estimate of the time left. It
stays silent when the verb prints JSON (standard output is then for machines) or when
standard error is not a terminal (logs, CI), so redirected output is never cluttered.
Library code never draws anything: it calls back (``harness.grid.runner.run_grid``'s
``progress`` with grid events, ``harness.check.run_check``'s ``progress`` with stage
messages) and these adapters turn the calls into a bar.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from pathlib import Path
from typing import IO, Any

from tqdm import tqdm

#: Elapsed time, then tqdm's estimate of the time left.
BAR_FORMAT = "{desc}: {n_fmt}/{total_fmt} {unit} [{elapsed} elapsed, about {remaining} left]"
#: Stage messages of ``run_check`` that start a counted step (the others only relabel).
CHECK_STEPS: tuple[str, ...] = ("fitting", "pilot fit", "dense reference", "tolerance",
                                "knob value", "end-to-end refit")


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


class CheckProgress:
    """``run_check``'s progress callback: stage messages become steps of a bar whose total
    is the fit, the reference and one step per tolerance (and the refit).

    Parameters
    ----------
    tolerances : int
        How many tolerances the check audits.
    refit : bool
        Whether an end-to-end refit follows.
    """

    def __init__(self, *, tolerances: int, refit: bool, enabled: bool | None = None,
                 stream: IO[str] | None = None) -> None:
        total = 2 + tolerances + (1 if refit else 0)
        self.bar = ProgressBar(total=total, unit="stages", desc="check", enabled=enabled,
                               stream=stream)
        self.messages: list[str] = []

    def __call__(self, message: str) -> None:
        self.messages.append(message)
        if message.startswith(CHECK_STEPS):
            self.bar.advance(text=message)
        else:
            self.bar.describe(message)

    def close(self) -> None:
        self.bar.close()


def wrote_lines(paths: Sequence[str | Path]) -> list[str]:
    """``wrote PATH`` for every file written, in the order given."""
    return [f"wrote {Path(p)}" for p in paths]
