"""Scaling fits against scipy.stats.linregress, closed forms and a coverage experiment."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from synthetic import write_synthetic_run

from harness.analysis import load_run
from harness.analysis.scaling import ScalingError, crossover, extrapolate, fit_power_law
from harness.analysis.scaling_table import scaling_rows

SIZES = np.array([500, 1000, 2000, 4000, 8000, 16000], dtype=float)


def test_slope_and_interval_equal_linregress():
    # Source: scipy.stats.linregress (slope, stderr) and the Student-t quantile, k-2 dof.
    rng = np.random.default_rng(1)
    t = 3e-7 * SIZES ** 1.4 * rng.lognormal(0, 0.1, SIZES.size)
    fit = fit_power_law(SIZES, t)
    ref = stats.linregress(np.log(SIZES), np.log(t))
    q = stats.t.ppf(0.975, SIZES.size - 2)
    assert fit.slope == pytest.approx(ref.slope, rel=1e-12)
    assert fit.intercept == pytest.approx(ref.intercept, rel=1e-12)
    assert fit.slope_se == pytest.approx(ref.stderr, rel=1e-10)
    assert fit.ci_low == pytest.approx(ref.slope - q * ref.stderr, rel=1e-10)
    assert fit.ci_high == pytest.approx(ref.slope + q * ref.stderr, rel=1e-10)
    assert fit.r_squared == pytest.approx(ref.rvalue ** 2, rel=1e-10)


def test_interval_covers_true_exponent_at_nominal_rate():
    # t = c n^b with lognormal noise satisfies the OLS assumptions on the log scale, so the
    # 95% t-interval covers b with probability 0.95 exactly; 400 seeds must fall within the
    # central 99.8% binomial range (scipy.stats.binom.ppf).
    b_true, seeds = 1.3, 400
    hits = 0
    for seed in range(seeds):
        rng = np.random.default_rng(seed)
        t = 2e-6 * SIZES ** b_true * rng.lognormal(0.0, 0.15, SIZES.size)
        fit = fit_power_law(SIZES, t)
        hits += fit.ci_low <= b_true <= fit.ci_high
    low, high = stats.binom.ppf([0.001, 0.999], seeds, 0.95)
    assert low <= hits <= high


def test_fewer_than_three_sizes_is_refused():
    with pytest.raises(ScalingError, match="at least 3 distinct sizes"):
        fit_power_law([1000, 2000, 2000], [1.0, 2.0, 2.1])


def test_non_positive_values_do_not_count_as_sizes():
    with pytest.raises(ScalingError, match="got 2"):
        fit_power_law([1000, 2000, 4000], [1.0, 2.0, 0.0])


def test_repeated_sizes_are_reduced_to_medians():
    fit = fit_power_law([10, 10, 10, 20, 40], [1.0, 5.0, 2.0, 4.0, 8.0])
    assert fit.values == (2.0, 4.0, 8.0)
    assert fit.slope == pytest.approx(1.0)  # closed form: 2, 4, 8 at 10, 20, 40


def test_local_slopes_show_curvature():
    # Closed form: t = n on [100, 1000], then t = n^2 / 1000 beyond: local slopes 1, 2.
    n = np.array([100.0, 1000.0, 10000.0])
    t = np.array([100.0, 1000.0, 1e5])
    fit = fit_power_law(n, t)
    assert fit.local_slopes == pytest.approx((1.0, 2.0))


def test_reference_slopes_inside_or_outside_interval():
    rng = np.random.default_rng(3)
    t = 1e-9 * SIZES ** 3.0 * rng.lognormal(0, 0.02, SIZES.size)
    fit = fit_power_law(SIZES, t)
    assert fit.reference_inside[3.0] is True
    assert fit.reference_inside[2.0] is False and fit.reference_inside[1.0] is False


def test_prediction_interval_closed_form():
    # Montgomery, Peck & Vining eq. 2.45, written out with numpy here.
    rng = np.random.default_rng(5)
    t = 1e-6 * SIZES ** 1.5 * rng.lognormal(0, 0.1, SIZES.size)
    fit = fit_power_law(SIZES, t)
    x, y = np.log(SIZES), np.log(t)
    slope, intercept = np.polyfit(x, y, 1)
    s = np.sqrt(np.sum((y - (intercept + slope * x)) ** 2) / (x.size - 2))
    x0 = np.log(1e6)
    half = stats.t.ppf(0.975, x.size - 2) * s * np.sqrt(
        1 + 1 / x.size + (x0 - x.mean()) ** 2 / np.sum((x - x.mean()) ** 2))
    e = extrapolate(fit, 1e6)
    assert e.value == pytest.approx(np.exp(intercept + slope * x0), rel=1e-9)
    assert e.low == pytest.approx(np.exp(intercept + slope * x0 - half), rel=1e-9)
    assert e.high == pytest.approx(np.exp(intercept + slope * x0 + half), rel=1e-9)
    assert e.extrapolated
    assert not extrapolate(fit, 3000).extrapolated


def test_crossover_of_exact_power_laws():
    # 1e-3 n = 1e-9 n^3  <=>  n = 1000 (closed form); measured points straddle 1000.
    n = np.array([250.0, 500.0, 2000.0, 4000.0])
    fast = fit_power_law(n, 1e-3 * n)
    dense = fit_power_law(n, 1e-9 * n ** 3)
    c = crossover(fast, dense)
    assert c.fitted == pytest.approx(1000.0, rel=1e-9)
    assert c.measured == pytest.approx(1000.0, rel=1e-9)


def test_no_crossover_when_dense_slope_is_not_larger():
    n = np.array([250.0, 500.0, 2000.0])
    c = crossover(fit_power_law(n, 1e-3 * n ** 2), fit_power_law(n, 1e-4 * n ** 2))
    assert np.isnan(c.fitted) and "do not cross" in c.note


def test_bootstrap_interval_is_reproducible_and_brackets_slope():
    rng = np.random.default_rng(11)
    sizes = SIZES[:5]
    repeats = {float(s): list(1e-6 * s ** 1.3 * rng.lognormal(0, 0.1, 7)) for s in sizes}
    med = [np.median(repeats[float(s)]) for s in sizes]
    a = fit_power_law(sizes, med, repeats=repeats, n_boot=400, rng=np.random.default_rng(0))
    b = fit_power_law(sizes, med, repeats=repeats, n_boot=400, rng=np.random.default_rng(0))
    assert (a.boot_low, a.boot_high) == (b.boot_low, b.boot_high)
    assert a.boot_low < a.slope < a.boot_high
    assert np.isnan(fit_power_law(sizes, med).boot_low)  # no repeats, no bootstrap


def test_run_level_fits_recover_planted_exponents(tmp_path):
    run = load_run(write_synthetic_run(tmp_path / "run", rng=np.random.default_rng(2),
                                       sizes=(500, 1000, 2000, 4000), tolerances=(1e-6,),
                                       seeds=(0,), probes=(16,), dense_max_n=4000))
    rows = {(r.solver, r.metric): r for r in scaling_rows(run, rng=0)}
    dense = rows[("dense", "t_factor")].fit
    assert dense.ci_low <= 3.0 <= dense.ci_high  # planted t = c n^3
    assert rows[("dense", "nbytes")].fit.slope == pytest.approx(2.0)  # planted 8 n^2
    hodlr = rows[("hodlr", "t_factor")]
    assert hodlr.crossover is not None and hodlr.crossover.fitted > 0
    assert not np.isnan(hodlr.fit.boot_low)


def test_run_level_refusal_is_reported(tmp_path):
    run = load_run(write_synthetic_run(tmp_path / "run", rng=np.random.default_rng(2),
                                       sizes=(500, 1000), tolerances=(1e-6,), seeds=(0,),
                                       probes=(16,)))
    rows = scaling_rows(run, rng=0)
    assert rows and all(r.fit is None and "at least 3" in r.refused for r in rows)
