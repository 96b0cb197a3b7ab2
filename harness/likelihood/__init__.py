"""Gaussian-process log-likelihood, score, Fisher information and kriging through any
Factorization (dense or compressed), with exact or stochastic trace terms."""

from harness.likelihood.kriging import kriging
from harness.likelihood.loglik import TRACE_CHOICES, evaluate_likelihood
from harness.likelihood.traces import EXACT_TRACE_MAX_N, ExactTraceSizeError, TraceTerms

__all__ = [
    "EXACT_TRACE_MAX_N",
    "TRACE_CHOICES",
    "ExactTraceSizeError",
    "TraceTerms",
    "evaluate_likelihood",
    "kriging",
]
