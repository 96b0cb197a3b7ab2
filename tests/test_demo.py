"""The demo generator: deterministic, documented, drawn from its stated model."""

from __future__ import annotations

import numpy as np

from harness.check.demo_data import TRUE_MEAN, TRUE_PARAMS, generate_demo
from harness.references import dense_evaluate


def test_demo_is_deterministic_and_documented():
    a, b = generate_demo(n=400), generate_demo(n=400)
    assert a.frame.equals(b.frame)
    assert list(a.frame.columns) == ["probe_id", "easting_m", "northing_m", "transect", "vwc"]
    assert not a.frame[["easting_m", "northing_m"]].duplicated().any()
    for column in a.frame.columns:
        assert f"| {column} |" in a.dictionary
    assert a.truth()["lengthscale"] == TRUE_PARAMS["lengthscale"]


def test_demo_values_follow_the_true_model():
    # Source: for y ~ N(mu 1, Sigma), the whitened residual L^-1 (y - mu) is standard
    # normal: its mean square has expectation 1 and SD sqrt(2/n) (chi-square, n dof).
    demo = generate_demo(n=400)
    x = demo.frame[["easting_m", "northing_m"]].to_numpy()
    y = demo.frame["vwc"].to_numpy() - TRUE_MEAN
    ev = dense_evaluate(x, y, demo.kernel, mean="zero", score=False)
    n = y.size
    assert abs(ev.quadratic / n - 1.0) < 4 * np.sqrt(2.0 / n)
