"""Stochastic trace estimation of tr(Sigma^-1 Sigma_i) and the Fisher information."""

from harness.likelihood.trace.affine import AffineForm, AffineReduction, declared_reduction
from harness.likelihood.trace.estimators import (
    TRACE_METHODS,
    TraceEstimate,
    estimate_traces,
    hutchinson,
    hutchpp,
)
from harness.likelihood.trace.operators import (
    ExplicitOperators,
    FactorizationOperators,
    OperatorFamily,
    Usage,
)
from harness.linalg.rademacher import rademacher_probes

__all__ = [
    "TRACE_METHODS",
    "AffineForm",
    "AffineReduction",
    "ExplicitOperators",
    "FactorizationOperators",
    "OperatorFamily",
    "TraceEstimate",
    "Usage",
    "declared_reduction",
    "estimate_traces",
    "hutchinson",
    "hutchpp",
    "rademacher_probes",
]
