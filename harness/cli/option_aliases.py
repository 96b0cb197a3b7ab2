"""Old option spellings kept working, hidden from ``--help``, with a deprecation note.

Options are added, never renamed away: when an option gets a clearer name, its old
spelling stays as a ``DeprecatedOption``. It is
absent from ``--help`` (``argparse.SUPPRESS``), stores into its own ``dest`` for the verb
to translate, and prints one line on standard error naming the new spelling:

    covaudit compare: --accuracy-only is deprecated; use --speed-checks off
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from typing import Any


class DeprecatedOption(argparse.Action):
    """A hidden old spelling: a flag (``nargs=0``, stores True) or a repeatable option
    taking one value (``nargs=None``, appends), noted on standard error when used.

    Parameters
    ----------
    instead : str
        The new spelling, as the note shows it (``--speed-checks off``).
    """

    def __init__(self, option_strings: Sequence[str], dest: str, *, instead: str,
                 nargs: int | str | None = None, default: Any = None,
                 metavar: str | None = None) -> None:
        if nargs not in (0, None):
            raise ValueError(f"DeprecatedOption {option_strings}: nargs must be 0 or None")
        super().__init__(option_strings, dest, nargs=nargs,
                         default=(False if nargs == 0 else []) if default is None else default,
                         help=argparse.SUPPRESS, metavar=metavar)
        self.instead = instead

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace,
                 values: Any, option_string: str | None = None) -> None:
        print(f"{parser.prog}: {option_string} is deprecated; use {self.instead}",
              file=sys.stderr)
        if self.nargs == 0:
            setattr(namespace, self.dest, True)
            return
        setattr(namespace, self.dest, [*getattr(namespace, self.dest, []), values])
