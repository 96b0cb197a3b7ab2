"""Exact references: dense Cholesky (certified) and structured references."""

from harness.exact.budget import (
    DenseBudgetError,
    default_memory_budget,
    dense_bytes_needed,
    largest_dense_n,
)
from harness.exact.cholesky import (
    CERTIFICATE_THRESHOLD,
    CertificateError,
    DenseCholesky,
    SingularCovarianceError,
)
from harness.exact.closed_forms import (
    ClosedFormError,
    exponential_fisher,
    exponential_logdet,
    exponential_loglik,
    exponential_quadratic,
    exponential_trace_terms,
)
from harness.exact.dense import KrigingPrediction, dense_evaluate, dense_kriging
from harness.exact.evaluation import ReferenceEvaluation, fisher_standard_errors
from harness.exact.gls import GlsFit, gls_loglik
from harness.exact.gridcheck import GridLayout, NotAGridError, detect_grid
from harness.exact.kronecker import (
    KroneckerError,
    KroneckerReference,
    SeparableKernel,
    separable_block_with_derivatives,
    separable_covariance,
)
from harness.exact.mean import MEAN_MODELS, design_matrix
from harness.exact.statespace import StateSpaceError, StateSpaceReference

__all__ = [
    "CERTIFICATE_THRESHOLD",
    "ClosedFormError",
    "GridLayout",
    "KroneckerError",
    "KroneckerReference",
    "NotAGridError",
    "SeparableKernel",
    "StateSpaceError",
    "StateSpaceReference",
    "detect_grid",
    "exponential_fisher",
    "fisher_standard_errors",
    "exponential_logdet",
    "exponential_loglik",
    "exponential_quadratic",
    "exponential_trace_terms",
    "separable_block_with_derivatives",
    "separable_covariance",
    "MEAN_MODELS",
    "CertificateError",
    "DenseBudgetError",
    "DenseCholesky",
    "GlsFit",
    "KrigingPrediction",
    "ReferenceEvaluation",
    "SingularCovarianceError",
    "default_memory_budget",
    "dense_bytes_needed",
    "dense_evaluate",
    "dense_kriging",
    "design_matrix",
    "gls_loglik",
    "largest_dense_n",
]
