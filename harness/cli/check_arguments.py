"""``covaudit check``'s command line turned into ``CheckOptions``: the solvers, their knob
values (``--tolerances``, ``--knob-values``, ``--sweep``), the parameters and every other
option, each refused in one line naming the option (``CheckError``, exit code 2)."""

from __future__ import annotations

import argparse

from harness.audit.rule import Thresholds
from harness.check import CheckError, CheckOptions
from harness.cli.params import ParamSyntaxError, parse_params
from harness.infra.option_specs import TOLERANCE, OptionError
from harness.model.kernels import KERNEL_CLASSES
from harness.solvers.knobs import KnobSpec
from harness.solvers.plugins import SolverLoadError
from harness.solvers.registry import resolve_solver

#: Shape parameters of any family (``Kernel.PARAMETERS``): fixed during the fit.
SHAPE_NAMES = tuple(dict.fromkeys(spec.name for cls in KERNEL_CLASSES
                                  for spec in cls.PARAMETERS if spec.shape))


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
        dask_local=getattr(args, "dask_local", None), scheduler=getattr(args, "scheduler", None),
        solver_timeout=args.solver_timeout)


def coord_units_option(text: str | None) -> str | None:
    """``--coord-units`` stripped; a blank one is refused (one line, exit 2)."""
    if text is None:
        return None
    if not text.strip():
        raise CheckError("--coord-units: expected a unit such as m or km, got a blank value")
    return text.strip()
