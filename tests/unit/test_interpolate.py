"""Tests of pmap.geostats.interpolate: settings, log choice, the composite run."""

from __future__ import annotations

import json
import warnings
from dataclasses import replace

import numpy as np
import pytest

from pmap.demo import truth
from pmap.errors import ConfigError, InputError, InsufficientDataError, ModelFitError, PmapWarning
from pmap.geostats.interpolate import (
    KrigingSettings,
    choose_log,
    interpolate,
    nugget_floor,
    sample_skewness,
)
from pmap.geostats.variogram import DEFAULT_MODELS, MAX_RANGE_FACTOR

# The earlier rule: log by skewness, model by weighted SSE (kriging.selection = 'sse').
SSE = KrigingSettings(selection="sse", models=DEFAULT_MODELS)


def _grid_samples(seed: int = 0, spacing: float = 100.0) -> np.ndarray:
    """About 90 jittered grid samples on a 1000 m x 900 m field (m)."""
    rng = np.random.default_rng(seed)
    gx, gy = np.meshgrid(np.arange(50.0, 1000.0, spacing), np.arange(50.0, 900.0, spacing))
    return np.column_stack([gx.ravel(), gy.ravel()]) + rng.uniform(-15, 15, (gx.size, 2))


def _bump(coords: np.ndarray, x0: float, y0: float, r: float) -> np.ndarray:
    return np.exp(-((coords[:, 0] - x0) ** 2 + (coords[:, 1] - y0) ** 2) / (2 * r**2))


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
    # pH is a logarithm already: never logged, whatever its skewness or the rule.
    assert choose_log(skewed, "auto", name="ph") is False
    assert choose_log(skewed, "always", name="ph") is False
    assert choose_log(skewed, "auto", name="total_p") is True


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
        ({"outlier_z": 0.0}, "kriging.outlier_z"),
        ({"outlier_z": float("inf")}, "kriging.outlier_z"),
        ({"drop_outliers": "yes"}, "kriging.drop_outliers"),
        ({"msdr_band": (2.0, 0.5)}, "kriging.msdr_band"),
        ({"msdr_band": (0.5,)}, "kriging.msdr_band"),
        ({"msdr_band": (1.2, 2.0)}, "kriging.msdr_band"),
        ({"msdr_band": (0.0, 2.0)}, "kriging.msdr_band"),
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
    assert KrigingSettings(msdr_band=[0.6, 1.5]).msdr_band == (0.6, 1.5)
    # Source: Iglewicz & Hoaglin (1993): modified z-score cut-off 3.5
    assert KrigingSettings().outlier_z == 3.5
    assert KrigingSettings().drop_outliers is False


def test_meuse_zinc_end_to_end(meuse):
    coords, zinc = meuse
    targets = np.column_stack([np.linspace(179000, 181000, 50), np.linspace(330500, 333000, 50)])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a well-behaved reference data set raises no warning
        out = interpolate("zinc", coords, zinc, targets,
                          KrigingSettings(selection="sse", models=DEFAULT_MODELS))
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
    assert {c["model"]["kind"] for c in summary["candidates"]} == set(DEFAULT_MODELS)
    assert [c["chosen"] for c in summary["candidates"]].count(True) == 1
    assert summary["variogram"]["count"][:3] == [57, 299, 419]
    assert set(summary["cv"]) == {"mean_error", "rmse", "msdr", "n"}
    assert summary["kind"] == "kriged" and summary["outliers"] == [] and summary["notes"] == []
    assert summary["diagnostics"]["pure_nugget"] is False
    assert summary["diagnostics"]["msdr_in_band"] is True


def test_never_log_and_model_subset(meuse):
    coords, zinc = meuse
    settings = KrigingSettings(models=("exponential",), log_transform="never")
    out = interpolate("zinc", coords, zinc, coords[:3], settings)
    assert out.log is False and out.model.kind == "exponential"
    assert {(c.model.kind, c.log) for c in out.candidates} == {("exponential", False)}
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
                               lab_error_sd_ph=0.0, selection="sse")
    with pytest.warns(UserWarning, match="skipping the gaussian"):
        out = interpolate("ph", coords, values, coords[:2] + 5.0, settings)
    assert out.model.kind == "spherical"
    # Chosen by cross-validation, the singular candidate is named and left out.
    with pytest.warns(UserWarning, match="gaussian, nugget fitted candidate was skipped"):
        out = interpolate("ph", coords, values, coords[:2] + 5.0,
                          replace(settings, selection="cross-validation"))
    assert out.model.kind == "spherical"
    assert any(c.skipped for c in out.candidates if c.model.kind == "gaussian")


def test_lab_error_sets_the_least_nugget():
    # The same smooth bump: with the lab's pH error as the least nugget the gaussian fit
    # is kept, its nugget is the lab variance, and no system is singular.
    gx, gy = np.meshgrid(np.arange(0.0, 400.0, 20.0), np.arange(0.0, 400.0, 20.0))
    coords = np.column_stack([gx.ravel(), gy.ravel()])
    values = 6.0 + np.exp(-((coords[:, 0] - 200.0) ** 2 + (coords[:, 1] - 200.0) ** 2) / (2 * 150.0**2))
    settings = KrigingSettings(models=("gaussian",), log_transform="never", lab_error_sd_ph=0.05)
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        out = interpolate("ph", coords, values, coords[:2] + 5.0, settings)
    # The bump has no noise at all, so a lab-error nugget overstates the errors: the only
    # warning is that the variance layer is too pessimistic (MSDR below the band).
    assert [str(w.message).split(":")[1] for w in seen] == [" the leave-one-out mean squared deviation ratio (MSDR) is 0.000188, outside kriging.msdr_band [0.5, 2]"]
    assert out.model.nugget == pytest.approx(0.05**2, rel=1e-6)
    assert nugget_floor("ph", values, False, settings) == pytest.approx(0.0025)
    assert nugget_floor("total_p", np.array([100.0, 300.0]), False, settings) == pytest.approx(100.0)
    assert nugget_floor("total_p", values, True, settings) == pytest.approx(np.log1p(0.05**2))
    # pH in log units (never used by interpolate): the same lab error as a relative one.
    assert nugget_floor("ph", values, True, settings) == pytest.approx(
        np.log1p((0.05 / values.mean()) ** 2))


def test_a_trend_that_never_levels_off_is_reported(meuse):
    # A plane across the points: a linear trend explains all the variance and the fitted
    # range sits on its bound; interpolate must say so. Meuse log(zinc) levels off (gstat's
    # range 897 m, inside the bound) and must not warn.
    coords, zinc = meuse
    plane = 0.002 * coords[:, 0] + 0.001 * coords[:, 1]
    settings = KrigingSettings(log_transform="never", models=("spherical",))
    with pytest.warns(PmapWarning, match=r"linear trend in x and y explains 100 % .* upper bound"):
        out = interpolate("clay", coords, plane - plane.min() + 10.0, coords[:2] + 5.0, settings)
    assert out.diagnostics["trend_r2"] == pytest.approx(1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        interpolate("zinc", coords, np.log(zinc), coords[:2] + 5.0, settings)


def test_no_trend_warning_for_a_bowl_without_a_sill():
    # A bowl rises from a point west of the middle in every direction: its variogram keeps
    # rising (the range hits its bound, which the old check alone warned about) and a plane
    # explains a significant share of it, but less than the 75 % pmap calls a trend.
    coords = _grid_samples(3)
    r2 = ((coords[:, 0] - 350.0) ** 2 + (coords[:, 1] - 450.0) ** 2) / 500.0**2
    values = 20.0 + 10.0 * r2 + np.random.default_rng(3).normal(0.0, 0.3, len(coords))
    settings = KrigingSettings(log_transform="never", models=("spherical",))
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        out = interpolate("clay", coords, values, coords[:3] + 5.0, settings)
    assert out.model.range >= 0.999 * MAX_RANGE_FACTOR * out.empirical.cutoff
    assert 0.3 < out.diagnostics["trend_r2"] < 0.6 and out.diagnostics["trend_p"] < 0.01
    assert not any("trend" in str(w.message) for w in seen)


def _skewed_ph_field():
    # ~90 samples, pH sd ~0.25, one alkaline spot that skews the values (skewness ~1.4).
    coords = _grid_samples(0)
    rng = np.random.default_rng(0)
    ph = np.round(6.1 + 1.0 * _bump(coords, 300.0, 600.0, 150.0)
                  + rng.normal(0.0, 0.1, len(coords)), 1)
    return coords, ph


def test_ph_is_never_log_kriged_and_keeps_its_structure():
    coords, ph = _skewed_ph_field()
    assert sample_skewness(ph) > 1.0 and 0.2 < ph.std() < 0.3
    # In log units the whole variance is below the pH nugget floor (0.1^2): a floor applied
    # there would force a pure-nugget fit and a map of the field mean.
    assert np.var(np.log(ph)) < 0.1**2
    hold = np.arange(len(ph)) % 9 == 4
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = interpolate("ph", coords[~hold], ph[~hold], coords[hold])
    assert out.log is False
    assert out.diagnostics["no_structure"] is False
    assert out.diagnostics["nugget_floor"] == pytest.approx(0.01)
    assert out.model.psill > 2 * out.model.nugget
    # The map beats the field mean on held-out samples by a wide margin.
    rmse = np.sqrt(np.mean((out.result.estimate - ph[hold]) ** 2))
    rmse_mean = np.sqrt(np.mean((ph[~hold].mean() - ph[hold]) ** 2))
    assert rmse < 0.7 * rmse_mean


def test_log_transform_always_is_ignored_for_ph_with_a_warning():
    coords, ph = _skewed_ph_field()
    with pytest.warns(PmapWarning, match="log_transform = 'always' is ignored for ph"):
        out = interpolate("ph", coords, ph, coords[:2] + 5.0, KrigingSettings(log_transform="always"))
    assert out.log is False
    assert "ignored" in out.notes[0]


def test_log_kriged_bounds_are_in_log_units():
    # A skewed positive property (total P ~600 mg/kg) kriged in log space: the nugget floor
    # is log(1 + cv^2) ~ 0.0025, not (cv x mean)^2 ~ 900 mg^2/kg^2, which would dwarf the
    # whole log variance and make the fit pure nugget.
    coords = _grid_samples(2)
    rng = np.random.default_rng(2)
    total_p = 450.0 * np.exp(0.9 * _bump(coords, 700.0, 300.0, 170.0)
                             + rng.normal(0.0, 0.06, len(coords)))
    settings = KrigingSettings()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = interpolate("total_p", coords, total_p, coords[:2] + 5.0, settings)
    assert out.log is True
    cv = settings.lab_error_cv
    assert out.diagnostics["nugget_floor"] == pytest.approx(np.log1p(cv**2))
    assert out.model.nugget >= np.log1p(cv**2) * (1 - 1e-9)
    assert out.model.sill < 1.0 < (cv * total_p.mean()) ** 2
    assert out.diagnostics["no_structure"] is False


def test_constant_property_is_mapped_as_that_constant():
    coords = _grid_samples(4)
    targets = coords[:7] + 3.0
    for rule in ("auto", "always"):  # "always" would refuse zeros if it were asked
        with pytest.warns(PmapWarning, match="all 90 samples hold the same value, 0"):
            out = interpolate("caco3", coords, np.zeros(len(coords)), targets,
                              KrigingSettings(log_transform=rule), limits=(0.0, 100.0))
        assert out.kind == "constant" and out.log is False
        np.testing.assert_array_equal(out.result.estimate, 0.0)
        np.testing.assert_array_equal(out.result.variance, 0.0)
        assert (out.cv.mean_error, out.cv.rmse, out.cv.n) == (0.0, 0.0, 90)
        assert np.isnan(out.cv.msdr)
    summary = json.loads(json.dumps(out.as_dict()))
    assert summary["kind"] == "constant" and summary["model"]["kind"] == "constant"
    assert summary["model"]["sill"] == 0.0 and summary["candidates"] == []
    assert out.model(np.array([0.0, 100.0])).tolist() == [0.0, 0.0]


def test_one_slip_is_named_with_id_and_row_and_the_flat_fit_explained():
    # One total P typed 100x too large: the fit turns pure nugget and the map flat. The
    # warning must name the sample and say what the map is.
    coords = _grid_samples(1)
    rng = np.random.default_rng(1)
    soil = truth(coords[:, 0] + 330_000.0, coords[:, 1] + 4_443_000.0)  # the demo's total P
    total_p = soil["total_p"] * np.exp(rng.normal(0.0, 0.06, len(coords)))
    total_p[17] *= 100.0
    ids = np.array([f"S-{i:03d}" for i in range(len(coords))])
    rows = np.arange(len(coords)) + 2
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        out = interpolate("total_p", coords, total_p, coords[::9] + 5.0, SSE, ids=ids, rows=rows)
    texts = [str(w.message) for w in seen]
    assert any("S-017 (row 19)" in t and "potential outliers" in t and "kept" in t for t in texts)
    # The fit is degenerate either way: pure nugget, or a range far below the spacing.
    assert any(("is pure nugget" in t or "leaves neighbouring samples uncorrelated" in t)
               and "field mean" in t for t in texts)
    assert any("MSDR" in t and "outside kriging.msdr_band" in t for t in texts)
    assert out.diagnostics["no_structure"] is True
    assert {(o.id, o.row, o.kind) for o in out.outliers} == {
        ("S-017", 19, "value"), ("S-017", 19, "cross-validation")}
    entry = out.as_dict()["outliers"][0]
    assert set(entry) == {"id", "row", "value", "z", "kind", "dropped"}
    assert entry["value"] == pytest.approx(total_p[17]) and abs(entry["z"]) > 3.5
    assert entry["dropped"] is False
    assert np.ptp(out.result.estimate) < 0.05 * np.ptp(total_p[total_p < 5000])

    with pytest.warns(PmapWarning, match="S-017 .*left out and the variogram refitted"):
        dropped = interpolate("total_p", coords, total_p, coords[::9] + 5.0,
                              replace(SSE, drop_outliers=True), ids=ids, rows=rows)
    assert dropped.cv.n == len(coords) - 1 and dropped.diagnostics["n_dropped"] == 1
    assert all(o.dropped for o in dropped.outliers if o.id == "S-017")
    assert dropped.diagnostics["no_structure"] is False
    assert np.ptp(dropped.result.estimate) > 0.3 * np.ptp(total_p[total_p < 5000])
    # Dropping is refused when it would leave fewer than kriging.min_samples.
    strict = KrigingSettings(drop_outliers=True, min_samples=len(coords))
    with pytest.warns(PmapWarning, match="kept: without them 89 samples would remain"):
        kept = interpolate("total_p", coords, total_p, coords[:2] + 5.0, strict, ids=ids)
    assert kept.cv.n == len(coords) and not any(o.dropped for o in kept.outliers)


def test_limits_clip_the_estimate_the_summary_uses():
    # CaCO3 rises from 0 to 8 % across the field: ordinary kriging overshoots below 0 %
    # beside the rise; with limits the estimate itself (result.estimate) is clipped.
    coords = _grid_samples(5, spacing=50.0)
    rng = np.random.default_rng(5)
    rise = 8.0 * np.clip((coords[:, 0] - 450.0) / 100.0, 0.0, 1.0)
    caco3 = np.clip(rise + rng.normal(0.0, 0.1, len(coords)), 0.0, None)
    gx, gy = np.meshgrid(np.arange(5.0, 1000.0, 10.0), np.arange(5.0, 900.0, 10.0))
    targets = np.column_stack([gx.ravel(), gy.ravel()])
    settings = KrigingSettings(models=("gaussian",))
    free = interpolate("caco3", coords, caco3, targets, settings)
    assert free.result.estimate.min() < -0.05  # the premise: kriging overshoots
    with pytest.warns(PmapWarning, match=r"caco3: \d+ cell\(s\) .* kriged outside 0-100"):
        out = interpolate("caco3", coords, caco3, targets, settings, limits=(0.0, 100.0))
    assert out.result.estimate.min() == 0.0
    assert out.diagnostics["clipped_cells"] == int(np.sum(free.result.estimate < 0))
    np.testing.assert_array_equal(out.result.variance, free.result.variance)


def test_many_large_errors_are_a_boundary_not_outliers():
    # A sharp step from carbonate-free to 8 % CaCO3: the samples beside it have huge
    # leave-one-out errors, and half the field is "extreme" by value. They are not slips:
    # none is listed or dropped as an outlier, and the warning says what it is.
    coords = _grid_samples(5, spacing=50.0)
    rng = np.random.default_rng(5)
    caco3 = np.clip(np.where(coords[:, 0] > 500.0, 8.0, 0.0)
                    + rng.normal(0.0, 0.05, len(coords)), 0.0, None)
    settings = KrigingSettings(models=("gaussian",), drop_outliers=True)
    with pytest.warns(PmapWarning, match="not single slips.*None were dropped"):
        out = interpolate("caco3", coords, caco3, coords[:3] + 5.0, settings)
    assert out.outliers == () and out.diagnostics["n_dropped"] == 0
    assert out.diagnostics["n_large_errors"] > 0.05 * len(coords)
    assert out.cv.n == len(coords)
