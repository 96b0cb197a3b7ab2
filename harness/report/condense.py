"""Shorten what a report shows: repeated notes as one line with a count, long text cut at a
word boundary (the full text kept for a note)."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass


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
