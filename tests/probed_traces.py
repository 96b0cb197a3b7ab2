"""A factorization with its exact ``derivative_traces`` hidden, so that the exact operator
probes the preconditioner's traces as for any factorization without them
(``harness.references.operator.score_traces``). Shared by
``tests/test_operator_reference.py`` and ``benchmarks/operator_exact_traces.py``."""

from __future__ import annotations


class ProbedTraces:
    """Every member of ``factorization`` except ``derivative_traces``."""

    def __init__(self, factorization: object) -> None:
        self._factorization = factorization

    def __getattr__(self, name: str) -> object:
        if name == "derivative_traces":
            raise AttributeError(name)
        return getattr(self._factorization, name)
