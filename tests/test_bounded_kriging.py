"""Kriging at bounded cost: tiled means and variances equal the dense formulas, no n x m
cross-covariance is formed, the holdout caps and their errors (issue 22, items 1-3, 6).

The expected values come from the kriging equations evaluated directly with numpy on the
whole n x m cross-covariance (Rasmussen and Williams 2006, eqs. 2.25-2.26; Cressie 1993,
eqs. 3.4.60-3.4.61 for the GLS mean), built in ``universal_kriging`` below.
"""

from __future__ import annotations

import numpy as np
import pytest
import sklearn.gaussian_process.kernels as sk

from harness.audit import engine
from harness.audit.audit_references import build_reference, reference_by_metric
from harness.audit.audit_sampling import (
    HoldoutSizeError,
    audit_draws,
    holdout_size,
    variance_positions,
)
from harness.audit.metrics.efficiency import prediction_efficiency
from harness.audit.metrics.held_out_scale import held_out_scale
from harness.audit.sides import kriging_side, kriging_weights, line_cross_product, predictor_mse
from harness.likelihood import kriging
from harness.linalg.dense_cholesky import DenseCholesky
from harness.model import cross_tiles, design_matrix
from harness.model.kernels import Kernel, make_kernel
from harness.references.line_products import LineCrossProducts
from harness.references.operator import operator_kriging
from harness.solvers.registry import resolve_solver

KERNEL = make_kernel("matern32", {"variance": 1.3, "lengthscale": 0.3, "nugget": 0.05})
SHRUNK_TILE = 7          # columns per cross-covariance tile in these tests


def universal_kriging(points, y, kernel, new, mean):
    """Means and latent variances from the whole n x m cross-covariance (the formula)."""
    sigma = kernel.cross_covariance(points, points) + kernel.nugget * np.eye(len(points))
    cross = kernel.cross_covariance(points, new)
    f, f_new = design_matrix(points, mean), design_matrix(new, mean)
    sinv_y, sinv_cross = np.linalg.solve(sigma, y), np.linalg.solve(sigma, cross)
    m = cross.T @ sinv_y
    v = kernel.variance - np.einsum("ij,ij->j", cross, sinv_cross)
    if f.shape[1]:
        sinv_f = np.linalg.solve(sigma, f)
        gram = f.T @ sinv_f
        beta = np.linalg.solve(gram, sinv_f.T @ y)
        u = f_new.T - sinv_f.T @ cross
        m = f_new @ beta + cross.T @ (sinv_y - sinv_f @ beta)
        v = v + np.einsum("ij,ij->j", u, np.linalg.solve(gram, u))
    return m, v


@pytest.fixture()
def shrunk_tiles(monkeypatch):
    monkeypatch.setattr(cross_tiles, "TILE_COLUMNS", SHRUNK_TILE)
    return SHRUNK_TILE


@pytest.fixture()
def field():
    rng = np.random.default_rng(4)
    points = rng.random((260, 2))
    y = 2.0 + np.sin(4 * points[:, 0]) + 0.3 * rng.standard_normal(260)
    new = rng.random((45, 2))
    return points, y, new


@pytest.mark.parametrize("mean", ["zero", "constant", "linear"])
def test_tiled_kriging_equals_the_dense_formula(field, shrunk_tiles, mean):
    # Source: R&W 2006 eqs. 2.25-2.26, Cressie 1993 eqs. 3.4.60-3.4.61 (module docstring).
    points, y, new = field
    expected_mean, expected_var = universal_kriging(points, y, KERNEL, new, mean)
    at = np.array([0, 3, 8, 9, 20, 44])
    pred = kriging(DenseCholesky(points, KERNEL), points, y, KERNEL, new, mean=mean,
                   variance_at=at)
    np.testing.assert_allclose(pred.mean, expected_mean, rtol=0, atol=1e-10)
    np.testing.assert_allclose(pred.variance, expected_var[at], rtol=0, atol=1e-10)
    full = kriging(DenseCholesky(points, KERNEL), points, y, KERNEL, new, mean=mean)
    np.testing.assert_allclose(full.variance, expected_var, rtol=0, atol=1e-10)


@pytest.mark.parametrize("mean", ["zero", "linear"])
def test_tiled_operator_kriging_equals_the_dense_formula(field, shrunk_tiles, mean):
    # Source: the dense formula (module docstring); the operator's CG error stays within
    # its stated bounds, and with a tight preconditioner far below 1e-8.
    points, y, new = field
    expected_mean, expected_var = universal_kriging(points, y, KERNEL, new, mean)
    tight = resolve_solver("hodlr").factorize(points, KERNEL, KERNEL.theta, tol=1e-12,
                                              rng=0)
    at = np.array([1, 2, 30, 31, 32, 33, 34, 35, 36, 40])
    got = operator_kriging(points, y, KERNEL, new, mean=mean, preconditioner=tight,
                           variance_at=at, progress=False)
    assert got.converged and got.rigorous
    assert got.mean.shape == (45,) and got.variance.shape == (at.size,)
    assert np.all(np.abs(got.mean - expected_mean) <= got.mean_bound + 1e-9)
    assert np.all(np.abs(got.variance - expected_var[at]) <= got.variance_bound + 1e-9)
    np.testing.assert_allclose(got.mean, expected_mean, rtol=0, atol=1e-8)


def test_predictor_mse_in_blocks_equals_the_whole_weights_formula(field, shrunk_tiles):
    # Source: E_at = c00 - 2 lambda' c + lambda' Sigma lambda (Hong et al. 2021, as
    # written from memory in harness.audit.metrics.efficiency); the whole-array form is
    # ``prediction_efficiency``'s own, at 45 columns at once.
    points, _, new = field
    approx = make_kernel("matern32", {"variance": 1.3, "lengthscale": 0.25, "nugget": 0.05})
    fac = DenseCholesky(points, approx)
    exact = DenseCholesky(points, KERNEL)
    sigma = KERNEL.cross_covariance(points, points) + KERNEL.nugget * np.eye(len(points))
    blocks = predictor_mse(fac, points, KERNEL, new, mean="constant", matvec=exact.matvec)
    lam = kriging_weights(fac, points, KERNEL, new, mean="constant")
    cross = KERNEL.cross_covariance(points, new)
    whole = KERNEL.variance - 2 * np.sum(lam * cross, 0) + np.sum(lam * (sigma @ lam), 0)
    np.testing.assert_allclose(blocks, whole, rtol=1e-10, atol=1e-12)
    var = np.full(new.shape[0], 0.5)
    eff = prediction_efficiency(lam, cross, sigma @ lam, KERNEL.variance, var, var)
    assert eff.points == new.shape[0] and np.isfinite(eff.mloe)


def test_held_out_scale_uses_own_variances_and_the_smallest_elsewhere():
    # Source: the definition in harness.audit.metrics.held_out_scale (hand-computed).
    scale = held_out_scale(5, np.array([4.0, 0.25]), np.array([1, 3]))
    np.testing.assert_allclose(scale.sd, [0.5, 2.0, 0.5, 0.5, 0.5])
    assert scale.own.tolist() == [False, True, False, True, False]
    z = scale.errors(np.ones(5), np.zeros(5))
    np.testing.assert_allclose(z, [2.0, 0.5, 2.0, 2.0, 2.0])
    with pytest.raises(ValueError, match="every exact predictive variance is zero"):
        held_out_scale(3, np.array([0.0, np.nan]), np.array([0, 1]))


# -- caps and their errors -----------------------------------------------------------------

def test_holdout_and_variance_caps():
    # Source: issue 22's caps, min(10% of n, 2,000) means and 256 variances.
    assert holdout_size(65_536, 0.1) == 2000
    assert holdout_size(10_000, 0.1) == 1000
    assert holdout_size(65_536, 0.1, cap=300) == 300
    assert holdout_size(40, 0.1) == 5           # MIN_HOLDOUT
    at = variance_positions(2000, seed=3)
    assert at.size == 256 and np.all(np.diff(at) > 0) and at.max() < 2000
    np.testing.assert_array_equal(at, variance_positions(2000, seed=3))   # deterministic
    assert not np.array_equal(at, variance_positions(2000, seed=4))
    np.testing.assert_array_equal(variance_positions(100, 256, seed=0), np.arange(100))


def test_variance_stream_leaves_the_holdout_and_probes_unchanged():
    # Source: numpy's SeedSequence.spawn: child i has spawn_key (i,), whatever the count.
    hold, probes = audit_draws(500, holdout=50, probes=4, seed=9)
    variance_positions(50, 10, seed=9)
    hold2, probes2 = audit_draws(500, holdout=50, probes=4, seed=9)
    np.testing.assert_array_equal(hold, hold2)
    np.testing.assert_array_equal(probes, probes2)


@pytest.mark.parametrize(("kwargs", "option", "message"), [
    ({"cap": 0}, "holdout_points", "expected an integer >= 1, got 0"),
    ({"cap": 300}, "holdout_points", "fewer held-out points than the 300 data points"),
    ({"cap": 5000}, "holdout_points", "fewer held-out points than the 300 data points"),
])
def test_holdout_size_errors(kwargs, option, message):
    with pytest.raises(HoldoutSizeError, match=message) as info:
        holdout_size(300, 0.1, **kwargs)
    assert info.value.option == option


def test_variance_points_error():
    with pytest.raises(HoldoutSizeError, match="got 0") as info:
        variance_positions(50, 0, seed=0)
    assert info.value.option == "variance_points"


# -- no n x m array: every cross-covariance with held-out points is one tile --------------

def _record_held_out_tiles(monkeypatch, held: np.ndarray) -> list[tuple[int, int]]:
    """Shapes of every ``Kernel.cross_covariance`` whose second argument holds only
    held-out points (the kriging tiles)."""
    shapes: list[tuple[int, int]] = []
    original = Kernel.cross_covariance
    held_rows = {tuple(r) for r in np.round(held, 15)}

    def recording(self, points_a, points_b):
        out = original(self, points_a, points_b)
        rows = np.atleast_2d(np.asarray(points_b, dtype=float))
        if rows.shape[0] and all(tuple(r) in held_rows for r in np.round(rows, 15)):
            shapes.append(out.shape)
        return out

    monkeypatch.setattr(Kernel, "cross_covariance", recording)
    return shapes


@pytest.mark.parametrize("kind", ["dense", "operator"])
def test_the_audit_forms_no_whole_cross_covariance(field, shrunk_tiles, monkeypatch, kind):
    # Source: issue 22 item 3 (peak O(n x (preconditioner + tile))): at most SHRUNK_TILE
    # held-out columns per cross-covariance, on both sides, and every held-out point seen.
    points, y, _ = field
    hold, probes = audit_draws(points.shape[0], holdout=40, probes=4, seed=1)
    at = variance_positions(hold.size, 12, seed=1)
    data = engine.AuditData(points=points, y=y, kernel=KERNEL, mean="constant",
                            holdout=hold, fisher=None, probes=probes, variance_at=at)
    shapes = _record_held_out_tiles(monkeypatch, points[hold])
    solver = resolve_solver("hodlr")
    reference = build_reference(kind, data, solver=solver, solver_options={}, base_seed=0,
                                memory_budget=None, ladder_factor=100.0, probes=4,
                                isolate=False)
    result = engine.audit_tolerances(data, solver, (1e-8,), reference, seeds=(1,))
    (audit,) = result.tolerances
    assert not audit.verdict.failures
    assert shapes, "no kriging tile was recorded"
    assert max(cols for _, cols in shapes) <= SHRUNK_TILE
    assert sum(cols for _, cols in shapes) >= 2 * hold.size     # both sides, every point
    names = {m.name for m in audit.worst_metrics()}
    assert {"kriging_mean_sd", "kriging_var_ratio"} <= names
    by_metric = reference_by_metric(reference, data)
    assert by_metric["kriging"]["kind"] == kind
    assert by_metric["kriging"]["n_holdout"] == 40
    assert by_metric["kriging"]["n_variance_points"] == 12


@pytest.mark.parametrize("family,nu", [("exponential", 0.5), ("matern32", 1.5),
                                       ("matern52", 2.5)])
def test_line_cross_products_equal_sklearns_cross_covariance(family, nu):
    # Source: scikit-learn's Matern kernel (sklearn.gaussian_process.kernels.Matern, the
    # R&W 2006 eq. 4.14 form) times s2: k(x*, X) z, with a new point on an observed one.
    rng = np.random.default_rng(8)
    x, new = rng.random(300) * 4.0, rng.random(37) * 5.0 - 0.5
    new[3] = x[10]
    z = rng.standard_normal((300, 2))
    kernel = make_kernel(family, {"variance": 1.7, "lengthscale": 0.4, "nugget": 0.03})
    expected = 1.7 * sk.Matern(length_scale=0.4, nu=nu)(new[:, None], x[:, None]) @ z
    got = LineCrossProducts(x[:, None], new[:, None], kernel)(z)
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(LineCrossProducts(x, new, kernel)(z[:, 0]), expected[:, 0],
                               rtol=1e-12, atol=1e-12)


def test_line_kriging_takes_the_exact_cross_product_and_matches_the_formula(monkeypatch):
    # Source: the dense formula above (R&W 2006 eqs. 2.25-2.26, Cressie 1993 eq. 3.4.60):
    # on a line the audit's kriging side forms no cross-covariance tile for the means.
    rng = np.random.default_rng(9)
    points, new = rng.random((240, 1)) * 3.0, rng.random((30, 1)) * 3.0
    y = 1.0 + np.sin(3 * points[:, 0]) + 0.2 * rng.standard_normal(240)
    expected_mean, expected_var = universal_kriging(points, y, KERNEL, new, "constant")
    shapes = _record_held_out_tiles(monkeypatch, new)
    at = np.array([2, 5, 7])
    side = kriging_side("dense", DenseCholesky(points, KERNEL), points, y, KERNEL, new,
                        mean="constant", variance_at=at)
    assert sum(cols for _, cols in shapes) == at.size      # the variances' tile only
    np.testing.assert_allclose(side.mean, expected_mean, rtol=0, atol=1e-10)
    np.testing.assert_allclose(side.variance, expected_var[at], rtol=0, atol=1e-10)
    assert line_cross_product(np.c_[points, points], np.c_[new, new], KERNEL) is None
    assert line_cross_product(points, new, make_kernel("gaussian", {"lengthscale": 1.0})
                              ) is None
