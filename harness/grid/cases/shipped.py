"""The case files shipped with the package, read through ``importlib.resources``.

The single copy lives in ``harness/grid/casefiles/``; the repository's ``cases/`` is a
link to it, so ``covaudit run cases/smoke.toml`` and ``covaudit run smoke`` read the
same bytes.
"""

from __future__ import annotations

from importlib import resources
from importlib.abc import Traversable

PACKAGE = "harness.grid.casefiles"


def shipped_case_files() -> dict[str, Traversable]:
    """Shipped case files by name (the file stem), sorted by name."""
    folder = resources.files(PACKAGE)
    found = {entry.name.removesuffix(".toml"): entry for entry in folder.iterdir()
             if entry.name.endswith(".toml")}
    return dict(sorted(found.items()))


def shipped_case_text(name: str) -> str:
    """The text of the shipped case file ``name`` (stem, with or without ``.toml``).

    Raises
    ------
    KeyError
        When no shipped case file has that name; the message lists the names there are.
    """
    files = shipped_case_files()
    stem = name.removesuffix(".toml")
    if stem not in files:
        raise KeyError(f"no shipped case file named {name!r}; shipped: {', '.join(files)}")
    return files[stem].read_text(encoding="utf-8")
