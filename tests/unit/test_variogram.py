"""Tests of pmap.geostats.variogram: empirical bins, model formulas, WLS fits."""

from __future__ import annotations

import json

import numpy as np
import pytest

from pmap.errors import ModelFitError
from pmap.geostats.variogram import (
    CONSTANT,
    MODELS,
    EmpiricalVariogram,
    VariogramModel,
    default_cutoff,
    empirical_variogram,
    fit_best_variogram,
    fit_variogram,
    weighted_sse,
)


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
    assert set(candidates) == set(MODELS)
    assert best.kind == min(candidates, key=candidates.get)
    for kind in MODELS:
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
    model = VariogramModel(kind, nugget=0.2, psill=1.0, range=300.0)
    assert model(0.0) == 0.0
    assert model(1e-9) == pytest.approx(0.2, abs=1e-6)
    assert model.sill == pytest.approx(1.2)
    reached = (model(300.0) - 0.2) / 1.0
    if kind == "spherical":
        assert reached == pytest.approx(1.0)
        assert model(600.0) == pytest.approx(1.2)
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
    true = VariogramModel(kind, nugget=0.1, psill=0.8, range=400.0)
    lag = np.linspace(40.0, 600.0, 15)
    emp = EmpiricalVariogram(lag, true(lag), np.full(15, 100), 600.0)
    fitted = fit_variogram(emp, kind)
    assert fitted.nugget == pytest.approx(0.1, abs=1e-4)
    assert fitted.psill == pytest.approx(0.8, rel=1e-4)
    assert fitted.range == pytest.approx(400.0, rel=1e-4)
    best, _ = fit_best_variogram(emp)
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
    true = VariogramModel(kind, nugget=0.1, psill=0.8, range=400.0)
    lag = np.linspace(40.0, 600.0, 15)
    emp = EmpiricalVariogram(lag, true(lag), np.full(15, 100), 600.0)
    fitted = fit_variogram(emp, kind, min_nugget=0.3)
    assert fitted.nugget == pytest.approx(0.3, rel=1e-9)
    clamped = VariogramModel(kind, 0.3, 0.8, 400.0)
    assert weighted_sse(emp, fitted) < 0.7 * weighted_sse(emp, clamped)
    # No (partial sill, range) on a grid with the nugget at the floor does better.
    best_grid = min(
        weighted_sse(emp, VariogramModel(kind, 0.3, ps, rng))
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
