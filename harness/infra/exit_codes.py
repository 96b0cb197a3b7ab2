"""The one table of ``covaudit`` exit codes, and how mixed outcomes combine.

=====  =================  ==============================================================
code   name               meaning
=====  =================  ==============================================================
0      ``OK``             the question was answered favourably
1      ``FINDING``        a finding: unsafe, nothing safe, a regression, nothing paired,
                          baseline tasks missing, a metric turned NaN, failed tasks
2      ``ERROR``          a usage, input or environment error, including a crash of the
                          harness's own computation (a reference, a fit)
3      ``SOLVER_FAILED``  the solver under test (a plugin, or a built-in audited as the
                          subject) crashed, raised, timed out or exited early
130    ``INTERRUPTED``    interrupted (Ctrl-C)
=====  =================  ==============================================================

When one command meets several outcomes, the first of 130, 2, 3, 1, 0 that applies wins
(``combine``); every outcome is still listed in the command's output. ``DEVELOPERS.md``
("Exit codes") and the README list the same table.

This module is infrastructure, the lowest layer: it imports nothing from ``harness``.
"""

from __future__ import annotations

from collections.abc import Iterable
from enum import IntEnum

__all__ = ["PRECEDENCE", "ExitCode", "combine"]


class ExitCode(IntEnum):
    """The exit status of a ``covaudit`` verb (see the module's table)."""

    OK = 0
    FINDING = 1
    ERROR = 2
    SOLVER_FAILED = 3
    INTERRUPTED = 130


#: The order in which mixed outcomes win: the first present is the command's exit code.
PRECEDENCE: tuple[ExitCode, ...] = (
    ExitCode.INTERRUPTED, ExitCode.ERROR, ExitCode.SOLVER_FAILED, ExitCode.FINDING,
    ExitCode.OK,
)


def combine(outcomes: Iterable[int]) -> ExitCode:
    """The exit code of a command that met every outcome in ``outcomes``.

    Parameters
    ----------
    outcomes
        Exit codes of the command's parts (members of ``ExitCode`` or their integers).

    Returns
    -------
    ExitCode
        The first of ``PRECEDENCE`` among ``outcomes``; ``OK`` when there are none.

    Raises
    ------
    ValueError
        When an outcome is not in the table.
    """
    present = {ExitCode(int(code)) for code in outcomes}
    return next((code for code in PRECEDENCE if code in present), ExitCode.OK)
