"""One set of display labels for the check's metrics, used by the terminal table, the
HTML report and the README's glossary, each with a one-line plain-language legend.

The JSON keys (``loglik_error``, ``param_shift_se``, ...) are the stable contract and do
not change; these are only how people see them.
"""

from __future__ import annotations

from dataclasses import dataclass

from harness.audit.metric_names import canonical_name


@dataclass(frozen=True)
class MetricLabel:
    """How a metric is shown: ``short`` for narrow table headers, ``label`` with its unit,
    and ``legend``, one plain sentence."""

    key: str
    short: str
    label: str
    legend: str

    @property
    def unit(self) -> str:
        """The unit in parentheses, ``(nats)``, for an axis label; empty when unknown."""
        return METRIC_UNITS.get(self.key) or METRIC_UNITS.get(canonical_name(self.key), "")


METRIC_LABELS: dict[str, MetricLabel] = {m.key: m for m in (
    MetricLabel("loglik_error", "\u0394 log-lik", "log-likelihood error (nats)",
                "how far the compressed model's fit criterion is from the exact one"),
    MetricLabel("loglik_error_extrapolated", "\u0394 log-lik (extrap.)",
                "log-likelihood error, extrapolated (nats)",
                "the log-likelihood error at the full size, extrapolated from exact audits "
                "of subsamples (upper 95% bound)"),
    MetricLabel("param_shift_se", "param. shift", "parameter shift (SE)",
                "how far the compressed gradient would move the fitted parameters, in "
                "standard errors of the estimate"),
    MetricLabel("microergodic_shift_se", "microergodic shift",
                "microergodic shift (SE)",
                "the same for the microergodic parameter s2/l^(2 nu), the combination the "
                "data pin down best (Zhang 2004)"),
    MetricLabel("kriging_mean_sd", "kriging error", "kriging error (pred. SD)",
                "largest difference of the kriging predictions at the held-out points, "
                "in predictive standard deviations"),
    MetricLabel("kriging_var_ratio", "kriging var.", "kriging variance error (relative)",
                "largest relative difference of the kriging variances at the held-out "
                "points"),
    MetricLabel("mloe", "MLOE", "MLOE (mean loss of efficiency)",
                "how much worse, on average, the compressed model's predictions are than "
                "the exact model's, as a fraction of the exact mean squared error "
                "(Hong et al. 2021)"),
    MetricLabel("mmom", "MMOM", "MMOM (mean misspecification of the MSE)",
                "how far, on average, the compressed model misstates its own prediction "
                "error, as a fraction (Hong et al. 2021)"),
)}

#: The unit of each metric, as axis labels write it.
METRIC_UNITS: dict[str, str] = {
    "loglik_error": "(nats)", "loglik_error_extrapolated": "(nats)",
    "param_shift_se": "(SE)", "microergodic_shift_se": "(SE)",
    "kriging_mean_sd": "(pred. SD)", "kriging_var_ratio": "(relative)",
    "mloe": "(fraction)", "mmom": "(fraction)", "seconds": "(s)", "speedup": "(\u00d7)"}

#: Columns the check report shows beside the metrics.
COLUMN_LABELS: dict[str, MetricLabel] = {m.key: m for m in (
    MetricLabel("tol", "tolerance", "compression tolerance",
                "the accuracy setting of the compressed solver: smaller is more exact and "
                "slower"),
    MetricLabel("verdict", "verdict", "verdict",
                "safe: every limit met with its uncertainty; unsafe: a limit failed "
                "(marked \u2718 and bold); unresolved: the uncertainty is too large to "
                "decide"),
    MetricLabel("seconds", "compressed s", "compressed time (s)",
                "seconds the compressed solver took for one log-likelihood evaluation "
                "(factorization included)"),
    MetricLabel("speedup", "speed-up", "speed-up (\u00d7)",
                "the reference's time divided by the compressed time; below 1 it does not "
                "pay at this size"),
)}

#: Columns of a run's ``results.csv`` as the run report, its figures and the export name
#: them, each with its unit.
RESULT_COLUMN_LABELS: dict[str, str] = {
    "loglik_abs_err": "|log-likelihood error| (nats)",
    "param_shift_se_max": "max implied parameter shift (SE)",
    "kriging_mean_err_sd_max": "max kriging mean error (predictive SD)",
    "trace_z_max": "max |trace z-score| (SE)",
    "trace_rel_err_max": "max trace error (relative)",
    "kl_nat": "KL divergence (nats)",
    "reference_certified": "dense reference certified (yes/no)",
    "t_factor": "factor time (s)", "t_logdet": "log det time (s)", "t_solve": "solve time (s)",
    "t_gradient": "gradient time (s)", "t_total": "total time (s)",
    "peak_rss_bytes": "peak RSS (bytes)", "nbytes": "factor storage (bytes)",
}


def column_label(key: str) -> str:
    """How a ``results.csv`` column is shown (``RESULT_COLUMN_LABELS``), else the check
    metric's label (``metric_label``); an unknown key is shown as itself."""
    return RESULT_COLUMN_LABELS.get(key) or metric_label(key).label


#: Labels under each metric's canonical name (``harness.audit.metric_names``), taken from
#: the label of one of its old names.
_BY_CANONICAL: dict[str, MetricLabel] = {
    canonical_name(key): label for key, label in {**COLUMN_LABELS, **METRIC_LABELS}.items()
    if canonical_name(key) != key}

#: Further terms the reports use, for the README glossary and the report's notes.
TERMS: dict[str, str] = {
    "DPOT01": "the scaled residual ||Sigma - L L'||_1 / (n ||Sigma||_1 eps) that LAPACK's "
              "test suite uses to certify a Cholesky factorization; it passes below 30",
    "Hutch++": "a stochastic estimator of a matrix trace from random probe vectors, with a "
               "low-rank correction that makes its error fall as 1/p instead of 1/sqrt(p) "
               "(Meyer, Musco, Musco & Woodruff 2021)",
    "Hutchinson": "the plain stochastic trace estimator: the average of z' A z over random "
                  "sign vectors z",
    "microergodic": "for Matern kernels, the parameter combination s2/l^(2 nu) that can be "
                    "estimated consistently from dense data in a fixed region (Zhang 2004); "
                    "variance and length scale alone cannot",
    "SE": "standard error of a fitted parameter, from the Fisher information",
    "nats": "natural-log units of likelihood; 1 nat is a likelihood ratio of e (about 2.7)",
}


def metric_label(key: str) -> MetricLabel:
    """The label of ``key`` (any name of a metric, ``harness.audit.metric_names``); an
    unknown key is shown as itself."""
    found = METRIC_LABELS.get(key) or COLUMN_LABELS.get(key)
    if found is None and key in _BY_CANONICAL:
        found = _BY_CANONICAL[key]
    return found or MetricLabel(key, key, key, "")
