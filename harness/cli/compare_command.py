"""``covaudit compare BASELINE NEW``: regression check of a run against a baseline run.

Exit 0 when nothing regressed; 1 on a regression, when no task pairs, when baseline tasks
are missing from NEW (``--allow-missing`` relaxes that) or when a metric finite in the
baseline is NaN or absent now; 2 when an input cannot be read. Writes ``comparison.json``
into NEW and re-renders NEW's report with a comparison section.
"""

from __future__ import annotations

import argparse
import sys

from harness.analysis.load import RunDirError, load_run
from harness.analysis.regression import (
    CheckSyntaxError,
    compare_runs,
    default_checks,
    parse_check,
    write_comparison,
)
from harness.infra.exit_codes import ExitCode
from harness.report import write_report

SHOWN = 20


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "compare", help="compare a run with a baseline run (exit 1 on regression)",
        description="Pair tasks by key and flag error metrics worse than the baseline by a "
                    "factor (above a floor) and significant slow-downs. Defaults are common "
                    "practice: every error metric at 2x, t_factor and t_total at 1.25x.")
    parser.add_argument("baseline", metavar="BASELINE", help="baseline run directory")
    parser.add_argument("new", metavar="NEW", help="run directory to check")
    parser.add_argument("--fail-on", action="append", default=[], metavar="METRIC:Fx[:FLOOR]",
                        help="regression limit for one metric, e.g. logdet_abs_err:2x or "
                             "t_factor:1.25x (repeatable; replaces that metric's default)")
    parser.add_argument("--accuracy-only", action="store_true",
                        help="skip speed and memory checks (for CI on shared machines)")
    parser.add_argument("--fail-on-missing", action="store_true",
                        help="exit 1 when baseline tasks are missing from NEW (the default "
                             "now; kept for scripts that pass it)")
    parser.add_argument("--allow-missing", action="store_true",
                        help="baseline tasks missing from NEW are listed, not a regression")
    parser.add_argument("--speed-across-machines", action="store_true",
                        help="compare speed although the machine fingerprints (CPU model, "
                             "cores, memory) of the two runs differ")
    parser.add_argument("--no-report", action="store_true",
                        help="do not write comparison.json or re-render NEW's report")
    return parser


def run(args: argparse.Namespace) -> int:
    try:
        overrides = [parse_check(spec) for spec in args.fail_on]
        baseline = load_run(args.baseline)
        new = load_run(args.new)
    except (CheckSyntaxError, RunDirError) as exc:
        print(f"covaudit compare: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    checks = default_checks(accuracy_only=args.accuracy_only, overrides=overrides)
    if args.allow_missing and args.fail_on_missing:
        print("covaudit compare: --allow-missing and --fail-on-missing contradict each "
              "other; give one", file=sys.stderr)
        return ExitCode.ERROR
    comparison = compare_runs(baseline, new, checks=checks,
                              allow_missing=args.allow_missing,
                              speed_across_machines=args.speed_across_machines)
    if not args.no_report:
        try:
            write_comparison(comparison, new.path)
            write_report(new.path, comparison=comparison)
        except OSError as exc:
            print(f"covaudit compare: cannot write into {new.path}: {exc}", file=sys.stderr)
            return ExitCode.ERROR
    print(f"{comparison.paired} of {comparison.baseline_tasks} baseline task(s) paired "
          f"(on {comparison.pair_column}); {len(comparison.findings)} regression(s); "
          f"{len(comparison.missing)} missing, {len(comparison.extra)} new; "
          f"speed {comparison.speed}")
    for f in comparison.findings[:SHOWN]:
        detail = f"{f.baseline:.3g} -> {f.current:.3g} (x{f.ratio:.3g}, limit x{f.threshold:g})" \
            if f.kind in ("accuracy", "speed") and f.note.startswith(("floor", "single")) \
            or f.kind == "speed" else f.note
        if f.kind == "accuracy" and not f.note.startswith("floor"):
            detail = f"{f.baseline:.3g} -> {f.current} ({f.note})"
        print(f"  REGRESSION {f.kind:8s} {f.metric:24s} {f.task}: {detail}")
    for v in comparison.versions[:SHOWN]:
        print(f"  version    {v.task}: {v.note}")
    if len(comparison.findings) > SHOWN:
        print(f"  ... and {len(comparison.findings) - SHOWN} more (see comparison.json)")
    for key in comparison.missing[:SHOWN]:
        print(f"  missing from NEW: {key}")
    if comparison.regressed:
        return ExitCode.FINDING
    return ExitCode.OK
