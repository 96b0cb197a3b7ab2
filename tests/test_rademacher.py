"""One Rademacher generator: ``harness.linalg.rademacher.rademacher_probes``.

The trace estimators, the exact-operator reference and the audit's probe block all draw
their +-1 probes through it, so one seed gives one probe block everywhere.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from harness.audit import sides
from harness.likelihood.trace import probes
from harness.linalg.rademacher import rademacher_probes

HARNESS = Path(__file__).resolve().parents[1] / "harness"
HOME = HARNESS / "linalg" / "rademacher.py"
GENERATOR = re.compile(r"integers\(\s*0\s*,\s*2\b|choice\([^)]*-1(\.0)?\s*,\s*1")


def test_no_second_generator_in_harness() -> None:
    found = [f"{p.relative_to(HARNESS)}:{i}" for p in sorted(HARNESS.rglob("*.py"))
             if p != HOME
             for i, line in enumerate(p.read_text(encoding="utf-8").splitlines(), 1)
             if GENERATOR.search(line)]
    assert found == []
    assert sides.rademacher is rademacher_probes
    assert probes.rademacher_probes is rademacher_probes  # the trace estimators' import path


def test_same_entries_as_the_former_generators() -> None:
    # The generators it replaced drew rng.choice([-1.0, 1.0], size); numpy draws the
    # same integers for both, so stored results are unchanged.
    former = np.random.default_rng(7).choice(np.array([-1.0, 1.0]), size=(300, 5))
    np.testing.assert_array_equal(rademacher_probes(300, 5, np.random.default_rng(7)), former)
