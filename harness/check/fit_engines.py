"""What a fit evaluates: L(theta), its score and Fisher information, by one engine.

Three engines, one call signature ``engine(theta, *, fisher=False) -> EngineEvaluation``:

* ``DenseEngine``: the exact GLS-profiled log-likelihood by the dense Cholesky factor,
  the exact score g_i = 1/2 a' Sigma_i a - 1/2 tr(Sigma^-1 Sigma_i) (Rasmussen and
  Williams 2006, eq. 5.9) and the expected Fisher information
  F_ij = 1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j) (Mardia and Marshall 1984, sec. 4);
* ``VecchiaEngine``: the Vecchia approximation's own log-likelihood with its exact
  gradient and Fisher information (Guinness 2021, Stat. Comput. 31, secs. 2-3), the
  ordering, pattern and supernodes built once for the points and reused at every theta;
* ``CompressedEngine``: a compressed solver's log-likelihood with Hutch++ traces (a
  stochastic score with its standard error);
* ``StateSpaceEngine``: on a line with a half-integer Matern kernel, the exact
  log-likelihood and score by the Kalman filter and its sensitivity equations, O(n), and
  the observed information by central differences of that score.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from harness.model.kernels import Kernel
from harness.references import dense_evaluate
from harness.references.statespace import StateSpaceReference
from harness.solvers.vecchia import DEFAULT_LAM, build_structure
from harness.solvers.vecchia.vecchia_likelihood import vecchia_evaluate


@dataclass(frozen=True)
class EngineEvaluation:
    """Log-likelihood, score and (when asked) Fisher information at one theta."""

    loglik: float
    score: np.ndarray
    fisher: np.ndarray | None
    seconds: float
    score_se: np.ndarray | None = None   # SE of a stochastic score (None: exact)

    def to_dict(self) -> dict[str, object]:
        return {"loglik": self.loglik, "score": self.score.tolist(),
                "fisher": None if self.fisher is None else self.fisher.tolist(),
                "seconds": self.seconds}


Engine = Callable[..., EngineEvaluation]


class DenseEngine:
    """L, g (exact traces) and F by the dense certified Cholesky reference."""

    name = "dense"

    def __init__(self, points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                 reml: bool = False, memory_budget: int | None = None) -> None:
        self.points, self.y, self.kernel = points, y, kernel
        self.mean, self.reml, self.memory_budget = mean, reml, memory_budget

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        start = time.perf_counter()
        ev = dense_evaluate(self.points, self.y, self.kernel.with_theta(theta),
                            mean=self.mean, reml=self.reml, score=True, fisher=fisher,
                            memory_budget=self.memory_budget, certify=False)
        return EngineEvaluation(loglik=ev.loglik, score=np.asarray(ev.score),
                                fisher=ev.fisher, seconds=time.perf_counter() - start)


class VecchiaEngine:
    """L~, its exact gradient and Fisher information by the built-in Vecchia solver.

    The parameter-free structure (maximin order, ``neighbours`` nearest pattern, supernodes of
    ``lam``) is built here once and passed to every evaluation. The Fisher information
    comes from the same pass as the score, so ``fisher`` only decides whether it is
    returned.
    """

    name = "vecchia"

    def __init__(self, points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                 neighbours: int, lam: float | None = DEFAULT_LAM) -> None:
        self.points, self.y, self.kernel, self.mean = points, y, kernel, mean
        self.neighbours, self.lam = int(neighbours), lam
        self.structure = build_structure(points, neighbours=self.neighbours, lam=lam)

    @property
    def nnz_per_column(self) -> float:
        """Nonzeros per column of the sparse inverse Cholesky factor."""
        return float(self.structure.nnz_per_column)

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        start = time.perf_counter()
        ev = vecchia_evaluate(self.points, self.y, self.kernel.with_theta(theta),
                              lam=self.lam, mean=self.mean, score=True,
                              fisher=True, structure=self.structure)
        return EngineEvaluation(loglik=ev.loglik, score=np.asarray(ev.score),
                                fisher=np.asarray(ev.fisher) if fisher else None,
                                seconds=time.perf_counter() - start)


class CompressedEngine:
    """L, g and F through a compressed solver (default: the built-in HODLR), traces by
    Hutch++.

    The solver's seed and the probes are the same at every theta (common random numbers),
    so the estimated score is a smooth function of theta for the optimizer. ``seed`` is
    the solver's seed (``harness.audit.solver_seeds.solver_seed``); the probes use
    ``seed + 1``.
    """

    name = "hodlr"

    def __init__(self, points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                 reml: bool = False, tol: float, probes: int = 32, seed: int = 0,
                 leaf_size: int = 128, solver: object | None = None,
                 options: Mapping[str, object] | None = None) -> None:
        from harness.solvers.registry import resolve_solver

        self.points, self.y, self.kernel = points, y, kernel
        self.mean, self.reml, self.tol = mean, reml, tol
        self.probes, self.seed, self.leaf_size = probes, seed, leaf_size
        self.solver = solver if solver is not None else resolve_solver("hodlr")
        name = str(getattr(self.solver, "name", "hodlr"))
        self.name = name
        base = dict(options) if options is not None else (
            {"leaf_size": leaf_size} if name == "hodlr" else {})
        from harness.audit.solver_seeds import seeded_options

        self.options = seeded_options(self.solver.factory, base, seed)  # type: ignore[attr-defined]

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        from harness.likelihood import evaluate_likelihood

        start = time.perf_counter()
        model = self.kernel.with_theta(theta)
        fac = self.solver.factorize(self.points, self.kernel, np.asarray(theta),  # type: ignore[attr-defined]
                                    tol=self.tol, **self.options)
        ev = evaluate_likelihood(fac, self.points, self.y, model, mean=self.mean,
                                 reml=self.reml, trace="hutchpp", probes=self.probes,
                                 rng=self.seed + 1, fisher=fisher)
        # g_i = 1/2 q_i - 1/2 tr_i, so SE(g_i) = SE(tr_i) / 2.
        score_se = (None if ev.trace_stderr is None
                    else 0.5 * np.asarray(ev.trace_stderr, dtype=float))
        return EngineEvaluation(loglik=ev.loglik, score=np.asarray(ev.score),
                                fisher=ev.fisher, seconds=time.perf_counter() - start,
                                score_se=score_se)


#: Log-scale step of the observed information's central differences (``StateSpaceEngine``).
OBSERVED_INFORMATION_STEP = 1e-4


def positive_definite(matrix: np.ndarray) -> tuple[np.ndarray, bool]:
    """The symmetric part of ``matrix`` with each eigenvalue lambda replaced by
    max(|lambda|, 1e-8 max |lambda|), and whether any was replaced: the modified Newton
    metric (Nocedal and Wright 2006, sec. 3.4, eigenvalue modification), so that a step
    B^-1 g is an ascent direction where the log-likelihood is not concave."""
    sym = 0.5 * (matrix + matrix.T)
    values, vectors = np.linalg.eigh(sym)
    floor = 1e-8 * float(np.max(np.abs(values))) if values.size else 0.0
    fixed = np.maximum(np.abs(values), floor)
    if np.array_equal(fixed, values):
        return sym, False
    return (vectors * fixed) @ vectors.T, True


class StateSpaceEngine:
    """Exact L and score on a line by the Kalman filter; the observed information.

    L by the prediction-error decomposition and g by the filter's sensitivity equations
    (``harness.references.statespace.StateSpaceReference``), both exact and O(n). With
    ``fisher`` the metric is the observed information J = -dg/dtheta, by central
    differences of the exact score with log-scale step h = ``OBSERVED_INFORMATION_STEP``
    (truncation O(h^2)), symmetrized and, where not positive definite, modified
    (``positive_definite``). At the MLE J estimates the Fisher information, and is the
    one Efron and Hinkley (1978, Biometrika 65, 457-487) recommend for the standard
    errors. Costs 1 + 2p filter passes with the score.
    """

    name = "statespace"

    def __init__(self, points: np.ndarray, y: np.ndarray, kernel: Kernel, *,
                 mean: str) -> None:
        self.y, self.kernel, self.mean = np.asarray(y, dtype=float), kernel, mean
        self.reference = StateSpaceReference(points, kernel)
        self._modified: set[bytes] = set()   # thetas whose information was modified

    def modified_at(self, theta: np.ndarray) -> bool:
        """Whether the information returned at ``theta`` was modified to be positive
        definite (``positive_definite``)."""
        return np.asarray(theta, dtype=float).tobytes() in self._modified

    def _at(self, theta: np.ndarray) -> StateSpaceReference:
        """The filter at ``theta`` (the points' sorting reused)."""
        return self.reference.with_kernel(self.kernel.with_theta(theta))

    def loglik(self, theta: np.ndarray) -> float:
        """L(theta) only (one filter pass)."""
        return self._at(theta).loglik(self.y, mean=self.mean)

    def _score(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        ev = self._at(theta).evaluate(self.y, mean=self.mean, score=True)
        return ev.loglik, np.asarray(ev.score, dtype=float)

    def observed_information(self, theta: np.ndarray) -> np.ndarray:
        """-dg/dtheta by central differences of the exact score (class docstring),
        before the positive-definite modification."""
        theta = np.asarray(theta, dtype=float)
        h = OBSERVED_INFORMATION_STEP
        columns = []
        for j in range(theta.size):
            shift = np.zeros_like(theta)
            shift[j] = h
            columns.append((self._score(theta - shift)[1] - self._score(theta + shift)[1])
                           / (2.0 * h))
        return np.column_stack(columns)

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        start = time.perf_counter()
        loglik, score = self._score(theta)
        information = None
        if fisher:
            information, modified = positive_definite(self.observed_information(theta))
            if modified:
                self._modified.add(np.asarray(theta, dtype=float).tobytes())
        return EngineEvaluation(loglik=loglik, score=score, fisher=information,
                                seconds=time.perf_counter() - start)
