"""Accuracy metrics of one tolerance: the solver's ``Side`` against the reference's.

* log-likelihood error L~ - L (nats; threshold ``Thresholds.loglik_nats``);
* implied parameter shift F^-1 (g~ - g) in SE units (``harness.audit.metrics.score_errors``), with
  g~ - g = 1/2 (q~ - q) - 1/2 tr(S~_i - S_i) from ``sides`` and its Monte Carlo
  uncertainty propagated from the difference-trace standard errors; threshold
  ``Thresholds.param_shift_se`` on the largest component;
* microergodic shift in SE (isotropic Matern kernels; information);
* kriging mean error max |m~ - m| / sqrt(v) at the held-out points
  (``harness.audit.metrics.kriging_errors``; threshold ``Thresholds.kriging_mean_sd``);
* kriging variance ratio v~ / v, largest |ratio - 1| (information);
* MLOE and MMOM (``efficiency``; information).
"""

from __future__ import annotations

import numpy as np

from harness.audit.metrics import kriging_errors, microergodic_shift, score_errors
from harness.audit.metrics.efficiency import prediction_efficiency
from harness.audit.sides import Side
from harness.audit.verdict import Thresholds
from harness.check.check_records import MetricValue, ToleranceResult
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


def compare(test: Side, ref: Side, *, tol: float, kernel: Kernel, fisher: np.ndarray,
            probes: np.ndarray, cross: np.ndarray, sigma_times_weights: np.ndarray,
            thresholds: Thresholds, reference: str, certified: bool,
            reference_seconds: float) -> ToleranceResult:
    """All metrics of ``test`` against ``ref`` at one tolerance (module docstring)."""
    metrics: list[MetricValue] = [
        MetricValue("loglik_error", test.loglik - ref.loglik, thresholds.loglik_nats,
                    note="nats"),
    ]
    e, e_se = score_difference(test, ref, probes)
    errs = score_errors(e, np.zeros_like(e), fisher, kernel.param_names)
    f_inv = np.linalg.inv(0.5 * (fisher + fisher.T))
    se = np.sqrt(np.diag(f_inv))
    shift_sd = np.sqrt(np.diag(f_inv @ np.diag(e_se ** 2) @ f_inv)) / se
    worst = int(np.argmax(np.abs(errs.shift_se)))
    metrics.append(MetricValue(
        "param_shift_se", float(np.abs(errs.shift_se[worst])), thresholds.param_shift_se,
        uncertainty=float(shift_sd[worst]),
        note=f"largest |F^-1 (g~ - g)| / SE, at {kernel.param_names[worst]}"))
    nu = smoothness(kernel)
    if nu is not None and kernel.isotropic:
        micro = microergodic_shift(errs.shift, fisher, kernel.param_names, nu)
        metrics.append(MetricValue("microergodic_shift_se", abs(micro.shift_se),
                                   note="log(s2 / l^(2 nu)) shift in SE (information)"))
    krig = kriging_errors(test.krige_mean, test.krige_var, ref.krige_mean, ref.krige_var)
    metrics.append(MetricValue("kriging_mean_sd", krig.mean_sd_max,
                               thresholds.kriging_mean_sd,
                               note="largest |m~ - m| / sqrt(v) at held-out points"))
    positive = ref.krige_var > 0
    ratio = test.krige_var[positive] / ref.krige_var[positive]
    metrics.append(MetricValue("kriging_var_ratio", float(np.max(np.abs(ratio - 1.0))),
                               note=f"largest |v~/v - 1|; v~/v in [{ratio.min():.6g}, "
                                    f"{ratio.max():.6g}]"))
    eff = prediction_efficiency(test.weights, cross, sigma_times_weights, kernel.variance,
                                ref.krige_var, test.krige_var)
    metrics.append(MetricValue("mloe", eff.mloe, note="mean loss of efficiency "
                               "(Hong et al. 2021; information)"))
    metrics.append(MetricValue("mmom", eff.mmom, note="mean misspecification of the MSE "
                               "(Hong et al. 2021; information)"))
    passed = all(m.passed for m in metrics if m.threshold is not None)
    seconds = test.loglik_seconds
    return ToleranceResult(tol=tol, safe=bool(passed and certified), reference=reference,
                           metrics=tuple(metrics), seconds=seconds,
                           speedup=reference_seconds / seconds if seconds > 0 else None,
                           nbytes=test.nbytes)


def failed(tol: float, reason: str, reference: str) -> ToleranceResult:
    """A tolerance whose solver failed: unsafe, with the reason."""
    return ToleranceResult(tol=tol, safe=False, reference=reference, metrics=(),
                           seconds=float("nan"), speedup=None, nbytes=0, error=reason)
