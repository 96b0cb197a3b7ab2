"""Which reference a check takes: ``--reference`` through the one selector of ``check``
and ``run`` (``harness.audit.reference_choice.select_reference``), with the check's own
messages for a kind that does not apply. The pipeline (``harness.check.pipeline``) and
the cost plan (``harness.check.cost_plan``) both ask here, so the plan names the
reference the check then builds."""

from __future__ import annotations

import numpy as np

from harness.audit.audit_references import operator_available
from harness.audit.reference_choice import (
    AUTO_ORDER,
    NoReference,
    ReferenceProblem,
    select_reference,
)
from harness.check.check_options import REFERENCE_CHOICES, CheckError, CheckOptions
from harness.model.kernels import Kernel


def reference_kind(options: CheckOptions, points: np.ndarray, kernel: Kernel
                   ) -> tuple[str, list[str]]:
    """The reference kind to use (``harness.audit.reference_choice``, the selector of
    ``run`` too) and warnings about the choice."""
    if options.reference not in REFERENCE_CHOICES:
        raise CheckError(f"--reference {options.reference!r}: choose one of "
                         f"{', '.join(REFERENCE_CHOICES)}")
    n = int(points.shape[0])
    if options.reference == "ladder":
        return "ladder", ["--reference ladder: the ladder is extra evidence only, so no "
                          "verdict can be better than unresolved"]
    problem = ReferenceProblem(n=n, d=int(points.shape[1]), kernel=kernel,
                               memory_budget=options.memory_budget,
                               operator_installed=operator_available())
    allowed = AUTO_ORDER if options.reference == "auto" else (options.reference,)
    try:
        return select_reference(problem, allowed=allowed).kind, []
    except NoReference as exc:
        if options.reference == "dense":
            raise CheckError(f"--reference dense: n = {n:,} is beyond the dense memory "
                             "budget; use --reference auto, operator or ladder, or raise "
                             "--memory-budget") from None
        if options.reference == "operator":
            raise CheckError("--reference operator: the exact operator reference "
                             "(harness.references.operator) is not available in this "
                             "installation yet; use --reference dense (within the "
                             "memory budget) or ladder") from None
        if options.reference != "auto":
            raise CheckError(f"--reference {options.reference}: "
                             + "; ".join(exc.declined)) from None
    return "ladder", [f"n = {n:,} is beyond the dense memory budget and no exact structured "
                      "or operator reference applies: the tolerance ladder is the only "
                      "reference, so no verdict can be better than unresolved"]
