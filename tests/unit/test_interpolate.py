"""Tests of pmap.geostats.interpolate: settings, log choice, the composite run."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from pmap.errors import ConfigError, InputError, InsufficientDataError, ModelFitError
from pmap.geostats.interpolate import (
    KrigingSettings,
    choose_log,
    interpolate,
    nugget_floor,
    sample_skewness,
)


def test_too_few_samples_message():
    rng = np.random.default_rng(0)
    coords = rng.random((12, 2)) * 100
    values = rng.random(12)
    with pytest.raises(InsufficientDataError) as info:
        interpolate("total_p", coords, values, coords)
    assert str(info.value) == (
        "total_p: 12 samples with values; kriging needs at least 30 (set kriging.min_samples to change)"
    )


def test_missing_values_are_left_out_before_counting():
    rng = np.random.default_rng(1)
    coords = rng.random((40, 2)) * 100
    values = rng.random(40)
    values[:15] = np.nan
    with pytest.raises(InsufficientDataError, match="ph: 25 samples"):
        interpolate("ph", coords, values, coords)


def test_auto_log_rule():
    rng = np.random.default_rng(2)
    skewed = rng.lognormal(mean=3.0, sigma=0.8, size=200)
    symmetric = rng.normal(6.5, 0.4, size=200)
    assert sample_skewness(skewed) > 1.0
    assert choose_log(skewed, "auto") is True
    assert choose_log(symmetric, "auto") is False
    with_zero = skewed.copy()
    with_zero[0] = 0.0
    assert choose_log(with_zero, "auto") is False
    assert choose_log(symmetric, "always") is True
    assert choose_log(skewed, "never") is False
    with pytest.raises(InputError, match="> 0"):
        choose_log(with_zero, "always")


def test_sample_skewness_of_known_values():
    # Three values 0, 0, 3: mean 1, m2 = 2, m3 = 2 -> 2 / 2**1.5
    assert sample_skewness(np.array([0.0, 0.0, 3.0])) == pytest.approx(2 / 2**1.5)
    assert sample_skewness(np.ones(5)) == 0.0


@pytest.mark.parametrize(
    "changes, key",
    [
        ({"models": ()}, "kriging.models"),
        ({"models": ("spherical", "linear")}, "kriging.models"),
        ({"models": ("spherical", "spherical")}, "kriging.models"),
        ({"n_bins": 2}, "kriging.n_bins"),
        ({"cutoff_fraction": 0.0}, "kriging.cutoff_fraction"),
        ({"cutoff_fraction": 1.5}, "kriging.cutoff_fraction"),
        ({"log_transform": "sometimes"}, "kriging.log_transform"),
        ({"min_samples": 2}, "kriging.min_samples"),
        ({"chunk_size": 0}, "kriging.chunk_size"),
    ],
)
def test_settings_validation_names_key(changes, key):
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
        KrigingSettings(**changes)


def test_settings_defaults_and_metadata():
    import dataclasses

    s = KrigingSettings(models=["gaussian", "spherical"])
    assert s.models == ("gaussian", "spherical")
    for f in dataclasses.fields(KrigingSettings):
        assert {"unit", "doc", "source"} <= set(f.metadata)
    assert KrigingSettings().min_samples == 30


def test_meuse_zinc_end_to_end(meuse):
    coords, zinc = meuse
    targets = np.column_stack([np.linspace(179000, 181000, 50), np.linspace(330500, 333000, 50)])
    out = interpolate("zinc", coords, zinc, targets)
    assert out.log is True  # zinc is right-skewed
    assert out.model.kind == "spherical"
    # Source: gstat fit.variogram documentation / vignette (Pebesma): log(zinc) spherical fit
    assert out.model.range == pytest.approx(897.0, rel=0.01)
    assert out.result.estimate.shape == (50,)
    assert np.all(out.result.estimate > 0) and np.all(out.result.variance >= 0)
    assert out.cv.n == 155
    summary = json.loads(json.dumps(out.as_dict()))
    assert summary["log"] is True
    assert summary["model"]["kind"] == "spherical"
    assert set(summary["candidates"]) == {"spherical", "exponential", "gaussian"}
    assert summary["variogram"]["count"][:3] == [57, 299, 419]
    assert set(summary["cv"]) == {"mean_error", "rmse", "msdr", "n"}


def test_never_log_and_model_subset(meuse):
    coords, zinc = meuse
    settings = KrigingSettings(models=("exponential",), log_transform="never")
    out = interpolate("zinc", coords, zinc, coords[:3], settings)
    assert out.log is False and out.model.kind == "exponential"
    assert list(out.candidates) == ["exponential"]
    np.testing.assert_allclose(out.result.estimate, zinc[:3])


def test_duplicates_named():
    rng = np.random.default_rng(4)
    coords = rng.random((40, 2)) * 500
    coords[1] = coords[0]
    with pytest.raises(ModelFitError, match="total_p: 1 duplicate"):
        interpolate("total_p", coords, rng.random(40) + 1, coords[:2])


def test_singular_gaussian_is_skipped_for_next_model():
    # A smooth bump on a dense grid: the gaussian fits best, with no nugget, and its
    # kriging system is singular; interpolate must fall back to another family.
    gx, gy = np.meshgrid(np.arange(0.0, 400.0, 20.0), np.arange(0.0, 400.0, 20.0))
    coords = np.column_stack([gx.ravel(), gy.ravel()])
    values = 10.0 + np.exp(-((coords[:, 0] - 200.0) ** 2 + (coords[:, 1] - 200.0) ** 2) / (2 * 150.0**2))
    settings = KrigingSettings(models=("gaussian", "spherical"), log_transform="never",
                               lab_error_sd_ph=0.0)
    with pytest.warns(UserWarning, match="skipping the gaussian"):
        out = interpolate("ph", coords, values, coords[:2] + 5.0, settings)
    assert out.model.kind == "spherical"


def test_lab_error_sets_the_least_nugget():
    # The same smooth bump: with the lab's pH error as the least nugget the gaussian fit
    # is kept, its nugget is the lab variance, and no system is singular.
    gx, gy = np.meshgrid(np.arange(0.0, 400.0, 20.0), np.arange(0.0, 400.0, 20.0))
    coords = np.column_stack([gx.ravel(), gy.ravel()])
    values = 6.0 + np.exp(-((coords[:, 0] - 200.0) ** 2 + (coords[:, 1] - 200.0) ** 2) / (2 * 150.0**2))
    settings = KrigingSettings(models=("gaussian",), log_transform="never", lab_error_sd_ph=0.05)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = interpolate("ph", coords, values, coords[:2] + 5.0, settings)
    assert out.model.nugget == pytest.approx(0.05**2, rel=1e-6)
    assert nugget_floor("ph", values, False, settings) == pytest.approx(0.0025)
    assert nugget_floor("total_p", np.array([100.0, 300.0]), False, settings) == pytest.approx(100.0)
    assert nugget_floor("total_p", values, True, settings) == pytest.approx(np.log1p(0.05**2))


def test_a_trend_that_never_levels_off_is_reported(meuse):
    # A plane across the points: the variogram rises to the cutoff and beyond, so the fitted
    # range sits on its bound; interpolate must say so. Meuse log(zinc) levels off (gstat's
    # range 897 m, inside the bound) and must not warn.
    coords, zinc = meuse
    plane = 0.002 * coords[:, 0] + 0.001 * coords[:, 1]
    settings = KrigingSettings(log_transform="never", models=("spherical",))
    with pytest.warns(UserWarning, match="upper bound"):
        interpolate("clay", coords, plane - plane.min() + 10.0, coords[:2] + 5.0, settings)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        interpolate("zinc", coords, np.log(zinc), coords[:2] + 5.0, settings)
