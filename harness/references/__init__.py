"""Exact references: dense Cholesky (certified) and structured references."""

from harness.linalg.dense_budget import (
    DenseBudgetError,
    default_memory_budget,
    dense_bytes_needed,
    largest_dense_n,
)
from harness.linalg.dense_cholesky import (
    CERTIFICATE_THRESHOLD,
    CertificateError,
    DenseCholesky,
    SingularCovarianceError,
)
from harness.references.closed_forms import (
    ClosedFormError,
    exponential_fisher,
    exponential_logdet,
    exponential_loglik,
    exponential_quadratic,
    exponential_trace_terms,
)
from harness.references.dense_reference import dense_evaluate, dense_kriging
from harness.references.gridcheck import GridLayout, NotAGridError, detect_grid
from harness.references.kronecker import (
    KroneckerError,
    KroneckerReference,
    SeparableKernel,
    separable_block_with_derivatives,
    separable_covariance,
)
from harness.references.statespace import StateSpaceError, StateSpaceReference

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
    "exponential_logdet",
    "exponential_loglik",
    "exponential_quadratic",
    "exponential_trace_terms",
    "separable_block_with_derivatives",
    "separable_covariance",
    "CertificateError",
    "DenseBudgetError",
    "DenseCholesky",
    "SingularCovarianceError",
    "default_memory_budget",
    "dense_bytes_needed",
    "dense_evaluate",
    "dense_kriging",
    "largest_dense_n",
]
