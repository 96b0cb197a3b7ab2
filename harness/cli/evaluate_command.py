"""``covaudit evaluate``: the model at given parameters, by one reference or solver."""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from typing import Any

import numpy as np

from harness.audit.named_evaluation import (
    EvaluationError,
    SolverEvaluationError,
    SolverOptions,
    evaluate_with_solver,
)
from harness.cli.flag_types import (
    float_range,
    int_range,
    nonnegative_int,
    positive_int,
    tolerance,
)
from harness.cli.params import ParamSyntaxError, kernel_from_options
from harness.geometry.spread import spread_warnings
from harness.grid.runner.dask_check import check_dask_options
from harness.infra.child_process import ChildCrashed, ChildTimeout, call_in_child
from harness.infra.data_files import DataFileError, load_observations
from harness.infra.exit_codes import ExitCode
from harness.infra.option_specs import PROBES, SOLVER_TIMEOUT, TOLERANCE, OptionError
from harness.infra.solver_timeout import RULE_TEXT, solver_call_timeout
from harness.model import MEAN_MODELS
from harness.model.evaluation import fisher_standard_errors
from harness.model.json_values import to_jsonable
from harness.model.kernels import KERNELS, KernelParameterError
from harness.solvers.plugins import SolverLoadError
from harness.solvers.registry import BUILTIN_SOLVERS, resolve_solver

#: ``--tol`` when neither it nor ``--knob-value`` is given.
DEFAULT_TOL = 1e-8
#: ``--solver`` names that are references, not registry solvers: no accuracy knob.
REFERENCE_NAMES = frozenset({"statespace", "kronecker", "operator"})

#: The structured references, evaluated in this process; every solver (plugins and the
#: built-in dense, hodlr and vecchia) and the operator reference with any preconditioner
#: run in a child process, so a crash or a hang is reported (exit code 3).
IN_PROCESS_SOLVERS = frozenset({"statespace", "kronecker"})


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "evaluate", help="log-likelihood, score and Fisher information at given parameters",
        description="Evaluate the Gaussian-process model at given parameters (no fitting).",
    )
    p.add_argument("datafile", help="CSV or Parquet file with coordinates and values")
    p.add_argument("--coords", required=True, help="comma-separated coordinate columns, e.g. x,y")
    p.add_argument("--value", required=True, help="column of observed values")
    p.add_argument("--kernel", required=True, help=f"one of: {', '.join(KERNELS)}")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="kernel parameter (variance, lengthscale[=l1,l2,..], nugget, nu, alpha)")
    p.add_argument("--mean", choices=MEAN_MODELS, default="zero", help="mean model (GLS)")
    p.add_argument("--reml", action="store_true", help="restricted (REML) likelihood")
    p.add_argument("--solver", default="dense",
                   help="dense, statespace, kronecker, hodlr, operator (exact-operator "
                        "reference with SEs; exit code 1 when it does not converge), or "
                        "package.module:factory")
    p.add_argument("--separable", action="store_true",
                   help="product of 1D kernels along the axes (needed by --solver kronecker)")
    p.add_argument("--tol", type=TOLERANCE.argparse_type(), default=None,
                   help="compression tolerance of a tol solver (hodlr, plugins; default "
                        f"{DEFAULT_TOL:g})")
    p.add_argument("--knob-value", default=None, metavar="V",
                   help="value of the --solver's accuracy knob (tol for hodlr, neighbours "
                        "for vecchia), checked against its declared range; default: --tol for a "
                        "tol solver, the factory's own default otherwise")
    p.add_argument("--leaf-size", type=int_range("--leaf-size", 2, 2**20), default=128,
                   help="cluster-tree leaf size (hodlr)")
    p.add_argument("--trace", choices=("exact", "hutchinson", "hutchpp"), default=None,
                   help="trace estimator for the score (default: exact for dense, "
                        "hutchpp for compressed solvers)")
    p.add_argument("--probes", type=PROBES.argparse_type(), default=64,
                   help="probe vectors for trace estimates (--solver operator: the probe "
                        "budget for log det and traces)")
    p.add_argument("--preconditioner", default="hodlr", metavar="NAME|pkg.mod:factory",
                   help="--solver operator: the factorization that preconditions it "
                        "(default: the built-in hodlr solver)")
    p.add_argument("--preconditioner-tol", type=tolerance("--preconditioner-tol"),
                   default=1e-8, metavar="T",
                   help="--solver operator: the preconditioner's tolerance (default 1e-8; "
                        "not used by vecchia)")
    p.add_argument("--preconditioner-neighbours", type=positive_int("--preconditioner-neighbours"),
                   default=None, metavar="M",
                   help="--solver operator --preconditioner vecchia: its neighbour count "
                        "(default: chosen by a pilot on a subsample, by predicted time)")
    p.add_argument("--se-target", type=float_range("--se-target", 0.0, 1e6, low_open=True),
                   default=0.02, metavar="NATS",
                   help="--solver operator: draw probes until the log-likelihood SE is at "
                        "most this (default 0.02 nat)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--dask-local", type=positive_int("--dask-local"), metavar="N",
                       default=None,
                       help="--solver operator: products on a local Dask cluster of N workers")
    where.add_argument("--scheduler", metavar="ADDR", default=None,
                       help="--solver operator: products on the Dask scheduler at ADDR "
                            "(e.g. tcp://host:8786)")
    p.add_argument("--seed", type=nonnegative_int("--seed"), default=0,
                   help="seed of the probe vectors and of the solver's randomness (seed "
                        "index 0, derived as in check and run)")
    p.add_argument("--fisher", action="store_true",
                   help="also the expected Fisher information (O(p n^3) dense)")
    p.add_argument("--no-score", action="store_true", help="skip the score")
    p.add_argument("--task-timeout", type=SOLVER_TIMEOUT.argparse_type(), default=None,
                   metavar="SECONDS",
                   help="stop the solver (or --solver operator with its preconditioner) "
                        "after this many seconds; it runs in a child process (default: "
                        f"{RULE_TEXT})")
    p.add_argument("--memory-budget", type=float_range("--memory-budget", 0.0, 1e6,
                                                       low_open=True),
                   default=None, metavar="GIB",
                   help="memory the dense reference may use, in GiB (default: 60%% of available)")
    p.add_argument("--drop-missing", action="store_true", help="drop rows with NaN/inf")
    p.add_argument("--json", action="store_true", help="one JSON object on standard output")


def knob_options(args: argparse.Namespace) -> tuple[float, float | None]:
    """``(tol, knob_value)`` of ``SolverOptions`` from ``--tol`` and ``--knob-value``: a
    ``tol`` solver takes either, another knob only ``--knob-value``, validated against the
    knob's declared range (``harness.solvers.knobs.KnobSpec.option_spec``)."""
    tol = DEFAULT_TOL if args.tol is None else float(args.tol)
    if args.knob_value is None and args.tol is None:
        return tol, None
    if args.solver in REFERENCE_NAMES:
        if args.knob_value is not None:
            raise EvaluationError(f"--knob-value: --solver {args.solver} is a reference with "
                                  "no accuracy knob")
        return tol, None
    try:
        knob = resolve_solver(args.solver).knob
    except (SolverLoadError, TypeError) as exc:
        raise EvaluationError(f"--solver {args.solver!r}: {exc}") from None
    if args.tol is not None and args.knob_value is not None:
        raise EvaluationError("--tol and --knob-value: give one of them, not both")
    if args.tol is not None and not knob.is_tol:
        raise EvaluationError(f"--tol: solver {args.solver!r} has no tol; its knob is "
                              f"{knob.name} in {knob.range_text()}: use --knob-value")
    if args.knob_value is None:
        return tol, None
    try:
        value = float(knob.option_spec().parse(args.knob_value))
    except OptionError as exc:
        raise EvaluationError(f"--knob-value: {exc.core}") from None
    return (value, None) if knob.is_tol else (DEFAULT_TOL, value)


def _solver_words(solver: str, preconditioner: str) -> str:
    """The solver under test as the messages name it."""
    if solver == "operator":
        kind = "plugin" if preconditioner not in BUILTIN_SOLVERS else "built-in solver"
        return f"the operator reference preconditioned by the {kind} {preconditioner!r}"
    if solver in BUILTIN_SOLVERS:
        return f"the {solver} solver"
    return f"the solver plugin {solver!r}"


def _default_timeout(args: argparse.Namespace, n: int, params: int, tol: float) -> float:
    """The limit without ``--task-timeout``: 10 x the cost model's estimate of one
    evaluation + 60 s for the built-in dense and hodlr solvers, else the rule of n
    (``harness.infra.solver_timeout``)."""
    from harness.check.plugin_guard import call_estimate

    estimate = None
    if args.solver in BUILTIN_SOLVERS:
        estimate = call_estimate(resolve_solver(args.solver), n, [tol], probes=args.probes,
                                 evaluations=1 + int(args.fisher), params=params)
    return solver_call_timeout(n, estimate)


def _finite_or_none(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def _summary(result: dict[str, Any]) -> str:
    lines = [
        f"covaudit evaluate: {result['n']:,} points, kernel {result['kernel']}, "
        f"solver {result['solver']}" + (
            f", {result['knob_name']} = {result['knob_value']:g}"
            if result.get("knob_name", "tol") != "tol" and result.get("knob_value") is not None
            else ""),
        f"  parameters  {json.dumps(result['params'])}",
        f"  mean        {result['mean']}{' (REML)' if result['reml'] else ''}"
        + (f"  beta = {result['beta']}" if result['beta'] else ""),
        f"  loglik      {result['loglik']:.10g}",
        f"  logdet      {result['logdet']:.10g}",
        f"  quadratic   {result['quadratic']:.10g}",
    ]
    if result.get("loglik_se") is not None:
        lines.append(f"  SE          loglik {result['loglik_se']:.3g}, logdet "
                     f"{result['logdet_se']:.3g}; quadratic bound "
                     f"{result['quadratic_bound']:.3g} ({result['bound_kind']})")
        lines.append(f"  work        {result['iterations']} iterations, {result['products']} "
                     f"exact column products, {result['probes']} probes, converged "
                     f"{result['converged']}")
    if result["score"]:
        lines.append("  score       " + ", ".join(f"{k} = {v:.6g}"
                                                  for k, v in result["score"].items()))
    if result.get("score_se"):
        lines.append("  score SE    " + ", ".join(f"{k} = {v:.3g}"
                                                  for k, v in result["score_se"].items()))
    if result.get("se"):
        lines.append("  SE (log)    " + ", ".join(f"{k} = {v:.4g}"
                                                  for k, v in result["se"].items()))
    if result.get("certificate") is not None:
        lines.append(f"  certificate {result['certificate']:.3g} "
                     "(LAPACK DPOT01 ratio; passes < 30)")
    phases = ", ".join(f"{k[8:]} {v:.3f}s" for k, v in result.items()
                       if k.startswith("seconds_"))
    lines.append(f"  time        {result['seconds']:.3f}s ({phases})")
    for note in result.get("notes", []):
        lines.append(f"  note        {note}")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    start = time.perf_counter()
    try:
        coords = [c.strip() for c in args.coords.split(",") if c.strip()]
        obs = load_observations(args.datafile, coords=coords, value=args.value,
                                drop_missing=args.drop_missing)
        kernel = kernel_from_options(args.kernel, args.param, dimension=obs.points.shape[1])
        for warning in spread_warnings(obs.points, kernel.lengthscale):
            print(f"covaudit evaluate: warning: {warning}", file=sys.stderr)
        tol, knob_value = knob_options(args)
        options = SolverOptions(
            tol=tol, knob_value=knob_value, leaf_size=args.leaf_size, trace=args.trace,
            probes=args.probes, seed=args.seed, separable=args.separable,
            memory_budget=None if args.memory_budget is None
            else int(args.memory_budget * 2**30),
            preconditioner=args.preconditioner, preconditioner_tol=args.preconditioner_tol,
            preconditioner_neighbours=args.preconditioner_neighbours,
            se_target=args.se_target, dask_local=args.dask_local, scheduler=args.scheduler,
        )
        check_dask_options(dask_local=args.dask_local, scheduler=args.scheduler)
        if args.solver != "operator" and (args.dask_local is not None
                                          or args.scheduler is not None):
            raise EvaluationError("--dask-local and --scheduler apply to --solver operator")
        if args.solver not in IN_PROCESS_SOLVERS:
            what = _solver_words(args.solver, args.preconditioner)
            timeout = (_default_timeout(args, obs.n, kernel.n_params, tol)
                       if args.task_timeout is None else args.task_timeout)
            outcome = call_in_child(evaluate_with_solver, args.solver, obs.points, obs.values,
                                    kernel, mean=args.mean, reml=args.reml,
                                    score=not args.no_score, fisher=args.fisher,
                                    options=options, timeout=timeout,
                                    what=f"{what} at n = {obs.n:,}", stage=what,
                                    daemon=args.dask_local is None)
        else:
            outcome = evaluate_with_solver(args.solver, obs.points, obs.values, kernel,
                                           mean=args.mean, reml=args.reml,
                                           score=not args.no_score, fisher=args.fisher,
                                           options=options)
    except (ChildCrashed, ChildTimeout, SolverEvaluationError) as exc:  # the solver failed
        print(f"covaudit evaluate: error: {exc}", file=sys.stderr)
        return ExitCode.SOLVER_FAILED
    except (DataFileError, KernelParameterError, ParamSyntaxError, EvaluationError,
            MemoryError, np.linalg.LinAlgError, ValueError) as exc:
        print(f"covaudit evaluate: error: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    result: dict[str, Any] = {
        "n": obs.n, "d": int(obs.points.shape[1]), "kernel": kernel.family,
        "params": kernel.natural_params(), "param_names": list(kernel.param_names),
        "solver": outcome.solver, "reference": outcome.reference,
        "mean": args.mean, "reml": bool(args.reml), "separable": bool(args.separable),
        "loglik": outcome.loglik, "logdet": outcome.logdet, "quadratic": outcome.quadratic,
        "beta": [float(b) for b in outcome.beta],
        "score": (dict(zip(kernel.param_names, map(float, outcome.score), strict=True))
                  if outcome.score is not None else None),
        "fisher": outcome.fisher.tolist() if outcome.fisher is not None else None,
        "se": (dict(zip(kernel.param_names,
                        map(float, fisher_standard_errors(outcome.fisher)), strict=True))
               if outcome.fisher is not None else None),
        "certificate": _finite_or_none(outcome.certificate),
    }
    result.update(outcome.extra)
    result["seconds"] = time.perf_counter() - start
    for phase, seconds in outcome.seconds.items():
        result[f"seconds_{phase}"] = float(seconds)
    result["notes"] = list(outcome.notes)
    if args.json:
        print(json.dumps(to_jsonable(result), indent=2, allow_nan=False))
    else:
        print(_summary(result))
    if result.get("converged") is False:
        for note in outcome.notes:
            print(f"covaudit evaluate: unresolved: {note}", file=sys.stderr)
        return ExitCode.FINDING
    return ExitCode.OK
