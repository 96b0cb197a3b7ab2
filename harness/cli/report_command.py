"""``covaudit report RUNDIR``: write the self-contained HTML report of a run."""

from __future__ import annotations

import argparse
import sys

from harness.analysis.load import RunDirError, load_run
from harness.audit.rule import ThresholdError, Thresholds
from harness.cli.flag_types import float_range, positive_float
from harness.infra.exit_codes import ExitCode
from harness.report import write_report
from harness.report.run_report import thresholds_for


def add_threshold_options(parser: argparse.ArgumentParser) -> None:
    """Options overriding the verdict limits (defaults: the case file's ``[verdict]``)."""
    group = parser.add_argument_group("verdict limits (common practice, not a standard)")
    group.add_argument("--verdict-from", metavar="CASE.toml",
                       help="read the limits from this case file's [verdict] table "
                            "(default: the run's own case file)")
    group.add_argument("--loglik-nats", type=positive_float("--loglik-nats"), metavar="X",
                       help="largest |log-likelihood error| in nats (default 0.1)")
    group.add_argument("--param-shift-se", type=positive_float("--param-shift-se"), metavar="X",
                       help="largest implied parameter shift in SE (default 0.1)")
    group.add_argument("--kriging-mean-sd", type=positive_float("--kriging-mean-sd"), metavar="X",
                       help="largest kriging mean error in predictive SD (default 0.05)")
    group.add_argument("--trace-min-fraction",
                       type=float_range("--trace-min-fraction", 0.0, 1.0), metavar="X",
                       help="smallest share of trace z-scores within +-2 (default 0.8)")


def thresholds_from_args(args: argparse.Namespace, base: Thresholds) -> Thresholds:
    """``base`` (or ``--verdict-from``) with the command-line overrides applied."""
    th = Thresholds.from_case_file(args.verdict_from) if args.verdict_from else base
    return th.with_overrides(loglik_nats=args.loglik_nats, param_shift_se=args.param_shift_se,
                             kriging_mean_sd=args.kriging_mean_sd,
                             trace_min_fraction=args.trace_min_fraction)


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "report", help="write the HTML report of a run directory",
        description="Write one self-contained HTML file (figures embedded, no scripts) "
                    "with verdicts, accuracy, scaling fits, failures and environment.")
    parser.add_argument("run_dir", metavar="RUNDIR", help="run directory")
    parser.add_argument("--out", metavar="FILE",
                        help="output file (default RUNDIR/report.html)")
    parser.add_argument("--coord-units", metavar="UNIT", default=None,
                        help="unit of the point sets' coordinates and length scales, e.g. "
                             "m or km (default: the case's coord_units, else 'coordinate "
                             "units')")
    add_threshold_options(parser)
    return parser


def run(args: argparse.Namespace) -> int:
    if args.coord_units is not None and not args.coord_units.strip():
        print("covaudit report: --coord-units: expected a unit such as m or km, got an "
              "empty text", file=sys.stderr)
        return ExitCode.ERROR
    try:
        thresholds = thresholds_from_args(args, thresholds_for(load_run(args.run_dir)))
        path = write_report(args.run_dir, out=args.out, thresholds=thresholds,
                            coord_units=args.coord_units)
    except (RunDirError, ThresholdError, ValueError, OSError) as exc:
        print(f"covaudit report: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    print(f"wrote {path}")
    return ExitCode.OK
