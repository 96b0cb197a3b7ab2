"""Random probe vectors for stochastic trace estimation (``harness.linalg.rademacher``).

The generator lives below the likelihood and the references, which both draw probes; this
module keeps the import path of the trace estimators.
"""

from harness.linalg.rademacher import rademacher_probes

__all__ = ["rademacher_probes"]
