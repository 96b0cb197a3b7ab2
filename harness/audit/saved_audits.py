"""Where the engine finds and keeps finished (knob value, seed) audits.

``harness.audit.engine.audit_tolerances(saved=...)`` asks a ``SavedAudits`` for each
(knob value, solver seed) audit before running it and hands it every audit that finished,
so a caller that keeps them on disk (``check``'s state folder,
``harness.check.check_state``) resumes after an interruption, losing at most the audit in
flight. The engine never knows how or where they are kept.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Protocol

if TYPE_CHECKING:
    from harness.audit.engine import SeedAudit


class SavedAudits(Protocol):
    """Finished audits by (knob value, seed index, seed)."""

    def load(self, value: float, index: int, seed: int) -> SeedAudit | None:
        """The saved audit of ``seed`` (the ``index``-th) at knob ``value``, or None."""
        ...

    def save(self, value: float, index: int, seed: int, audit: SeedAudit) -> None:
        """Keep a finished audit (atomically: an interruption leaves it whole or absent)."""
        ...
