"""Fixtures shared by several test modules."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest


@pytest.fixture
def plane_csv(tmp_path: Path) -> tuple[Path, pd.DataFrame]:
    """200 uniform points in the unit square with standard-normal values, as the CSV a
    user would give ``evaluate`` or ``check`` (columns x, y, v), and its frame."""
    rng = np.random.default_rng(4)
    pts = rng.random((200, 2))
    frame = pd.DataFrame({"x": pts[:, 0], "y": pts[:, 1], "v": rng.standard_normal(200)})
    path = tmp_path / "obs.csv"
    frame.to_csv(path, index=False)
    return path, frame
