"""The check of a tolerance ladder on a user's dataset, end to end.

1. Split off a seeded random holdout (default 10%) for kriging; fit on the rest.
2. Fit the covariance parameters by maximum likelihood (``harness.check.fitting``): dense
   multi-start L-BFGS-B when the fit set has at most ``dense_fit_max_n`` points;
   otherwise a dense multi-start pilot fit on a random subset of ``pilot_n`` points,
   polished at full n by Fisher scoring with the compressed solver at the tightest
   tolerance. Or take the parameters as given (``fixed_params``).
3. Fisher information at the estimate (dense exact when n <= ``dense_fit_max_n``, else
   Hutch++ estimate at the tightest tolerance: used as the unit of the shift metrics
   and for standard errors).
4. Reference: the certified dense Cholesky when the fit set fits the memory budget
   (``reference = "dense"``); otherwise a tolerance ladder, each tolerance against the
   compressed solver at a tolerance 100x tighter (``"ladder"``), plus dense audits of
   the log-likelihood error on nested random subsamples with a power-law fit of the
   error against n, extrapolated to the full n with a 95% prediction interval
   (``"subsample"`` evidence in ``growth``).
5. Metrics per tolerance (``compare``), the recommendation (loosest safe tolerance and
   its speed-up in log-likelihood time over the reference), and an end-to-end refit with
   the recommended tolerance by Fisher scoring from the reference estimate.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import stats

from harness.audit.sides import Side, evaluate_side, rademacher
from harness.audit.tolerance_metrics import compare, failed
from harness.audit.verdict import Thresholds
from harness.check.check_records import CheckResult, MetricValue, RefitResult, ToleranceResult
from harness.check.data_checks import ValidatedData
from harness.check.fitting import (
    CompressedEngine,
    DenseEngine,
    MleFit,
    data_scale,
    default_bounds,
    default_starts,
    fisher_scoring,
    fit_mle,
    standard_errors,
)
from harness.model import design_matrix
from harness.model.kernels import Kernel, make_kernel
from harness.references import (
    CERTIFICATE_THRESHOLD,
    DenseBudgetError,
    DenseCholesky,
    dense_evaluate,
)
from harness.references.budget import check_dense_budget
from harness.solvers.hodlr import CompressionBreakdownError, factorize

DEFAULT_TOLERANCES = (1e-2, 1e-4, 1e-6, 1e-8, 1e-10)
Progress = Callable[[str], None]


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
    holdout : float
        Fraction of points held out for kriging, in (0, 0.5].
    seed : int
    probes : int
        Rademacher probes of the difference-trace estimate.
    fixed_params : mapping or None
        Natural-scale parameters to use instead of fitting.
    start_params : mapping or None
        An extra starting point for the fit (natural scale).
    thresholds : Thresholds
    dense_fit_max_n, pilot_n : int
        Largest fit set for a dense fit; pilot subset size beyond it.
    memory_budget : int or None
        Bytes for the dense reference.
    subsample_sizes : tuple of int
        Subsample sizes of the growth audit (ladder mode); capped by the budget.
    refit : bool
    leaf_size : int
    """

    kernel: str = "matern32"
    shape: Mapping[str, float] = field(default_factory=dict)
    anisotropic: bool = False
    nugget: bool = True
    mean: str = "constant"
    tolerances: tuple[float, ...] = DEFAULT_TOLERANCES
    holdout: float = 0.1
    seed: int = 0
    probes: int = 16
    fixed_params: Mapping[str, Any] | None = None
    start_params: Mapping[str, Any] | None = None
    thresholds: Thresholds = field(default_factory=Thresholds)
    dense_fit_max_n: int = 2000
    pilot_n: int = 1000
    memory_budget: int | None = None
    subsample_sizes: tuple[int, ...] = (500, 1000, 2000, 4000)
    refit: bool = True
    leaf_size: int = 128


class CheckError(ValueError):
    """The check cannot run with these options."""


def _template(options: CheckOptions, d: int) -> Kernel:
    params: dict[str, Any] = dict(options.shape)
    params["lengthscale"] = [1.0] * d if options.anisotropic else 1.0
    params["nugget"] = 1.0 if options.nugget else 0.0
    return make_kernel(options.kernel, params)


def split_holdout(n: int, fraction: float, rng: np.random.Generator
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Random (train, holdout) index arrays, holdout of round(fraction n) >= 5 points."""
    if not 0.0 < fraction <= 0.5:
        raise CheckError(f"--holdout: expected a fraction in (0, 0.5], got {fraction!r}")
    m = max(5, int(round(fraction * n)))
    perm = rng.permutation(n)
    return np.sort(perm[m:]), np.sort(perm[:m])


def _dense_fits(n: int, budget: int | None) -> bool:
    try:
        check_dense_budget(n, budget=budget, score=True)
    except DenseBudgetError:
        return False
    return True


def _fit(x: np.ndarray, y: np.ndarray, template: Kernel, options: CheckOptions,
         rng: np.random.Generator, say: Progress) -> tuple[MleFit, np.ndarray, list[str]]:
    """The MLE and the Fisher information at it (module docstring, steps 2-3)."""
    notes: list[str] = []
    scale = data_scale(x, y, mean=options.mean)
    bounds = default_bounds(template, scale)
    starts = default_starts(template, scale)
    if options.start_params:
        extra = dict(options.shape) | dict(options.start_params)
        starts.append(make_kernel(options.kernel, extra).theta)
    tightest = min(options.tolerances)
    n = y.size
    if n <= options.dense_fit_max_n and _dense_fits(n, options.memory_budget):
        say(f"fitting by dense L-BFGS-B from {len(starts)} starts at n = {n:,}")
        fit = fit_mle(DenseEngine(x, y, template, mean=options.mean,
                                  memory_budget=options.memory_budget),
                      template, starts=starts, bounds=bounds)
        ev = dense_evaluate(x, y, fit.kernel, mean=options.mean, score=False, fisher=True,
                            memory_budget=options.memory_budget, certify=False)
        return fit, np.asarray(ev.fisher), notes
    pilot = np.sort(rng.choice(n, size=min(options.pilot_n, n), replace=False))
    say(f"pilot fit by dense L-BFGS-B on {pilot.size:,} random points")
    pilot_fit = fit_mle(DenseEngine(x[pilot], y[pilot], template, mean=options.mean),
                        template, starts=starts, bounds=bounds)
    say(f"polishing at n = {n:,} by Fisher scoring with hodlr tol {tightest:g}")
    engine = CompressedEngine(x, y, template, mean=options.mean, tol=tightest,
                              seed=options.seed, leaf_size=options.leaf_size)
    fit = fisher_scoring(engine, template, pilot_fit.theta, bounds=bounds)
    notes.append(f"fit: dense pilot on {pilot.size:,} random points (loglik "
                 f"{pilot_fit.loglik:.6g}), then Fisher scoring at n = {n:,} with the "
                 f"compressed solver at tol {tightest:g} (Hutch++ traces, 32 probes)")
    notes.append("Fisher information (SE units of the shift metrics) estimated by Hutch++ "
                 f"at tol {tightest:g}, not exact")
    return fit, np.asarray(fit.fisher), notes


def _side_for(name: str, fac: object, factor_seconds: float, x: np.ndarray, y: np.ndarray,
              kernel: Kernel, options: CheckOptions, probes: np.ndarray,
              x_new: np.ndarray) -> Side:
    return evaluate_side(name, fac, x, y, kernel, mean=options.mean, probes=probes,
                         new_points=x_new, factor_seconds=factor_seconds)


def _hodlr(x: np.ndarray, kernel: Kernel, tol: float, options: CheckOptions
           ) -> tuple[object, float]:
    t0 = time.perf_counter()
    fac = factorize(x, kernel, tol=tol, leaf_size=options.leaf_size, rng=options.seed)
    return fac, time.perf_counter() - t0


def _growth(x: np.ndarray, y: np.ndarray, kernel: Kernel, options: CheckOptions,
            rng: np.random.Generator, say: Progress) -> dict[str, Any]:
    """Dense audits of |L~ - L| on nested random subsamples, power law fitted in n."""
    n = y.size
    sizes = [m for m in options.subsample_sizes
             if m < n and _dense_fits(m, options.memory_budget)]
    if len(sizes) < 3:
        return {"sizes": sizes, "note": "fewer than 3 subsample sizes fit the budget; "
                                        "no growth fit"}
    perm = rng.permutation(n)
    errors: dict[float, list[float]] = {tol: [] for tol in options.tolerances}
    for m in sizes:
        idx = np.sort(perm[:m])
        say(f"subsample audit at m = {m:,}")
        chol = DenseCholesky(x[idx], kernel, memory_budget=options.memory_budget)
        design = design_matrix(x[idx], options.mean)
        ref = evaluate_loglik(chol, y[idx], design)
        for tol in options.tolerances:
            try:
                fac, _ = _hodlr(x[idx], kernel, tol, options)
                errors[tol].append(abs(evaluate_loglik(fac, y[idx], design) - ref))
            except CompressionBreakdownError:
                errors[tol].append(math.inf)
    out: dict[str, Any] = {"sizes": sizes, "n_target": n, "per_tolerance": {}}
    logm = np.log(np.asarray(sizes, dtype=float))
    for tol, errs in errors.items():
        e = np.asarray(errs)
        entry: dict[str, Any] = {"errors": [float(v) for v in e]}
        if np.all(np.isfinite(e)):
            z = np.log(np.maximum(e, 1e-14))
            slope, intercept = np.polyfit(logm, z, 1)
            resid = z - (intercept + slope * logm)
            k = len(sizes)
            s = math.sqrt(float(resid @ resid) / (k - 2)) if k > 2 else math.nan
            x0 = math.log(n)
            lev = 1 + 1 / k + (x0 - logm.mean()) ** 2 / float(((logm - logm.mean()) ** 2).sum())
            pred = intercept + slope * x0
            half = float(stats.t.ppf(0.975, k - 2)) * s * math.sqrt(lev)
            entry.update({"slope": float(slope), "extrapolated": math.exp(pred),
                          "upper95": math.exp(pred + half), "lower95": math.exp(pred - half)})
        out["per_tolerance"][repr(tol)] = entry
    return out


def evaluate_loglik(fac: object, y: np.ndarray, design: np.ndarray) -> float:
    """GLS profile log-likelihood through a factorization."""
    from harness.likelihood.whitening import fit_mean

    return float(fit_mean(fac, y, design, float(fac.logdet()))[0].loglik)  # type: ignore[attr-defined]


def _with_growth(row: ToleranceResult, entry: Mapping[str, Any] | None,
                 thresholds: Thresholds) -> ToleranceResult:
    if not entry or "upper95" not in entry:
        return row
    metric = MetricValue("loglik_error_extrapolated", float(entry["upper95"]),
                         thresholds.loglik_nats,
                         note=f"upper 95% bound of |L~ - L| extrapolated to full n "
                              f"(fitted slope {entry['slope']:.2f} in log n)")
    metrics = (*row.metrics, metric)
    safe = row.safe and bool(metric.passed)
    return ToleranceResult(tol=row.tol, safe=safe, reference=row.reference, metrics=metrics,
                           seconds=row.seconds, speedup=row.speedup, nbytes=row.nbytes,
                           error=row.error)


def recommend(rows: Sequence[ToleranceResult]) -> ToleranceResult | None:
    """The loosest tolerance that is safe, and all tighter ones safe too."""
    best = None
    for row in sorted(rows, key=lambda r: r.tol):
        if not row.safe:
            break
        best = row
    return best


def run_check(data: ValidatedData, options: CheckOptions, *, source: str,
              truth: Mapping[str, Any] | None = None,
              progress: Progress | None = None) -> CheckResult:
    """Run the whole check (module docstring) on validated data."""
    say: Progress = progress or (lambda _msg: None)
    start = time.perf_counter()
    tols = tuple(sorted({float(t) for t in options.tolerances}, reverse=True))
    if not tols or any(not 0 < t < 1 for t in tols):
        raise CheckError(f"--tolerances: expected numbers in (0, 1), got {options.tolerances}")
    gen = np.random.default_rng(options.seed)
    split_rng, fit_rng, probe_rng, growth_rng = gen.spawn(4)
    train, hold = split_holdout(data.n, options.holdout, split_rng)
    x, y = data.points[train], data.values[train]
    x_new, y_new = data.points[hold], data.values[hold]
    d = data.points.shape[1]
    template = _template(options, d)
    notes: list[str] = list(data.notes)
    if options.fixed_params is not None:
        params = dict(options.fixed_params)
        kernel = make_kernel(options.kernel, dict(options.shape) | params)
        kernel.check_dimension(d)
        fit_info: dict[str, Any] = {"method": "fixed (--params)", "engine": None}
        fit = None
        if y.size <= options.dense_fit_max_n and _dense_fits(y.size, options.memory_budget):
            fisher = np.asarray(dense_evaluate(x, y, kernel, mean=options.mean, score=False,
                                               fisher=True, certify=False).fisher)
        else:
            fisher = np.asarray(CompressedEngine(x, y, kernel, mean=options.mean,
                                                 tol=min(tols), seed=options.seed)(
                kernel.theta, fisher=True).fisher)
            notes.append("Fisher information estimated by Hutch++ at the tightest tolerance")
    else:
        fit, fisher, fit_notes = _fit(x, y, template, options, fit_rng, say)
        kernel = fit.kernel
        fit_info = fit.to_dict()
        notes.extend(fit_notes)
        if fit.bounds_hit:
            notes.append("bounds hit: " + "; ".join(fit.bounds_hit))
    se = standard_errors(kernel, fisher)
    probes = rademacher(y.size, options.probes, probe_rng)
    cross = kernel.cross_covariance(x, x_new)
    dense_ok = _dense_fits(y.size, options.memory_budget)
    rows: list[ToleranceResult] = []
    growth: dict[str, Any] = {}
    holdout_info: dict[str, Any] = {}
    if dense_ok:
        reference = "dense"
        say(f"dense reference at n = {y.size:,}")
        chol = DenseCholesky(x, kernel, memory_budget=options.memory_budget)
        certified = bool(chol.certificate is not None
                         and chol.certificate < CERTIFICATE_THRESHOLD)
        ref = _side_for("dense", chol, chol.seconds["assemble"] + chol.seconds["factor"],
                        x, y, kernel, options, probes, x_new)
        ref_loglik = ref.loglik
        notes.append(f"dense reference certified: DPOT01 ratio {chol.certificate:.3g} "
                     f"(passes below {CERTIFICATE_THRESHOLD:g})")
        for tol in tols:
            say(f"tolerance {tol:g}")
            try:
                fac, secs = _hodlr(x, kernel, tol, options)
                side = _side_for(f"hodlr {tol:g}", fac, secs, x, y, kernel, options, probes,
                                 x_new)
            except CompressionBreakdownError as exc:
                rows.append(failed(tol, str(exc), reference))
                continue
            rows.append(compare(side, ref, tol=tol, kernel=kernel, fisher=fisher,
                                probes=probes, cross=cross,
                                sigma_times_weights=np.asarray(chol.matvec(side.weights)),
                                thresholds=options.thresholds, reference="dense",
                                certified=certified, reference_seconds=ref.loglik_seconds))
        exact_side = ref
        speedup_over = "dense"
    else:
        reference = "ladder"
        sides: dict[float, tuple[object, Side]] = {}
        for tol in sorted(set(tols) | {t / 100 for t in tols}, reverse=True):
            say(f"tolerance {tol:g} (ladder)")
            try:
                fac, secs = _hodlr(x, kernel, tol, options)
                sides[tol] = (fac, _side_for(f"hodlr {tol:g}", fac, secs, x, y, kernel,
                                             options, probes, x_new))
            except CompressionBreakdownError:
                continue
        growth = _growth(x, y, kernel, options, growth_rng, say)
        for tol in tols:
            if tol not in sides:
                rows.append(failed(tol, "compression lost positive definiteness", reference))
                continue
            tighter = tol / 100
            if tighter not in sides:
                rows.append(failed(tol, f"the ladder reference at tol {tighter:g} failed",
                                   reference))
                continue
            ref_fac, ref_side = sides[tighter]
            row = compare(sides[tol][1], ref_side, tol=tol, kernel=kernel, fisher=fisher,
                          probes=probes, cross=cross,
                          sigma_times_weights=np.asarray(ref_fac.matvec(sides[tol][1].weights)),  # type: ignore[attr-defined]
                          thresholds=options.thresholds, reference=f"hodlr {tighter:g}",
                          certified=True, reference_seconds=sides[min(sides)][1].loglik_seconds)
            rows.append(_with_growth(row, growth.get("per_tolerance", {}).get(repr(tol)),
                                     options.thresholds))
        tightest = min(sides) if sides else None
        if tightest is None:
            raise CheckError("the compressed solver failed at every tolerance")
        exact_side = sides[tightest][1]
        ref_loglik = exact_side.loglik
        speedup_over = f"hodlr tol {tightest:g}"
        notes.append(f"n = {y.size:,} is beyond the dense memory budget: each tolerance is "
                     "compared with one 100x tighter; the log-likelihood error is "
                     "extrapolated from dense subsample audits")
    resid = y_new - exact_side.krige_mean
    obs_var = exact_side.krige_var + kernel.nugget
    holdout_info = {"points": int(hold.size), "rmse": float(np.sqrt(np.mean(resid ** 2))),
                    "mean_z2": float(np.mean(resid ** 2 / obs_var)),
                    "coverage95": float(np.mean(np.abs(resid) <= 1.96 * np.sqrt(obs_var))),
                    "reference": reference}
    best = recommend(rows)
    refit = None
    if best is not None and options.refit and fit is not None:
        say(f"end-to-end refit with tol {best.tol:g}")
        refit = _refit(x, y, template, fit, best.tol, options, se.log_se, ref_loglik,
                       fisher)
    loglik = fit.loglik if fit is not None and fit.engine == "dense" else ref_loglik
    return CheckResult(
        source=source, n=data.n, n_fit=int(y.size), n_holdout=int(hold.size), d=d,
        coord_system=data.coord_system, kernel=kernel.family, mean=options.mean,
        params=kernel.natural_params(),
        se={"log": dict(zip(kernel.param_names, se.log_se.tolist(), strict=True)),
            "natural": se.natural_se, "microergodic": se.microergodic,
            "microergodic_se": se.microergodic_se, "nu": se.nu},
        loglik=float(loglik), reference=reference, fit=fit_info, tolerances=tuple(rows),
        recommended_tolerance=None if best is None else best.tol,
        speedup=None if best is None else best.speedup, speedup_over=speedup_over,
        refit=refit, thresholds=options.thresholds.to_dict(), growth=growth,
        holdout=holdout_info, truth=dict(truth) if truth else None,
        seconds=time.perf_counter() - start, notes=tuple(notes))


def _refit(x: np.ndarray, y: np.ndarray, template: Kernel, fit: MleFit, tol: float,
           options: CheckOptions, log_se: np.ndarray, ref_loglik: float,
           fisher: np.ndarray) -> RefitResult:
    """Fisher scoring with the compressed solver at ``tol`` from the reference estimate."""
    engine = CompressedEngine(x, y, template, mean=options.mean, tol=tol, seed=options.seed,
                              leaf_size=options.leaf_size)
    refit = fisher_scoring(engine, template, fit.theta, bounds=fit.bounds, step_tol_se=1e-4)
    delta = refit.theta - fit.theta
    shift = delta / log_se
    micro = None
    from harness.model.kernels import smoothness

    nu = smoothness(template)
    if nu is not None and template.isotropic:
        a = np.zeros(template.n_params)
        a[0], a[1] = 1.0, -2.0 * nu
        micro = float(a @ delta) / math.sqrt(float(a @ np.linalg.solve(fisher, a)))
    return RefitResult(tol=tol, params=refit.kernel.natural_params(),
                       shift_se=dict(zip(template.param_names, shift.tolist(), strict=True)),
                       max_shift_se=float(np.max(np.abs(shift))),
                       loglik_change=float(refit.loglik - ref_loglik),
                       microergodic_shift_se=micro, evaluations=refit.evaluations,
                       seconds=refit.seconds)
