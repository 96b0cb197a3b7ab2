"""Reading a case file: TOML syntax, schema, every problem reported at once.

The layout (all tables optional except ``pointsets``, ``kernels`` and ``solvers``)::

    name = "smoke"                 # defaults to the file stem
    description = "..."
    seeds = [0, 1]

    [[pointsets]]                  # one table per point set
    generator = "uniform"          # harness.geometry.pointsets.GENERATORS or "tensor_grid"
    options = { }                  # generator keyword options
    sizes = [256, 512]
    dims = [2]
    # or: file = "points.csv", columns = ["x", "y"], values = "z" (optional), sizes = [...]

    [[kernels]]
    family = "matern32"            # harness.model.kernels.KERNELS
    variance = 1.0
    lengthscale = 0.1              # or one per coordinate
    nugget = 1e-4                  # nu / alpha for matern / rational_quadratic
    separable = false              # the product model (Kronecker reference on grids)

    [mean]    models = ["zero"], reml = false
    [[solvers]]  name = "hodlr", tolerances = [1e-4, 1e-8], options = { leaf_size = 64 },
                 max_n = 32768 (sizes above it are left out of the grid for this solver)
                 or, for any solver, knob_values = [...]: values of its declared accuracy
                 knob (harness.solvers.knobs; name = "vecchia", knob_values = [2.5, 6]);
                 a solver whose knob is not tol and that gives neither gets its
                 declared default sweep
    [trace]   method = "hutchpp", probes = 32
    [metrics] compute = [...], holdout = 64, perturbation = 0.05, power_iterations = 20
    [timing]  enabled = true, repeats = 3, warmup = 1, threads = 1, exclusive = true,
              timeout = 600.0   # seconds per task job (default: from the cost estimate)
    [reference] order = ["dense", "statespace", "kronecker", "ladder"],
                ladder_factor = 100, sample_tol = 1e-10
    [budget]  memory = "4 GiB", time = 600
"""

from __future__ import annotations

import inspect
import math
import re
import tomllib
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from harness.geometry.pointsets import GENERATORS
from harness.grid.cases.case_grid import (
    Case,
    KernelEntry,
    PointSetEntry,
    SolverEntry,
    is_perfect_power,
)
from harness.grid.cases.case_schema import Checker
from harness.grid.cases.problems import CaseFileError, CaseProblem
from harness.grid.cases.units import parse_bytes
from harness.grid.tasks import ALL_REFERENCE_KINDS, METRIC_GROUPS, REFERENCE_KINDS, PointSetSpec
from harness.infra.option_specs import LADDER_FACTOR, PROBES, TOLERANCE
from harness.model.kernels import KERNEL_CLASSES, KERNELS, KernelParameterError, make_kernel
from harness.model.mean import MEAN_MODELS
from harness.solvers.knobs import DEFAULT_TOL_KNOB, KnobSpec

TOP_KEYS = ("name", "description", "seeds", "pointsets", "kernels", "mean", "solvers",
            "trace", "metrics", "timing", "reference", "budget")
POINTSET_KEYS = ("name", "generator", "options", "sizes", "dims", "file", "columns", "values")
#: Keys of a ``[[kernels]]`` table: the family, every parameter any family declares
#: (``Kernel.PARAMETERS``), and separability.
KERNEL_KEYS = ("family", *dict.fromkeys(spec.name for cls in KERNEL_CLASSES
                                       for spec in cls.PARAMETERS), "separable")
SOLVER_KEYS = ("name", "tolerances", "knob_values", "options", "max_n")
TRACE_METHODS = ("exact", "hutchinson", "hutchpp")
GENERATOR_NAMES = (*GENERATORS, "tensor_grid")

#: How the tensor-grid problem names the power a size must be, by dimension.
_POWER_NAMES = {1: "first power", 2: "square", 3: "cube"}

_TOML_POSITION = re.compile(r"\(at line (\d+), column (\d+)\)")

#: resolve(name) -> (canonical name, version) or (canonical name, version, knob); raises
#: an exception naming the problem. A resolver that gives no knob declares ``tol``.
SolverResolver = Callable[[str], tuple[str, str] | tuple[str, str, KnobSpec]]


def default_solver_resolver(name: str) -> tuple[str, str, KnobSpec]:
    """Name, version and accuracy knob of a solver from ``harness.solvers.registry``."""
    from harness.solvers.registry import resolve_solver

    record = resolve_solver(name)
    return (record.name, "unknown" if record.version is None else str(record.version),
            record.knob)


def parse_toml(text: str, file: str) -> dict[str, Any]:
    """``tomllib.loads`` with syntax errors turned into a ``CaseFileError`` at line:column."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        match = _TOML_POSITION.search(message)
        line = int(match.group(1)) if match else getattr(exc, "lineno", None)
        column = int(match.group(2)) if match else getattr(exc, "colno", None)
        text_only = _TOML_POSITION.sub("", message).strip()
        raise CaseFileError([CaseProblem(file, "", f"TOML syntax error: {text_only}",
                                         line=line, column=column)]) from None


def load_case(path: str | Path, *, resolver: SolverResolver | None = None) -> Case:
    """Read, validate and resolve a case file.

    Raises
    ------
    CaseFileError
        With every problem found (file, key path, offending value), or the TOML
        syntax error with its line and column.
    """
    path = Path(path)
    file = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise CaseFileError([CaseProblem(file, "", f"cannot read the case file: {exc.strerror}")]
                            ) from None
    return case_from_text(text, file=file, base=path.parent, default_name=path.stem,
                          resolver=resolver)


def case_from_text(text: str, *, file: str, base: Path, default_name: str,
                   resolver: SolverResolver | None = None) -> Case:
    """Validate TOML text as a case file (``base`` resolves relative data-file paths)."""
    doc = parse_toml(text, file)
    check = Checker(file)
    check.finish_table(doc, "", TOP_KEYS)
    name = check.take_str(doc, "name", "", default=default_name) or default_name
    description = check.take_str(doc, "description", "", default="") or ""
    seeds = check.take_list(doc, "seeds", "", item=check.seed, default=[0])

    pointsets = [_pointset(check, path, table, base)
                 for path, table in check.tables(doc, "pointsets", required=True)]
    kernels = [_kernel(check, path, table)
               for path, table in check.tables(doc, "kernels", required=True)]
    solvers = [_solver(check, path, table, resolver or default_solver_resolver)
               for path, table in check.tables(doc, "solvers", required=True)]

    mean = _subtable(check, doc, "mean", ("models", "reml"))
    means = check.take_list(mean, "models", "mean", item=check.choice(MEAN_MODELS),
                            default=["zero"])
    reml = check.take_bool(mean, "reml", "mean", default=False)

    trace = _subtable(check, doc, "trace", ("method", "probes"))
    trace_method = check.take_str(trace, "method", "trace", default="hutchpp",
                                  choices=TRACE_METHODS) or "hutchpp"
    probes = check.take_int(trace, "probes", "trace", default=32)
    if not check.spec("trace.probes", PROBES, probes):
        probes = 32

    metrics = _subtable(check, doc, "metrics",
                        ("compute", "holdout", "perturbation", "power_iterations"))
    compute = check.take_list(metrics, "compute", "metrics", item=check.choice(METRIC_GROUPS),
                              default=list(METRIC_GROUPS))
    holdout = check.take_int(metrics, "holdout", "metrics", default=64, minimum=1)
    perturbation = check.take_number(metrics, "perturbation", "metrics", default=0.05)
    power_iterations = check.take_int(metrics, "power_iterations", "metrics", default=20,
                                      minimum=1)

    timing = _subtable(check, doc, "timing", ("enabled", "repeats", "warmup", "threads",
                                              "exclusive", "timeout"))
    timing_on = check.take_bool(timing, "enabled", "timing", default=True)
    repeats = check.take_int(timing, "repeats", "timing", default=3, minimum=1)
    warmup = check.take_int(timing, "warmup", "timing", default=1, minimum=0)
    threads = check.take_int(timing, "threads", "timing", default=1, minimum=1)
    exclusive = check.take_bool(timing, "exclusive", "timing", default=True)
    timeout = check.take_number(timing, "timeout", "timing", default=None)
    if timeout is not None and not (math.isfinite(timeout) and 0 < timeout <= 7 * 86400):
        check.problem("timing.timeout", f"expected seconds in (0, 604800], got {timeout!r}")

    reference = _subtable(check, doc, "reference", ("order", "ladder_factor", "sample_tol"))
    order = check.take_list(reference, "order", "reference", item=check.choice(ALL_REFERENCE_KINDS),
                            default=list(REFERENCE_KINDS))
    ladder_factor = check.take_number(reference, "ladder_factor", "reference", default=100.0,
                                      positive=False)
    if ladder_factor is not None:
        check.spec("reference.ladder_factor", LADDER_FACTOR, ladder_factor)
    sample_tol = check.take_number(reference, "sample_tol", "reference", default=1e-10)

    budget = _subtable(check, doc, "budget", ("memory", "time"))
    memory_budget = None
    if "memory" in budget:
        try:
            memory_budget = parse_bytes(budget["memory"])
        except ValueError as exc:
            check.problem("budget.memory", str(exc))
    time_budget = check.take_number(budget, "time", "budget", default=None)

    if check.problems:
        raise CaseFileError(check.problems)
    return Case(
        name=name, description=description, source=file,
        pointsets=tuple(p for p in pointsets if p is not None),
        kernels=tuple(k for k in kernels if k is not None), means=tuple(means), reml=reml,
        solvers=tuple(s for s in solvers if s is not None),
        seeds=tuple(seeds), trace_method=trace_method, probes=probes, metrics=tuple(compute),
        holdout=holdout, perturbation=float(perturbation or 0.05),
        power_iterations=power_iterations, references=tuple(order),
        ladder_factor=float(ladder_factor or 100.0), sample_tol=float(sample_tol or 1e-10),
        memory_budget=memory_budget, time_budget=time_budget, timing=timing_on,
        repeats=repeats, warmup=warmup, timing_threads=threads, exclusive_timing=exclusive,
        timeout=timeout,
    )


def _subtable(check: Checker, doc: Mapping[str, Any], key: str, valid: tuple[str, ...]
              ) -> dict[str, Any]:
    if key not in doc:
        return {}
    table = check.table(doc[key], key)
    if table is None:
        return {}
    check.finish_table(table, key, valid)
    return table


def _generator_options(check: Checker, path: str, generator: str, options: Any) -> dict:
    table = check.table(options, f"{path}.options") if options is not None else {}
    if table is None:
        return {}
    valid: tuple[str, ...]
    if generator == "tensor_grid":
        valid = ("extent",)
    else:
        params = inspect.signature(GENERATORS[generator]).parameters
        valid = tuple(p for p, spec in params.items()
                      if spec.kind is inspect.Parameter.KEYWORD_ONLY and p != "rng")
    check.finish_table(table, f"{path}.options", valid)
    return {k: v for k, v in table.items() if k in valid}


def _pointset(check: Checker, path: str, table: dict[str, Any], base: Path
              ) -> PointSetEntry | None:
    check.finish_table(table, path, POINTSET_KEYS)
    generator = check.take_str(table, "generator", path, choices=GENERATOR_NAMES)
    file = check.take_str(table, "file", path)
    sized = check.take_items(table, "sizes", path, item=check.positive_int,
                             required=file is None)
    sizes = [n for _, n in sized]
    if "generator" in table and "file" in table:
        check.problem(path, "give either 'generator' or 'file', not both")
    if "generator" not in table and "file" not in table:
        check.problem(path, "give a 'generator' (one of "
                            f"{', '.join(GENERATOR_NAMES)}) or a data 'file'")
    if file is not None:
        return _file_pointset(check, path, table, base, file, sized)
    dims = check.take_list(table, "dims", path,
                           item=lambda v, p: check.positive_int(v, p, maximum=3), default=[2])
    options = _generator_options(check, path, generator, table.get("options")) if generator \
        else {}
    if generator == "sorted_1d" and any(d != 1 for d in dims):
        check.problem(f"{path}.dims", f"generator 'sorted_1d' makes 1D points; got dims {dims}")
    if generator == "tensor_grid":
        for where, n in sized:
            for d in dims:
                if not is_perfect_power(n, d):
                    check.problem(where, f"a tensor grid in {d}D needs a perfect "
                                         f"{_POWER_NAMES.get(d, f'{d}-th power')}, got {n} "
                                         f"(nearest: {round(n ** (1 / d)) ** d})")
    name = check.take_str(table, "name", path, default=generator or "points") or "points"
    spec = PointSetSpec(name=name, generator=generator, options=options)
    return PointSetEntry(spec=spec, sizes=tuple(sizes), dims=tuple(dims))


def _file_pointset(check: Checker, path: str, table: dict[str, Any], base: Path, file: str,
                   sized: list[tuple[str, int]]) -> PointSetEntry | None:
    from harness.infra.data_files import DataFileError, read_table

    columns = check.take_list(table, "columns", path, item=check.string, required=True,
                              scalar_ok=False)
    values = check.take_str(table, "values", path)
    if "dims" in table:
        check.problem(f"{path}.dims", "a data file's dimension is its number of 'columns'; "
                                      "remove 'dims'")
    location = Path(file) if Path(file).is_absolute() else (base / file)
    try:
        frame = read_table(location)
    except (OSError, DataFileError, ValueError) as exc:
        check.problem(f"{path}.file", f"cannot read {str(location)!r}: {exc}")
        return None
    for i, col in enumerate([*columns, *([values] if values else [])]):
        if col not in frame.columns:
            where = f"{path}.columns[{i}]" if i < len(columns) else f"{path}.values"
            check.problem(where, f"column {col!r} not in {str(location)!r}; it has "
                                 f"{', '.join(map(str, frame.columns))}")
    if not 1 <= len(columns) <= 3:
        check.problem(f"{path}.columns", f"expected 1 to 3 coordinate columns, got {columns}")
    rows = len(frame)
    for where, n in sized:
        if n > rows:
            check.problem(where, f"{n} exceeds the {rows} rows of {file!r}")
    sizes = [n for _, n in sized] or [rows]
    name = check.take_str(table, "name", path, default=location.stem) or location.stem
    spec = PointSetSpec(name=name, file=str(location.resolve()), columns=tuple(columns),
                        value_column=values)
    return PointSetEntry(spec=spec, sizes=tuple(sizes), dims=(len(columns),))


def _kernel(check: Checker, path: str, table: dict[str, Any]) -> KernelEntry | None:
    check.finish_table(table, path, KERNEL_KEYS)
    family = check.take_str(table, "family", path, required=True, choices=tuple(KERNELS))
    separable = check.take_bool(table, "separable", path, default=False)
    params = {k: v for k, v in table.items() if k in KERNEL_KEYS and k not in
              ("family", "separable")}
    if family is None:
        return None
    try:
        make_kernel(family, params)
    except (KernelParameterError, TypeError, ValueError) as exc:
        check.problem(path, f"{exc} (got {params!r})")
        return None
    return KernelEntry(family=family, params=params, separable=separable)


def _solver(check: Checker, path: str, table: dict[str, Any], resolver: SolverResolver
            ) -> SolverEntry | None:
    """One ``[[solvers]]`` table: its knob's values are ``tolerances`` (a ``tol`` solver)
    or ``knob_values`` (any solver), validated against the knob the solver declares."""
    check.finish_table(table, path, SOLVER_KEYS)
    name = check.take_str(table, "name", path, required=True)
    max_n = table.get("max_n")
    if max_n is not None:
        max_n = check.positive_int(max_n, f"{path}.max_n")
        max_n = max_n if isinstance(max_n, int) else None
    options = table.get("options", {})
    if check.table(options, f"{path}.options") is None:
        options = {}
    resolved: tuple[str, str] | None = None
    knob = DEFAULT_TOL_KNOB
    if name is not None:
        try:
            answer = resolver(name)
            resolved = (answer[0], answer[1])
            knob = answer[2] if len(answer) > 2 else DEFAULT_TOL_KNOB
        except Exception as exc:  # noqa: BLE001 - any failure to load a plugin is a problem to report
            check.problem(f"{path}.name", f"cannot load solver {name!r}: "
                                          f"{type(exc).__name__}: {exc}")
    values = _knob_values(check, path, table, name, knob)
    if knob.name in options:
        check.problem(f"{path}.options.{knob.name}", f"{knob.name} is solver {name!r}'s "
                                                     "accuracy knob: give it as knob_values")
    if resolved is None or values is None:
        return None
    return SolverEntry(name=resolved[0], version=resolved[1], tolerances=values,
                       options=dict(options), max_n=max_n, knob_name=knob.name)


def _knob_values(check: Checker, path: str, table: dict[str, Any], name: str | None,
                 knob: KnobSpec) -> tuple[float | None, ...] | None:
    """The knob values of a ``[[solvers]]`` table (None after a problem): ``tolerances``
    only for a ``tol`` solver, not both keys, each value in the knob's declared range
    (``KnobSpec.option_spec``; ``TOLERANCE`` for ``tol``). Neither key: ``(None,)`` for
    a ``tol`` solver (an exact one such as ``dense``), the declared sweep otherwise."""
    if "tolerances" in table and "knob_values" in table:
        check.problem(path, "give either 'tolerances' or 'knob_values', not both")
        return None
    if "tolerances" in table and not knob.is_tol:
        check.problem(f"{path}.tolerances", f"solver {name!r} has no tol; its knob is "
                                            f"{knob.name} in {knob.range_text()}: give "
                                            "knob_values")
        return None
    key = "knob_values" if "knob_values" in table else "tolerances"
    if key not in table:
        return (None,) if knob.is_tol else tuple(knob.default_sweep)
    before = len(check.problems)
    spec = TOLERANCE if knob.is_tol else knob.option_spec()
    items = check.take_items(table, key, path, item=check.spec_item(spec))
    if len(check.problems) > before:
        return None
    return tuple(float(value) for _, value in items)
