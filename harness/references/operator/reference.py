"""The exact-operator reference: log-likelihood, score and their uncertainties.

Everything reported comes from exact kernel entries (``products``); the preconditioner
P (any ``Factorization``) only speeds the iterations up:

    Q        = r' Sigma^-1 r by PCG, bound ||r_res||^2 / tau2         (``pcg``, ``operator_gls``)
    log det  = log det P + log det(W^-1 Sigma W^-T),  P = W W'         (``lanczos``)
    traces   = tr(P^-1 P_i) + tr(Sigma^-1 Sigma_i - P^-1 P_i)          (``score_traces``;
               the first exact where P offers it, e.g. the Vecchia factor)
    L        = -1/2 Q - 1/2 log det Sigma - n/2 log(2 pi)             (R&W 2006, eq. 2.30)
    L_REML   = L_ML - 1/2 log det G + 1/2 log det F'F + p/2 log(2 pi) (Harville 1974, eq. 5)
    g_i      = 1/2 a' Sigma_i a - 1/2 tr(Sigma^-1 Sigma_i)            (R&W 2006, eq. 5.9)

The second log-det term is exact in expectation whatever P is (it is the log det of
Sigma in the basis W), so an inaccurate P changes only the Lanczos step count and the
standard error, never the expected answer; likewise for the traces. The one number taken
from P is log det P, which must be the log det of the same W that ``solve_sqrt`` and
``apply_sqrt`` apply (true of any factorization computing both from one factor).

Probes are drawn in batches until the standard error of L (1/2 that of log det) is at
most ``se_target`` or ``max_probes`` is reached. Caution, measured: with a loose
preconditioner the per-probe values are skewed and the sample SE from 16-64 probes ran
low (dL / SE spread about 1.3 over 20 seeds at n = 2,000 with the built-in solver at tol
1e-5; about 1 at tol 1e-8, benchmarks/results/operator_vs_dense.json).
Stated uncertainty. ``loglik_se`` and ``loglik_bound`` hold every
term, listed with its kind and source in ``uncertainty`` (and so in the reference's
``reference_detail`` / ``reference_by_metric`` entries):

    probes              estimate  sample SD of the probe values / sqrt(N), halved, times
                                  the t factor of N - 1 degrees of freedom
                                  (``harness.linalg.probe_intervals``)
    lanczos             bound     1/2 mean of the Gauss/Gauss-Radau brackets (``lanczos``;
                                  Golub and Meurant 2010, ch. 6), given the Radau node
    cg                  bound     1/2 ||r||^2 / lambda_min (``pcg``; rigorous with a nugget)
    rounding_dots       bound     the correctly rounded dots of Q and of L's sum (Higham
                                  2002, section 3.1; ``rounding``)
    rounding_products   estimate  measured x'e of the residual product (``rounding``)
    rounding_entries_q  estimate  model SD of x' dK x (entries to 64 u; Higham 2002, 2.8)
    rounding_entries_ld estimate  model SD of tr(K^-1 dK)
    rounding_pivots     estimate  model SD of log det P

The estimates are independent, so their variances add: loglik_se = sqrt(sum se^2); the
bounds add linearly: loglik_bound = sum b. The verdict rule uses |e| <= 2 se + b, which
is conservative for the bounds (each is taken whole, at its worst sign). The score's
``score_se`` is the probes' SE (1/2 ``trace_se``: the preconditioner's probed traces
(none where they are exact) and the probed difference, their SEs combined with
Welch-Satterthwaite degrees of freedom and stated with the t factor of
``probe_intervals``) and ``score_bound`` the CG bound of its quadratic term
(|a'S_i a - a*'S_i a*| <= 2 ||S_i a|| d + ||S_i a|| d^2 / ||a||, d = ||r|| / lambda_min)
plus the probes' CG bounds (``score_traces``) plus the dots'
rounding; the rounding of its per-probe values is in the probes' sample variance.

A preconditioner that is not positive
definite, a CG that does not converge, or an SE above target give ``converged=False``
and a message; values that could not be computed are NaN, never presented as exact.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from harness.linalg.probe_intervals import (
    mean_standard_error,
    satterthwaite_dof,
    t_inflation,
)
from harness.linalg.rademacher import rademacher_probes
from harness.model.evaluation import ModelEvaluation
from harness.model.kernels import Kernel
from harness.model.mean import design_matrix
from harness.references.operator.lanczos import IndefiniteOperatorError, slq_logdet
from harness.references.operator.operator_gls import RankDeficientDesignError, gls_by_cg
from harness.references.operator.pcg import (
    BlockMap,
    PreconditionerError,
    lambda_min_estimate,
    pcg,
)
from harness.references.operator.products import KernelOperator
from harness.references.operator.rounding import (
    ENTRY_ULPS,
    PIVOT_ULPS,
    UNIT_ROUNDOFF,
    accurate_dots,
    logdet_entry_se,
    pivot_logdet_se,
    quadratic_rounding,
)
from harness.references.operator.schedule import DEFAULT_TILE
from harness.references.operator.score_traces import (
    control_traces,
    trace_difference_bounded,
)
from harness.solvers.protocol import Factorization

LOG_2PI = math.log(2.0 * math.pi)

#: Bound names reported in ``OperatorEvaluation.bound_kind``.
BOUND_NUGGET = "residual/nugget"
BOUND_ESTIMATE = "residual/ritz-estimate"
#: ``operator_evaluate``'s default stopping rules: the CG relative residual and iteration
#: budget per solve, the Lanczos budget and per-step convergence (nats) per probe
#: (``iteration_counts`` measures with the same).
CG_RTOL = 1e-10
MAX_ITERATIONS = 1000
LANCZOS_STEPS = 300
LANCZOS_TOL = 1e-6


@dataclass(frozen=True)
class SharedProbes:
    """The score's trace probes of one evaluation, for common random numbers.

    ``columns`` holds the Rademacher probes Z (n, k); ``per_probe`` z_j' Sigma^-1
    Sigma_i z_j (p, k) from CG and exact products; ``bound`` the mean over j of their CG
    error bounds (p,); ``trace_terms`` the ML traces tr(Sigma^-1 Sigma_i) the score used
    (estimated from these probes and the preconditioner's); ``other_score_bound`` the
    score's deterministic uncertainty other than the probes' CG bound (the quadratic
    term's CG bound and the dots' rounding, halved as in the score).
    """

    columns: np.ndarray
    per_probe: np.ndarray
    bound: np.ndarray
    trace_terms: np.ndarray
    other_score_bound: np.ndarray


@dataclass(frozen=True)
class OperatorEvaluation:
    """One evaluation by the exact-operator reference, each value with its uncertainty.

    Attributes
    ----------
    n : int
    param_names : tuple of str
    loglik, loglik_se : float
        L and its standard error: the probes and the rounding model's estimates
        combined (module docstring, "Stated uncertainty").
    logdet, logdet_se : float
    preconditioner_logdet : float
        log det P (the rest of ``logdet`` is the Lanczos estimate).
    quadratic, quadratic_bound : float
        r' Sigma^-1 r and a bound on its error (``bound_kind``).
    beta : ndarray
        GLS coefficients.
    score, score_se : ndarray or None
    trace_terms, trace_se : ndarray or None
        tr(Sigma^-1 Sigma_i) (tr(P Sigma_i) with REML) and its SE.
    iterations : int
        CG iterations plus Lanczos steps (each one block product).
    products : int
        Exact n x 1 products (a block of k columns counts k; each derivative counts).
    probes : int
        Probe vectors used for log det and traces.
    seconds : float
    converged : bool
        Every CG converged, every Lanczos run converged and loglik_se <= se_target.
    messages : tuple of str
    bound_kind : str
        ``residual/nugget`` (rigorous: ||r||^2 / lambda_min with lambda_min >= nugget)
        or ``residual/ritz-estimate`` (no nugget: an estimate, not rigorous).
    mean : str
    reml : bool
    phases : dict of str to float
        Seconds per phase (``preconditioner_traces``, ``quadratic``, ``probes``).
    loglik_bound : float
        Deterministic part of L's uncertainty: Lanczos bracket, CG bound and the dots'
        rounding (module docstring); nan when not computed.
    score_bound : ndarray or None
        Deterministic part of the score's uncertainty (module docstring).
    uncertainty : dict
        Each term of loglik_se and loglik_bound: {"value" (nats, on L), "kind"
        ("estimate" or "bound"), "source"}, plus "combination".
    shared_probes : SharedProbes or None
        The score's trace probes with their exact per-probe values, for a solver's
        audit on the same probes; None without a score. Not in ``to_dict``.
    preconditioner_traces : str
        How tr(P^-1 P_i) was taken: "exact" (the preconditioner's ``derivative_traces``),
        "N probes", "none" (no control: plain Hutchinson of the exact traces), or ""
        without a score.
    """

    n: int
    param_names: tuple[str, ...]
    loglik: float
    loglik_se: float
    logdet: float
    logdet_se: float
    preconditioner_logdet: float
    quadratic: float
    quadratic_bound: float
    beta: np.ndarray
    score: np.ndarray | None
    score_se: np.ndarray | None
    trace_terms: np.ndarray | None
    trace_se: np.ndarray | None
    iterations: int
    products: int
    probes: int
    seconds: float
    converged: bool
    messages: tuple[str, ...]
    bound_kind: str
    mean: str = "zero"
    reml: bool = False
    phases: dict[str, float] = field(default_factory=dict)
    loglik_bound: float = float("nan")
    score_bound: np.ndarray | None = None
    uncertainty: dict[str, object] = field(default_factory=dict)
    shared_probes: SharedProbes | None = None
    preconditioner_traces: str = ""

    def to_dict(self) -> dict[str, object]:
        def arr(a: np.ndarray | None) -> object:
            return None if a is None else [float(v) for v in np.asarray(a)]

        return {
            "reference": "operator", "n": self.n, "param_names": list(self.param_names),
            "loglik": self.loglik, "loglik_se": self.loglik_se, "logdet": self.logdet,
            "logdet_se": self.logdet_se, "preconditioner_logdet": self.preconditioner_logdet,
            "quadratic": self.quadratic, "quadratic_bound": self.quadratic_bound,
            "beta": arr(self.beta), "score": arr(self.score), "score_se": arr(self.score_se),
            "trace_terms": arr(self.trace_terms), "trace_se": arr(self.trace_se),
            "iterations": self.iterations, "products": self.products, "probes": self.probes,
            "seconds": self.seconds, "converged": self.converged,
            "messages": list(self.messages), "bound_kind": self.bound_kind,
            "mean": self.mean, "reml": self.reml, "phases": dict(self.phases),
            "loglik_bound": self.loglik_bound, "score_bound": arr(self.score_bound),
            "uncertainty": dict(self.uncertainty),
            "preconditioner_traces": self.preconditioner_traces,
        }

    def as_model_evaluation(self) -> ModelEvaluation:
        """The values as a ``ModelEvaluation`` (``source="operator"``, estimated traces
        with their SEs); loglik_se and quadratic_bound stay on this record and in the notes."""
        notes = (f"operator reference: loglik SE {self.loglik_se:.3g}, bound "
                 f"{self.loglik_bound:.3g} (quadratic-form bound {self.quadratic_bound:.3g}, "
                 f"{self.bound_kind}), converged={self.converged}",
                 *self.messages)
        return ModelEvaluation(
            source="operator", n=self.n, param_names=self.param_names, loglik=self.loglik,
            logdet=self.logdet, quadratic=self.quadratic, beta=self.beta, score=self.score,
            trace_terms=self.trace_terms, trace_stderr=self.trace_se,
            trace_method="lanczos+hutchinson", probes=self.probes, matvecs=self.products,
            seconds=dict(self.phases), notes=notes)


def sqrt_maps(preconditioner: Factorization) -> tuple[BlockMap, BlockMap] | None:
    """(W^-1, W^-T) of the preconditioner, or None when it exposes no symmetric factor."""
    solve_sqrt = getattr(preconditioner, "solve_sqrt", None)
    apply_sqrt = getattr(preconditioner, "apply_sqrt", None)
    if getattr(preconditioner, "supports_sqrt", True) is False or not (
            callable(solve_sqrt) and callable(apply_sqrt)):
        return None
    transpose = getattr(preconditioner, "solve_sqrt_transpose", None)
    if callable(transpose):
        return solve_sqrt, transpose
    return solve_sqrt, lambda b: preconditioner.solve(apply_sqrt(b))


def _failed(n: int, kernel: Kernel, *, mean: str, reml: bool, messages: list[str],
            start: float, operator: KernelOperator | None, bound_kind: str) -> OperatorEvaluation:
    nan = float("nan")
    return OperatorEvaluation(
        n=n, param_names=kernel.param_names, loglik=nan, loglik_se=nan, logdet=nan,
        logdet_se=nan, preconditioner_logdet=nan, quadratic=nan, quadratic_bound=nan,
        beta=np.empty(0), score=None, score_se=None, trace_terms=None, trace_se=None,
        iterations=0, products=0 if operator is None else operator.column_products, probes=0,
        seconds=time.perf_counter() - start, converged=False, messages=tuple(messages),
        bound_kind=bound_kind, mean=mean, reml=reml)


def operator_evaluate(points: np.ndarray, y: np.ndarray, kernel: Kernel,
                      theta: np.ndarray | None = None, *, mean: str = "zero",
                      reml: bool = False, preconditioner: Factorization,
                      rng: np.random.Generator | int | None = None, se_target: float = 0.02,
                      max_probes: int = 256, probe_batch: int = 16, min_probes: int = 16,
                      preconditioner_probes: int = 64, cg_rtol: float = CG_RTOL,
                      max_iterations: int = MAX_ITERATIONS,
                      lanczos_steps: int = LANCZOS_STEPS, lanczos_tol: float = LANCZOS_TOL,
                      score: bool = True, tile: int = DEFAULT_TILE,
                      memory_budget: int | None = None, client: object | None = None,
                      progress: bool | None = None) -> OperatorEvaluation:
    """Evaluate L, its score and their uncertainties with exact products (module docstring).

    Parameters
    ----------
    points : ndarray, shape (n, d)
    y : ndarray, shape (n,)
    kernel : Kernel
    theta : ndarray, optional
        Log-scale parameters (``kernel.param_names`` order); default ``kernel.theta``.
    mean : {"zero", "constant", "linear"}
    reml : bool
        Restricted likelihood (Harville 1974).
    preconditioner : Factorization
        Of the same Sigma(theta); its ``solve`` preconditions CG, its symmetric factor
        (``solve_sqrt``/``apply_sqrt``) the Lanczos runs, its ``derivative_matvec`` the
        trace control variate (with no probe variance where it has exact
        ``derivative_traces``). Without a symmetric factor log det is estimated by plain
        Lanczos on Sigma (slower, larger SE; said in ``messages``).
    rng : Generator, int or None
        Seeds the probes (``numpy.random.default_rng``).
    se_target : float
        Stop drawing probes when the SE of L is at most this (nats).
    max_probes : int
        Probe budget; reaching it with SE > se_target gives converged=False.
    probe_batch, min_probes, preconditioner_probes : int
        Probes per batch, at least this many before stopping, probes for tr(P^-1 P_i).
    cg_rtol, max_iterations : float, int
        CG relative-residual target and iteration budget per solve.
    lanczos_steps, lanczos_tol : int, float
        Lanczos budget and per-step convergence (nats) per probe.
    score : bool
        Also the score with its SE.
    tile, memory_budget, client, progress
        Passed to ``KernelOperator`` (tile rows, product memory budget in bytes, a Dask
        client for row blocks on workers, the progress bar).
    """
    start = time.perf_counter()
    gen = np.random.default_rng(rng)
    probe_rng, pre_rng, lam_rng = gen.spawn(3)
    for name, value in (("max_probes", max_probes), ("probe_batch", probe_batch),
                        ("min_probes", min_probes), ("max_iterations", max_iterations),
                        ("lanczos_steps", lanczos_steps)):
        if int(value) != value or value < 1:
            raise ValueError(f"{name} must be a positive integer, got {value!r}")
    if not (math.isfinite(se_target) and se_target > 0):
        raise ValueError(f"se_target must be a number > 0 (nats), got {se_target!r}")
    model = kernel if theta is None else kernel.with_theta(theta)
    pts = np.asarray(points, dtype=float)
    pts = pts[:, None] if pts.ndim == 1 else pts
    yv = np.asarray(y, dtype=float).ravel()
    if pts.shape[0] != yv.size:
        raise ValueError(f"points have {pts.shape[0]} rows but y has {yv.size} values")
    if not np.all(np.isfinite(yv)):
        raise ValueError("y: values must be finite")
    n = yv.size
    if int(preconditioner.n) != n:
        raise ValueError(f"preconditioner is for n = {preconditioner.n} points, data have {n}")
    op = KernelOperator(pts, model, tile=tile, memory_budget=memory_budget, progress=progress,
                        client=client)
    messages: list[str] = []
    phases: dict[str, float] = {}
    lam = model.nugget if model.nugget > 0 else None
    bound_kind = BOUND_NUGGET if lam is not None else BOUND_ESTIMATE
    design = design_matrix(pts, mean)

    def precondition(b: np.ndarray) -> np.ndarray:
        return np.asarray(preconditioner.solve(b)).reshape(b.shape)

    lam_fallback = None
    if lam is None:
        messages.append("no nugget: lambda_min(Sigma) has no proven lower bound; the "
                        "quadratic bound uses a Ritz-value estimate (not rigorous)")

        def lam_fallback(ritz: float) -> float:
            return 0.1 * ritz * lambda_min_estimate(precondition, n, rng=lam_rng)

    pre_logdet = float(preconditioner.logdet())
    maps = sqrt_maps(preconditioner)
    if not math.isfinite(pre_logdet):
        messages.append(f"preconditioner log det is {pre_logdet!r}: not positive definite")
        return _failed(n, model, mean=mean, reml=reml, messages=messages, start=start,
                       operator=op, bound_kind=bound_kind)
    if maps is None:
        messages.append("preconditioner has no symmetric factor (solve_sqrt/apply_sqrt): "
                        "log det by unpreconditioned Lanczos on Sigma")
        pre_logdet = 0.0

        def apply_c(v: np.ndarray) -> np.ndarray:
            return op.matvec(v)
    else:
        w_inv, w_inv_t = maps

        def apply_c(v: np.ndarray) -> np.ndarray:
            out = w_inv(op.matvec(np.asarray(w_inv_t(v)).reshape(v.shape)))
            return np.asarray(out).reshape(v.shape)

    iterations = 0
    try:
        t0 = time.perf_counter()
        gls = gls_by_cg(op.matvec, yv, design, precondition=precondition, rtol=cg_rtol,
                        max_iterations=max_iterations, lambda_min=lam,
                        lambda_min_fallback=lam_fallback)
        iterations += gls.iterations
        messages.extend(gls.messages)
        phases["quadratic"] = time.perf_counter() - t0
        p = model.n_params
        pre = None
        quad_terms = reml_terms = None
        if score:
            t0 = time.perf_counter()
            pre = control_traces(preconditioner, p, probes=preconditioner_probes,
                                 rng=pre_rng)
            if pre.message:
                messages.append(pre.message)
            da = op.derivative_matvecs(gls.a)                   # (p, n)
            quad_terms = accurate_dots(da.T, np.repeat(gls.a[:, None], p, axis=1))
            da_norms = np.linalg.norm(da, axis=1)
            if reml and design.shape[1]:
                dsf = op.derivative_matvecs(gls.sinv_design)    # (p, n, q)
                ginv = np.linalg.inv(gls.gram)
                reml_terms = np.array([np.trace(ginv @ (gls.sinv_design.T @ dsf[i]))
                                       for i in range(p)])
            phases["preconditioner_traces"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        logdet_samples: list[np.ndarray] = []
        width_samples: list[np.ndarray] = []
        trace_samples: list[np.ndarray] = []
        trace_bounds: list[np.ndarray] = []
        exact_samples: list[np.ndarray] = []
        probe_columns: list[np.ndarray] = []
        lanczos_ok = True
        radau_node = float("inf")
        probes = 0
        se_l = float("inf")
        while probes < max_probes:
            count = min(probe_batch, max_probes - probes)
            z = rademacher_probes(n, count, probe_rng)
            slq = slq_logdet(apply_c, z, max_steps=lanczos_steps, step_tol=lanczos_tol)
            iterations += int(slq.steps.max())
            lanczos_ok = lanczos_ok and bool(slq.converged.all())
            logdet_samples.append(slq.values)
            width_samples.append(slq.widths)
            radau_node = min(radau_node, slq.radau_node)
            if score and pre is not None:
                solved = pcg(op.matvec, z, precondition=precondition, rtol=cg_rtol,
                             max_iterations=max_iterations, lambda_min=lam)
                iterations += solved.iterations
                if not solved.converged:
                    messages.extend(solved.messages)
                cg_error = (np.linalg.norm(solved.residual, axis=0) / solved.lambda_min
                            if solved.residual is not None and solved.lambda_min > 0
                            else np.full(count, np.inf))
                values_i, exact_i, bounds_i = trace_difference_bounded(
                    op, preconditioner, z, solved.x, use_control=pre.available,
                    error_norms=cg_error)
                trace_samples.append(values_i)
                exact_samples.append(exact_i)
                trace_bounds.append(bounds_i)
                probe_columns.append(z)
            probes += count
            se_l = 0.5 * mean_standard_error(np.concatenate(logdet_samples))
            if probes >= min_probes and se_l <= se_target:
                break
        phases["probes"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        max_entry = float(model.variance) + float(model.nugget)
        q_round = (quadratic_rounding(op.matvec, gls.a, gls.rhs, gls.residual,
                                      max_entry=max_entry)
                   if gls.residual is not None and gls.rhs is not None else None)
        phases["rounding"] = time.perf_counter() - t0
    except (PreconditionerError, IndefiniteOperatorError, RankDeficientDesignError) as exc:
        messages.append(str(exc))
        return _failed(n, model, mean=mean, reml=reml, messages=messages, start=start,
                       operator=op, bound_kind=bound_kind)
    values = np.concatenate(logdet_samples)
    logdet = pre_logdet + float(values.mean())
    logdet_se = mean_standard_error(values)
    converged = gls.converged and lanczos_ok
    if not lanczos_ok:
        messages.append(f"Lanczos did not converge within lanczos_steps = {lanczos_steps} "
                        "for some probes; raise it or use a better preconditioner")
    probe_se = 0.5 * logdet_se
    lam_bound = float(lam) if lam is not None else float(gls.lambda_min)
    ld_entry = logdet_entry_se(n, max_entry=max_entry, lambda_min=lam_bound)
    terms = _uncertainty_terms(
        probe_se=probe_se, widths=np.concatenate(width_samples), radau_node=radau_node,
        cg_bound=float(gls.bound), bound_kind=bound_kind, dot_bound=float(gls.dot_rounding),
        q_round=q_round, logdet_entry=ld_entry, pivots=pivot_logdet_se(n)
        if maps is not None else 0.0,
        combination=UNIT_ROUNDOFF * 2.0 * (abs(gls.quadratic) + abs(pre_logdet)
                                           + abs(logdet - pre_logdet) + n * LOG_2PI))
    loglik_se = math.sqrt(sum(float(t["value"]) ** 2 for t in terms.values()
                              if isinstance(t, dict) and t.get("kind") == "estimate"))
    loglik_bound = sum(float(t["value"]) for t in terms.values()
                       if isinstance(t, dict) and t.get("kind") == "bound")
    logdet_se = math.sqrt(logdet_se ** 2 + (2 * terms["rounding_entries_ld"]["value"]) ** 2  # type: ignore[index]
                          + (2 * terms["rounding_pivots"]["value"]) ** 2)  # type: ignore[index]
    if not probe_se <= se_target:
        converged = False
        messages.append(f"the log-likelihood SE {probe_se:.3g} nat exceeds se_target = "
                        f"{se_target:g} after max_probes = {max_probes} probes; raise "
                        "max_probes or use a more accurate preconditioner")
    q = design.shape[1]
    loglik = -0.5 * (gls.quadratic + logdet + n * LOG_2PI)
    if reml and q:
        logdet_gram = float(np.linalg.slogdet(gls.gram)[1])
        logdet_ftf = float(np.linalg.slogdet(design.T @ design)[1])
        loglik = -0.5 * (gls.quadratic + logdet + logdet_gram - logdet_ftf + (n - q) * LOG_2PI)
    score_vec = score_se = trace_terms = trace_se = score_bound = None
    shared = None
    if score and pre is not None and quad_terms is not None:
        diff = np.concatenate(trace_samples, axis=1)
        diff_se = diff.std(axis=1, ddof=1) / math.sqrt(diff.shape[1]) if diff.shape[1] > 1 \
            else np.full(model.n_params, np.inf)
        ml_traces = pre.estimate + diff.mean(axis=1)
        trace_terms = ml_traces if reml_terms is None else ml_traces - reml_terms
        dof = satterthwaite_dof([pre.se ** 2, diff_se ** 2],
                                [max(pre.probes - 1, 1), max(diff.shape[1] - 1, 1)])
        trace_se = np.sqrt(pre.se ** 2 + diff_se ** 2) * t_inflation(dof)
        score_vec = 0.5 * quad_terms - 0.5 * trace_terms
        score_se = 0.5 * trace_se
        d_a = (math.sqrt(float(gls.residual @ gls.residual)) / lam_bound
               if lam_bound > 0 and gls.residual is not None else float("inf"))
        a_norm = max(float(np.linalg.norm(gls.a)), 1e-300)
        quad_bound = 2.0 * da_norms * d_a + da_norms * d_a ** 2 / a_norm
        probe_bound = np.concatenate(trace_bounds, axis=1).mean(axis=1)
        dots = UNIT_ROUNDOFF * 2.0 * (np.abs(da) @ np.abs(gls.a) + np.abs(quad_terms))
        score_bound = 0.5 * (quad_bound + probe_bound + dots)
        shared = SharedProbes(columns=np.concatenate(probe_columns, axis=1),
                              per_probe=np.concatenate(exact_samples, axis=1),
                              bound=probe_bound, trace_terms=ml_traces,
                              other_score_bound=0.5 * (quad_bound + dots))
    return OperatorEvaluation(
        n=n, param_names=model.param_names, loglik=float(loglik), loglik_se=loglik_se,
        logdet=logdet, logdet_se=logdet_se, preconditioner_logdet=pre_logdet,
        quadratic=gls.quadratic, quadratic_bound=gls.bound, beta=gls.beta, score=score_vec,
        score_se=score_se, trace_terms=trace_terms, trace_se=trace_se, iterations=iterations,
        products=op.column_products, probes=probes, seconds=time.perf_counter() - start,
        converged=converged, messages=tuple(dict.fromkeys(messages)), bound_kind=bound_kind,
        mean=mean, reml=reml, phases=phases, loglik_bound=float(loglik_bound),
        score_bound=score_bound, uncertainty=terms, shared_probes=shared,
        preconditioner_traces="" if pre is None else pre.describe())


def _uncertainty_terms(*, probe_se: float, widths: np.ndarray, radau_node: float,
                       cg_bound: float, bound_kind: str, dot_bound: float,
                       q_round: object, logdet_entry: float, pivots: float,
                       combination: float) -> dict[str, object]:
    """The terms of L's stated uncertainty, on the scale of L (module docstring)."""
    product_se = float(getattr(q_round, "product_se", float("inf")))
    entry_se = float(getattr(q_round, "entry_se", float("inf")))
    rigorous = bound_kind == BOUND_NUGGET

    def term(value: float, kind: str, source: str) -> dict[str, object]:
        return {"value": float(value), "kind": kind, "source": source}

    return {
        "probes": term(probe_se, "estimate",
                       "sample SD of the Lanczos probe values / sqrt(N), halved (Ubaru, Chen "
                       "and Saad 2017, SIAM J. Matrix Anal. Appl. 38(4), Algorithm 1)"),
        "lanczos": term(0.5 * float(np.mean(widths)) if widths.size else float("inf"), "bound",
                        "1/2 mean Gauss minus Gauss-Radau value per probe, Radau node "
                        f"{radau_node:.3g} = 1/2 smallest Ritz value (an estimate of a lower "
                        "bound of lambda_min(C)); quadrature and stopping error (Golub and "
                        "Meurant 2010, Matrices, Moments and Quadrature, ch. 6)"),
        "cg": term(0.5 * cg_bound, "bound",
                   "1/2 ||r||^2 / lambda_min of the final true residual "
                   + ("(lambda_min >= nugget: rigorous)" if rigorous
                      else "(lambda_min from a Ritz estimate: not rigorous)")
                   + "; Golub and Meurant 2010, ch. 12"),
        "rounding_dots": term(0.5 * dot_bound + 0.5 * combination, "bound",
                              "correctly rounded dots of Q (u sum|a_i b_i| + u|a'b|) and the sum "
                              "-1/2 (Q + log det + n log 2 pi) (Higham 2002, Accuracy and "
                              "Stability of Numerical Algorithms, section 3.1; Shewchuk 1997)"),
        "rounding_products": term(0.5 * product_se, "estimate",
                                  "measured SD of x'e, e the rounding of the residual product "
                                  "K x, from four rescaled recomputations (statistical model, "
                                  "Higham 2002, section 2.8)"),
        "rounding_entries_q": term(0.5 * entry_se, "estimate",
                                   f"model SD of x' dK x, entries to {ENTRY_ULPS:g} u, "
                                   "independent (Higham and Mary 2019, SIAM J. Sci. Comput. "
                                   "41(5))"),
        "rounding_entries_ld": term(0.5 * logdet_entry, "estimate",
                                    f"model SD of tr(K^-1 dK) <= {ENTRY_ULPS:g} u max|K| "
                                    "sqrt(n) / lambda_min (same model)"),
        "rounding_pivots": term(0.5 * pivots, "estimate",
                                f"model SD of log det P: n pivots to {PIVOT_ULPS:g} u, "
                                "independent (same model)"),
        "combination": "loglik_se = sqrt(sum of the estimates' squares); loglik_bound = sum "
                       "of the bounds; the rule's |e| <= 2 se + b takes each bound whole",
    }
