"""Design notes live inside the repository: no citation of documents outside it.

The verdict rule, the reference order, the exit codes and the architecture are written in
DEVELOPERS.md; code, tests and benchmarks point there (or to a module), never to a
design or style document that is not in the repository.
"""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SEARCHED = ("harness", "tests", "benchmarks")
OUTSIDE = re.compile(r"DESIGN|STYLE\.md")


def _citations() -> list[str]:
    found: list[str] = []
    for folder in SEARCHED:
        for path in sorted((ROOT / folder).rglob("*")):
            if path.suffix not in {".py", ".md", ".toml", ".txt", ".html", ".j2", ".cfg"}:
                continue
            relative = path.relative_to(ROOT).as_posix()
            if relative == "tests/test_citations.py" or "__pycache__" in path.parts:
                continue
            text = path.read_text(encoding="utf-8", errors="replace")
            found.extend(f"{relative}:{i}: {line.strip()}"
                         for i, line in enumerate(text.splitlines(), 1)
                         if OUTSIDE.search(line))
    return found


def test_no_citation_of_documents_outside_the_repository() -> None:
    offenders = _citations()
    assert offenders == [], "cite DEVELOPERS.md or a module instead:\n" + "\n".join(offenders)


def test_developers_guide_holds_the_cited_sections() -> None:
    guide = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    for section in ("## Architecture", "## The verdict rule", "## The reference order",
                    "## Exit codes", "## Conventions", "## How to add a metric",
                    "## How to add a kernel", "## How to add a solver plugin"):
        assert section in guide, section
