"""Accuracy metrics of one tolerance: the solver's ``Side`` against the reference's.

* log-likelihood error L~ - L (nats; threshold ``Thresholds.loglik_nats``);
* implied parameter shift F^-1 (g~ - g) in SE units (``harness.audit.metrics.score_errors``), with
  g~ - g = 1/2 (q~ - q) - 1/2 tr(S~_i - S_i) from ``sides`` and its Monte Carlo
  uncertainty propagated from the difference-trace standard errors; threshold
  ``Thresholds.param_shift_se`` on the largest component;
* microergodic shift in SE (isotropic Matern kernels; information);
* kriging mean error max |m~ - m| / sqrt(v) at the held-out points, both sides
  conditioned on the other points (``harness.audit.metrics.held_out_scale``; threshold
  ``Thresholds.kriging_mean_sd``);
* kriging variance ratio v~ / v at the variance points, largest |ratio - 1|
  (information);
* MLOE and MMOM (``efficiency``; information).
"""

from __future__ import annotations

import numpy as np

from harness.audit.metric_values import MetricValue
from harness.audit.metrics import microergodic_shift, score_errors
from harness.audit.metrics.efficiency import efficiency_from_mse
from harness.audit.metrics.held_out_scale import held_out_scale
from harness.audit.rule import Thresholds
from harness.audit.sides import KrigingSide, Side
from harness.model.kernels import Kernel, smoothness


def score_difference(test: Side, ref: Side, probes: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray]:
    """g~ - g and its standard error per parameter (``sides`` module docstring)."""
    diff = test.sinv_deriv_probes - ref.sinv_deriv_probes            # (p, n, k)
    samples = np.einsum("nk,pnk->pk", probes, diff)                   # z_j' D_i z_j
    k = probes.shape[1]
    trace = samples.mean(axis=1)
    trace_se = samples.std(axis=1, ddof=1) / np.sqrt(k) if k > 1 else np.full(trace.size,
                                                                            np.nan)
    return 0.5 * (test.quad - ref.quad) - 0.5 * trace, 0.5 * trace_se


def likelihood_metrics(test: Side, ref: Side, *, kernel: Kernel, fisher: np.ndarray | None,
                       probes: np.ndarray, thresholds: Thresholds,
                       reference_loglik_se: float = 0.0) -> list[MetricValue]:
    """Log-likelihood error and implied parameter shifts of ``test`` against ``ref`` on
    all n points (module docstring); each limited metric carries its standard error."""
    metrics: list[MetricValue] = [
        MetricValue("loglik_error", test.loglik - ref.loglik, thresholds.loglik_nats,
                    uncertainty=float(reference_loglik_se), note="nats"),
    ]
    e, e_se = score_difference(test, ref, probes)
    metrics.extend(shift_metrics(e, e_se, kernel=kernel, fisher=fisher,
                                 thresholds=thresholds))
    return metrics


def shift_uncertainty(e_se: np.ndarray, fisher: np.ndarray) -> np.ndarray:
    """SD of each implied parameter shift (F^-1 e)_i / SE_i from independent score errors
    with SDs ``e_se``: sqrt((F^-1 diag(e_se^2) F^-1)_ii) / sqrt((F^-1)_ii) (linear
    propagation; common practice)."""
    f_inv = np.linalg.inv(0.5 * (fisher + fisher.T))
    se = np.sqrt(np.diag(f_inv))
    return np.sqrt(np.diag(f_inv @ np.diag(np.asarray(e_se) ** 2) @ f_inv)) / se


def shift_metrics(e: np.ndarray, e_se: np.ndarray, *, kernel: Kernel,
                  fisher: np.ndarray | None, thresholds: Thresholds) -> list[MetricValue]:
    """Implied parameter shift F^-1 e in SE units from a score error e with per-component
    standard errors e_se (independent), and the microergodic shift (information); none
    without a Fisher information (the shift is then not measured).

    Var((F^-1 e)_i) = (F^-1 diag(e_se^2) F^-1)_ii (linear propagation of independent
    errors; common practice).
    """
    if fisher is None:
        return []
    errs = score_errors(e, np.zeros_like(e), fisher, kernel.param_names)
    shift_sd = shift_uncertainty(e_se, fisher)
    upper = np.abs(errs.shift_se) + 2.0 * np.nan_to_num(shift_sd, nan=np.inf)
    worst = int(np.argmax(upper))
    metrics = [MetricValue(
        "param_shift_se", float(np.abs(errs.shift_se[worst])), thresholds.param_shift_se,
        uncertainty=float(shift_sd[worst]),
        note=f"largest |F^-1 (g~ - g)| / SE (+ 2 SE of its estimate), at "
             f"{kernel.param_names[worst]}")]
    nu = smoothness(kernel)
    if nu is not None and kernel.isotropic:
        micro = microergodic_shift(errs.shift, fisher, kernel.param_names, nu)
        metrics.append(MetricValue("microergodic_shift_se", abs(micro.shift_se),
                                   note="log(s2 / l^(2 nu)) shift in SE (information)"))
    return metrics


def kriging_metrics(test: KrigingSide, ref: KrigingSide, *, predictor_mse: np.ndarray,
                    thresholds: Thresholds) -> list[MetricValue]:
    """Kriging errors at the held-out points, both sides conditioned on the other points.

    The mean error is scaled per point by ``harness.audit.metrics.held_out_scale`` (each
    variance point by its own reference SD); the variance ratio and the efficiency
    criteria use the variance points, ``predictor_mse`` being E_at there
    (``harness.audit.sides.predictor_mse``).
    """
    if not np.array_equal(test.variance_at, ref.variance_at):
        raise ValueError("the two kriging sides hold variances at different points")
    scale = held_out_scale(ref.mean.size, ref.variance, ref.variance_at)
    z = scale.errors(test.mean, ref.mean)
    own = int(np.count_nonzero(scale.own))
    metrics = [MetricValue("kriging_mean_sd", float(np.max(z)), thresholds.kriging_mean_sd,
                           uncertainty=0.0,
                           note=f"largest |m~ - m| / sqrt(v) at {z.size} held-out points, "
                                f"conditioned on the other points ({own} with their own "
                                f"variance, the others scaled by the smallest)")]
    positive = ref.variance > 0
    ratio = test.variance[positive] / ref.variance[positive]
    metrics.append(MetricValue("kriging_var_ratio", float(np.max(np.abs(ratio - 1.0))),
                               note=f"largest |v~/v - 1| at {ratio.size} variance points; "
                                    f"v~/v in [{ratio.min():.6g}, {ratio.max():.6g}]"))
    eff = efficiency_from_mse(predictor_mse, ref.variance, test.variance)
    metrics.append(MetricValue("mloe", eff.mloe, note="mean loss of efficiency "
                               "(Hong et al. 2021; information)"))
    metrics.append(MetricValue("mmom", eff.mmom, note="mean misspecification of the MSE "
                               "(Hong et al. 2021; information)"))
    return metrics
