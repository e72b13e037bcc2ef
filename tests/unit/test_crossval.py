"""Tests of pmap.geostats.crossval: leave-one-out figures and the Dubrule shortcut."""

from __future__ import annotations

import json

import numpy as np
import pytest

from pmap.errors import ModelFitError
from pmap.geostats.crossval import leave_one_out, loo_kriging
from pmap.geostats.kriging import lognormal_ordinary_kriging, ordinary_kriging
from pmap.geostats.variogram import VariogramModel, empirical_variogram, fit_variogram


@pytest.fixture(scope="module")
def meuse_model(meuse) -> VariogramModel:
    coords, zinc = meuse
    return fit_variogram(empirical_variogram(coords, np.log(zinc)), "spherical")


def _brute_force(coords, values, model, krige):
    est, var = np.empty(len(values)), np.empty(len(values))
    for i in range(len(values)):
        keep = np.arange(len(values)) != i
        res = krige(coords[keep], values[keep], coords[i:i + 1], model)
        est[i], var[i] = res.estimate[0], res.variance[0]
    return est, var


def test_meuse_log_zinc_figures_are_sensible(meuse, meuse_model):
    coords, zinc = meuse
    cv = leave_one_out(coords, np.log(zinc), meuse_model)
    assert cv.n == 155
    # common practice, no source: a sound model has mean error ~0 and MSDR ~1
    assert abs(cv.mean_error) < 0.03
    assert 0.6 < cv.msdr < 1.4
    assert 0.2 < cv.rmse < 0.6  # log units; the log(zinc) sill is ~0.64
    figures = json.loads(json.dumps(cv.as_dict()))
    assert set(figures) == {"mean_error", "rmse", "msdr", "n"}
    assert figures["rmse"] == pytest.approx(np.sqrt(np.mean(cv.errors**2)))
    assert figures["msdr"] == pytest.approx(np.mean(cv.errors**2 / cv.variances))


def test_shortcut_equals_brute_force_loop(meuse, meuse_model):
    coords, zinc = meuse
    y = np.log(zinc)
    cv = leave_one_out(coords, y, meuse_model)
    est, var = _brute_force(coords, y, meuse_model, ordinary_kriging)
    np.testing.assert_allclose(cv.errors, est - y, atol=1e-9)
    np.testing.assert_allclose(cv.variances, var, atol=1e-9)


def test_lognormal_shortcut_equals_brute_force_loop(meuse, meuse_model):
    coords, zinc = meuse
    cv = leave_one_out(coords, zinc, meuse_model, log=True)
    est, var = _brute_force(coords, zinc, meuse_model, lognormal_ordinary_kriging)
    np.testing.assert_allclose(cv.errors, est - zinc, rtol=1e-9, atol=1e-7)
    np.testing.assert_allclose(cv.variances, var, rtol=1e-9)
    # Errors are in mg/kg; the back-transformed predictions are close to unbiased.
    # common practice, no source: mean error small against the mean (~470 mg/kg)
    assert abs(cv.mean_error) < 0.05 * zinc.mean()
    assert 0.5 < cv.msdr < 2.0


def test_lagrange_term_matches_kriging():
    rng = np.random.default_rng(2)
    coords = rng.random((25, 2)) * 300.0
    values = rng.normal(size=25)
    model = VariogramModel("exponential", 0.1, 1.0, 200.0)
    _, _, mu = loo_kriging(coords, values, model)
    for i in (0, 7, 24):
        keep = np.arange(25) != i
        ref = ordinary_kriging(coords[keep], values[keep], coords[i:i + 1], model)
        assert mu[i] == pytest.approx(ref.lagrange[0], abs=1e-10)


def test_too_few_or_duplicate_samples():
    model = VariogramModel("spherical", 0.0, 1.0, 10.0)
    with pytest.raises(ModelFitError, match="at least 3"):
        leave_one_out(np.zeros((2, 2)) + [[0, 0], [1, 1]], np.array([1.0, 2.0]), model)
    coords = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 0.0], [3.0, 3.0]])
    with pytest.raises(ModelFitError, match="duplicate"):
        leave_one_out(coords, np.arange(4.0), model)


def test_standardized_errors_are_in_the_units_kriged(meuse, meuse_model):
    coords, zinc = meuse
    y = np.log(zinc)
    raw = leave_one_out(coords, y, meuse_model)
    np.testing.assert_allclose(raw.standardized, raw.errors / np.sqrt(raw.variances))
    # Lognormal: errors in mg/kg, standardized errors in log units, equal to those of
    # ordinary kriging of the logarithms (not of the back-transformed figures).
    logged = leave_one_out(coords, zinc, meuse_model, log=True)
    np.testing.assert_allclose(logged.standardized, raw.standardized, rtol=1e-12)
    assert not np.allclose(logged.standardized, logged.errors / np.sqrt(logged.variances))
    # common practice, no source: a sound model gives standardized errors of sd ~1
    assert 0.7 < np.std(logged.standardized) < 1.3


def test_limits_clip_the_predictions_before_the_errors():
    # A step from 0 to 8 % CaCO3: leave-one-out predictions beside it overshoot below 0.
    x = np.arange(0.0, 200.0, 10.0)
    coords = np.column_stack([x, (x % 20.0) * 0.5])
    values = np.where(x < 100.0, 0.0, 8.0)
    model = VariogramModel("gaussian", 0.01, 10.0, 150.0)
    free = leave_one_out(coords, values, model)
    assert (free.errors + values).min() < 0
    clipped = leave_one_out(coords, values, model, limits=(0.0, 100.0))
    np.testing.assert_allclose(clipped.errors + values,
                               np.clip(free.errors + values, 0.0, 100.0), atol=1e-12)
    assert clipped.rmse < free.rmse
    np.testing.assert_array_equal(clipped.standardized, free.standardized)
