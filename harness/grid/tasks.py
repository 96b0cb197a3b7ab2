"""Audit tasks: one cell of a case grid, with a stable key and its own random streams.

A task holds only small, JSON-able parameters (never arrays); the worker rebuilds the
points, kernel and data from them. Two hashes identify it:

- ``key`` hashes the canonical parameters together with the solver's name and version,
  so the same cell gets the same key in every run and on every machine, and a changed
  solver version gets a new one (a resumed run redoes the task);
- ``pair_key`` hashes what the problem *is* (case, geometry, n, kernel, solver name,
  tolerance, options, seed, measurement settings) and leaves out the solver version and
  pure execution settings (timing repeats and threads, budgets, timeouts), so a baseline
  pairs with a run of a newer version; ``harness.analysis.regression`` reports version
  differences beside the pairing.

The solver's accuracy knob (``harness.solvers.knobs``) is ``knob_name`` and
``knob_value``. A ``tol`` solver's task keeps its value in ``tol`` as before, and both
hashes leave the two knob fields out (``KNOB_FIELDS``), so the keys of every run written
before the knob existed stay the same; a task of another knob (``rho``) has ``tol`` None
and hashes its knob.

Random streams follow numpy's ``SeedSequence`` spawning (numpy's "Parallel random number
generation" guide): the task's data stream is ``SeedSequence(seed, spawn_key=(data_id,))``
with ``data_id`` a hash of the parameters that define the data (point set, size, kernel,
mean model, hold-out size), and its children feed the points, the draw of y, the hold-out
points, the trace probes and the power iteration. Every solver and tolerance of one
cell therefore sees the same data, and any cell reruns alone with identical streams.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from harness.audit.rule import REFERENCE_KINDS as RULE_REFERENCE_KINDS
from harness.model.json_values import canonical_json

#: Names of the child streams of a task's data SeedSequence, in spawn order.
STREAMS: tuple[str, ...] = ("points", "sample", "holdout", "probes", "power", "solver")

#: Metrics a case can ask for (see ``harness.audit.metrics``).
METRIC_GROUPS: tuple[str, ...] = (
    "loglik", "score", "perturbed", "trace", "factorization", "solve", "kriging",
)

#: Task fields left out of ``pair_key``: the version (recorded beside the result) and
#: settings that change how a task is executed or timed, not what it computes.
UNPAIRED_FIELDS: tuple[str, ...] = (
    "solver_version", "time_budget", "timing", "repeats", "warmup", "timing_threads",
    "exclusive_timing", "timeout",
)

#: Task fields left out of ``key`` (execution settings added after keys were first
#: stored; leaving them out keeps earlier run directories resumable).
UNKEYED_FIELDS: tuple[str, ...] = ("timeout",)

#: The knob's fields, hashed only for a solver whose knob is not ``tol`` (module docstring).
KNOB_FIELDS: tuple[str, ...] = ("knob_name", "knob_value")

#: The default reference order of a case file, in decreasing trust (DEVELOPERS.md, "The
#: reference order"); ``ladder`` is the stand-in.
REFERENCE_KINDS: tuple[str, ...] = ("dense", "statespace", "kronecker", "ladder")
#: Every kind a case file or ``run --reference`` may name (``harness.audit.rule``): the
#: default order plus the exact operator (``harness.references.operator``), which is opt-in
#: because it costs O(n^2) per product (and keeps the default order, hence earlier task
#: keys, unchanged).
ALL_REFERENCE_KINDS: tuple[str, ...] = RULE_REFERENCE_KINDS


def _digest(value: Any) -> str:
    return hashlib.sha256(canonical_json(value).encode()).hexdigest()


def without_tol_knob(task: Mapping[str, Any]) -> dict[str, Any]:
    """``task`` less ``KNOB_FIELDS`` when its knob is ``tol`` (or unstated, as in records
    written before the knob existed): what the hashes see."""
    values = dict(task)
    if values.get("knob_name", "tol") in ("tol", None):
        for name in KNOB_FIELDS:
            values.pop(name, None)
    return values


def pair_key_of(task: Mapping[str, Any]) -> str:
    """The version-free key of a task given as ``Task.to_dict()`` (stored records too).

    16 hex digits of sha256 over the task's fields less ``UNPAIRED_FIELDS`` (and less
    ``KNOB_FIELDS`` for a ``tol`` solver); the case name is included, so runs of different
    case files never pair.
    """
    values = {k: v for k, v in without_tol_knob(task).items() if k not in UNPAIRED_FIELDS}
    return _digest(values)[:16]


def knob_fields(task: Mapping[str, Any]) -> dict[str, Any]:
    """``knob_name`` and ``knob_value`` of a task dict; a record written before the knob
    existed is a ``tol`` task whose value is its ``tol``."""
    name = task.get("knob_name") or "tol"
    value = task.get("knob_value")
    return {"knob_name": name, "knob_value": task.get("tol") if value is None and name == "tol"
            else value}


@dataclass(frozen=True)
class PointSetSpec:
    """Where the points come from: a named generator with options, or a data file.

    Attributes
    ----------
    name : str
        Label used in task labels and reports.
    generator : str or None
        A name from ``harness.geometry.pointsets.GENERATORS`` or ``tensor_grid``.
    options : mapping
        Keyword options of the generator.
    file : str or None
        Absolute path of a CSV file of coordinates (instead of a generator).
    columns : tuple of str
        Coordinate column names in ``file``.
    value_column : str or None
        Column of observed values in ``file``; when given, y is read, not drawn.
    """

    name: str
    generator: str | None = None
    options: Mapping[str, Any] = field(default_factory=dict)
    file: str | None = None
    columns: tuple[str, ...] = ()
    value_column: str | None = None

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["options"] = dict(self.options)
        out["columns"] = list(self.columns)
        return out

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> PointSetSpec:
        return cls(name=data["name"], generator=data.get("generator"),
                   options=dict(data.get("options") or {}), file=data.get("file"),
                   columns=tuple(data.get("columns") or ()),
                   value_column=data.get("value_column"))


@dataclass(frozen=True)
class TaskPoints:
    """A task's points, its new kriging points, and observed values (a data file's value
    column; None when y is drawn)."""

    points: np.ndarray
    new_points: np.ndarray
    observed: np.ndarray | None


@dataclass(frozen=True, kw_only=True)
class AuditSettings:
    """What to measure and how: the settings a case file gives every task of its grid.

    ``Case`` (a case file) and ``Task`` (one cell of it) both inherit these fields, so a
    setting and its default are written once.

    Attributes
    ----------
    trace_method : str
        ``exact``, ``hutchinson`` or ``hutchpp``.
    probes : int
    metrics : tuple of str
        Subset of ``METRIC_GROUPS``.
    holdout : int
        Number of held-out kriging points.
    perturbation : float
        Log-scale offset added to every entry of theta_0 for the perturbed-point gradient.
    power_iterations : int
        Iterations of the randomized norm estimate of Sigma - Sigma~.
    references : tuple of str
        Allowed reference kinds, in the order tried.
    ladder_factor : float
        The ladder reference is the solver at tol / ladder_factor.
    sample_tol : float
        Tolerance of the solver factorization used to draw y when the reference cannot.
    memory_budget : int or None
        Bytes the dense reference may use (None: the dense module's default).
    time_budget : float or None
        Seconds a task may be estimated to take; costlier tasks are skipped.
    timing : bool
    repeats, warmup : int
    timing_threads : int
        BLAS and numba threads while timing (accuracy work always uses one).
    exclusive_timing : bool
        Time after the parallel accuracy work, one task at a time.
    timeout : float or None
        Seconds one job of a task may run before its worker is stopped and the task
        recorded as timed out (``[timing] timeout``; None: the runner's default from the
        cost estimate, ``harness.grid.runner.deadlines``).
    """

    trace_method: str = "hutchpp"
    probes: int = 32
    metrics: tuple[str, ...] = METRIC_GROUPS
    holdout: int = 64
    perturbation: float = 0.05
    power_iterations: int = 20
    references: tuple[str, ...] = REFERENCE_KINDS
    ladder_factor: float = 100.0
    sample_tol: float = 1e-10
    memory_budget: int | None = None
    time_budget: float | None = None
    timing: bool = True
    repeats: int = 3
    warmup: int = 1
    timing_threads: int = 1
    exclusive_timing: bool = True
    timeout: float | None = None


@dataclass(frozen=True, kw_only=True)
class Task(AuditSettings):
    """One audit cell: data, model, solver under test, and what to measure.

    Attributes
    ----------
    case : str
        Name of the case grid (not part of the key).
    pointset : PointSetSpec
    n, d : int
        Number of observations and dimension.
    kernel : str
        Kernel family (``harness.model.kernels.KERNELS``).
    kernel_params : mapping
        Natural-scale parameters for ``make_kernel``; these are also the data-generating
        parameters theta_0.
    separable : bool
        Use the product (separable) form of the kernel, ``harness.references.kronecker
        .SeparableKernel``, which the Kronecker reference needs on tensor grids.
    mean : str
        ``zero``, ``constant`` or ``linear``.
    reml : bool
    solver, solver_version : str
        Registry name (or ``module:factory``) and version of the solver under test.
    solver_options : mapping
        Extra keyword options of the solver factory.
    tol : float or None
        Compression tolerance (None for exact solvers such as ``dense`` and for a solver
        whose knob is not ``tol``).
    seed : int
    knob_name : str
        The solver's accuracy knob (``harness.solvers.knobs``): ``tol`` or e.g. ``rho``.
    knob_value : float or None
        Its value (equal to ``tol`` for a ``tol`` solver; None for an exact solver).
    (the settings of ``AuditSettings``)
    """

    case: str
    pointset: PointSetSpec
    n: int
    d: int
    kernel: str
    kernel_params: Mapping[str, Any]
    separable: bool
    mean: str
    reml: bool
    solver: str
    solver_version: str
    solver_options: Mapping[str, Any]
    tol: float | None
    seed: int
    knob_name: str = "tol"
    knob_value: float | None = None

    def __post_init__(self) -> None:
        if self.knob_name == "tol" and self.knob_value != self.tol:
            # one value for a tol solver: knob_value mirrors tol (records before the knob)
            object.__setattr__(self, "knob_value", self.tol)

    # -- identity -------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["pointset"] = self.pointset.to_dict()
        out["kernel_params"] = dict(self.kernel_params)
        out["solver_options"] = dict(self.solver_options)
        out["metrics"] = list(self.metrics)
        out["references"] = list(self.references)
        return out

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Task:
        values = dict(data)
        values["pointset"] = PointSetSpec.from_dict(values["pointset"])
        values["metrics"] = tuple(values["metrics"])
        values["references"] = tuple(values["references"])
        values["kernel_params"] = dict(values["kernel_params"])
        values["solver_options"] = dict(values["solver_options"])
        return cls(**values)

    def canonical(self) -> dict[str, Any]:
        """The parameters that define the task's results (everything but the case name;
        the knob's fields only for a solver whose knob is not ``tol``)."""
        out = without_tol_knob(self.to_dict())
        del out["case"]
        for name in UNKEYED_FIELDS:
            out.pop(name, None)
        return out

    @property
    def key(self) -> str:
        """16 hex digits of sha256 over the canonical parameters (with solver version)."""
        return _digest(self.canonical())[:16]

    @property
    def pair_key(self) -> str:
        """16 hex digits of the version-free problem key (``pair_key_of``)."""
        return pair_key_of(self.to_dict())

    @property
    def label(self) -> str:
        """A readable name: ``pointset-n-d/kernel/solver@tol/mean/seed`` (``solver@rho6``
        for a solver whose knob is not ``tol``)."""
        if self.knob_name != "tol" and self.knob_value is not None:
            tol = f"{self.knob_name}{self.knob_value:g}"
        else:
            tol = "exact" if self.tol is None else f"{self.tol:.0e}"
        kernel = self.kernel + ("-sep" if self.separable else "")
        return (f"{self.pointset.name}-n{self.n}-d{self.d}/{kernel}/"
                f"{self.solver}@{tol}/{self.mean}{'-reml' if self.reml else ''}/s{self.seed}")

    def data_identity(self) -> dict[str, Any]:
        """The parameters that define the data (shared by all solvers of one cell)."""
        return {"pointset": self.pointset.to_dict(), "n": self.n, "d": self.d,
                "kernel": self.kernel, "kernel_params": dict(self.kernel_params),
                "separable": self.separable, "mean": self.mean, "holdout": self.holdout}

    def load_points(self, streams: Mapping[str, np.random.Generator]) -> TaskPoints:
        """The task's points, its new kriging points and (from a data file's value
        column) the observed values, from the ``points`` and ``holdout`` streams."""
        spec = self.pointset
        if spec.file is not None:
            from harness.infra.data_files import read_table

            frame = read_table(spec.file)
            coords = frame[list(spec.columns)].to_numpy(dtype=float)
            values = (frame[spec.value_column].to_numpy(dtype=float) if spec.value_column
                      else None)
            rows = (np.arange(coords.shape[0]) if self.n >= coords.shape[0]
                    else np.sort(streams["points"].choice(coords.shape[0], self.n,
                                                          replace=False)))
            points = coords[rows]
            low, high = points.min(axis=0), points.max(axis=0)
            new = low + (high - low) * streams["holdout"].random((self.holdout,
                                                                 points.shape[1]))
            return TaskPoints(points, new, None if values is None else values[rows])
        options = dict(spec.options)
        if spec.generator == "tensor_grid":
            from harness.geometry.pointsets import grid_side, tensor_grid

            extent = options.get("extent")
            points = tensor_grid((grid_side(self.n, self.d),) * self.d, extent=extent)
            span = np.asarray(extent if extent is not None else (1.0,) * self.d, dtype=float)
            return TaskPoints(points, span * streams["holdout"].random((self.holdout, self.d)),
                              None)
        if spec.generator is None:
            raise ValueError(f"point set {spec.name!r} names neither a generator nor a file")
        from harness.geometry.pointsets import generate

        points = generate(spec.generator, self.n, self.d, rng=streams["points"], **options)
        new = generate(spec.generator, self.holdout, self.d, rng=streams["holdout"],
                       **options)
        return TaskPoints(points, new, None)

    def streams(self) -> dict[str, np.random.Generator]:
        """Independent generators named by ``STREAMS`` (see module docstring)."""
        data_id = int(_digest(self.data_identity())[:8], 16)
        root = np.random.SeedSequence(self.seed, spawn_key=(data_id,))
        return {name: np.random.default_rng(child)
                for name, child in zip(STREAMS, root.spawn(len(STREAMS)), strict=True)}
