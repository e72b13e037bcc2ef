"""Tests of pmap.geostats.kriging: pykrige agreement, invariants, lognormal back-transform."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from pmap.errors import ModelFitError
from pmap.geostats.kriging import (
    SingularSystemError,
    clip_to_limits,
    kriging_matrix,
    lognormal_ordinary_kriging,
    ordinary_kriging,
)
from pmap.geostats.variogram import VariogramModel


@pytest.fixture(scope="module")
def off_sample_targets(meuse) -> np.ndarray:
    coords, _ = meuse
    rng = np.random.default_rng(11)
    lo, hi = coords.min(axis=0), coords.max(axis=0)
    targets = lo + rng.random((400, 2)) * (hi - lo)
    assert cdist(targets, coords).min() > 1.0
    return targets


@pytest.mark.parametrize(
    "kind, nugget, psill, range_m",
    [("spherical", 0.05066, 0.59061, 897.0), ("exponential", 0.0, 0.7187, 1349.3)],
)
def test_matches_pykrige_builtin_models(meuse, off_sample_targets, kind, nugget, psill, range_m):
    ok_mod = pytest.importorskip("pykrige.ok")
    coords, zinc = meuse
    z = np.log(zinc)
    model = VariogramModel(kind, nugget, psill, range_m)
    ok = ok_mod.OrdinaryKriging(
        coords[:, 0], coords[:, 1], z, variogram_model=kind,
        variogram_parameters={"psill": psill, "range": range_m, "nugget": nugget},
    )
    ref_est, ref_var = ok.execute("points", off_sample_targets[:, 0], off_sample_targets[:, 1])
    res = ordinary_kriging(coords, z, off_sample_targets, model)
    # Source: pykrige OrdinaryKriging (predictions and 'ss' kriging variance)
    np.testing.assert_allclose(res.estimate, np.asarray(ref_est), atol=1e-6)
    np.testing.assert_allclose(res.variance, np.asarray(ref_var), atol=1e-6)


def test_matches_pykrige_custom_gaussian(meuse, off_sample_targets):
    ok_mod = pytest.importorskip("pykrige.ok")
    coords, zinc = meuse
    z = np.log(zinc)
    model = VariogramModel("gaussian", 0.1244, 0.5051, 712.6)

    def gaussian(params, d):
        psill, range_m, nugget = params
        return nugget + psill * (1.0 - np.exp(-3.0 * d**2 / range_m**2))

    ok = ok_mod.OrdinaryKriging(
        coords[:, 0], coords[:, 1], z, variogram_model="custom",
        variogram_parameters=[0.5051, 712.6, 0.1244], variogram_function=gaussian,
    )
    ref_est, ref_var = ok.execute("points", off_sample_targets[:, 0], off_sample_targets[:, 1])
    res = ordinary_kriging(coords, z, off_sample_targets, model)
    # Source: pykrige OrdinaryKriging with a custom variogram function
    np.testing.assert_allclose(res.estimate, np.asarray(ref_est), atol=1e-6)
    np.testing.assert_allclose(res.variance, np.asarray(ref_var), atol=1e-6)


def _scatter(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    coords = rng.random((n, 2)) * 1000.0
    values = 5.0 + np.sin(coords[:, 0] / 150.0) + rng.normal(scale=0.3, size=n)
    return coords, values


def test_zero_nugget_reproduces_samples_with_zero_variance():
    coords, values = _scatter(60, 1)
    res = ordinary_kriging(coords, values, coords, VariogramModel("exponential", 0.0, 1.0, 500.0))
    np.testing.assert_array_equal(res.estimate, values)
    np.testing.assert_array_equal(res.variance, 0.0)
    # A hair away from a sample the zero-nugget surface is continuous.
    near = ordinary_kriging(coords, values, coords + 1e-3, VariogramModel("exponential", 0.0, 1.0, 500.0))
    np.testing.assert_allclose(near.estimate, values, atol=1e-3)
    assert np.all(near.variance < 1e-4)


def test_sample_location_is_exact_even_with_nugget():
    coords, values = _scatter(40, 2)
    res = ordinary_kriging(coords, values, coords[:5], VariogramModel("spherical", 0.3, 0.7, 400.0))
    np.testing.assert_array_equal(res.estimate, values[:5])
    np.testing.assert_array_equal(res.variance, 0.0)


@pytest.mark.parametrize("kind", ["spherical", "exponential", "gaussian"])
def test_variance_never_negative_and_bounded(kind):
    coords, values = _scatter(50, 3)
    gx, gy = np.meshgrid(np.linspace(-200, 1200, 60), np.linspace(-200, 1200, 60))
    grid = np.column_stack([gx.ravel(), gy.ravel()])
    model = VariogramModel(kind, 0.05, 1.0, 300.0)
    res = ordinary_kriging(coords, values, grid, model)
    assert np.all(res.variance >= 0.0)
    assert np.all(np.isfinite(res.estimate))
    # Ordinary kriging variance cannot exceed 2 * sill for a target far from data.
    assert res.variance.max() <= 2.0 * model.sill


def test_weights_sum_to_one_constant_data_gives_constant_estimate():
    coords, _ = _scatter(45, 4)
    targets = np.random.default_rng(5).random((300, 2)) * 1400.0 - 200.0
    res = ordinary_kriging(coords, np.full(45, 7.25), targets, VariogramModel("spherical", 0.1, 1.0, 250.0))
    np.testing.assert_allclose(res.estimate, 7.25, rtol=0, atol=1e-10)


def test_grid_equals_point_by_point_and_chunking_is_invisible():
    coords, values = _scatter(35, 6)
    model = VariogramModel("spherical", 0.1, 0.9, 350.0)
    gx, gy = np.meshgrid(np.arange(0.0, 1000.0, 50.0), np.arange(0.0, 1000.0, 50.0))
    grid = np.column_stack([gx.ravel(), gy.ravel()])
    whole = ordinary_kriging(coords, values, grid, model)
    chunked = ordinary_kriging(coords, values, grid, model, chunk_size=7)
    np.testing.assert_allclose(chunked.estimate, whole.estimate, rtol=0, atol=1e-12)
    np.testing.assert_allclose(chunked.variance, whole.variance, rtol=0, atol=1e-12)
    np.testing.assert_allclose(chunked.lagrange, whole.lagrange, rtol=0, atol=1e-12)
    for k in range(0, grid.shape[0], 37):
        one = ordinary_kriging(coords, values, grid[k:k + 1], model)
        assert one.estimate[0] == pytest.approx(whole.estimate[k], abs=1e-12)
        assert one.variance[0] == pytest.approx(whole.variance[k], abs=1e-12)


def test_variance_equals_covariance_form_solution():
    coords, values = _scatter(30, 7)
    model = VariogramModel("exponential", 0.2, 0.8, 600.0)
    target = np.array([[410.0, 530.0]])
    n = coords.shape[0]
    c = np.ones((n + 1, n + 1))
    c[:n, :n] = model.covariance(cdist(coords, coords))
    c[n, n] = 0.0
    c0 = np.append(model.covariance(cdist(coords, target)[:, 0]), 1.0)
    sol = np.linalg.solve(c, c0)
    w, nu = sol[:n], sol[n]
    res = ordinary_kriging(coords, values, target, model)
    assert res.estimate[0] == pytest.approx(w @ values, abs=1e-10)
    assert res.variance[0] == pytest.approx(model.sill - w @ c0[:n] - nu, abs=1e-10)
    assert res.lagrange[0] == pytest.approx(-nu, abs=1e-10)


def test_duplicate_coordinates_raise_with_count():
    coords, values = _scatter(20, 8)
    coords = np.vstack([coords, coords[:2]])
    values = np.append(values, [1.0, 2.0])
    with pytest.raises(ModelFitError, match=r"2 duplicate sample coordinates.*[Aa]verage"):
        ordinary_kriging(coords, values, np.zeros((1, 2)), VariogramModel("spherical", 0.1, 1.0, 300.0))


def test_non_finite_input_raises_value_error():
    coords, values = _scatter(20, 9)
    model = VariogramModel("spherical", 0.1, 1.0, 300.0)
    bad = values.copy()
    bad[3] = np.nan
    with pytest.raises(ValueError, match="finite"):
        ordinary_kriging(coords, bad, np.zeros((1, 2)), model)
    with pytest.raises(ValueError, match="finite"):
        ordinary_kriging(coords, values, np.array([[np.inf, 0.0]]), model)


def test_singular_gaussian_system_is_refused():
    gx, gy = np.meshgrid(np.arange(0.0, 200.0, 10.0), np.arange(0.0, 200.0, 10.0))
    coords = np.column_stack([gx.ravel(), gy.ravel()])
    model = VariogramModel("gaussian", 0.0, 1.0, 2000.0)
    with pytest.raises(SingularSystemError, match="nugget"):
        ordinary_kriging(coords, np.ones(coords.shape[0]), np.zeros((1, 2)), model)


def test_kriging_matrix_layout():
    coords, _ = _scatter(5, 10)
    a = kriging_matrix(coords, VariogramModel("spherical", 0.1, 1.0, 300.0))
    assert a.shape == (6, 6)
    np.testing.assert_array_equal(np.diag(a), 0.0)
    np.testing.assert_array_equal(a[5, :5], 1.0)
    np.testing.assert_allclose(a, a.T)


def _gaussian_field(coords: np.ndarray, model: VariogramModel, n_real: int, seed: int) -> np.ndarray:
    cov = model.covariance(cdist(coords, coords))
    chol = np.linalg.cholesky(cov + 1e-10 * np.eye(coords.shape[0]))
    return (chol @ np.random.default_rng(seed).normal(size=(coords.shape[0], n_real))).T


def test_lognormal_back_transform_is_unbiased_and_bare_exp_is_not():
    # Synthetic stationary lognormal field, true log variogram known.
    rng = np.random.default_rng(12)
    samples = rng.random((120, 2)) * 1000.0
    holdout = rng.random((80, 2)) * 1000.0
    model = VariogramModel("spherical", 0.15, 0.85, 350.0)
    fields = 3.0 + _gaussian_field(np.vstack([samples, holdout]), model, n_real=40, seed=13)
    truth, pred, bare = [], [], []
    for y in fields:
        z = np.exp(y)
        res = lognormal_ordinary_kriging(samples, z[:120], holdout, model)
        log_res = ordinary_kriging(samples, y[:120], holdout, model)
        truth.append(z[120:])
        pred.append(res.estimate)
        bare.append(np.exp(log_res.estimate))
    truth_mean = np.mean(truth)
    bias = np.mean(pred) / truth_mean - 1.0
    bare_bias = np.mean(bare) / truth_mean - 1.0
    # from memory, unverified: Journel (1980) lognormal OK estimator is unbiased
    assert abs(bias) < 0.05
    assert bare_bias < -0.1
    assert abs(bare_bias) > 3 * abs(bias)


def test_lognormal_honours_samples_and_rejects_non_positive():
    coords, values = _scatter(30, 14)
    z = np.exp(values)
    res = lognormal_ordinary_kriging(coords, z, coords[:4], VariogramModel("spherical", 0.1, 0.9, 300.0))
    np.testing.assert_allclose(res.estimate, z[:4], rtol=1e-12)
    np.testing.assert_array_equal(res.variance, 0.0)
    bad = z.copy()
    bad[0] = 0.0
    with pytest.raises(ValueError, match="> 0"):
        lognormal_ordinary_kriging(coords, bad, coords[:1], VariogramModel("spherical", 0.1, 0.9, 300.0))


def test_lognormal_formulas_from_log_space_result():
    coords, values = _scatter(30, 15)
    targets = np.array([[100.0, 900.0], [555.0, 444.0]])
    model = VariogramModel("exponential", 0.05, 0.5, 400.0)
    log_res = ordinary_kriging(coords, values, targets, model)
    res = lognormal_ordinary_kriging(coords, np.exp(values), targets, model)
    expected = np.exp(log_res.estimate + log_res.variance / 2 - log_res.lagrange)
    np.testing.assert_allclose(res.estimate, expected, rtol=1e-12)
    np.testing.assert_allclose(res.variance, expected**2 * np.expm1(log_res.variance), rtol=1e-12)


def test_clip_to_limits_counts_and_keeps_nan():
    est = np.array([-0.4, 0.0, 3.0, 101.0, np.nan])
    clipped, n = clip_to_limits(est, (0.0, 100.0))
    np.testing.assert_array_equal(clipped, [0.0, 0.0, 3.0, 100.0, np.nan])
    assert n == 2
    assert est[0] == -0.4  # a new array; the input is untouched
    assert clip_to_limits(est[:3], (-np.inf, np.inf))[1] == 0
    with pytest.raises(ValueError, match="lo < hi"):
        clip_to_limits(est, (5.0, 5.0))


def test_kriging_overshoots_physical_limits_where_clipping_is_needed():
    # Why clipping exists: negative weights take the kriged CaCO3 below 0 % beside a step
    # from a calcareous patch to carbonate-free soil (gaussian model, small nugget).
    x = np.arange(0.0, 200.0, 10.0)
    coords = np.column_stack([x, np.zeros_like(x)])
    values = np.where(x < 100.0, 0.0, 8.0)
    model = VariogramModel("gaussian", 0.01, 10.0, 150.0)
    targets = np.column_stack([np.arange(0.0, 190.0, 2.5) + 1.25, np.zeros(76)])
    est = ordinary_kriging(coords, values, targets, model).estimate
    assert est.min() < -0.1
    clipped, n = clip_to_limits(est, (0.0, 100.0))
    assert clipped.min() == 0.0 and n == int(np.sum(est < 0))


def test_lognormal_log_moments_invert_the_back_transform():
    # Source: Journel (1980) back-transform, inverted algebraically; round trip must be exact.
    from pmap.geostats.kriging import lognormal_back_transform, lognormal_log_moments

    rng = np.random.default_rng(7)
    y = rng.normal(3.0, 0.5, 200)
    s2 = rng.uniform(0.0, 0.8, 200)
    mu = rng.normal(0.0, 0.05, 200)
    est, var = lognormal_back_transform(y, s2, mu)
    y2, s22 = lognormal_log_moments(est, var, mu)
    np.testing.assert_allclose(y2, y, rtol=0, atol=1e-12)
    np.testing.assert_allclose(s22, s2, rtol=0, atol=1e-12)


def test_kriged_moments_are_log_space_for_lognormal_kriging():
    # Source: definition of lognormal kriging (Journel 1980): log Z is kriged, so the
    # distribution at a target is normal in log space with the log-space kriging variance.
    from pmap.geostats.interpolate import KrigingSettings, interpolate
    from pmap.geostats.kriging import _krige

    rng = np.random.default_rng(3)
    coords = rng.uniform(0, 1000, (60, 2))
    values = np.exp(rng.normal(3.0, 0.8, 60))
    targets = rng.uniform(0, 1000, (30, 2))
    interp = interpolate("stp", coords, values, targets,
                         KrigingSettings(log_transform="always"))
    assert interp.log
    mean, variance = interp.kriged_moments()
    direct = _krige(coords, np.log(values), targets, interp.model, 20000)
    np.testing.assert_allclose(mean, direct.estimate, atol=1e-9)
    np.testing.assert_allclose(variance, direct.variance, atol=1e-9)
