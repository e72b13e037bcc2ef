"""Tests of pmap.geostats.variogram: empirical bins, model formulas, WLS fits."""

from __future__ import annotations

import json

import numpy as np
import pytest

from pmap.errors import ModelFitError
from pmap.geostats.variogram import (
    CONSTANT,
    DEFAULT_MODELS,
    ESTIMATORS,
    MODELS,
    SHAPE_BOUNDS,
    SHAPED,
    EmpiricalVariogram,
    VariogramModel,
    default_cutoff,
    empirical_variogram,
    fit_best_variogram,
    fit_variogram,
    fit_variograms,
    matern_practical_factor,
    weighted_sse,
)

# Shape of the shaped families in the tests below (stable alpha, Matern nu).
SHAPES = {"stable": 1.5, "matern": 1.5}


def _model(kind: str, nugget: float, psill: float, rng: float) -> VariogramModel:
    return VariogramModel(kind, nugget, psill, rng, SHAPES.get(kind))


def test_meuse_cutoff_and_first_bins(meuse):
    coords, zinc = meuse
    emp = empirical_variogram(coords, np.log(zinc))
    # Source: gstat vignette / variogram documentation (Pebesma)
    assert emp.cutoff == pytest.approx(1596.62, abs=0.005)
    assert len(emp.lag) == 15
    # Source: gstat vignette / variogram documentation (Pebesma)
    assert list(emp.count[:3]) == [57, 299, 419]
    np.testing.assert_allclose(emp.lag[:3], [79.29, 163.97, 267.36], atol=0.005)
    np.testing.assert_allclose(emp.gamma[:3], [0.12345, 0.21622, 0.30279], atol=0.000005)


def test_meuse_spherical_wls_fit(meuse):
    coords, zinc = meuse
    model = fit_variogram(empirical_variogram(coords, np.log(zinc)), "spherical")
    # Source: gstat fit.variogram documentation / vignette (Pebesma), fit.method 7
    assert model.nugget == pytest.approx(0.05066, rel=0.01)
    assert model.psill == pytest.approx(0.59061, rel=0.01)
    assert model.range == pytest.approx(897.0, rel=0.01)


def test_meuse_best_model_is_spherical_and_candidates_are_wsse(meuse):
    coords, zinc = meuse
    emp = empirical_variogram(coords, np.log(zinc))
    best, candidates = fit_best_variogram(emp)
    assert set(candidates) == set(DEFAULT_MODELS)
    assert best.kind == min(candidates, key=candidates.get)
    for kind in DEFAULT_MODELS:
        assert candidates[kind] == pytest.approx(weighted_sse(emp, fit_variogram(emp, kind)))


def test_bin_boundary_is_upper_inclusive():
    # Pair distances 1, 2 and 3 m with cutoff 3 m and 3 bins: (0,1], (1,2], (2,3].
    coords = np.array([[0.0, 0.0], [1.0, 0.0], [3.0, 0.0]])
    values = np.array([0.0, 1.0, 3.0])
    emp = empirical_variogram(coords, values, cutoff=3.0, n_bins=3)
    np.testing.assert_array_equal(emp.count, [1, 1, 1])
    np.testing.assert_allclose(emp.lag, [1.0, 2.0, 3.0])
    np.testing.assert_allclose(emp.gamma, [0.5, 2.0, 4.5])


def test_empty_bins_dropped_and_pairs_beyond_cutoff_ignored():
    coords = np.array([[0.0, 0.0], [1.0, 0.0], [10.0, 0.0]])
    emp = empirical_variogram(coords, np.array([1.0, 2.0, 5.0]), cutoff=4.0, n_bins=4)
    np.testing.assert_array_equal(emp.count, [1])
    assert emp.lag[0] == 1.0


def test_block_accumulation_matches_direct_formula():
    rng = np.random.default_rng(3)
    coords = rng.random((300, 2)) * 500
    values = rng.normal(size=300)
    emp = empirical_variogram(coords, values, n_bins=10)
    i, j = np.triu_indices(300, 1)
    d = np.hypot(*(coords[i] - coords[j]).T)
    sq = 0.5 * (values[i] - values[j]) ** 2
    k = np.ceil(d / (emp.cutoff / 10)).astype(int) - 1
    for b in range(10):
        sel = (k == b) & (d <= emp.cutoff)
        assert emp.count[b] == sel.sum()
        assert emp.gamma[b] == pytest.approx(sq[sel].mean())


def test_default_cutoff_is_third_of_diagonal():
    coords = np.array([[0.0, 0.0], [300.0, 400.0]])
    assert default_cutoff(coords) == pytest.approx(500.0 / 3.0)


@pytest.mark.parametrize("kind", MODELS)
def test_model_formulas_and_practical_range(kind):
    model = _model(kind, 0.2, 1.0, 300.0)
    assert model(0.0) == 0.0
    assert model(1e-9) == pytest.approx(0.2, abs=1e-6)
    assert model.sill == pytest.approx(1.2)
    reached = (model(300.0) - 0.2) / 1.0
    if kind == "spherical":
        assert reached == pytest.approx(1.0)
        assert model(600.0) == pytest.approx(1.2)
    elif kind == "matern":
        assert reached == pytest.approx(0.95)  # correlation 0.05 at the practical range
    else:
        assert reached == pytest.approx(1.0 - np.exp(-3.0))  # 95 % of the partial sill
    h = np.linspace(0.0, 900.0, 50)
    np.testing.assert_allclose(model.covariance(h), model.sill - model(h))
    assert model.covariance(0.0) == pytest.approx(1.2)
    assert np.all(np.diff(model(h)) >= 0)
    assert json.loads(json.dumps(model.as_dict()))["range_m"] == 300.0
    assert VariogramModel.from_dict(model.as_dict()) == model


def test_model_rejects_bad_parameters():
    with pytest.raises(ValueError, match="unknown variogram model"):
        VariogramModel("linear", 0.0, 1.0, 10.0)
    with pytest.raises(ValueError, match="range"):
        VariogramModel("spherical", 0.0, 1.0, 0.0)
    with pytest.raises(ValueError, match=">= 0"):
        VariogramModel("spherical", -0.1, 1.0, 10.0)


@pytest.mark.parametrize("kind", MODELS)
def test_fit_recovers_model_from_exact_semivariances(kind):
    true = _model(kind, 0.1, 0.8, 400.0)
    lag = np.linspace(40.0, 600.0, 15)
    emp = EmpiricalVariogram(lag, true(lag), np.full(15, 100), 600.0)
    fitted = fit_variogram(emp, kind)
    assert fitted.nugget == pytest.approx(0.1, abs=1e-4)
    assert fitted.psill == pytest.approx(0.8, rel=1e-4)
    assert fitted.range == pytest.approx(400.0, rel=1e-4)
    if kind in SHAPED:
        assert fitted.shape == pytest.approx(SHAPES[kind], rel=1e-4)
    best, _ = fit_best_variogram(emp, MODELS)
    assert best.kind == kind


def test_fit_refuses_too_few_bins_and_constant_values():
    emp = EmpiricalVariogram(np.array([10.0, 20.0]), np.array([0.1, 0.2]), np.array([5, 5]), 30.0)
    with pytest.raises(ModelFitError, match="at least 3"):
        fit_best_variogram(emp)
    flat = EmpiricalVariogram(np.arange(1.0, 6.0), np.zeros(5), np.full(5, 9), 6.0)
    with pytest.raises(ModelFitError, match="constant"):
        fit_variogram(flat, "spherical")


def test_empirical_rejects_non_finite():
    with pytest.raises(ValueError, match="finite"):
        empirical_variogram(np.array([[0.0, 0.0], [1.0, 1.0]]), np.array([1.0, np.nan]))


@pytest.mark.parametrize("kind", MODELS)
def test_nugget_floor_is_a_bound_of_the_fit_not_a_clamp_after_it(kind):
    # Exact semivariances of a model with nugget 0.1, fitted with a floor of 0.3: the
    # bounded optimum has the nugget at 0.3 and re-balances partial sill and range to the
    # bins (weights N_h / h^2 favour the short lags). Raising the nugget of the unbounded fit
    # afterwards would give (0.3, 0.8, 400 m), which overshoots every bin by 0.2.
    true = _model(kind, 0.1, 0.8, 400.0)
    lag = np.linspace(40.0, 600.0, 15)
    emp = EmpiricalVariogram(lag, true(lag), np.full(15, 100), 600.0)
    fitted = fit_variogram(emp, kind, min_nugget=0.3)
    assert fitted.nugget == pytest.approx(0.3, rel=1e-9)
    clamped = _model(kind, 0.3, 0.8, 400.0)
    assert weighted_sse(emp, fitted) < 0.7 * weighted_sse(emp, clamped)
    # No (partial sill, range) on a grid with the nugget at the floor does better.
    best_grid = min(
        weighted_sse(emp, _model(kind, 0.3, ps, rng))
        for ps in np.linspace(0.3, 2.0, 69) for rng in np.linspace(100.0, 1800.0, 69)
    )
    assert weighted_sse(emp, fitted) <= best_grid * (1 + 1e-6)


def test_constant_variogram_is_zero_and_only_zero():
    zero = VariogramModel(CONSTANT, 0.0, 0.0, 50.0)
    np.testing.assert_array_equal(zero(np.array([0.0, 1.0, 500.0])), 0.0)
    assert zero.sill == 0.0 and VariogramModel.from_dict(zero.as_dict()) == zero
    with pytest.raises(ValueError, match="nugget and psill 0"):
        VariogramModel(CONSTANT, 0.1, 0.0, 50.0)
    assert CONSTANT not in MODELS  # never fitted
    with pytest.raises(ModelFitError, match="unknown variogram model"):
        fit_variogram(EmpiricalVariogram(np.arange(1.0, 6.0), np.ones(5), np.full(5, 9), 6.0),
                      CONSTANT)


# --- shaped families -------------------------------------------------------------------


@pytest.mark.parametrize("alpha", [0.3, 1.0, 1.5, 2.0])
def test_stable_semivariance_matches_gstools(alpha):
    gs = pytest.importorskip("gstools")
    h = np.linspace(0.5, 2000.0, 400)
    ours = VariogramModel("stable", nugget=0.2, psill=1.3, range=600.0, shape=alpha)
    # Source: gstools (Stable: rho(r) = exp(-(r / len_scale)^alpha); len_scale = a / 3^(1/alpha)
    # gives pmap's 1 - exp(-3 (h/a)^alpha))
    theirs = gs.Stable(dim=2, var=1.3, len_scale=600.0 / 3.0 ** (1.0 / alpha), alpha=alpha,
                       nugget=0.2)
    np.testing.assert_allclose(ours(h), theirs.variogram(h), rtol=0, atol=1e-10)


@pytest.mark.parametrize("nu", [0.2, 0.5, 1.5, 5.0, 20.0])
def test_matern_semivariance_matches_gstools(nu):
    gs = pytest.importorskip("gstools")
    h = np.linspace(0.5, 2000.0, 400)
    ours = VariogramModel("matern", nugget=0.2, psill=1.3, range=600.0, shape=nu)
    # Source: gstools (Matern: rho(r) = 2^(1-nu)/Gamma(nu) (sqrt(nu) r/l)^nu K_nu(sqrt(nu) r/l),
    # so l = sqrt(nu) a / matern_practical_factor(nu))
    theirs = gs.Matern(dim=2, var=1.3, len_scale=np.sqrt(nu) * 600.0 / matern_practical_factor(nu),
                       nu=nu, nugget=0.2)
    np.testing.assert_allclose(ours(h), theirs.variogram(h), rtol=0, atol=1e-10)
    assert theirs.correlation(600.0) == pytest.approx(0.05, abs=1e-10)


@pytest.mark.parametrize(("kind", "shape"), [("stable", 0.5), ("stable", 1.0), ("stable", 2.0),
                                             ("matern", 0.3), ("matern", 0.5), ("matern", 3.0)])
def test_shaped_fit_recovers_shape_including_bounds(kind, shape):
    true = VariogramModel(kind, nugget=0.05, psill=1.2, range=350.0, shape=shape)
    lag = np.linspace(30.0, 600.0, 15)
    emp = EmpiricalVariogram(lag, true(lag), np.linspace(300, 50, 15).astype(int), 600.0)
    fitted = fit_variogram(emp, kind)
    assert fitted.shape == pytest.approx(shape, rel=1e-4)
    assert fitted.range == pytest.approx(350.0, rel=1e-4)
    assert fitted.nugget == pytest.approx(0.05, abs=1e-5)
    assert fitted.psill == pytest.approx(1.2, rel=1e-4)
    lo, hi = SHAPE_BOUNDS[kind]
    assert lo <= fitted.shape <= hi


def test_nested_ties_rank_the_simpler_family_first():
    # Exact exponential semivariances: stable (alpha 1) and Matern (nu 1/2) reproduce them
    # too; the tie keeps the order of the families tried.
    true = VariogramModel("exponential", 0.1, 0.8, 400.0)
    lag = np.linspace(40.0, 600.0, 15)
    emp = EmpiricalVariogram(lag, true(lag), np.full(15, 100), 600.0)
    models, candidates = fit_variograms(emp, MODELS)
    assert models[0].kind == "exponential"
    by_kind = {m.kind: m for m in models}
    assert by_kind["stable"].shape == pytest.approx(1.0, rel=1e-5)
    assert by_kind["matern"].shape == pytest.approx(0.5, rel=1e-5)
    total = float(np.sum(100 / lag**2 * true(lag) ** 2))
    assert max(candidates["stable"], candidates["matern"]) < 1e-10 * total


def test_meuse_shaped_fits_nest_exponential_and_gaussian(meuse):
    coords, zinc = meuse
    emp = empirical_variogram(coords, np.log(zinc))
    models, candidates = fit_variograms(emp, MODELS)
    assert set(candidates) == set(MODELS)
    # Stable spans exponential (alpha 1) and gaussian (alpha 2), Matern spans exponential
    # (nu 1/2): their optimum can be no worse.
    unshaped = min(candidates["exponential"], candidates["gaussian"])
    assert candidates["stable"] <= unshaped * (1 + 1e-9)
    assert candidates["matern"] <= candidates["exponential"] * (1 + 1e-9)
    assert [m.kind for m in models] == sorted(candidates, key=candidates.get)
    assert models[0].kind == "spherical"


# --- Cressie-Hawkins estimator ---------------------------------------------------------


def test_cressie_hawkins_matches_scikit_gstat_on_meuse(meuse):
    skg = pytest.importorskip("skgstat")
    coords, zinc = meuse
    z = np.log(zinc)
    ours = empirical_variogram(coords, z, estimator="cressie-hawkins")
    assert ESTIMATORS == ("matheron", "cressie-hawkins")
    # Source: scikit-gstat (skgstat.Variogram, estimator="cressie", bin_func="even":
    # upper edges linspace(0, maxlag, n+1)[1:]).
    theirs = skg.Variogram(coords, z, estimator="cressie", maxlag=ours.cutoff, n_lags=15,
                           bin_func="even", fit_method=None)
    np.testing.assert_allclose(theirs.bins, ours.cutoff * np.arange(1, 16) / 15, rtol=1e-12)
    np.testing.assert_array_equal(theirs.bin_count, ours.count)
    # Source: scikit-gstat (skgstat.estimators.cressie, denominator
    # 0.457 + 0.494/N + 0.045/N^2, Cressie 1993); pmap keeps the 1980 denominator
    # 0.457 + 0.494/N, so their values are rescaled by the ratio of denominators.
    n = ours.count.astype(float)
    rescale = (0.457 + 0.494 / n + 0.045 / n**2) / (0.457 + 0.494 / n)
    np.testing.assert_allclose(theirs.experimental * rescale, ours.gamma, rtol=1e-10)
    per_class = np.array([skg.estimators.cressie(np.asarray(d)) for d in theirs.lag_classes()])
    np.testing.assert_allclose(per_class * rescale, ours.gamma, rtol=1e-10)


def test_cressie_hawkins_direct_formula():
    rng = np.random.default_rng(5)
    coords = rng.random((120, 2)) * 300
    values = rng.normal(size=120)
    emp = empirical_variogram(coords, values, n_bins=6, estimator="cressie-hawkins")
    i, j = np.triu_indices(120, 1)
    d = np.hypot(*(coords[i] - coords[j]).T)
    root = np.sqrt(np.abs(values[i] - values[j]))
    k = np.ceil(d / (emp.cutoff / 6)).astype(int) - 1
    for b in range(6):
        sel = (k == b) & (d <= emp.cutoff)
        nh = sel.sum()
        # Source: Cressie & Hawkins (1980), Math. Geol. 12, 115-125
        expected = 0.5 * root[sel].mean() ** 4 / (0.457 + 0.494 / nh)
        assert emp.gamma[b] == pytest.approx(expected, rel=1e-12)
        assert emp.count[b] == nh
    matheron = empirical_variogram(coords, values, n_bins=6)
    explicit = empirical_variogram(coords, values, n_bins=6, estimator="matheron")
    np.testing.assert_array_equal(matheron.gamma, explicit.gamma)
    with pytest.raises(ValueError, match="estimator"):
        empirical_variogram(coords, values, estimator="dowd")


def test_cressie_hawkins_resists_a_gross_outlier(meuse):
    coords, zinc = meuse
    z = np.log(zinc)
    spoiled = z.copy()
    spoiled[77] += 10.0 * z.std()
    change = {}
    for est in ESTIMATORS:
        clean = empirical_variogram(coords, z, estimator=est).gamma
        dirty = empirical_variogram(coords, spoiled, estimator=est).gamma
        change[est] = dirty / clean - 1.0
    # Matheron: median +55 %, up to +194 %; Cressie-Hawkins: median +10 %, up to +27 %.
    assert np.median(change["cressie-hawkins"]) < 0.3 * np.median(change["matheron"])
    assert change["cressie-hawkins"].max() < 0.3 * change["matheron"].max()


def test_best_least_squares_keeps_the_lowest_of_several_minima():
    # common practice, no source: (x - 2)(x + 1) vanishes at both 2 and -1; the second
    # residual makes x = 2 the global minimum (cost 0) and x = -1 a local one.
    from pmap.geostats.variogram import best_least_squares

    def residuals(x):
        return np.array([(x[0] - 2.0) * (x[0] + 1.0), 0.3 * (x[0] - 2.0)])

    lo, hi = np.array([-5.0]), np.array([5.0])
    best = best_least_squares(residuals, [np.array([-1.1]), np.array([2.1])], lo, hi)
    assert best[0] == pytest.approx(2.0, abs=1e-6)
    local = best_least_squares(residuals, [np.array([-1.1])], lo, hi)
    assert local[0] == pytest.approx(-1.0, abs=0.1)
    assert best_least_squares(residuals, [np.array([9.0])], lo, hi) is None   # infeasible
