"""The statistical model: kernels, mean models and GLS, evaluation records, standard errors."""

from harness.model.evaluation import KrigingPrediction, ModelEvaluation, fisher_standard_errors
from harness.model.gls import GlsFit, gls_loglik
from harness.model.mean import MEAN_MODELS, design_matrix

__all__ = [
    "MEAN_MODELS",
    "GlsFit",
    "KrigingPrediction",
    "ModelEvaluation",
    "design_matrix",
    "fisher_standard_errors",
    "gls_loglik",
]
