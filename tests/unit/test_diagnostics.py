"""Tests of pmap.geostats.diagnostics: pure nugget, trend test, near-coincident pairs."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from pmap.geostats.diagnostics import (
    PURE_NUGGET_FRACTION,
    close_pairs,
    first_bin_weight_share,
    is_pure_nugget,
    linear_trend,
    neighbour_correlation,
    neighbour_spacing,
    range_at_bound,
)
from pmap.geostats.variogram import MAX_RANGE_FACTOR, EmpiricalVariogram, VariogramModel


def test_pure_nugget_threshold():
    assert is_pure_nugget(VariogramModel("spherical", 1.0, 0.0, 100.0))
    at = PURE_NUGGET_FRACTION / (1 - PURE_NUGGET_FRACTION)  # psill / nugget at the line
    assert is_pure_nugget(VariogramModel("spherical", 1.0, 0.99 * at, 100.0))
    assert not is_pure_nugget(VariogramModel("spherical", 1.0, 1.01 * at, 100.0))
    assert not is_pure_nugget(VariogramModel("spherical", 0.05, 0.6, 900.0))


def test_trend_of_a_plane_and_of_noise():
    rng = np.random.default_rng(0)
    coords = rng.random((80, 2)) * 500.0
    plane = 3.0 + 0.01 * coords[:, 0] - 0.02 * coords[:, 1]
    exact = linear_trend(coords, plane)
    assert exact.r2 == 1.0 and exact.p_value == 0.0
    noise = linear_trend(coords, rng.normal(size=80))
    assert noise.r2 < 0.15 and noise.p_value > 0.01
    flat = linear_trend(coords, np.full(80, 2.0))
    assert (flat.r2, flat.p_value) == (0.0, 1.0)
    with pytest.raises(ValueError, match="at least 4"):
        linear_trend(coords[:3], plane[:3])


def test_trend_r2_and_f_against_scipy_linregress():
    # With y proportional to x the plane reduces to a line in x: R^2 is linregress's r^2,
    # and the plane's F with (2, n - 3) degrees of freedom follows from it.
    rng = np.random.default_rng(1)
    x = np.sort(rng.random(40)) * 300.0
    coords = np.column_stack([x, rng.random(40) * 300.0])
    values = 0.02 * x + rng.normal(0.0, 1.0, 40)
    test = linear_trend(coords, values)
    # Source: scipy.stats (linregress for the x-only fit, f for the F distribution)
    line = stats.linregress(x, values)
    assert test.r2 >= line.rvalue**2 - 1e-12  # a plane fits at least as well as the line
    assert test.f == pytest.approx((test.r2 / 2) / ((1 - test.r2) / 37))
    assert test.p_value == pytest.approx(stats.f.sf(test.f, 2, 37))


def test_close_pairs_found_and_sorted():
    coords = np.array([[0.0, 0.0], [100.0, 0.0], [0.01, 0.0], [100.0, 0.2], [50.0, 50.0]])
    np.testing.assert_array_equal(close_pairs(coords, 0.25), [[0, 2], [1, 3]])
    assert close_pairs(coords, 0.001).shape == (0, 2)
    with pytest.raises(ValueError):
        close_pairs(coords, -1.0)


def test_first_bin_weight_share():
    # Weights N_h / h^2: 10 / 0.01^2 = 1e5 against 100 / 50^2 = 0.04 and 100 / 100^2 = 0.01
    emp = EmpiricalVariogram(np.array([0.01, 50.0, 100.0]), np.ones(3), np.array([10, 100, 100]), 150.0)
    assert first_bin_weight_share(emp) == pytest.approx(1e5 / (1e5 + 0.05))
    even = EmpiricalVariogram(np.array([10.0, 20.0]), np.ones(2), np.array([100, 400]), 30.0)
    assert first_bin_weight_share(even) == pytest.approx(0.5)


def test_range_at_bound():
    emp = EmpiricalVariogram(np.array([10.0, 20.0, 30.0]), np.ones(3), np.ones(3, int), 100.0)
    assert range_at_bound(VariogramModel("spherical", 0.0, 1.0, MAX_RANGE_FACTOR * 100.0), emp)
    assert not range_at_bound(VariogramModel("spherical", 0.0, 1.0, 150.0), emp)


def test_neighbour_spacing_and_correlation():
    gx, gy = np.meshgrid(np.arange(0.0, 1000.0, 100.0), np.arange(0.0, 800.0, 100.0))
    coords = np.column_stack([gx.ravel(), gy.ravel()])
    assert neighbour_spacing(coords) == pytest.approx(100.0)
    assert neighbour_spacing(coords[:1]) == 0.0
    # A spherical range shorter than the spacing: neighbours are uncorrelated.
    assert neighbour_correlation(VariogramModel("spherical", 0.01, 0.3, 41.0), 100.0) == 0.0
    # Spherical at h = a/2: C/C0 = psill (1 - 1.5 * 0.5 + 0.5 * 0.125) / sill
    model = VariogramModel("spherical", 0.2, 0.8, 200.0)
    assert neighbour_correlation(model, 100.0) == pytest.approx(0.8 * (1 - 0.6875) / 1.0)
    assert neighbour_correlation(VariogramModel("spherical", 1.0, 0.0, 500.0), 100.0) == 0.0
