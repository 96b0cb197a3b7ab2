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
from harness.exact.dense import KrigingPrediction, dense_evaluate, dense_kriging
from harness.exact.evaluation import ReferenceEvaluation
from harness.exact.gls import GlsFit, gls_loglik
from harness.exact.mean import MEAN_MODELS, design_matrix

__all__ = [
    "CERTIFICATE_THRESHOLD",
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
