"""Observation loading: shape mismatches and non-numeric columns named precisely."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from harness.check.datafile import DataFileError, load_observations, observations_from_arrays


def test_length_mismatch_in_arrays():
    with pytest.raises(DataFileError, match="4 rows but values have 3"):
        observations_from_arrays(np.zeros((4, 2)), np.zeros(3))


def test_non_numeric_column(tmp_path):
    path = tmp_path / "t.csv"
    pd.DataFrame({"x": [0.1, "north", 0.3], "y": [0, 1, 2], "v": [1, 2, 3]}).to_csv(path,
                                                                               index=False)
    with pytest.raises(DataFileError, match="column 'x' is not numeric: 'north' in row"):
        load_observations(path, coords=["x", "y"], value="v")


def test_drop_missing_keeps_row_numbers(tmp_path):
    path = tmp_path / "t.parquet"
    pd.DataFrame({"x": [0.1, np.nan, 0.3], "v": [1.0, 2.0, 3.0]}).to_parquet(path)
    obs = load_observations(path, coords=["x"], value="v", drop_missing=True)
    assert obs.n == 2 and obs.rows.tolist() == [1, 3]
