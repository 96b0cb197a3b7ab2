"""Probe SEs stated with Student's t factor and Welch-Satterthwaite degrees of freedom."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from harness.linalg.probe_intervals import mean_standard_error, satterthwaite_dof, t_inflation


def test_t_factor_is_the_t_quantile_of_the_normal_two_sd_level():
    # Source: scipy.stats' t quantile; the normal limit is 1 (Abramowitz and Stegun
    # 1964, 26.7, from memory). The simulation below checks the coverage it gives.
    assert t_inflation(15) == pytest.approx(stats.t.ppf(stats.norm.cdf(2.0), 15) / 2.0)
    assert t_inflation(math.inf) == 1.0 and t_inflation(0) == math.inf
    assert t_inflation(1e6) == pytest.approx(1.0, abs=1e-5)
    np.testing.assert_allclose(t_inflation(np.array([15.0, math.inf])),
                               [t_inflation(15), 1.0])


def test_coverage_of_two_stated_se_is_the_normal_level_for_normal_probes():
    # Source: simulation against the normal 2-SD level Phi(2) - Phi(-2) = 0.9545 (the
    # 20,000 trials put its SE at 0.0015): 16 normal probe values per trial.
    rng = np.random.default_rng(3)
    values = rng.standard_normal((20000, 16))
    se = values.std(axis=1, ddof=1) / 4.0
    plain = np.mean(np.abs(values.mean(axis=1)) <= 2.0 * se)
    stated = np.mean(np.abs(values.mean(axis=1)) <= 2.0 * se * t_inflation(15))
    assert plain == pytest.approx(2 * stats.t.cdf(2.0, 15) - 1, abs=0.006)   # 0.936
    assert stated == pytest.approx(0.9545, abs=0.006)


def test_satterthwaite_dof():
    # Source: Satterthwaite 1946 (Biometrics Bulletin 2), nu = (sum v)^2 / sum v^2 / nu_i:
    # two equal variances of 15 dof give 30; a single nonzero term keeps its own.
    assert satterthwaite_dof([1.0, 1.0], [15, 15]) == pytest.approx(30.0)
    assert satterthwaite_dof([2.0, 1.0], [9, 99]) == pytest.approx(9.0 / (4 / 9 + 1 / 99))
    np.testing.assert_allclose(satterthwaite_dof([np.array([1.0, 0.0]),
                                                  np.array([0.0, 0.0])], [15, 31]),
                               [15.0, math.inf])


def test_mean_standard_error_is_the_t_stated_se_of_the_mean():
    # Source: scipy.stats.sem (s / sqrt(k)) times scipy's t quantile at the normal 2-SD
    # level over 2; one value has no SE (inf).
    values = np.random.default_rng(5).standard_normal(16)
    expected = stats.sem(values) * stats.t.ppf(stats.norm.cdf(2.0), 15) / 2.0
    assert mean_standard_error(values) == pytest.approx(expected, rel=1e-12)
    assert mean_standard_error(values[:1]) == math.inf
