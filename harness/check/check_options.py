"""The options of a check (``covaudit check``) and its error for unusable ones."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from harness.audit import engine as audit_engine
from harness.audit.rule import Thresholds
from harness.audit.solver_seeds import DEFAULT_SOLVER_SEEDS
from harness.infra.option_specs import PRECONDITIONER, VARIANCE_POINTS

DEFAULT_TOLERANCES = (1e-2, 1e-4, 1e-6, 1e-8, 1e-10)
REFERENCE_CHOICES = ("auto", "dense", "statespace", "operator", "ladder")
DEFAULT_FIT_TIME_BUDGET = 600.0


@dataclass(frozen=True)
class CheckOptions:
    """Options of a check (CLI ``covaudit check``).

    Attributes
    ----------
    kernel : str
        Family name (``harness.model.kernels.KERNELS``).
    shape : mapping
        Fixed shape parameters (``nu`` for ``matern``, ``alpha`` for rational quadratic).
    anisotropic : bool
        One length scale per coordinate.
    nugget : bool
        Fit a nugget (False: exact interpolation model).
    mean : str
    tolerances : tuple of float
        Compression tolerances of a ``tol`` solver (``--tolerances``); the tightest is
        also the built-in solver's tolerance when the fit needs a compressed solver.
    knob_values : tuple of float or None
        Values of the solver's accuracy knob to audit (``--knob-values``;
        ``harness.solvers.knobs``): for a ``tol`` solver they replace ``tolerances``; for
        another knob None means its declared default sweep.
    holdout : float
        Fraction of points held out for the kriging evaluation, in (0, 0.5].
    holdout_points : int or None
        At most this many held-out points (``--holdout-points``), whatever the fraction;
        None: the default cap, 2,000 (a given cap must be below n).
    variance_points : int
        At most this many held-out points get a kriging variance (``--variance-points``,
        a seeded subset; ``harness.audit.audit_sampling``).
    seed : int
        Base seed of the holdout, probes, pilot subset and the solver's seeds.
    probes : int
        Rademacher probes of the difference-trace estimate.
    fixed_params : mapping or None
        Natural-scale parameters to use instead of fitting.
    start_params : mapping or None
        An extra starting point for the fit (natural scale).
    thresholds : Thresholds
    dense_fit_max_n : int or None
        n above which the at-scale fit runs (None: ``fit_plan.DENSE_FIT_MAX_N``; 0
        forces the at-scale fit).
    pilot_n : int
        Size of the random subset whose dense fit starts the at-scale fit.
    memory_budget : int or None
        Bytes for the dense reference and the dense fit.
    fit_time_budget : float
        Seconds the fit stage may take: past them it stops and reports itself
        unconverged (a cap, never the choice of the fit).
    fit_max_iter, fit_max_steps : int
        L-BFGS-B iterations and Fisher-scoring steps of the fit.
    score_tol_se : float or None
        Stopping tolerance of the fit in SE units (None: 1e-3 for the dense fit's score,
        ``vecchia_fit.REFINE_TOL_SE`` for the at-scale fit's distance to the exact MLE,
        1e-2 for the compressed fall-back).
    subsample_sizes : tuple of int
        Subsample sizes of the growth audit (ladder reference); capped by the budget.
    refit : bool
    leaf_size : int
        Leaf size of the built-in solver.
    solver : str
        Solver under test: registry name or ``package.module:factory`` (the only one when
        ``solvers`` is empty).
    solvers : tuple of str
        Several solvers under test, each spelled as given (``--solver``, repeatable): all
        are audited on the same fit, reference, holdout and probes, and the frontier
        recommends one (``harness.check.frontier``). Empty: ``(solver,)``.
    sweeps : mapping of str to tuple of float
        Knob values of one listed solver, by its spelling in ``solvers`` (``--sweep``);
        a solver without one takes ``knob_values`` (a single solver only), else
        ``tolerances`` (a ``tol`` solver), else its declared default sweep.
    kl : bool
        Also estimate the KL divergence of each knob value's Sigma~ against an exact
        operator reference (``--kl``; Hutchinson probes of exact products); against the
        dense reference it is measured exactly whatever this says.
    timing_repeats : int or None
        Timed fit evaluations per (solver, knob value), after an untimed warm-up
        (``harness.check.solver_timing``); None: 5 below 65,536 points, 3 from there.
    solver_seeds : int
        Seeds of the solver's randomness per tolerance.
    reference : str
        ``auto``, ``dense``, ``statespace``, ``operator`` or ``ladder``.
    preconditioner : str
        The exact-operator reference's preconditioner, ``vecchia`` (its neighbour count
        chosen by a pilot) or ``hodlr`` (tol 1e-10); ``option_specs.PRECONDITIONER``.
    ladder_factor : float
        The ladder reference is the solver at tol / ladder_factor.
    solver_timeout : float or None
        Seconds one call into a solver plugin may take in its child process
        (``harness.check.plugin_guard``); None: ``default_solver_timeout(n)``.
    dask_local, scheduler : int or str, optional
        Run the exact-operator reference's products on a local Dask cluster of this many
        workers, or on the Dask scheduler at this address (at most one; the values do
        not depend on where the products run: a fixed summation order).
    """

    kernel: str = "matern32"
    shape: Mapping[str, float] = field(default_factory=dict)
    anisotropic: bool = False
    nugget: bool = True
    mean: str = "constant"
    tolerances: tuple[float, ...] = DEFAULT_TOLERANCES
    knob_values: tuple[float, ...] | None = None
    holdout: float = 0.1
    holdout_points: int | None = None
    variance_points: int = VARIANCE_POINTS.default
    seed: int = 0
    probes: int = 16
    fixed_params: Mapping[str, Any] | None = None
    start_params: Mapping[str, Any] | None = None
    thresholds: Thresholds = field(default_factory=Thresholds)
    dense_fit_max_n: int | None = None
    pilot_n: int = 1000
    memory_budget: int | None = None
    fit_time_budget: float = DEFAULT_FIT_TIME_BUDGET
    fit_max_iter: int = 200
    fit_max_steps: int = 20
    score_tol_se: float | None = None
    subsample_sizes: tuple[int, ...] = (500, 1000, 2000, 4000)
    refit: bool = True
    leaf_size: int = 128
    solver: str = "hodlr"
    solver_seeds: int = DEFAULT_SOLVER_SEEDS
    reference: str = "auto"
    preconditioner: str = PRECONDITIONER.default
    ladder_factor: float = audit_engine.LADDER_FACTOR
    solver_timeout: float | None = None
    solvers: tuple[str, ...] = ()
    sweeps: Mapping[str, tuple[float, ...]] = field(default_factory=dict)
    timing_repeats: int | None = None
    kl: bool = False
    dask_local: int | None = None
    scheduler: str | None = None

    @property
    def solver_names(self) -> tuple[str, ...]:
        """The solvers under test as given: ``solvers``, or ``(solver,)``."""
        return self.solvers or (self.solver,)


class CheckError(ValueError):
    """The check cannot run with these options."""


def solver_options(options: CheckOptions, name: str) -> dict[str, Any]:
    """The options a check passes to solver ``name``'s factory besides its knob and seed:
    the leaf size of the built-in HODLR, nothing for any other."""
    return {"leaf_size": options.leaf_size} if name == "hodlr" else {}
