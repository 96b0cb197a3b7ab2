"""``covaudit export RUNDIR --to DIR``: methods-section table, figures and paragraph."""

from __future__ import annotations

import argparse
import sys

from harness.analysis.load import RunDirError
from harness.analysis.time_to_accuracy import TimeToAccuracyError
from harness.cli.flag_types import float_range, nonnegative_int, positive_float
from harness.infra.exit_codes import ExitCode
from harness.report.export import export_methods


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "export", help="write the scaling table, figures and a methods paragraph",
        description="Write scaling.tex (booktabs), scaling.md, time_to_accuracy.tex, "
                    "time_to_accuracy.md, methods.txt and every figure as PDF and SVG into "
                    "DIR.")
    parser.add_argument("run_dir", metavar="RUNDIR", help="run directory")
    parser.add_argument("--to", required=True, metavar="DIR", help="output directory")
    parser.add_argument("--seed", type=nonnegative_int("--seed"), default=0,
                        help="seed of the bootstrap intervals (default 0)")
    parser.add_argument("--level",
                        type=float_range("--level", 0.0, 1.0, low_open=True, high_open=True),
                        default=0.95,
                        help="confidence level of the intervals (default 0.95)")
    parser.add_argument("--loglik-nats", type=positive_float("--loglik-nats"), metavar="X",
                        help="largest |log-likelihood error| in nats that the time to "
                             "accuracy counts as met (default: the run's [verdict] limit, "
                             "0.1)")
    return parser


def run(args: argparse.Namespace) -> int:
    if not 0 < args.level < 1:
        print(f"covaudit export: --level must lie in (0, 1), got {args.level}", file=sys.stderr)
        return ExitCode.ERROR
    try:
        result = export_methods(args.run_dir, to=args.to, seed=args.seed, level=args.level,
                                accuracy_limit=args.loglik_nats)
    except (RunDirError, TimeToAccuracyError, OSError) as exc:
        print(f"covaudit export: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    for path in result.files:
        print(f"wrote {path}")
    for note in result.notes:
        print(f"covaudit export: {note}", file=sys.stderr)
    return ExitCode.OK
