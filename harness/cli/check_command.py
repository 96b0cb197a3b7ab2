"""``covaudit check``: is a compression tolerance safe for my data?

Reads a CSV/Parquet file, validates it, fits the covariance model by maximum
likelihood (or takes ``--fixed-params``), audits every tolerance against the exact reference
(``harness.check``), prints the verdict table and writes ``check.json`` and
``check.html`` into ``--out``. Outputs are written to a temporary folder beside
``--out`` and moved into place only when everything succeeded.
Exit codes (``harness.infra.exit_codes``, combined by ``combine``): 0 a safe tolerance
was found, 1 none is safe, 2 bad input or an error, 3 the solver under test failed (at
one knob value or more, or in its trial before the fit).
"""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np

from harness.audit.engine import LADDER_FACTOR
from harness.audit.solver_seeds import DEFAULT_SOLVER_SEEDS
from harness.audit.solver_trial import SolverFailed
from harness.check import CheckDataError, CheckError, run_check, validate
from harness.check.compile_ahead import CompileAhead, compile_ahead_for
from harness.check.cost_plan import budget_refusal, plan_check
from harness.check.fitting import FitError
from harness.check.pipeline import DEFAULT_FIT_TIME_BUDGET, REFERENCE_CHOICES, holdout_indices
from harness.check.solver_lineup import line_up
from harness.cli.check_arguments import (
    DEFAULT_TOLERANCES_TEXT,
    coord_units_option,
    options_from_args,
)
from harness.cli.check_outputs import default_out, json_text, write_outputs, written_files
from harness.cli.check_summary import failed_points, summary
from harness.cli.flag_types import (
    float_range,
    nonnegative_int,
    positive_float,
    positive_int,
)
from harness.cli.params import ParamSyntaxError
from harness.cli.plan_summary import plan_lines
from harness.grid.runner.dask_check import check_dask_options
from harness.infra.child_process import StageCrashed
from harness.infra.data_files import DataFileError, load_observations
from harness.infra.exit_codes import ExitCode, combine
from harness.infra.option_specs import (
    HOLDOUT_FRACTION,
    HOLDOUT_POINTS,
    PRECONDITIONER,
    PROBES,
    SOLVER_SEEDS,
    SOLVER_TIMEOUT,
    TIMING_REPEATS,
    VARIANCE_POINTS,
)
from harness.infra.option_specs import LADDER_FACTOR as LADDER_FACTOR_SPEC
from harness.infra.solver_timeout import RULE_TEXT as SOLVER_TIMEOUT_RULE
from harness.linalg.dense_budget import DEFAULT_BUDGET_FRACTION
from harness.model import MEAN_MODELS
from harness.model.kernels import KERNELS, KernelParameterError
from harness.solvers.registry import SolverRuntimeError

__all__ = ["add_parser", "default_out", "json_text", "options_from_args", "run", "summary",
           "write_outputs"]


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "check", help="is a compression tolerance safe for my dataset?",
        description="Fit a Gaussian-process model to a dataset and audit a ladder of "
                    "compression tolerances against the exact reference.")
    p.add_argument("datafile", help="CSV or Parquet file with coordinates and values")
    p.add_argument("--coords", required=True,
                   help="comma-separated coordinate columns (lonlat: longitude,latitude)")
    p.add_argument("--value", required=True, help="column of observed values")
    p.add_argument("--kernel", default="matern32", help=f"one of: {', '.join(KERNELS)}")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="repeatable; a shape parameter (nu, alpha) is held at VALUE during "
                        "the fit, any other (variance, lengthscale, nugget; lengthscale "
                        "then required) is a starting value of the fit. To skip the fit, "
                        "use --fixed-params")
    p.add_argument("--fixed-params", nargs="+", default=None, metavar="NAME=VALUE",
                   help="skip the fit and audit at these parameters, e.g. variance=1 "
                        "lengthscale=0.2 nugget=0.01 (same syntax as evaluate --param; "
                        "default: fit them)")
    p.add_argument("--params", dest="fixed_params", nargs="+", help=argparse.SUPPRESS)
    p.add_argument("--anisotropic", action="store_true",
                   help="fit one length scale per coordinate")
    p.add_argument("--no-nugget", action="store_true", help="fit without a nugget")
    p.add_argument("--mean", choices=MEAN_MODELS, default="constant", help="mean model (GLS)")
    p.add_argument("--tolerances", default=None,
                   help="comma-separated compression tolerances of a tol solver (default "
                        f"{DEFAULT_TOLERANCES_TEXT})")
    p.add_argument("--knob-values", default=None, metavar="V1,V2,...",
                   help="comma-separated values of the --solver's accuracy knob (tol for "
                        "hodlr, neighbours for vecchia; default: tol solvers the --tolerances "
                        "default, other solvers their declared sweep)")
    p.add_argument("--coord-system", choices=("planar", "lonlat"), default="planar",
                   help="lonlat: degrees, embedded on the Earth sphere (chordal km)")
    p.add_argument("--coord-units", default=None, metavar="UNIT",
                   help="unit of planar coordinates and length scales in the report, e.g. "
                        "m or km (default: 'coordinate units'; lonlat is always degrees and "
                        "chordal km)")
    p.add_argument("--holdout",
                   type=HOLDOUT_FRACTION.argparse_type(),
                   default=0.1,
                   help="fraction held out for kriging (default 0.1), at most "
                        "--holdout-points")
    p.add_argument("--holdout-points", type=HOLDOUT_POINTS.argparse_type(),
                   default=None, metavar="N",
                   help="most held-out points of the kriging evaluation (means; default "
                        f"{HOLDOUT_POINTS.default:,}), whatever --holdout says; below n")
    p.add_argument("--variance-points", type=VARIANCE_POINTS.argparse_type(),
                   default=VARIANCE_POINTS.default, metavar="N",
                   help="most held-out points whose kriging variance is computed (a seeded "
                        f"subset; one solve each; default {VARIANCE_POINTS.default})")
    p.add_argument("--drop-missing", action="store_true", help="drop rows with NaN/inf")
    p.add_argument("--average-duplicates", action="store_true",
                   help="average values at repeated locations")
    p.add_argument("--probes", type=PROBES.argparse_type(), default=16,
                   help="probe vectors of the score-difference estimate")
    p.add_argument("--dense-fit-max-n", type=positive_int("--dense-fit-max-n"), default=None,
                   help="largest n fitted by the dense exact fit (default: 4,096, within "
                        "the memory budget); above it the Vecchia pilot with exact-score "
                        "steps")
    p.add_argument("--fit-time-budget", type=positive_float("--fit-time-budget"),
                   default=DEFAULT_FIT_TIME_BUDGET,
                   metavar="SECONDS",
                   help="seconds the fit may take (default "
                        f"{DEFAULT_FIT_TIME_BUDGET:g}); past them it stops and every verdict "
                        "says it was measured at an unconverged estimate")
    p.add_argument("--solver", action="append", default=None, metavar="SOLVER",
                   help="solver under test: hodlr, vecchia, an entry-point name, or "
                        "package.module:factory (same registry as run); repeatable: several "
                        "solvers are audited on the same fit, reference, holdout and probes "
                        "and the fastest safe setting is recommended (default hodlr)")
    p.add_argument("--sweep", action="append", default=[], metavar="SOLVER=V1,V2,...",
                   help="repeatable; the knob values of one listed solver, spelled as given "
                        "to --solver (default: --knob-values with a single solver, else "
                        "--tolerances for tol solvers, else the solver's declared sweep)")
    p.add_argument("--timing-repeats", type=TIMING_REPEATS.argparse_type(), default=None,
                   metavar="K",
                   help="timed fit evaluations per (solver, knob value), after an untimed "
                        "warm-up (default with several solvers: 5 below 65,536 points, 3 "
                        "from there; with one solver: none, its audit's log-likelihood time "
                        "is used)")
    p.add_argument("--solver-seeds", type=SOLVER_SEEDS.argparse_type(),
                   default=DEFAULT_SOLVER_SEEDS, metavar="K",
                   help="seeds of the solver's randomness per tolerance; the worst decides "
                        f"(default {DEFAULT_SOLVER_SEEDS})")
    p.add_argument("--reference", choices=REFERENCE_CHOICES, default="auto",
                   help="auto (the first that applies: dense within the memory budget, "
                        "statespace for 1D half-integer Matern data, the exact operator), "
                        "dense, statespace, operator, or ladder (extra evidence only)")
    p.add_argument("--preconditioner", type=PRECONDITIONER.argparse_type(),
                   default=PRECONDITIONER.default, metavar="{vecchia,hodlr}",
                   help="the exact-operator reference's preconditioner: hodlr at tol "
                        "1e-10 or vecchia (its neighbour count chosen by a pilot on a "
                        f"subsample; less memory, more iterations) (default "
                        f"{PRECONDITIONER.default})")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--dask-local", type=positive_int("--dask-local"), metavar="N",
                       default=None,
                       help="the exact-operator reference's products on a local Dask "
                            "cluster of N workers (same values as in this process)")
    where.add_argument("--scheduler", metavar="ADDR", default=None,
                       help="the exact-operator reference's products on the Dask scheduler "
                            "at ADDR, e.g. tcp://host:8786 (every worker with covaudit "
                            "installed)")
    p.add_argument("--ladder-factor",
                   type=LADDER_FACTOR_SPEC.argparse_type(),
                   default=LADDER_FACTOR,
                   help=f"ladder reference: the solver at tol / factor (default "
                        f"{LADDER_FACTOR:g})")
    p.add_argument("--memory-budget",
                   type=float_range("--memory-budget", 0.0, 1e6, low_open=True),
                   default=None, metavar="GIB",
                   help="memory the dense reference may use, in GiB (default: "
                        f"{100 * DEFAULT_BUDGET_FRACTION:.0f}%% of total memory)")
    p.add_argument("--no-refit", action="store_true", help="skip the end-to-end refit")
    p.add_argument("--kl", action="store_true",
                   help="also estimate the KL divergence of each knob value's model from "
                        "the exact one beyond the dense limit (exact-operator reference; "
                        "32 probes of exact products per knob value and seed; against the "
                        "dense reference it is always measured exactly)")
    p.add_argument("--solver-timeout", type=SOLVER_TIMEOUT.argparse_type(), default=None,
                   metavar="SECONDS",
                   help="stop one call into the solver under test (each knob value and "
                        "seed runs in a child process, built-in solvers and plugins alike) "
                        f"after this many seconds (default: {SOLVER_TIMEOUT_RULE})")
    p.add_argument("--out", default=None, help="folder for check.json and check.html "
                                               "(default reports/check-<data file stem>/)")
    p.add_argument("--json", action="store_true", help="one JSON object on standard output")
    p.add_argument("--plan-only", action="store_true",
                   help="print the cost plan (reference per metric, fit plan, predicted "
                        "peak memory and time per stage, from a calibration of a few "
                        "seconds) and exit 0 without fitting or auditing; with --json the "
                        "plan as one JSON object")
    p.add_argument("--seed", type=nonnegative_int("--seed"), default=0,
                   help="seed of holdout, pilot and probes")


def run(args: argparse.Namespace) -> int:
    from harness.check.check_state import CheckState, state_folder, state_inputs
    from harness.cli.progress import CheckProgress, progress_enabled, wrote_lines

    out = Path(args.out) if args.out else default_out(args.datafile)
    ahead: CompileAhead | None = None
    try:
        coord_units = coord_units_option(getattr(args, "coord_units", None))
        options = options_from_args(args)
        check_dask_options(dask_local=options.dask_local, scheduler=options.scheduler)
        coords = [c.strip() for c in args.coords.split(",") if c.strip()]
        obs = load_observations(args.datafile, coords=coords, value=args.value,
                                drop_missing=args.drop_missing)
        data = validate(obs, coord_system=args.coord_system,
                        average_duplicates=args.average_duplicates)
        lineup = line_up(options, data.n)
        if not getattr(args, "plan_only", False):
            ahead = compile_ahead_for(options, data.points)
        plan = plan_check(data.points, data.values, options, lineup=lineup)
        for plan_line in plan_lines(plan):
            print(plan_line, file=sys.stderr if args.json else sys.stdout)
        over_budget = budget_refusal(plan, data.points, data.values, options, lineup=lineup)
        if over_budget is not None:
            print(f"covaudit check: error: {over_budget}", file=sys.stderr)
            return ExitCode.ERROR
        if getattr(args, "plan_only", False):
            if args.json:
                print(json.dumps(plan.to_dict(), indent=2))
            return ExitCode.OK
        steps = sum(len(s.values) for s in lineup.solvers)
        progress = CheckProgress(tolerances=steps, refit=options.refit,
                                 enabled=progress_enabled(json_output=args.json))
        reading = {"coords": coords, "value": args.value, "coord_system": args.coord_system,
                   "drop_missing": args.drop_missing,
                   "average_duplicates": args.average_duplicates}
        state, line = CheckState.open(state_folder(out),
                                      state_inputs(args.datafile, reading, options))
        if line:
            progress(line)
        try:
            result = run_check(data, options, source=str(args.datafile), progress=progress,
                               state=state)
            progress.finish()
        finally:
            progress.close()
        result = replace(result, plan=plan.to_dict())
        write_outputs(result, out, points=data.points, coord_units=coord_units,
                      holdout=holdout_indices(
            data.n, fraction=args.holdout, seed=args.seed, cap=args.holdout_points))
    except (DataFileError, CheckDataError, CheckError, KernelParameterError,
            ParamSyntaxError, FitError, MemoryError, np.linalg.LinAlgError, ValueError,
            OSError, SolverRuntimeError, StageCrashed) as exc:
        print(f"covaudit check: error: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    except SolverFailed as exc:  # the solver under test failed its trial, before the fit
        print(f"covaudit check: solver failed: {exc}", file=sys.stderr)
        return ExitCode.SOLVER_FAILED
    finally:
        if ahead is not None:
            ahead.finish()
    print(json_text(result) if args.json else summary(result))
    for warning in dict.fromkeys(result.warnings) if args.json else ():
        print(f"covaudit check: warning: {warning}", file=sys.stderr)
    for line in wrote_lines(written_files(out, ["check.json", "check.html"])):
        print(line, file=sys.stderr if args.json else sys.stdout)
    failed = failed_points(result)
    for reason in [*failed, *result.solver_failures]:
        print(f"covaudit check: solver failed: {reason}", file=sys.stderr)
    refused = [entry["problem"] for entry in result.solvers if entry["status"] == "refused"]
    for problem in refused:
        print(f"covaudit check: error: {problem}", file=sys.stderr)
    answer = ExitCode.OK if result.recommended_value is not None else ExitCode.FINDING
    return combine([answer, *([ExitCode.SOLVER_FAILED]
                              if failed or result.solver_failures else []),
                    *([ExitCode.ERROR] if refused else [])])


