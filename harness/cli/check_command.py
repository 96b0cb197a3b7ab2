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
import math
import os
import shutil
import sys
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from harness.audit.engine import LADDER_FACTOR
from harness.audit.rule import SOLVER_FAILED, Thresholds
from harness.audit.solver_seeds import DEFAULT_SOLVER_SEEDS
from harness.audit.solver_trial import SolverFailed
from harness.check import CheckDataError, CheckError, CheckOptions, run_check, validate
from harness.check.check_records import CheckResult
from harness.check.fitting import FitError
from harness.check.pipeline import DEFAULT_FIT_TIME_BUDGET, REFERENCE_CHOICES, holdout_indices
from harness.check.solver_lineup import line_up
from harness.cli.flag_types import (
    float_range,
    nonnegative_int,
    positive_float,
    positive_int,
)
from harness.cli.frontier_summary import frontier_lines
from harness.cli.params import ParamSyntaxError, parse_params
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
    TOLERANCE,
    VARIANCE_POINTS,
    OptionError,
)
from harness.infra.option_specs import LADDER_FACTOR as LADDER_FACTOR_SPEC
from harness.linalg.dense_budget import DEFAULT_BUDGET_FRACTION
from harness.model import MEAN_MODELS
from harness.model.json_values import json_text as strict_json
from harness.model.kernels import KERNEL_CLASSES, KERNELS, KernelParameterError
from harness.report.check_report import render_check_report
from harness.report.condense import shorten
from harness.report.labels import metric_label
from harness.solvers.knobs import KnobSpec
from harness.solvers.plugins import SolverLoadError
from harness.solvers.registry import SolverRuntimeError, resolve_solver

#: Shape parameters of any family (``Kernel.PARAMETERS``): fixed during the fit.
SHAPE_NAMES = tuple(dict.fromkeys(spec.name for cls in KERNEL_CLASSES
                                  for spec in cls.PARAMETERS if spec.shape))


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
                   help="the exact-operator reference's preconditioner: vecchia (its "
                        "neighbour count chosen by a pilot on a subsample) or hodlr at tol "
                        "1e-10 (default vecchia)")
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
                   help="stop one call into a solver plugin (each knob value and seed runs "
                        "in a child process) after this many seconds (default: one hour up "
                        "to 100,000 points, growing like n^1.5 beyond)")
    p.add_argument("--out", default=None, help="folder for check.json and check.html "
                                               "(default reports/check-<data file stem>/)")
    p.add_argument("--json", action="store_true", help="one JSON object on standard output")
    p.add_argument("--seed", type=nonnegative_int("--seed"), default=0,
                   help="seed of holdout, pilot and probes")


#: ``--tolerances`` when neither it nor ``--knob-values`` is given to a ``tol`` solver.
DEFAULT_TOLERANCES_TEXT = "1e-2,1e-4,1e-6,1e-8,1e-10"


def _tolerances(text: str) -> tuple[float, ...]:
    try:
        return tuple(float(v) for v in TOLERANCE.parse_list(text, where="--tolerances"))
    except OptionError as exc:
        raise CheckError(str(exc)) from None


def solver_knob(name: str) -> KnobSpec:
    """The accuracy knob of ``--solver NAME`` (``harness.solvers.knobs``)."""
    try:
        return resolve_solver(name).knob
    except (SolverLoadError, TypeError) as exc:
        raise CheckError(f"--solver {name!r}: {exc}") from None


def solver_names(args: argparse.Namespace) -> tuple[str, ...]:
    """The solvers under test as given (``--solver``, repeatable; default hodlr)."""
    given = args.solver if args.solver is not None else ["hodlr"]
    return tuple(given) if isinstance(given, list | tuple) else (str(given),)


def sweeps(args: argparse.Namespace) -> dict[str, tuple[float, ...]]:
    """``--sweep SOLVER=V1,V2,...`` by solver; the values' ranges are checked per solver
    by ``harness.check.solver_lineup`` (a solver with a bad sweep is refused alone)."""
    out: dict[str, tuple[float, ...]] = {}
    for text in getattr(args, "sweep", None) or ():
        solver, sep, values = text.partition("=")
        if not sep or not solver.strip() or not values.strip():
            raise CheckError(f"--sweep {text!r}: expected SOLVER=V1,V2,... (the solver "
                             "spelled as given to --solver)")
        try:
            parsed = tuple(float(v) for v in values.split(",") if v.strip())
        except ValueError:
            raise CheckError(f"--sweep {text!r}: the values must be numbers separated by "
                             "commas") from None
        if solver.strip() in out:
            raise CheckError(f"--sweep {solver.strip()}: given twice")
        out[solver.strip()] = parsed
    return out


def knob_sweep(args: argparse.Namespace) -> tuple[tuple[float, ...], tuple[float, ...] | None]:
    """``(tolerances, knob_values)`` of ``CheckOptions`` from ``--tolerances`` and
    ``--knob-values`` (README, "check"): a single ``tol`` solver takes either, another
    knob only ``--knob-values`` (default: its declared sweep), each value validated
    against the knob's declared range. With several solvers ``--knob-values`` is refused
    (``--sweep`` gives each its values) and ``--tolerances`` serves the ``tol`` solvers."""
    names = solver_names(args)
    given_tol = args.tolerances is not None
    given_knob = getattr(args, "knob_values", None) is not None
    if given_tol and given_knob:
        raise CheckError("--tolerances and --knob-values: give one of them, not both")
    if len(names) > 1:
        if given_knob:
            raise CheckError("--knob-values: allowed with a single --solver; with several, "
                             "give each its values with --sweep SOLVER=V1,V2,...")
        return _tolerances(args.tolerances or DEFAULT_TOLERANCES_TEXT), None
    knob = solver_knob(names[0])
    if given_tol and not knob.is_tol:
        raise CheckError(f"--tolerances: solver {names[0]!r} has no tol; its knob is "
                         f"{knob.name} in {knob.range_text()}: use --knob-values")
    if not given_knob:
        tolerances = _tolerances(args.tolerances or DEFAULT_TOLERANCES_TEXT)
        return tolerances, None if knob.is_tol else knob.default_sweep
    try:
        values = tuple(float(v) for v in knob.option_spec().parse_list(
            args.knob_values, where="--knob-values"))
    except OptionError as exc:
        raise CheckError(str(exc)) from None
    if knob.is_tol:
        return values, None
    return _tolerances(DEFAULT_TOLERANCES_TEXT), values


def options_from_args(args: argparse.Namespace) -> CheckOptions:
    """CheckOptions from the parsed command line."""
    extra = parse_params(args.param)
    shape = {k: float(v) for k, v in extra.items() if k in SHAPE_NAMES}  # type: ignore[arg-type]
    start = {k: v for k, v in extra.items() if k not in SHAPE_NAMES}
    if start and "lengthscale" not in start:
        raise ParamSyntaxError("--param: a starting point needs lengthscale=... "
                               "(variance and nugget are optional)")
    fixed = parse_params(args.fixed_params, flag="--fixed-params") \
        if args.fixed_params else None
    if fixed is not None:
        shape = shape | {k: float(v) for k, v in fixed.items() if k in SHAPE_NAMES}  # type: ignore[arg-type]
        fixed = {k: v for k, v in fixed.items() if k not in SHAPE_NAMES}
    budget = None if args.memory_budget is None else int(args.memory_budget * 2**30)
    tolerances, knob_values = knob_sweep(args)
    names = solver_names(args)
    return CheckOptions(
        kernel=args.kernel, shape=shape, anisotropic=args.anisotropic,
        nugget=not args.no_nugget, mean=args.mean, tolerances=tolerances,
        knob_values=knob_values,
        holdout=args.holdout, holdout_points=args.holdout_points,
        variance_points=args.variance_points, seed=args.seed, probes=args.probes,
        fixed_params=fixed,
        start_params=start or None, thresholds=Thresholds(),
        dense_fit_max_n=args.dense_fit_max_n, memory_budget=budget,
        refit=not args.no_refit, fit_time_budget=args.fit_time_budget, solver=names[0],
        solvers=names if len(names) > 1 else (), sweeps=sweeps(args),
        timing_repeats=getattr(args, "timing_repeats", None), kl=getattr(args, "kl", False),
        solver_seeds=args.solver_seeds, reference=args.reference,
        preconditioner=args.preconditioner, ladder_factor=args.ladder_factor,
        solver_timeout=args.solver_timeout)


def json_text(result: CheckResult) -> str:
    """The JSON output (non-finite numbers as null)."""
    return strict_json(result)


def write_outputs(result: CheckResult, out: str | Path, *, html_name: str = "check.html",
                  json_name: str = "check.json", extra: dict[str, str] | None = None,
                  points: np.ndarray | None = None, holdout: np.ndarray | None = None,
                  coord_units: str | None = None) -> Path:
    """Write the JSON, the HTML report and ``extra`` files (name -> text) into ``out``
    atomically: everything goes to a temporary folder first and is renamed at the end."""
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}-", dir=out.parent))
    try:
        (tmp / json_name).write_text(json_text(result), encoding="utf-8")
        for name, text in (extra or {}).items():
            (tmp / name).parent.mkdir(parents=True, exist_ok=True)
            (tmp / name).write_text(text, encoding="utf-8")
        (tmp / html_name).write_text(render_check_report(result, points=points,
                                                         holdout=holdout,
                                                         coord_units=coord_units),
                                     encoding="utf-8")
        out.mkdir(exist_ok=True)
        for item in sorted(tmp.rglob("*")):
            if item.is_file():
                target = out / item.relative_to(tmp)
                target.parent.mkdir(parents=True, exist_ok=True)
                os.replace(item, target)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return out


def summary(result: CheckResult) -> str:
    """The verdict table for the terminal."""
    solver = result.solver.get("name", "?")
    version = result.solver.get("version")
    per = "tolerance" if result.knob_name == "tol" else f"{result.knob_name} value"
    lines = [f"covaudit check: {result.source}: {result.n:,} points (all fitted; "
             f"{result.n_holdout:,} held out for the kriging evaluation), kernel "
             f"{result.kernel}, mean {result.mean}, reference {result.reference}",
             f"  solver      {solver}{f' {version}' if version else ''}, "
             f"{len(result.solver_seeds)} seed(s) per {per} (the worst decides)",
             "  parameters  " + ", ".join(f"{k} = {_short(v)}" for k, v in result.params.items()),
             "  SE          " + ", ".join(f"{k} = {_short(v)}"
                                          for k, v in result.se["natural"].items()),
             f"  loglik      {result.loglik:.10g}"]
    if result.se.get("microergodic") is not None:
        lines.append(f"  s2/l^(2nu)  {result.se['microergodic']:.6g} "
                     f"(SE {result.se['microergodic_se']:.3g})")
    shown = ("loglik_error", "param_shift_se", "kriging_mean_sd", "mloe", "mmom")
    knob = result.knob_name
    column = metric_label("tol").short if knob == "tol" else knob
    header = (f"  {column:>9} {metric_label('verdict').short:>10} "
              + " ".join(f"{metric_label(n).short:>14}" for n in shown)
              + f" {metric_label('speedup').short:>9}")
    lines += ["", header]
    broke: list[str] = []
    for row in result.tolerances:
        status = row.status or ("safe" if row.safe else "unsafe")
        if row.error and not row.metrics:
            broke.append(f"  [{len(broke) + 1}] {_at(knob, row.value, short=True)}: "
                         f"{row.error}")
            lines.append(f"  {_cell(knob, row.value)} {status:>10}  "
                         f"{shorten(row.error, 60)} [{len(broke)}]")
            continue
        vals = [row.metric(n) for n in ("loglik_error", "param_shift_se", "kriging_mean_sd",
                                        "mloe", "mmom")]
        cells = " ".join(f"{(v.value if v else float('nan')):>14.3g}" for v in vals)
        lines.append(f"  {_cell(knob, row.value)} {status:>10} {cells} "
                     f"{row.speedup or float('nan'):>9.3g}")
    lines += broke
    lines.append("  " + "; ".join(f"{metric_label(n).short}: {metric_label(n).label}"
                                  for n in shown[:3])
                 + "; MLOE, MMOM: loss of prediction efficiency (see check.html's legend)")
    lines.append("")
    if not result.fit_converged:
        lines.append("  every verdict was measured at an unconverged estimate")
    picked = result.recommended_value
    if picked is None:
        noun = "tolerance" if knob == "tol" else f"{knob} value"
        lines.append(f"  recommendation: no {noun} in the list qualifies ("
                     + str(result.recommendation.get("reason", "none is safe")) + ")")
    else:
        best = next(r for r in result.tolerances if r.value == picked)
        speedup = result.speedup if result.speedup is not None else float("nan")
        times = (f": {best.seconds * speedup:.3g} s against {best.seconds:.3g} s "
                 "per log-likelihood evaluation"
                 if result.speedup is not None and math.isfinite(best.seconds) else "")
        lines.append(f"  recommendation: {_at(knob, picked)} "
                     f"({speedup:.3g}x faster than {result.speedup_over}{times})")
    lines += frontier_lines(result)
    if result.refit:
        refit_value = (result.refit.tol if result.refit.knob_value is None
                       else result.refit.knob_value)
        lines.append(f"  refit at {_at(knob, refit_value)}: largest shift "
                     f"{result.refit.max_shift_se:.3g} SE, loglik change "
                     f"{result.refit.loglik_change:.3g} nat, "
                     f"{result.refit.accepted_steps} step(s) accepted")
        if result.refit.accepted_steps == 0 or not result.refit.converged:
            lines.append(f"  refit: {result.refit.note}")
    lines += [f"WARNING: {w}" for w in dict.fromkeys(result.warnings)]  # each once
    lines.append("  thresholds are common practice chosen for covaudit, not a published "
                 "standard")
    return "\n".join(lines)


def _at(knob: str, value: float | None, *, short: bool = False) -> str:
    """``tol 1e-06`` (``tol 1e-06`` as ``1e-06`` in the short form) or ``rho = 6``."""
    if value is None:
        return "exact"
    if knob == "tol":
        return f"tol {value:.0e}" if short else f"tol {value:g}"
    return f"{knob} = {value:g}"


def _cell(knob: str, value: float | None) -> str:
    """A value in the table's first column: ``1e-06`` for tol, ``6`` for another knob."""
    if value is None:
        return f"{'exact':>9}"
    return f"{value:>9.0e}" if knob == "tol" else f"{value:>9g}"


def _short(value: Any) -> str:
    if isinstance(value, list):
        return "(" + ", ".join(f"{v:.4g}" for v in value) + ")"
    return f"{value:.4g}" if isinstance(value, float) else str(value)


def _coord_units(text: str | None) -> str | None:
    """``--coord-units`` stripped; a blank one is refused (one line, exit 2)."""
    if text is None:
        return None
    if not text.strip():
        raise CheckError("--coord-units: expected a unit such as m or km, got a blank value")
    return text.strip()


def default_out(datafile: str | Path) -> Path:
    """``reports/check-<data file stem>``: one folder per data file, so checks of different
    files do not overwrite each other."""
    return Path("reports") / f"check-{Path(datafile).stem}"


def written_files(out: str | Path, names: list[str]) -> list[Path]:
    """The files ``write_outputs`` wrote into ``out``, in order."""
    return [Path(out) / name for name in names if (Path(out) / name).is_file()]


def run(args: argparse.Namespace) -> int:
    from harness.check.check_state import CheckState, state_folder, state_inputs
    from harness.cli.progress import CheckProgress, progress_enabled, wrote_lines

    out = Path(args.out) if args.out else default_out(args.datafile)
    try:
        coord_units = _coord_units(getattr(args, "coord_units", None))
        options = options_from_args(args)
        coords = [c.strip() for c in args.coords.split(",") if c.strip()]
        obs = load_observations(args.datafile, coords=coords, value=args.value,
                                drop_missing=args.drop_missing)
        data = validate(obs, coord_system=args.coord_system,
                        average_duplicates=args.average_duplicates)
        steps = sum(len(s.values) for s in line_up(options, data.n).solvers)
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


def failed_points(result: CheckResult) -> list[str]:
    """The reasons of every (solver, knob value) whose status is "solver failed"."""
    if not result.solvers:
        return [row.error for row in result.tolerances if row.status == SOLVER_FAILED]
    return [point.get("error") or f"solver {entry['given']!r} failed"
            for entry in result.solvers for point in entry["points"]
            if point.get("status") == SOLVER_FAILED]
