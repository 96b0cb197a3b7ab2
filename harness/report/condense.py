"""Shorten what a report shows: repeated notes as one line with a count, one solver
failure repeated over the solver's seeds as one line naming the seeds, long text cut at a
word boundary (the full text kept for a note)."""

from __future__ import annotations

import re
from collections.abc import Iterable
from dataclasses import dataclass

#: How the audit engine prefixes one seed's failure (``seed 0 (1234): message``); the
#: failures of one knob value are joined by ``"; "``.
_SEED_PREFIX = re.compile(r"(?:^|; )seed (\d+) \((\d+)\): ")


@dataclass(frozen=True)
class Note:
    """One distinct note, how often it occurred and the subjects it concerned."""

    text: str
    count: int
    subjects: tuple[str, ...] = ()

    def line(self, *, max_subjects: int = 6) -> str:
        """``text`` alone, or ``text (N times: a, b, c, ...)``."""
        if self.count <= 1 and len(self.subjects) <= 1:
            prefix = f"{self.subjects[0]}: " if self.subjects else ""
            return prefix + self.text
        shown = ", ".join(self.subjects[:max_subjects])
        more = len(self.subjects) - max_subjects
        if more > 0:
            shown += f" and {more} more"
        return f"{self.text} ({self.count}\u00d7{': ' + shown if shown else ''})"

    def to_dict(self) -> dict[str, object]:
        return {"text": self.text, "count": self.count, "subjects": list(self.subjects)}


def collapse_notes(notes: Iterable[str | tuple[str, str]]) -> tuple[Note, ...]:
    """Group equal notes, keeping first-seen order.

    Each entry is a note text, or a ``(subject, text)`` pair: pairs with the same text
    become one ``Note`` listing their subjects (each once, in order).
    """
    order: list[str] = []
    counts: dict[str, int] = {}
    subjects: dict[str, list[str]] = {}
    for entry in notes:
        subject, text = ("", entry) if isinstance(entry, str) else entry
        if text not in counts:
            order.append(text)
            counts[text] = 0
            subjects[text] = []
        counts[text] += 1
        if subject and subject not in subjects[text]:
            subjects[text].append(subject)
    return tuple(Note(t, counts[t], tuple(subjects[t])) for t in order)


def shorten(text: str, width: int = 60) -> str:
    """``text`` cut at the last word boundary before ``width`` characters, with an ellipsis
    (unchanged when it fits)."""
    text = " ".join(str(text).split())
    if len(text) <= width:
        return text
    cut = text[: width - 1]
    space = cut.rfind(" ")
    if space > width // 2:
        cut = cut[:space]
    return cut.rstrip(" ,;:") + "\u2026"


def _seeds_text(indices: list[str]) -> str:
    if len(indices) == 1:
        return f"seed {indices[0]}"
    return "seeds " + ", ".join(indices[:-1]) + " and " + indices[-1]


def per_seed_failures(error: str) -> str:
    """A knob value's failures with each message once, naming the seeds it came from.

    ``"seed 0 (11): lost definiteness; seed 1 (12): lost definiteness"`` becomes
    ``"seeds 0 and 1: lost definiteness"``; text before the first seed prefix (a failed
    reference) is kept as it is, and an ``error`` without seed prefixes is returned
    unchanged.
    """
    parts = _SEED_PREFIX.split(" ".join(str(error).split()))
    head, rest = parts[0], parts[1:]
    if not rest:
        return head
    seeds: dict[str, list[str]] = {}
    for i in range(0, len(rest), 3):
        index, text = rest[i], rest[i + 2].strip()
        seeds.setdefault(text, [])
        if index not in seeds[text]:
            seeds[text].append(index)
    lines = [head.strip().rstrip(";")] if head.strip() else []
    lines += [f"{_seeds_text(indices)}: {text}" for text, indices in seeds.items()]
    return "; ".join(lines)
