"""The exact-operator reference's preconditioner, built from a spec.

The preconditioner P only speeds the exact operator up: it changes iteration counts and
standard errors, never the expected answer (``harness.references.operator.reference``).
Two families serve:

* ``hodlr`` (the default): the built-in HODLR solver at a tolerance (1e-10 by default).
* ``vecchia``: the KL-minimizing sparse inverse Cholesky factor with m neighbours
  (``harness.solvers.vecchia``); its cost grows like n m^3 and its solves like n m, so it
  holds far less memory than HODLR at a tight tolerance. With no m given, m is chosen by a
  pilot (``pilot_neighbours``).

Why HODLR stays the default: at 16,384 points (Matern 3/2, the log-likelihood with its
score; ``benchmarks/results/operator_preconditioner.json``) the Vecchia-preconditioned
operator took 4.5x the time of the HODLR-preconditioned one (21 against 6 iterations, 32
against 16 probes, and a pilot about as long as the whole HODLR run) at 0.49x its peak
memory. Vecchia is the choice where HODLR's memory is the limit.

When the Vecchia factor cannot be built for the inputs (a kernel without a compiled closed
form, identical points under a zero nugget), ``build_operator_preconditioner`` falls back
to HODLR when asked to and says why in ``BuiltPreconditioner.fallback``.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass

import numpy as np

from harness.infra.option_specs import PRECONDITIONER
from harness.linalg.rademacher import rademacher_probes
from harness.model.kernels import Kernel
from harness.references.operator.lanczos import slq_logdet
from harness.references.operator.pcg import pcg
from harness.references.operator.products import KernelOperator
from harness.references.operator.score_traces import control_traces
from harness.solvers.protocol import Factorization
from harness.solvers.registry import resolve_solver
from harness.solvers.vecchia import NEIGHBOURS_KNOB, VecchiaFactorization, VecchiaInputError
from harness.solvers.vecchia import factorize as vecchia_factorize

#: HODLR's tolerance when the spec gives none (the earlier default of ``check`` and ``run``).
HODLR_TOL = 1e-10
#: Neighbour counts the pilot tries (Vecchia's m). Larger values buy fewer iterations
#: and, above all, a smaller per-probe variance of the log det (fewer probes to the SE
#: target) at a higher factor cost; in a trial at 6,000 points (2D, Matern 3/2, l = 0.1,
#: nugget 1e-2) m = 10 needed the full 256 probes, so it is not tried.
PILOT_CANDIDATES: tuple[int, ...] = (20, 40, 80, 160)
#: Most points in the pilot's random subsample; below 4 x this many the pilot takes a
#: quarter of the points (at least ``PILOT_MIN_POINTS``), so that its products cost at
#: most 1/16 of the reference's.
PILOT_POINTS = 4096
#: Fewest points in the pilot's subsample (all of them below this).
PILOT_MIN_POINTS = 256
#: Right-hand sides per block product in the reference's probe runs
#: (``operator_evaluate``'s default ``probe_batch``); the pilot times products this wide.
PILOT_BLOCK = 16
#: Probe limits of the reference (``operator_evaluate``'s ``min_probes``, ``max_probes``)
#: and its standard-error target of L in nats (``se_target``).
REFERENCE_MIN_PROBES = 16
REFERENCE_MAX_PROBES = 256
REFERENCE_SE_TARGET = 0.02
#: Probes of the preconditioner's own traces (``operator_evaluate``'s
#: ``preconditioner_probes``) where they are not exact; the pilot times the traces at its
#: size (the Vecchia factor's are exact: its derivative factor, no probes).
REFERENCE_PRECONDITIONER_PROBES = 64
#: Lanczos probes the pilot uses to estimate the per-probe variance of z' log(C) z.
PILOT_LANCZOS_PROBES = 8
#: PCG tolerance of the pilot: the reference's own (``operator_evaluate``'s ``cg_rtol``).
PILOT_CG_RTOL = 1e-10
#: PCG iteration and Lanczos step budgets of one pilot run (the reference's own).
PILOT_MAX_ITERATIONS = 1000
PILOT_LANCZOS_STEPS = 300

Clock = Callable[[], float]


@dataclass(frozen=True, kw_only=True)
class PreconditionerSpec:
    """Which preconditioner the exact operator gets.

    Attributes
    ----------
    family : {"vecchia", "hodlr"}
        Validated by ``harness.infra.option_specs.PRECONDITIONER`` (``OptionError``).
    knob : float or None
        Vecchia's neighbour count m (None: chosen by the pilot) or HODLR's tolerance
        (None: ``HODLR_TOL``).
    """

    family: str = "hodlr"
    knob: float | None = None

    def __post_init__(self) -> None:
        PRECONDITIONER.validate(self.family, where="--preconditioner")
        if self.knob is None:
            return
        if self.family == "vecchia":
            NEIGHBOURS_KNOB.validate(self.knob, where="--preconditioner-neighbours")
        elif not (math.isfinite(self.knob) and 0.0 < self.knob < 1.0):
            raise ValueError(f"--preconditioner-tol: expected a tolerance in (0, 1), "
                             f"got {self.knob!r}")

    @property
    def knob_name(self) -> str:
        return "neighbours" if self.family == "vecchia" else "tol"


@dataclass(frozen=True)
class PilotCandidate:
    """One neighbour count tried by the pilot: what it measured at the pilot size and
    what it predicts at the full size (``predicted_seconds``)."""

    neighbours: int
    factor_seconds: float
    trace_seconds: float
    pcg_seconds: float
    lanczos_seconds: float
    iterations: int
    lanczos_steps: int
    logdet_variance: float
    converged: bool
    predicted_probes: int
    predicted_products: int
    predicted_seconds: float

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


@dataclass(frozen=True)
class NeighbourPilot:
    """The pilot's measurements and its choice (``pilot_neighbours``)."""

    n: int
    pilot_n: int
    product_seconds: float
    block: int
    candidates: tuple[PilotCandidate, ...]
    chosen: int
    seconds: float

    def to_dict(self) -> dict[str, object]:
        return asdict(self) | {"candidates": [c.to_dict() for c in self.candidates]}


@dataclass(frozen=True)
class BuiltPreconditioner:
    """A preconditioner and how it was chosen.

    Attributes
    ----------
    factorization : Factorization
    family : str
        The family actually built (``hodlr`` after a fallback).
    knob_name : str
        ``neighbours`` or ``tol``.
    knob_value : float
    seconds : float
        Building it, the pilot included.
    pilot : NeighbourPilot or None
        Present when the pilot chose Vecchia's m.
    fallback : str
        Why Vecchia was replaced by HODLR ("" when it was not).
    """

    factorization: Factorization
    family: str
    knob_name: str
    knob_value: float
    seconds: float
    pilot: NeighbourPilot | None = None
    fallback: str = ""

    def describe(self) -> str:
        """One phrase for a reference's description."""
        value = (f"{int(self.knob_value)}" if self.knob_name == "neighbours"
                 else f"{self.knob_value:g}")
        text = f"{self.family} at {self.knob_name} {value}"
        if self.pilot is not None:
            text += f" (chosen by a {self.pilot.pilot_n:,}-point pilot)"
        if self.fallback:
            text += f" (vecchia could not be built: {self.fallback})"
        return text

    def to_dict(self) -> dict[str, object]:
        return {"family": self.family, "knob": self.knob_name, "knob_value": self.knob_value,
                "seconds": self.seconds, "fallback": self.fallback or None,
                "pilot": None if self.pilot is None else self.pilot.to_dict()}


def predicted_probes(*, logdet_variance: float, n: int, pilot_n: int) -> int:
    """Probes the reference will draw at n: the per-probe variance of z' log(C) z grows
    like n (a sum over n eigenvalues), so v_n = v_s n / s, and SE(L) = 1/2 sqrt(v_n / N)
    <= ``REFERENCE_SE_TARGET`` needs N >= v_n / (4 target^2); clipped to the reference's
    probe limits and rounded up to whole batches of ``PILOT_BLOCK``
    (``operator_evaluate``'s stopping rule). Variance of the Hutchinson estimate from
    Hutchinson (1990), its sum form "from memory"."""
    need = logdet_variance * (n / pilot_n) / (4.0 * REFERENCE_SE_TARGET ** 2)
    need = need if math.isfinite(need) else REFERENCE_MAX_PROBES
    clipped = min(max(math.ceil(need), REFERENCE_MIN_PROBES), REFERENCE_MAX_PROBES)
    return min(PILOT_BLOCK * math.ceil(clipped / PILOT_BLOCK), REFERENCE_MAX_PROBES)


def predicted_products(*, iterations: int, lanczos_steps: int, probes: int) -> int:
    """Block products of the reference at n: one PCG for the quadratic form, then per
    batch of ``PILOT_BLOCK`` probes one Lanczos run and one PCG run (the score traces),
    k + (N / 16) (l + k) with k the PCG iterations and l the Lanczos steps."""
    return iterations + math.ceil(probes / PILOT_BLOCK) * (lanczos_steps + iterations)


def predicted_seconds(*, n: int, pilot_n: int, setup_seconds: float, products: int,
                      product_seconds: float) -> float:
    """The pilot's prediction of one candidate's cost at the full size n.

        T(m) = t_s(m) n / s  +  K(m) t_p (n / s)^2

    with s the pilot size, t_s(m) the pilot's setup time (the Vecchia factorization and
    the preconditioner's own score traces, O(n m^3) and O(n m) each: linear in n at fixed
    m), K(m) the block products predicted at n (``predicted_products``) and t_p one exact
    block product at the pilot size (exact products cost O(n^2) per column). The
    preconditioner's solves inside PCG and Lanczos (O(n m) each) are left out against the
    O(n^2) products. Model from the operation counts above ("from memory").
    """
    scale = n / pilot_n
    return setup_seconds * scale + products * product_seconds * scale ** 2


def pilot_neighbours(points: np.ndarray, kernel: Kernel, *, rng: np.random.Generator,
                     candidates: Sequence[int] = PILOT_CANDIDATES,
                     pilot_points: int = PILOT_POINTS, cg_rtol: float = PILOT_CG_RTOL,
                     clock: Clock = time.perf_counter) -> NeighbourPilot:
    """Choose Vecchia's neighbour count m by predicted iterations per unit time.

    On a random window of s = min(``pilot_points``, max(n / 4, min(n,
    ``PILOT_MIN_POINTS``))) points (the s nearest a point drawn from ``rng``, so that the
    local density, and with it Vecchia's accuracy, stays that of the data; a thinned
    subsample made the per-probe variance 10x too small in a trial at 6,000 points):
    time one exact product with
    ``PILOT_BLOCK`` columns; then for each candidate m, factor the Vecchia
    preconditioner, run PCG with exact products on a standard-normal right-hand side to
    ``cg_rtol`` (iterations counted), run Lanczos quadrature on ``PILOT_LANCZOS_PROBES``
    probes of C = W^-1 Sigma W^-T (steps counted, the per-probe variance of z' log(C) z
    estimated) and the preconditioner's own score traces, each timed. Each candidate's
    cost at the full n is predicted by ``predicted_probes``, ``predicted_products`` and
    ``predicted_seconds``, and the cheapest is chosen (the smaller m on a tie).

    This is a prediction, not a measurement at n. Its assumptions: the iteration and
    step counts in the window stand for those at n (PCG iterations grow slowly with n at
    fixed density); the per-probe variance grows like n (each point adds its local
    error); the window's edge, where points have fewer neighbours, is ignored; the setup
    time grows linearly in n at fixed m; the product time grows as n^2; the
    preconditioner's solves are negligible.
    Its own cost is bounded: per candidate one factorization, one single-column PCG run,
    one Lanczos run of 8 probes and the preconditioner's traces at s <= min(4,096, n / 4)
    points (above ``PILOT_MIN_POINTS``), each exact product at most 1/16 of one at n.

    Parameters
    ----------
    points : ndarray, shape (n, d)
    kernel : Kernel
        At the parameters the reference will use.
    rng : Generator
        Draws the window's centre, the right-hand side and the probes.
    candidates : sequence of int
        Values of m to try; those >= s - 1 (an exact factor) are dropped unless none is left.
    pilot_points, cg_rtol
        The subsample's most points and the PCG tolerance.
    clock : callable
        Seconds from an arbitrary origin (``time.perf_counter``); injectable for tests.
        Called in pairs around, in this order: the product, then for each candidate the
        factorization, the PCG run, the Lanczos run and the traces.
    """
    x = np.asarray(points, dtype=float)
    x = x[:, None] if x.ndim == 1 else x
    n = x.shape[0]
    if not candidates:
        raise ValueError("pilot_neighbours: no candidate neighbour counts")
    s = min(int(pilot_points), max(n // 4, min(n, PILOT_MIN_POINTS)))
    start = time.perf_counter()
    pick = local_window(x, s, rng)
    xs = x[pick]
    usable = [int(m) for m in candidates if int(m) < s - 1] or [min(int(m) for m in candidates)]
    _warm_up(xs, kernel, min(usable))
    operator = KernelOperator(xs, kernel, progress=False)
    t0 = clock()
    operator.matvec(rng.standard_normal((s, PILOT_BLOCK)))
    product_seconds = clock() - t0
    rhs = rng.standard_normal((s, 1))
    probes = rademacher_probes(s, PILOT_LANCZOS_PROBES, rng)
    lam = kernel.nugget if kernel.nugget > 0 else None
    tried: list[PilotCandidate] = []
    for m in usable:
        t0 = clock()
        fac = vecchia_factorize(xs, kernel, neighbours=m)
        factor_seconds = clock() - t0

        def precondition(b: np.ndarray, fac: VecchiaFactorization = fac) -> np.ndarray:
            return np.asarray(fac.solve(b)).reshape(b.shape)

        def apply_c(v: np.ndarray, fac: VecchiaFactorization = fac) -> np.ndarray:
            return fac.solve_sqrt(operator.matvec(fac.solve_sqrt_transpose(v)))

        t0 = clock()
        run = pcg(operator.matvec, rhs, precondition=precondition, rtol=cg_rtol,
                  max_iterations=PILOT_MAX_ITERATIONS, lambda_min=lam)
        pcg_seconds = clock() - t0
        t0 = clock()
        slq = slq_logdet(apply_c, probes, max_steps=PILOT_LANCZOS_STEPS)
        lanczos_seconds = clock() - t0
        t0 = clock()
        control_traces(fac, kernel.n_params, probes=REFERENCE_PRECONDITIONER_PROBES,
                       rng=rng)
        trace_seconds = clock() - t0
        converged = bool(run.converged and slq.converged.all())
        iterations = run.iterations if run.converged else PILOT_MAX_ITERATIONS
        steps = int(slq.steps.max())
        variance = float(np.var(slq.values, ddof=1))
        probes_n = predicted_probes(logdet_variance=variance, n=n, pilot_n=s)
        products = predicted_products(iterations=iterations, lanczos_steps=steps,
                                      probes=probes_n)
        tried.append(PilotCandidate(
            neighbours=m, factor_seconds=factor_seconds, trace_seconds=trace_seconds,
            pcg_seconds=pcg_seconds, lanczos_seconds=lanczos_seconds,
            iterations=int(run.iterations), lanczos_steps=steps, logdet_variance=variance,
            converged=converged, predicted_probes=probes_n, predicted_products=products,
            predicted_seconds=predicted_seconds(
                n=n, pilot_n=s, setup_seconds=factor_seconds + trace_seconds,
                products=products, product_seconds=product_seconds)))
    best = min(tried, key=lambda c: (c.predicted_seconds, c.neighbours))
    return NeighbourPilot(n=n, pilot_n=s, product_seconds=product_seconds, block=PILOT_BLOCK,
                          candidates=tuple(tried), chosen=best.neighbours,
                          seconds=time.perf_counter() - start)


def local_window(points: np.ndarray, size: int, rng: np.random.Generator) -> np.ndarray:
    """Indices of the ``size`` points nearest a point drawn at random (all when ``size``
    is n): a window keeps the data's local density, against which Vecchia's accuracy is
    set, where a thinned random subsample would make every factor look more accurate."""
    n = points.shape[0]
    if size >= n:
        return np.arange(n)
    centre = points[rng.integers(n)]
    dist2 = np.sum((points - centre) ** 2, axis=1)
    return np.sort(np.argpartition(dist2, size - 1)[:size])


def _warm_up(points: np.ndarray, kernel: Kernel, neighbours: int) -> None:
    """One untimed small factorization, so that compiling the Vecchia kernels (on a cold
    cache) is not charged to the first candidate."""
    few = points[: min(points.shape[0], 256)]
    vecchia_factorize(few, kernel, neighbours=min(neighbours, max(1, few.shape[0] - 2)))


def build_operator_preconditioner(points: np.ndarray, kernel: Kernel, spec: PreconditionerSpec,
                                  *, rng: np.random.Generator, leaf_size: int = 128,
                                  hodlr_fallback: bool = True,
                                  clock: Clock = time.perf_counter) -> BuiltPreconditioner:
    """The preconditioner ``spec`` names, for ``kernel`` at its parameters on ``points``.

    Vecchia with no m given runs ``pilot_neighbours`` first. HODLR is seeded from ``rng``
    (its randomized compression). With ``hodlr_fallback``, a Vecchia factor refused for
    these inputs (``VecchiaInputError``) is replaced by HODLR at ``HODLR_TOL``.

    Raises
    ------
    VecchiaInputError
        Vecchia refused the inputs and ``hodlr_fallback`` is False.
    """
    start = time.perf_counter()
    pilot_rng, hodlr_rng = rng.spawn(2)
    if spec.family == "vecchia":
        try:
            pilot = None
            if spec.knob is None:
                pilot = pilot_neighbours(points, kernel, rng=pilot_rng, clock=clock)
                m = pilot.chosen
            else:
                m = int(spec.knob)
            vecchia = vecchia_factorize(points, kernel, neighbours=m)
            return BuiltPreconditioner(vecchia, "vecchia", "neighbours", float(m),
                                       time.perf_counter() - start, pilot=pilot)
        except VecchiaInputError as exc:
            if not hodlr_fallback:
                raise
            reason = str(exc)
        tol = HODLR_TOL
    else:
        reason = ""
        tol = HODLR_TOL if spec.knob is None else float(spec.knob)
    fac = resolve_solver("hodlr").factorize(points, kernel, kernel.theta, tol=tol,
                                            leaf_size=leaf_size, rng=hodlr_rng)
    return BuiltPreconditioner(fac, "hodlr", "tol", tol, time.perf_counter() - start,
                               fallback=reason)
