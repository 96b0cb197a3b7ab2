"""``covaudit run CASEFILE``: run a case grid into a resumable run directory."""

from __future__ import annotations

import argparse
import dataclasses
import importlib.util
import logging
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from harness.cli.flag_types import float_range, int_range
from harness.infra.exit_codes import ExitCode

logger = logging.getLogger(__name__)

#: Most local workers accepted (a typo guard, far above any machine's cores).
MAX_WORKERS = 4096


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "run", help="run a case grid (resumable)",
        description="Run every task of a case file and store the results in a run directory. "
                    "Rerunning with the same --out skips finished tasks. Exit 0 when every "
                    "task finished or was skipped, 3 when a task failed or timed out (in this "
                    "run or kept from an earlier one; all are listed), 2 on bad input.")
    add_arguments(parser)
    return parser


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("casefile", metavar="CASEFILE", help="case grid (TOML)")
    parser.add_argument("--out", metavar="DIR", default=None,
                        help="run directory (default: reports/<case name>, the name made "
                             "one safe folder name; --out is the only way elsewhere)")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int_range("--workers", 1, MAX_WORKERS), metavar="N",
                       default=None, help="local worker processes (default: run serially, "
                                          "one task at a time in a child process)")
    where.add_argument("--dask-local", type=int_range("--dask-local", 1, MAX_WORKERS),
                       metavar="N", default=None,
                       help="start a Dask LocalCluster with N single-threaded workers")
    where.add_argument("--scheduler", metavar="ADDR", default=None,
                       help="join the Dask scheduler at ADDR (e.g. tcp://host:8786)")
    parser.add_argument("--redo-failed", action="store_true",
                        help="redo tasks (and timings) that failed in an earlier run")
    parser.add_argument("--only", metavar="KEY-PATTERN", action="append", default=None,
                        help="run only tasks whose key or label matches (shell pattern or "
                             "substring; repeatable)")
    parser.add_argument("--task-timeout", type=float_range("--task-timeout", 0.0, 7 * 86400.0,
                                                           low_open=True),
                        metavar="SECONDS", default=None,
                        help="stop a task (and record it as timed out) after this many "
                             "seconds (default: the case file's [timing] timeout, else "
                             "the cost estimate times a safety factor, at least 300 s)")
    parser.add_argument("--reference", choices=tuple(REFERENCE_ORDERS), default=None,
                        help="the truth each task compares with: dense, operator (exact "
                             "products, beyond the dense memory budget), ladder (the solver "
                             "at a tighter tolerance; never the sole basis of 'safe'), or "
                             "auto (dense within the budget, else a structured reference, "
                             "else the operator); default: the case file's [reference] order")


#: ``--reference`` choices and the reference order each gives every task.
REFERENCE_ORDERS: dict[str, tuple[str, ...]] = {
    "auto": ("dense", "statespace", "kronecker", "operator"),
    "dense": ("dense",),
    "operator": ("operator",),
    "ladder": ("ladder",),
}


def _write_report(out: Path) -> Path | None:
    """Call ``harness.report.write_report(run_dir)`` when that package exists."""
    if importlib.util.find_spec("harness.report") is None:
        return None
    module = importlib.import_module("harness.report")
    writer = getattr(module, "write_report", None)
    if writer is None:
        return None
    return writer(out)


def run(args: argparse.Namespace) -> int:
    from harness.grid.cases import CaseFileError, load_case
    from harness.grid.runner import make_backend, run_grid, select_tasks
    from harness.grid.store import OutputDirectoryError, RunStore, safe_path_component

    try:
        case = load_case(args.casefile)
    except CaseFileError as exc:
        print(f"covaudit run: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    if args.reference is not None:
        case = dataclasses.replace(case, references=REFERENCE_ORDERS[args.reference])
    tasks = select_tasks(case.tasks(), args.only)
    if not tasks:
        print(f"covaudit run: no task of {args.casefile} matches --only {args.only}",
              file=sys.stderr)
        return ExitCode.ERROR
    if args.out:
        out = Path(args.out)
    else:
        folder = safe_path_component(case.name)
        out = Path("reports") / folder
        if folder != case.name:
            print(f"covaudit run: case name {case.name!r} is not a safe folder name; "
                  f"writing to {out} (give --out to choose another place)", file=sys.stderr)
    store = RunStore(out)
    try:
        store.prepare()
    except OutputDirectoryError as exc:
        print(f"covaudit run: {exc.strerror}", file=sys.stderr)
        return ExitCode.ERROR
    try:
        backend = make_backend(workers=args.workers, dask_local=args.dask_local,
                               scheduler=args.scheduler)
    except (ValueError, OSError) as exc:
        print(f"covaudit run: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    from harness.cli.progress import GridProgress, wrote_lines

    progress = GridProgress()
    try:
        summary = run_grid(tasks, store, backend, redo_failed=args.redo_failed,
                           progress=progress, case_file=args.casefile,
                           case_text=Path(args.casefile).read_text(encoding="utf-8"),
                           case_info=case.to_dict(), task_timeout=args.task_timeout)
    except KeyboardInterrupt:
        progress.close()
        print(f"covaudit run: interrupted; finished tasks are kept in {out}; run the same "
              "command again to resume", file=sys.stderr)
        return ExitCode.INTERRUPTED
    except OutputDirectoryError as exc:
        progress.close()
        print(f"covaudit run: {exc.strerror}", file=sys.stderr)
        return ExitCode.ERROR
    finally:
        backend.close()
    progress.close()
    print(f"{case.name}: {summary.tasks} tasks; {summary.already_done} already done, "
          f"{summary.ran} run ({summary.ok} ok, {summary.failed} failed, {summary.skipped} "
          f"skipped), {summary.timed} timed, {summary.kept_failed} earlier failures kept; "
          f"{summary.seconds:.1f} s -> {out}")
    for line in (*summary.failures, *summary.kept_failures):
        print(f"  failed: {line}")
    try:
        report = _write_report(out)
    except Exception as exc:  # noqa: BLE001 - the results are stored; a report error is reported
        print(f"covaudit run: the report could not be written: {type(exc).__name__}: {exc}",
              file=sys.stderr)
        report = None
    written = [out / name for name in ("results.csv", "timings.csv", "run.json")
               if (out / name).is_file()]
    for line in wrote_lines([*written, *([report] if report is not None else [])]):
        print(line)
    print(f"wrote task records under {out / 'tasks'} ({summary.ran} new, "
          f"{summary.timed} timed)")
    return ExitCode.SOLVER_FAILED if summary.has_failures else ExitCode.OK


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m harness.cli.run_command CASEFILE ...``: this verb alone."""
    parser = argparse.ArgumentParser(prog="covaudit run")
    add_arguments(parser)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    try:
        return run(parser.parse_args(argv))
    except KeyboardInterrupt:
        return ExitCode.INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
