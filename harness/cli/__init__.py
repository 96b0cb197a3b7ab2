"""The ``covaudit`` command line: one module per verb, registered in ``VERBS``.

Each verb module offers ``add_parser(subparsers)`` and ``run(args) -> int`` (the exit
code). The exit codes are ``harness.infra.exit_codes.ExitCode`` (one table, listed in the
README and in DEVELOPERS.md).
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys
from collections.abc import Sequence
from contextlib import nullcontext

from harness._version import __version__
from harness.cli.help_format import DefaultsArgumentParser, DefaultsHelpFormatter
from harness.infra.compile_notice import first_compile_notice
from harness.infra.exit_codes import ExitCode

#: Verb modules under ``harness.cli``, in the order ``--help`` lists them.
VERBS: tuple[str, ...] = (
    "check", "demo", "evaluate", "run", "cases", "report", "compare", "export", "warm-up",
)
#: Verbs that run compiled kernels in this process: they say so before compiling any
#: (``harness.infra.compile_notice``).
COMPUTING_VERBS: frozenset[str] = frozenset({"check", "demo", "evaluate", "run", "warm-up"})


def _module(verb: str) -> str:
    return f"{verb.replace('-', '_')}_command"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="covaudit",
        description="Audit compressed Gaussian-process solvers against exact references.",
        formatter_class=DefaultsHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"covaudit {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output (repeat for debug)")
    subparsers = parser.add_subparsers(
        dest="verb", metavar="VERB", required=True,
        parser_class=DefaultsArgumentParser)
    for verb in VERBS:
        importlib.import_module(f"harness.cli.{_module(verb)}").add_parser(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING - 10 * min(args.verbose, 2),
                        format="%(levelname)s %(name)s: %(message)s")
    module = importlib.import_module(f"harness.cli.{_module(args.verb)}")
    notice = first_compile_notice() if args.verb in COMPUTING_VERBS else nullcontext()
    try:
        with notice:
            return int(module.run(args))
    except KeyboardInterrupt:
        print("covaudit: interrupted", file=sys.stderr)
        return ExitCode.INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
