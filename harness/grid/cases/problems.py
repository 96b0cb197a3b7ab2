"""Problems found in a case file, collected so that all of them are reported at once."""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class CaseProblem:
    """One problem: the file, the key path (``solvers[1].tolerances[0]``), what is wrong.

    ``line`` and ``column`` are set for TOML syntax errors.
    """

    file: str
    key_path: str
    message: str
    line: int | None = None
    column: int | None = None

    def __str__(self) -> str:
        where = self.file
        if self.line is not None:
            where += f":{self.line}:{self.column}"
        path = f" {self.key_path}:" if self.key_path else ""
        return f"{where}:{path} {self.message}"

    def to_dict(self) -> dict[str, Any]:
        return {"file": self.file, "key_path": self.key_path, "message": self.message,
                "line": self.line, "column": self.column}


class CaseFileError(ValueError):
    """A case file that cannot be used; ``problems`` lists every problem found."""

    def __init__(self, problems: Sequence[CaseProblem]) -> None:
        self.problems = tuple(problems)
        count = len(self.problems)
        head = f"{count} problem{'s' if count != 1 else ''} in case file"
        super().__init__(head + ":\n" + "\n".join(f"  {p}" for p in self.problems))


def nearest(name: str, valid: Iterable[str]) -> str | None:
    """The closest valid name by ``difflib.get_close_matches`` (cutoff 0.6), or None."""
    matches = difflib.get_close_matches(name, list(valid), n=1, cutoff=0.6)
    return matches[0] if matches else None


def unknown_key_message(name: str, valid: Iterable[str]) -> str:
    valid = sorted(valid)
    guess = nearest(name, valid)
    hint = f"did you mean {guess!r}? " if guess else ""
    return f"unknown key {name!r}; {hint}valid keys here: {', '.join(valid)}"
