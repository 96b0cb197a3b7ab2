"""``covaudit compare BASELINE NEW``: regression check of a run against a baseline run.

Exit 0 when nothing regressed; 1 on a regression, when no task pairs, when baseline tasks
are missing from NEW (``--missing-tasks list`` relaxes that) or when a metric finite in
the baseline is NaN or absent now; 2 when an input or an option cannot be read. Writes
``comparison.json`` into NEW and re-renders NEW's report with a comparison section.

The gate's options, validated through ``harness.infra.option_specs``:
``--max-ratio METRIC=R`` (the largest allowed ratio new / baseline), ``--ignore-below
METRIC=VALUE`` (an error under VALUE never regresses), ``--speed-checks
{same-machine,off,any-machine}`` and ``--missing-tasks {fail,list}``. The old spellings
(``--fail-on METRIC:Rx[:FLOOR]``, ``--accuracy-only``, ``--speed-across-machines``,
``--allow-missing``, ``--fail-on-missing``) still work, hidden from ``--help``, each with
a one-line deprecation note (``harness.cli.option_aliases``).
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass

from harness.analysis.load import RunDirError, load_run
from harness.analysis.regression import (
    Check,
    CheckSyntaxError,
    compare_runs,
    gate_checks,
    parse_check,
    parse_fail_on,
    parse_metric_setting,
    write_comparison,
)
from harness.cli.option_aliases import DeprecatedOption
from harness.infra.exit_codes import ExitCode
from harness.infra.option_specs import IGNORE_BELOW, MAX_RATIO, MISSING_TASKS, SPEED_CHECKS
from harness.report import write_report

SHOWN = 20


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "compare", help="compare a run with a baseline run (exit 1 on regression)",
        description="Pair tasks by key and flag error metrics worse than the baseline by a "
                    "ratio (above a floor) and significant slow-downs. Defaults are common "
                    "practice: every error metric at ratio 2 over a round-off floor, "
                    "t_factor and t_total at 1.25.")
    parser.add_argument("baseline", metavar="BASELINE", help="baseline run directory")
    parser.add_argument("new", metavar="NEW", help="run directory to check")
    parser.add_argument("--max-ratio", action="append", default=[], metavar="METRIC=R",
                        help="largest allowed ratio new / baseline of METRIC, R >= 1, e.g. "
                             "loglik_abs_err=3 or t_factor=1.5 (repeatable; replaces that "
                             "metric's default, 2 for errors and 1.25 for times)")
    parser.add_argument("--ignore-below", action="append", default=[], metavar="METRIC=VALUE",
                        help="an error metric below VALUE never counts as a regression, "
                             "e.g. loglik_abs_err=1e-4 (repeatable; default: a round-off "
                             "floor per metric)")
    parser.add_argument("--speed-checks", type=SPEED_CHECKS.argparse_type(),
                        default=SPEED_CHECKS.default,
                        metavar="{same-machine,off,any-machine}",
                        help="compare speed and memory only when the two runs' machine "
                             "fingerprints (CPU model, cores, memory) match, never (off, for "
                             "CI on shared machines), or on any machines")
    parser.add_argument("--missing-tasks", type=MISSING_TASKS.argparse_type(),
                        default=MISSING_TASKS.default, metavar="{fail,list}",
                        help="baseline tasks absent from NEW: fail (a regression, exit 1) or "
                             "list (reported only)")
    parser.add_argument("--no-report", action="store_true",
                        help="do not write comparison.json or re-render NEW's report")
    parser.add_argument("--fail-on", dest="old_fail_on", action=DeprecatedOption,
                        instead="--max-ratio METRIC=R and --ignore-below METRIC=VALUE")
    parser.add_argument("--accuracy-only", dest="old_accuracy_only", action=DeprecatedOption,
                        nargs=0, instead="--speed-checks off")
    parser.add_argument("--speed-across-machines", dest="old_across_machines",
                        action=DeprecatedOption, nargs=0, instead="--speed-checks any-machine")
    parser.add_argument("--allow-missing", dest="old_allow_missing", action=DeprecatedOption,
                        nargs=0, instead="--missing-tasks list")
    parser.add_argument("--fail-on-missing", dest="old_fail_on_missing",
                        action=DeprecatedOption, nargs=0, instead="--missing-tasks fail")
    return parser


@dataclass(frozen=True)
class GateOptions:
    """The gate as the options ask for it, old and new spellings merged."""

    checks: tuple[Check, ...]
    speed_checks: str      # same-machine | off | any-machine
    missing_tasks: str     # fail | list


def _one_choice(flag: str, given: str, default: str, old: dict[str, str]) -> str:
    """``given`` merged with the old flags that set the same option (``old``: flag ->
    the value it means); contradicting spellings are refused naming both."""
    values = {f"{flag} {given}": given} if given != default else {}
    values |= old
    if len(set(values.values())) > 1:
        raise CheckSyntaxError(f"{' and '.join(values)} contradict each other; give one")
    return next(iter(values.values()), default)


def gate_options(args: argparse.Namespace) -> GateOptions:
    """The checks, speed mode and missing-task rule from the parsed options.

    Raises
    ------
    CheckSyntaxError
        One line naming the option at fault.
    """
    max_ratios: dict[str, float] = {}
    floors: dict[str, float] = {}
    for flag, spec, target in (("--max-ratio", MAX_RATIO, max_ratios),
                               ("--ignore-below", IGNORE_BELOW, floors)):
        for text in getattr(args, flag[2:].replace("-", "_")):
            metric, value = parse_metric_setting(text, flag=flag, spec=spec)
            if metric in target:
                raise CheckSyntaxError(f"{flag} {metric} given twice")
            target[metric] = value
    for text in args.old_fail_on:
        parse_check(text)                      # the old syntax's own messages
        name, factor, floor = parse_fail_on(text)
        max_ratios.setdefault(name, factor)
        if floor is not None:
            floors.setdefault(name, floor)
    speed = _one_choice("--speed-checks", args.speed_checks, SPEED_CHECKS.default,
                        {**({"--accuracy-only": "off"} if args.old_accuracy_only else {}),
                         **({"--speed-across-machines": "any-machine"}
                            if args.old_across_machines else {})})
    missing = _one_choice("--missing-tasks", args.missing_tasks, MISSING_TASKS.default,
                          {**({"--allow-missing": "list"} if args.old_allow_missing else {}),
                           **({"--fail-on-missing": "fail"} if args.old_fail_on_missing
                              else {})})
    checks = gate_checks(max_ratios=max_ratios, floors=floors, speed=speed != "off")
    return GateOptions(checks=checks, speed_checks=speed, missing_tasks=missing)


def run(args: argparse.Namespace) -> int:
    try:
        gate = gate_options(args)
        baseline = load_run(args.baseline)
        new = load_run(args.new)
    except (CheckSyntaxError, RunDirError) as exc:
        print(f"covaudit compare: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    comparison = compare_runs(baseline, new, checks=gate.checks,
                              allow_missing=gate.missing_tasks == "list",
                              speed_across_machines=gate.speed_checks == "any-machine")
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
