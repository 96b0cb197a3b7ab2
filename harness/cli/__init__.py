"""The ``covaudit`` command line: one module per verb, registered in ``VERBS``.

Each verb module offers ``add_parser(subparsers)`` and ``run(args) -> int`` (the exit
code). Exit codes: 0 success, 1 a finding the caller asked to fail on (regression,
unsafe tolerance), 2 bad input or an error.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys
from collections.abc import Sequence

from harness._version import __version__

#: Verb modules under ``harness.cli``, in the order ``--help`` lists them.
VERBS: tuple[str, ...] = (
    "check", "demo", "evaluate", "run", "cases", "report", "compare", "export",
)

EXIT_OK = 0
EXIT_FINDING = 1
EXIT_ERROR = 2


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="covaudit",
        description="Audit compressed Gaussian-process solvers against exact references.",
    )
    parser.add_argument("--version", action="version", version=f"covaudit {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output (repeat for debug)")
    subparsers = parser.add_subparsers(dest="verb", metavar="VERB", required=True)
    for verb in VERBS:
        importlib.import_module(f"harness.cli.{verb}_command").add_parser(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING - 10 * min(args.verbose, 2),
                        format="%(levelname)s %(name)s: %(message)s")
    module = importlib.import_module(f"harness.cli.{args.verb.replace('-', '_')}_command")
    try:
        return int(module.run(args))
    except KeyboardInterrupt:
        print("covaudit: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
