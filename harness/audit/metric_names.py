"""One canonical name per metric, with its unit in the name, and the table of old names.

Each metric is declared once here (``MetricName``): its canonical name (a module constant
such as ``LOGLIK_ERR_NAT``), its unit, what it means and the names it had before
(``aliases``). The canonical names are what new code writes and reads; the old names stay
valid forever (add, never rename):

* ``results.csv`` holds every metric under its contract column (old name) and, beside it,
  under its canonical name (``harness.grid.store.tables``);
* the JSON of ``check`` holds every tolerance's metric under both names;
* a stored run that has only the old columns gets the canonical ones from this table
  (``with_canonical_columns``), and the regression gate accepts either name
  (``canonical_name``).

Unit suffixes: ``_nat`` natural-log units (nats), ``_se`` standard errors of the fitted
parameter, ``_sd`` predictive standard deviations, ``_rel`` relative (dimensionless),
``_abs`` absolute in the quantity's own units, ``_fisher`` units of sqrt(F_ii).

This module imports nothing from ``harness``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pandas loads only where a results frame is read
    import pandas as pd

__all__ = [
    "ALIASES", "FACTOR_ERR_REL", "KRIGING_MEAN_ERR_SD", "KRIGING_VAR_ERR_REL",
    "LOGDET_ERR_NAT", "LOGDET_ERR_REL", "LOGLIK_ERR_NAT", "METRICS", "PARAM_SHIFT_SE",
    "QUAD_ERR_ABS", "QUAD_ERR_REL", "SCORE_ERR_FISHER", "SHIFT_NAT", "SOLVE_FWD_ERR_REL",
    "TRACE_ERR_REL", "MetricName", "canonical_name", "metric", "with_both_names",
    "with_canonical_columns",
]

LOGLIK_ERR_NAT = "loglik_err_nat"
PARAM_SHIFT_SE = "param_shift_se"
KRIGING_MEAN_ERR_SD = "kriging_mean_err_sd"
KRIGING_VAR_ERR_REL = "kriging_var_err_rel"
LOGDET_ERR_NAT = "logdet_err_nat"
LOGDET_ERR_REL = "logdet_err_rel"
QUAD_ERR_ABS = "quad_err_abs"
QUAD_ERR_REL = "quad_err_rel"
SOLVE_FWD_ERR_REL = "solve_fwd_err_rel"
FACTOR_ERR_REL = "factor_err_rel"
SCORE_ERR_FISHER = "score_err_fisher"
SHIFT_NAT = "shift_nat"
TRACE_ERR_REL = "trace_err_rel"


@dataclass(frozen=True)
class MetricName:
    """One metric's names.

    Attributes
    ----------
    canonical : str
        The name new code writes and reads.
    unit : str
        The unit the name ends with, in words.
    meaning : str
        What the metric measures.
    column : str
        Its column in ``results.csv``'s contract (``harness.grid.store.columns``).
    aliases : tuple of str
        Every earlier name of the metric (the contract column, the task record's
        detailed key, the key of ``check --json``), each accepted wherever a name is read.
    """

    canonical: str
    unit: str
    meaning: str
    column: str
    aliases: tuple[str, ...]


#: Every metric with more than one name in a stored file, an output or an argument.
METRICS: tuple[MetricName, ...] = (
    MetricName(LOGLIK_ERR_NAT, "nats", "log-likelihood error L~ - L (|.| in results.csv)",
               "loglik_abs_err", ("loglik_abs_err", "loglik_abs_error", "loglik_error",
                                  "loglik_err", "loglik_nats")),
    MetricName(PARAM_SHIFT_SE, "standard errors", "largest implied parameter shift "
               "|(F^-1 (g~ - g))_i| / SE_i", "param_shift_se_max",
               ("param_shift_se_max", "score_shift_se_max")),
    MetricName(KRIGING_MEAN_ERR_SD, "predictive standard deviations", "largest kriging "
               "mean error |m~ - m| / sqrt(v) at the held-out points",
               "kriging_mean_err_sd_max", ("kriging_mean_err_sd_max", "kriging_mean_sd_max",
                                           "kriging_mean_sd")),
    MetricName(KRIGING_VAR_ERR_REL, "relative", "largest |v~ / v - 1| of the kriging "
               "variances at the held-out points", "kriging_var_rel_err_max",
               ("kriging_var_rel_err_max", "kriging_var_rel_max", "kriging_var_ratio")),
    MetricName(LOGDET_ERR_NAT, "nats", "absolute error of log det Sigma", "logdet_abs_err",
               ("logdet_abs_err", "logdet_abs_error")),
    MetricName(LOGDET_ERR_REL, "relative", "relative error of log det Sigma",
               "logdet_rel_err", ("logdet_rel_err", "logdet_rel_error")),
    MetricName(QUAD_ERR_ABS, "absolute", "absolute error of the quadratic form r' Sigma^-1 r",
               "quad_abs_err", ("quad_abs_err", "quadratic_abs_error")),
    MetricName(QUAD_ERR_REL, "relative", "relative error of the quadratic form",
               "quad_rel_err", ("quad_rel_err", "quadratic_rel_error")),
    MetricName(SOLVE_FWD_ERR_REL, "relative", "relative forward error of a solve",
               "solve_fwd_err", ("solve_fwd_err", "solve_forward_error")),
    MetricName(FACTOR_ERR_REL, "relative", "||Sigma - Sigma~||_2 / ||Sigma||_2 "
               "(randomized estimate)", "factor_err", ("factor_err", "factorization_error")),
    MetricName(SCORE_ERR_FISHER, "sqrt(F_ii)", "largest score error |g~_i - g_i| / "
               "sqrt(F_ii)", "score_err_fisher_max", ("score_err_fisher_max",
                                                     "score_fisher_max")),
    MetricName(SHIFT_NAT, "nats", "1/2 dtheta' F dtheta of the implied shift",
               "shift_nats", ("shift_nats", "score_shift_nats")),
    MetricName(TRACE_ERR_REL, "relative", "largest relative error of a trace estimate",
               "trace_rel_err_max", ("trace_rel_err_max", "trace_rel_error_max")),
)

#: Old name -> canonical name (the one mapping table every reader uses).
ALIASES: dict[str, str] = {alias: m.canonical for m in METRICS for alias in m.aliases}

_BY_CANONICAL: dict[str, MetricName] = {m.canonical: m for m in METRICS}


def canonical_name(name: str) -> str:
    """The canonical name of ``name`` (itself when it is canonical or not a metric).

    Parameters
    ----------
    name : str
        A metric name, old or new.

    Returns
    -------
    str
    """
    return ALIASES.get(name, name)


def metric(name: str) -> MetricName:
    """The declaration of a metric given any of its names.

    Raises
    ------
    KeyError
        When ``name`` is no metric's name.
    """
    return _BY_CANONICAL[canonical_name(name)]


def with_both_names(values: Mapping[str, Any]) -> dict[str, Any]:
    """``values`` (metric name -> value) with each metric also under its canonical name.

    Old keys are kept; a canonical key already present is not overwritten.
    """
    out = dict(values)
    for name, value in values.items():
        out.setdefault(canonical_name(name), value)
    return out


def with_canonical_columns(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of a results frame with every metric's canonical column, as numbers.

    The canonical column is taken from the metric's contract column (which every stored
    run holds, also one written before the canonical names existed), else from the
    canonical column itself, else from the first old name present.

    Parameters
    ----------
    frame : DataFrame
        Rows as in ``results.csv`` (``harness.analysis.load.load_run(...).results``).
    """
    import pandas as pd

    out = frame.copy()
    for m in METRICS:
        source = next((c for c in (m.column, m.canonical, *m.aliases) if c in out.columns),
                      None)
        if source is not None:
            out[m.canonical] = pd.to_numeric(out[source], errors="coerce").astype(float)
    return out
