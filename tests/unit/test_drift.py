"""Tests of pmap.geostats.drift: pykrige/gstools/gstat agreement, GLS trend, invariants."""

from __future__ import annotations

import csv
import os

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.distance import cdist

from pmap.errors import ModelFitError
from pmap.geostats.drift import (
    DriftKrigingResult,
    linear_drift,
    regression_residuals,
    universal_k_fold,
    universal_kriging,
    universal_leave_one_out,
)
from pmap.geostats.kriging import SingularSystemError, ordinary_kriging
from pmap.geostats.variogram import VariogramModel, empirical_variogram, fit_variogram

# Variogram of the log(zinc) residuals from a linear trend in x, y (plausible Meuse values,
# used only to compare solvers on the same model).
_MODELS = [("spherical", 0.08, 0.15, 870.0), ("exponential", 0.057, 0.176, 1020.0)]


@pytest.fixture(scope="module")
def meuse_dist(meuse) -> np.ndarray:
    """Normalised distance to the river Meuse (0-1) of the Meuse samples, shape (155,)."""
    skgstat = pytest.importorskip("skgstat")
    # Source: scikit-gstat sample data (skgstat/data/samples/meuse.txt, the copy of the
    # R package sp's meuse data), read from the installed package.
    path = os.path.join(os.path.dirname(skgstat.__file__), "data", "samples", "meuse.txt")
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    coords = np.array([[float(r["x"]), float(r["y"])] for r in rows])
    np.testing.assert_array_equal(coords, meuse[0])
    return np.array([float(r["dist"]) for r in rows])


@pytest.fixture(scope="module")
def targets(meuse) -> np.ndarray:
    """Off-sample points in the Meuse bounding box, plus the first sample's location."""
    coords, _ = meuse
    rng = np.random.default_rng(5)
    lo, hi = coords.min(axis=0), coords.max(axis=0)
    pts = lo + rng.random((300, 2)) * (hi - lo)
    assert cdist(pts, coords).min() > 1.0
    return np.vstack([pts, coords[:1]])


def _xy_drift(coords: np.ndarray, targets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    origin = coords.mean(axis=0)
    return linear_drift(coords, origin, 1000.0), linear_drift(targets, origin, 1000.0)


def _holdout(n: int) -> tuple[np.ndarray, np.ndarray]:
    test = np.zeros(n, dtype=bool)
    test[np.random.default_rng(3).choice(n, 35, replace=False)] = True
    return ~test, test


@pytest.mark.parametrize("kind, nugget, psill, range_m", _MODELS)
def test_regional_linear_matches_pykrige(meuse, targets, kind, nugget, psill, range_m):
    uk_mod = pytest.importorskip("pykrige.uk")
    coords, zinc = meuse
    z = np.log(zinc)
    uk = uk_mod.UniversalKriging(
        coords[:, 0], coords[:, 1], z, variogram_model=kind,
        variogram_parameters={"psill": psill, "range": range_m, "nugget": nugget},
        drift_terms=["regional_linear"],
    )
    ref_est, ref_var = uk.execute("points", targets[:, 0], targets[:, 1])
    ds, dt = _xy_drift(coords, targets)
    res = universal_kriging(coords, z, targets, VariogramModel(kind, nugget, psill, range_m),
                            drift_samples=ds, drift_targets=dt, chunk_size=64)
    # Source: pykrige UniversalKriging, drift_terms=['regional_linear']
    np.testing.assert_allclose(res.estimate, np.asarray(ref_est), rtol=0, atol=1e-6)
    np.testing.assert_allclose(res.variance, np.asarray(ref_var), rtol=0, atol=1e-6)
    assert res.estimate[-1] == z[0] and res.variance[-1] == 0.0


@pytest.mark.parametrize("kind, nugget, psill, range_m", _MODELS)
def test_external_drift_matches_pykrige_specified(meuse, meuse_dist, kind, nugget, psill,
                                                  range_m):
    uk_mod = pytest.importorskip("pykrige.uk")
    coords, zinc = meuse
    z, cov = np.log(zinc), np.sqrt(meuse_dist)
    train, test = _holdout(z.size)
    uk = uk_mod.UniversalKriging(
        coords[train, 0], coords[train, 1], z[train], variogram_model=kind,
        variogram_parameters={"psill": psill, "range": range_m, "nugget": nugget},
        drift_terms=["specified"], specified_drift=[cov[train]],
    )
    ref_est, ref_var = uk.execute("points", coords[test, 0], coords[test, 1],
                                  specified_drift_arrays=[cov[test]])
    res = universal_kriging(coords[train], z[train], coords[test],
                            VariogramModel(kind, nugget, psill, range_m),
                            drift_samples=cov[train], drift_targets=cov[test])
    # Source: pykrige UniversalKriging, drift_terms=['specified']
    np.testing.assert_allclose(res.estimate, np.asarray(ref_est), rtol=0, atol=1e-6)
    np.testing.assert_allclose(res.variance, np.asarray(ref_var), rtol=0, atol=1e-6)


def _gstools_model(kind: str, nugget: float, psill: float, range_m: float, ratio: float = 1.0,
                   angle: float = 0.0):
    gs = pytest.importorskip("gstools")
    # gstools' spherical len_scale is the range; its exponential len_scale is the scale,
    # a third of the practical range.
    cls, factor = {"spherical": (gs.Spherical, 1.0), "exponential": (gs.Exponential, 3.0)}[kind]
    return gs.krige, cls(dim=2, var=psill, nugget=nugget, len_scale=range_m / factor,
                         anis=ratio, angles=np.deg2rad(angle))


@pytest.mark.parametrize("kind, nugget, psill, range_m", _MODELS)
def test_universal_matches_gstools(meuse, targets, kind, nugget, psill, range_m):
    krige, cov_model = _gstools_model(kind, nugget, psill, range_m)
    coords, zinc = meuse
    z = np.log(zinc)
    uk = krige.Universal(cov_model, (coords[:, 0], coords[:, 1]), z, drift_functions="linear",
                         exact=True, pseudo_inv=False)
    ref_est, ref_var = uk((targets[:, 0], targets[:, 1]), mesh_type="unstructured",
                          return_var=True)
    ds, dt = _xy_drift(coords, targets)
    res = universal_kriging(coords, z, targets, VariogramModel(kind, nugget, psill, range_m),
                            drift_samples=ds, drift_targets=dt)
    # Source: gstools krige.Universal (drift_functions='linear', exact=True)
    np.testing.assert_allclose(res.estimate, ref_est, rtol=0, atol=1e-6)
    np.testing.assert_allclose(res.variance, ref_var, rtol=0, atol=1e-6)


def test_external_drift_anisotropic_matches_gstools(meuse, meuse_dist):
    krige, cov_model = _gstools_model("exponential", 0.05, 0.18, 1200.0, ratio=0.5, angle=40.0)
    coords, zinc = meuse
    z, cov = np.log(zinc), np.sqrt(meuse_dist)
    train, test = _holdout(z.size)
    ed = krige.ExtDrift(cov_model, (coords[train, 0], coords[train, 1]), z[train],
                        ext_drift=cov[train], exact=True, pseudo_inv=False)
    ref_est, ref_var = ed((coords[test, 0], coords[test, 1]), mesh_type="unstructured",
                          return_var=True, ext_drift=cov[test])
    model = VariogramModel("exponential", 0.05, 0.18, 1200.0, ratio=0.5, angle=40.0)
    res = universal_kriging(coords[train], z[train], coords[test], model,
                            drift_samples=cov[train], drift_targets=cov[test])
    # Source: gstools krige.ExtDrift (anis = minor/major, angles counter-clockwise, radians)
    np.testing.assert_allclose(res.estimate, ref_est, rtol=0, atol=1e-6)
    np.testing.assert_allclose(res.variance, ref_var, rtol=0, atol=1e-6)


def test_meuse_residual_variogram_matches_gstat(meuse, meuse_dist):
    coords, zinc = meuse
    coefficients, residuals, r2 = regression_residuals(np.log(zinc), np.sqrt(meuse_dist))
    emp = empirical_variogram(coords, residuals)
    assert emp.lag.size == 15
    model = fit_variogram(emp, "exponential")
    # Source: gstat, fit.variogram(variogram(log(zinc) ~ sqrt(dist), meuse),
    # vgm(1, "Exp", 900, 1)) as printed in the knitted output of
    # ucdavisdatalab/workshop-spatial-stats docs/03_geostatistics.md: Nug 0.05712112,
    # Exp psill 0.17641525, range 340.3105 (gstat's scale parameter = practical range / 3).
    assert model.nugget == pytest.approx(0.05712112, rel=0.02)
    assert model.psill == pytest.approx(0.17641525, rel=0.02)
    assert model.range == pytest.approx(3 * 340.3105, rel=0.02)
    assert coefficients[1] < 0 and 0 < r2 < 1


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    kind=st.sampled_from(["spherical", "exponential", "gaussian"]),
    nugget_share=st.floats(0.05, 0.9),
    range_m=st.floats(20.0, 2000.0),
    n=st.integers(3, 60),
)
def test_no_drift_equals_ordinary_kriging(seed, kind, nugget_share, range_m, n):
    rng = np.random.default_rng(seed)
    coords = rng.random((n, 2)) * 500.0
    values = rng.normal(size=n) * 3.0 + 10.0
    targets = np.vstack([rng.random((25, 2)) * 600.0 - 50.0, coords[:2]])
    sill = 2.5
    model = VariogramModel(kind, nugget_share * sill, (1 - nugget_share) * sill, range_m)
    ok = ordinary_kriging(coords, values, targets, model)
    res = universal_kriging(coords, values, targets, model, drift_samples=np.empty((n, 0)),
                            drift_targets=np.empty((targets.shape[0], 0)), chunk_size=7)
    np.testing.assert_allclose(res.estimate, ok.estimate, rtol=0, atol=1e-10)
    np.testing.assert_allclose(res.variance, ok.variance, rtol=0, atol=1e-10)
    # Without covariates the trend is the GLS mean, the same at every target.
    np.testing.assert_allclose(res.trend, res.coefficients[0], rtol=0, atol=1e-12)


def _correlated_field(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    coords = rng.random((n, 2)) * 1000.0
    noise_model = VariogramModel("exponential", 0.001, 0.01, 300.0)
    cov = noise_model.covariance(cdist(coords, coords))
    noise = np.linalg.cholesky(cov) @ rng.normal(size=n)
    return coords, noise, rng.random((200, 2)) * 1000.0


def test_trend_recovers_linear_plane():
    coords, noise, targets = _correlated_field(150, 21)
    a, b, c = 5.0, 0.004, -0.003  # value units, per m, per m

    def plane(xy: np.ndarray) -> np.ndarray:
        return a + b * xy[:, 0] + c * xy[:, 1]

    values = plane(coords) + noise
    model = VariogramModel("exponential", 0.001, 0.01, 300.0)
    res = universal_kriging(coords, values, targets, model, drift_samples=coords,
                            drift_targets=targets)
    assert isinstance(res, DriftKrigingResult)
    # The GLS coefficient error has covariance (F' C^-1 F)^-1: its squared Mahalanobis
    # length is chi-square with 3 degrees of freedom (99.9 % quantile 16.27).
    f = np.column_stack([np.ones(150), coords])
    gram = f.T @ np.linalg.solve(model.covariance(cdist(coords, coords)), f)
    err = res.coefficients - [a, b, c]
    assert float(err @ gram @ err) < 16.27
    # The plane spans 7 value units over the targets; the noise has sd 0.1.
    span = np.ptp(plane(targets))
    assert span > 5.0
    assert np.max(np.abs(res.trend - plane(targets))) < 0.03 * span
    # Ordinary kriging's constant mean misses the plane by far more.
    ok_mean = universal_kriging(coords, values, targets, model, drift_samples=np.empty((150, 0)),
                                drift_targets=np.empty((200, 0))).trend
    assert np.max(np.abs(ok_mean - plane(targets))) > 2.0


def test_trend_and_estimate_are_gls_formulas():
    coords, noise, targets = _correlated_field(80, 4)
    covariate = np.sin(coords[:, 0] / 150.0) + coords[:, 1] / 1000.0
    cov_t = np.sin(targets[:, 0] / 150.0) + targets[:, 1] / 1000.0
    values = 1.0 + 2.0 * covariate + noise
    model = VariogramModel("spherical", 0.002, 0.01, 400.0)
    res = universal_kriging(coords, values, targets, model, drift_samples=covariate,
                            drift_targets=cov_t, chunk_size=33)
    c = model.covariance(cdist(coords, coords))
    f = np.column_stack([np.ones(80), covariate])
    ci_f = np.linalg.solve(c, f)
    beta = np.linalg.solve(f.T @ ci_f, ci_f.T @ values)
    ft = np.column_stack([np.ones(200), cov_t])
    c0 = model.covariance(cdist(coords, targets))
    np.testing.assert_allclose(res.coefficients, beta, rtol=1e-10)
    np.testing.assert_allclose(res.trend, ft @ beta, rtol=0, atol=1e-10)
    estimate = ft @ beta + c0.T @ np.linalg.solve(c, values - f @ beta)
    np.testing.assert_allclose(res.estimate, estimate, rtol=0, atol=1e-10)
    # Extra drift terms can only add estimation variance.
    ok = ordinary_kriging(coords, values, targets, model)
    assert np.all(res.variance >= ok.variance - 1e-12)
    assert np.any(res.variance > ok.variance + 1e-6)


def test_exact_at_samples_and_chunking(meuse, targets):
    coords, zinc = meuse
    z = np.log(zinc)
    model = VariogramModel("spherical", 0.08, 0.15, 870.0)
    pts = np.vstack([targets[:50], coords[10:20]])
    ds, dt = _xy_drift(coords, pts)
    one = universal_kriging(coords, z, pts, model, drift_samples=ds, drift_targets=dt)
    many = universal_kriging(coords, z, pts, model, drift_samples=ds, drift_targets=dt,
                             chunk_size=3)
    np.testing.assert_array_equal(one.estimate[50:], z[10:20])
    np.testing.assert_array_equal(one.variance[50:], 0.0)
    assert np.all(one.variance[:50] > model.nugget)
    np.testing.assert_allclose(many.estimate, one.estimate, rtol=0, atol=1e-12)
    np.testing.assert_allclose(many.variance, one.variance, rtol=0, atol=1e-12)


def test_drift_units_do_not_change_the_prediction(meuse, targets):
    coords, zinc = meuse
    z = np.log(zinc)
    model = VariogramModel("exponential", 0.057, 0.176, 1020.0)
    ds, dt = _xy_drift(coords, targets)
    scaled = universal_kriging(coords, z, targets, model, drift_samples=ds, drift_targets=dt)
    raw = universal_kriging(coords, z, targets, model, drift_samples=coords,
                            drift_targets=targets)
    np.testing.assert_allclose(raw.estimate, scaled.estimate, rtol=0, atol=1e-10)
    np.testing.assert_allclose(raw.variance, scaled.variance, rtol=0, atol=1e-10)
    np.testing.assert_allclose(raw.trend, scaled.trend, rtol=0, atol=1e-10)
    np.testing.assert_allclose(raw.coefficients[1:], scaled.coefficients[1:] / 1000.0, rtol=1e-9)


def test_anisotropic_model_krige_in_isotropic_coords(meuse, meuse_dist):
    coords, zinc = meuse
    z, cov = np.log(zinc), np.sqrt(meuse_dist)
    train, test = _holdout(z.size)
    aniso = VariogramModel("spherical", 0.05, 0.2, 1500.0, ratio=0.4, angle=120.0)
    iso = VariogramModel("spherical", 0.05, 0.2, 1500.0)
    res = universal_kriging(coords[train], z[train], coords[test], aniso,
                            drift_samples=cov[train], drift_targets=cov[test])
    ref = universal_kriging(aniso.isotropic_coords(coords[train]), z[train],
                            aniso.isotropic_coords(coords[test]), iso,
                            drift_samples=cov[train], drift_targets=cov[test])
    np.testing.assert_allclose(res.estimate, ref.estimate, rtol=0, atol=1e-12)
    np.testing.assert_allclose(res.variance, ref.variance, rtol=0, atol=1e-12)
    plain = universal_kriging(coords[train], z[train], coords[test], iso,
                              drift_samples=cov[train], drift_targets=cov[test])
    assert np.max(np.abs(plain.estimate - res.estimate)) > 1e-3


def test_collinear_and_constant_drift_raise(meuse, meuse_dist, targets):
    coords, zinc = meuse
    z = np.log(zinc)
    model = VariogramModel("spherical", 0.08, 0.15, 870.0)
    ds, dt = _xy_drift(coords, targets)
    collinear = np.column_stack([ds, 2.0 * ds[:, 0] - 3.0 * ds[:, 1] + 1.0])
    collinear_t = np.column_stack([dt, 2.0 * dt[:, 0] - 3.0 * dt[:, 1] + 1.0])
    with pytest.raises(ModelFitError, match=r"drift columns \[0, 1, 2\] are collinear"):
        universal_kriging(coords, z, targets, model, drift_samples=collinear,
                          drift_targets=collinear_t)
    doubled = np.column_stack([ds[:, 0], meuse_dist, 3.0 * ds[:, 0]])
    with pytest.raises(ModelFitError, match=r"drift columns \[0, 2\] are collinear"):
        universal_kriging(coords, z, coords[:5], model, drift_samples=doubled,
                          drift_targets=doubled[:5])
    with pytest.raises(ModelFitError, match="collinear"):
        regression_residuals(z, collinear)
    const = np.column_stack([meuse_dist, np.full(z.size, 4.0)])
    with pytest.raises(ModelFitError, match="drift column 1 is constant"):
        universal_kriging(coords, z, coords[:5], model, drift_samples=const,
                          drift_targets=const[:5])
    with pytest.raises(ModelFitError, match="at least 4 samples"):
        universal_kriging(coords[:3], z[:3], targets, model, drift_samples=ds[:3],
                          drift_targets=dt)


def test_input_errors(meuse, targets):
    coords, zinc = meuse
    z = np.log(zinc)
    model = VariogramModel("spherical", 0.08, 0.15, 870.0)
    ds, dt = _xy_drift(coords, targets)
    with pytest.raises(ValueError, match="columns"):
        universal_kriging(coords, z, targets, model, drift_samples=ds, drift_targets=dt[:, :1])
    with pytest.raises(ValueError, match="drift_targets"):
        universal_kriging(coords, z, targets, model, drift_samples=ds, drift_targets=dt[:-1])
    bad = ds.copy()
    bad[3, 1] = np.nan
    with pytest.raises(ValueError, match="finite"):
        universal_kriging(coords, z, targets, model, drift_samples=bad, drift_targets=dt)
    dup = coords.copy()
    dup[1] = dup[0]
    with pytest.raises(ModelFitError, match="duplicate"):
        universal_kriging(dup, z, targets, model, drift_samples=ds, drift_targets=dt)
    with pytest.raises(SingularSystemError):
        universal_kriging(coords, z, targets, VariogramModel("gaussian", 0.0, 1.0, 3000.0),
                          drift_samples=ds, drift_targets=dt)


def test_regression_residuals_match_linregress(meuse, meuse_dist):
    stats = pytest.importorskip("scipy.stats")
    _, zinc = meuse
    z, x = np.log(zinc), np.sqrt(meuse_dist)
    coefficients, residuals, r2 = regression_residuals(z, x)
    ref = stats.linregress(x, z)
    # Source: scipy.stats.linregress
    np.testing.assert_allclose(coefficients, [ref.intercept, ref.slope], rtol=1e-12)
    assert r2 == pytest.approx(ref.rvalue**2, rel=1e-12)
    np.testing.assert_allclose(residuals, z - ref.intercept - ref.slope * x, rtol=0, atol=1e-12)
    mean_only, centred, r2_0 = regression_residuals(z, np.empty((z.size, 0)))
    np.testing.assert_allclose(mean_only, [z.mean()], rtol=1e-14)
    np.testing.assert_allclose(centred, z - z.mean(), rtol=0, atol=1e-14)
    assert r2_0 == pytest.approx(0.0, abs=1e-14)
    assert np.isnan(regression_residuals(np.ones(5), np.arange(5.0))[2])


def test_linear_drift_centres_and_scales():
    xy = np.array([[100.0, 200.0], [300.0, 200.0], [200.0, 500.0]])
    cols = linear_drift(xy)
    np.testing.assert_allclose(cols.mean(axis=0), 0.0, atol=1e-15)
    assert np.sqrt(np.mean(np.sum(cols**2, axis=1))) == pytest.approx(1.0, rel=1e-14)
    np.testing.assert_allclose(linear_drift(xy, origin=(100.0, 200.0), scale=100.0),
                               [[0.0, 0.0], [2.0, 0.0], [1.0, 3.0]])
    with pytest.raises(ValueError, match="scale"):
        linear_drift(xy, scale=0.0)
    with pytest.raises(ValueError, match="coincide"):
        linear_drift(np.ones((3, 2)))


_CV_MODELS = [
    VariogramModel("spherical", 0.08, 0.15, 870.0),
    VariogramModel("exponential", 0.05, 0.18, 1200.0, ratio=0.5, angle=40.0),
]


def _cv_drift(coords: np.ndarray, dist: np.ndarray, kind: str) -> np.ndarray:
    if kind == "linear":
        return linear_drift(coords, coords.mean(axis=0), 1000.0)
    if kind == "covariate":
        return np.sqrt(dist)
    return np.empty((coords.shape[0], 0))


@pytest.mark.parametrize("model", _CV_MODELS, ids=["isotropic", "anisotropic"])
@pytest.mark.parametrize("drift", ["linear", "covariate", "none"])
def test_leave_one_out_matches_brute_force(meuse, meuse_dist, model, drift):
    coords, zinc = meuse
    z = np.log(zinc)
    ds = _cv_drift(coords, meuse_dist, drift)
    est, var = universal_leave_one_out(coords, z, model, ds)
    n = z.size
    ref_est, ref_var = np.empty(n), np.empty(n)
    for i in range(n):
        keep = np.arange(n) != i
        res = universal_kriging(coords[keep], z[keep], coords[i : i + 1], model,
                                drift_samples=ds[keep], drift_targets=ds[i : i + 1])
        ref_est[i], ref_var[i] = res.estimate[0], res.variance[0]
    # common practice, no source: the identity must equal refitting-free re-kriging.
    np.testing.assert_allclose(est, ref_est, rtol=0, atol=1e-9)
    np.testing.assert_allclose(var, ref_var, rtol=0, atol=1e-9)
    assert np.all(var > model.nugget)
    assert np.max(np.abs(est - z)) > 0.1


@pytest.mark.parametrize("model", _CV_MODELS, ids=["isotropic", "anisotropic"])
@pytest.mark.parametrize("drift", ["linear", "covariate"])
def test_k_fold_matches_brute_force(meuse, meuse_dist, model, drift):
    coords, zinc = meuse
    z = np.log(zinc)
    ds = _cv_drift(coords, meuse_dist, drift)
    labels = np.array([3, 7, -1, 10, 2])
    folds = labels[np.random.default_rng(8).integers(0, 5, z.size)]
    est, var = universal_k_fold(coords, z, model, ds, folds)
    ref_est, ref_var = np.empty(z.size), np.empty(z.size)
    for label in labels:
        out = folds == label
        assert 10 < out.sum() < 60
        res = universal_kriging(coords[~out], z[~out], coords[out], model,
                                drift_samples=ds[~out], drift_targets=ds[out])
        ref_est[out], ref_var[out] = res.estimate, res.variance
    # common practice, no source: the block identity must equal re-kriging each fold.
    np.testing.assert_allclose(est, ref_est, rtol=0, atol=1e-9)
    np.testing.assert_allclose(var, ref_var, rtol=0, atol=1e-9)
    # Holding out more samples than one moves the predictions.
    loo_est, loo_var = universal_leave_one_out(coords, z, model, ds)
    assert np.max(np.abs(loo_est - est)) > 1e-3
    assert np.mean(var) > np.mean(loo_var)


def test_k_fold_with_singleton_folds_is_leave_one_out():
    coords, noise, _ = _correlated_field(60, 9)
    covariate = np.cos(coords[:, 1] / 200.0)
    values = 3.0 + covariate + noise
    model = VariogramModel("exponential", 0.001, 0.01, 300.0)
    est, var = universal_k_fold(coords, values, model, covariate, np.arange(60)[::-1])
    loo_est, loo_var = universal_leave_one_out(coords, values, model, covariate)
    np.testing.assert_allclose(est, loo_est, rtol=0, atol=1e-12)
    np.testing.assert_allclose(var, loo_var, rtol=0, atol=1e-14)


def test_cross_validation_refuses_undetermined_drift():
    coords, noise, _ = _correlated_field(40, 2)
    model = VariogramModel("exponential", 0.001, 0.01, 300.0)
    spike = np.zeros(40)
    spike[17] = 1.0  # without sample 17 this covariate is constant
    with pytest.raises(ModelFitError, match=r"sample\(s\) \[17\]"):
        universal_leave_one_out(coords, noise, model, spike)
    step = (coords[:, 0] > 500.0).astype(float)
    folds = np.where(step > 0, 1, 0)  # each fold takes one level of the step
    with pytest.raises(ModelFitError, match="without fold 0"):
        universal_k_fold(coords, noise, model, step, folds)
    with pytest.raises(ValueError, match="integer labels"):
        universal_k_fold(coords, noise, model, step, folds.astype(float))
    with pytest.raises(ValueError, match="integer labels"):
        universal_k_fold(coords, noise, model, step, folds[:-1])
    with pytest.raises(ModelFitError, match="at least 3 samples left after holding out 39"):
        universal_k_fold(coords, noise, model, step, np.r_[np.zeros(39, int), 1])
    dup = coords.copy()
    dup[1] = dup[0]
    with pytest.raises(ModelFitError, match="duplicate"):
        universal_leave_one_out(dup, noise, model, step)
