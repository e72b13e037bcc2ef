"""Tests of pmap.geostats.simulation: normal scores, SGS moments, variogram reproduction."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import norm

from pmap.errors import ModelFitError, PmapWarning
from pmap.geostats.simulation import (
    NormalScore,
    _neighbour_sets,
    realisation_probability,
    realisation_quantile,
    sequential_gaussian_simulation,
    simulate_normal_scores,
)
from pmap.geostats.variogram import VariogramModel


def _grid(n: int, spacing: float = 1.0) -> np.ndarray:
    g = (np.arange(n) + 0.5) * spacing
    x, y = np.meshgrid(g, g, indexing="ij")
    return np.column_stack([x.ravel(), y.ravel()])


def _global_simple_kriging(
    coords: np.ndarray, data: np.ndarray, targets: np.ndarray, cov
) -> tuple[np.ndarray, np.ndarray]:
    """Dense simple kriging (mean 0) with all data; ``cov(a, b)`` is a covariance matrix."""
    c = cov(coords, coords)
    c0 = cov(coords, targets)
    w = np.linalg.solve(c, c0)
    return w.T @ data, cov(targets[:1], targets[:1])[0, 0] - np.sum(w * c0, axis=0)


def _axis_variogram(fields: np.ndarray, lags: list[int]) -> np.ndarray:
    """Semivariance along both grid axes at integer lags, per field; shape (r, len(lags))."""
    out = []
    for h in lags:
        gx = np.mean((fields[:, h:, :] - fields[:, :-h, :]) ** 2, axis=(1, 2)) / 2.0
        gy = np.mean((fields[:, :, h:] - fields[:, :, :-h]) ** 2, axis=(1, 2)) / 2.0
        out.append(0.5 * (gx + gy))
    return np.array(out).T


# ---------------------------------------------------------------- normal-score transform


def test_normal_score_round_trip_and_moments():
    rng = np.random.default_rng(0)
    values = np.round(np.exp(rng.normal(2.0, 0.8, 500)), 1)  # rounded: many ties
    assert np.unique(values).size < values.size
    ns = NormalScore.fit(values)
    scores = ns.forward(values)
    np.testing.assert_array_equal(ns.back(scores), values)
    # common practice, no source: Hazen normal scores of n values have mean 0 (symmetric
    # plotting positions) and sd slightly below 1 (about 0.99 at n = 500); ties shift both a little.
    assert abs(scores.mean()) < 0.01
    assert abs(scores.std() - 1.0) < 0.03
    # Ties share one score; the order of the values is kept.
    assert np.all(np.diff(scores[np.argsort(values, kind="stable")]) >= 0)
    y = np.linspace(ns.scores[0], ns.scores[-1], 101)
    np.testing.assert_allclose(ns.forward(ns.back(y)), y, atol=1e-9)


def test_normal_score_hazen_positions_with_ties():
    ns = NormalScore.fit(np.array([3.0, 1.0, 2.0, 2.0]))
    # Ranks 1, 2.5, 2.5, 4 of n = 4 -> positions (r - 0.5) / 4.
    # Source: Hazen plotting positions, scipy.stats.norm.ppf for the quantiles
    np.testing.assert_allclose(ns.scores, norm.ppf([0.125, 0.5, 0.875]), rtol=1e-12)
    np.testing.assert_array_equal(ns.values, [1.0, 2.0, 3.0])


def test_normal_score_tails_clamped_or_linear_to_bounds():
    values = np.array([1.0, 2.0, 4.0, 8.0])
    clamped = NormalScore.fit(values)
    np.testing.assert_array_equal(clamped.back(np.array([-9.0, 9.0])), [1.0, 8.0])
    bounded = NormalScore.fit(values, lower=0.0, upper=10.0)
    p0 = 0.5 / 4
    y = norm.ppf([p0 / 2, 1.0 - p0 / 2])
    # Halfway in probability between the bound and the extreme sample: halfway in value.
    np.testing.assert_allclose(bounded.back(y), [0.5, 9.0], rtol=1e-12)
    np.testing.assert_allclose(bounded.back(np.array([-np.inf, np.inf])), [0.0, 10.0])
    np.testing.assert_allclose(bounded.forward(np.array([0.5, 9.0])), y, rtol=1e-12)
    assert np.all(np.diff(bounded.back(np.linspace(-6, 6, 200))) >= 0)


def test_normal_score_rejects_bad_bounds():
    with pytest.raises(ValueError, match="lower bound"):
        NormalScore.fit(np.array([1.0, 2.0]), lower=1.5)
    with pytest.raises(ValueError, match="finite"):
        NormalScore.fit(np.array([1.0, np.nan]))


# ---------------------------------------------------------------- neighbour search


@pytest.mark.parametrize("radius", [None, 0.08])
def test_neighbour_sets_are_the_nearest_earlier_points(radius):
    rng = np.random.default_rng(3)
    samples = rng.random((40, 2))
    nodes = rng.random((2500, 2))  # more than one search block
    k = 12
    idx = _neighbour_sets(samples, nodes, k, radius)
    pts = np.vstack([samples, nodes])
    for t in rng.choice(nodes.shape[0], 150, replace=False):
        d = np.hypot(*(pts[: 40 + t] - nodes[t]).T)
        if radius is not None:
            d = d[d <= radius]
        want = np.sort(d)[:k]
        got_ids = idx[t][idx[t] >= 0]
        assert np.all(got_ids < 40 + t)  # only samples and earlier nodes
        got = np.hypot(*(pts[got_ids] - nodes[t]).T)
        np.testing.assert_allclose(got, want, rtol=1e-12)


# ---------------------------------------------------------------- simulation


@pytest.fixture(scope="module")
def small_case() -> tuple[np.ndarray, np.ndarray, np.ndarray, VariogramModel]:
    rng = np.random.default_rng(5)
    coords = rng.random((15, 2)) * 12.0
    values = np.exp(rng.normal(1.0, 0.7, 15))
    model = VariogramModel("exponential", 0.05, 0.95, 8.0)
    return coords, values, _grid(12), model


def test_seed_reproducibility(small_case):
    coords, values, targets, model = small_case
    a = sequential_gaussian_simulation(coords, values, targets, model, n_realisations=6, seed=7)
    b = sequential_gaussian_simulation(coords, values, targets, model, n_realisations=6, seed=7)
    c = sequential_gaussian_simulation(coords, values, targets, model, n_realisations=6, seed=8)
    assert a.shape == (6, targets.shape[0])
    np.testing.assert_array_equal(a, b)
    assert np.mean(a != c) > 0.9
    # Realisations differ from one another.
    assert np.mean(a[0] != a[1]) > 0.9


@pytest.mark.parametrize("model", [
    VariogramModel("spherical", 0.1, 0.9, 6.0),
    VariogramModel("exponential", 0.0, 1.0, 10.0, ratio=0.4, angle=30.0),
])
def test_data_honoured(small_case, model):
    coords, values, grid, _ = small_case
    targets = np.vstack([grid, coords[[0, 3, 7, 11]]])
    sim = sequential_gaussian_simulation(coords, values, targets, model, n_realisations=20,
                                         seed=1, radius=20.0)
    np.testing.assert_array_equal(sim[:, -4:], np.broadcast_to(values[[0, 3, 7, 11]], (20, 4)))
    assert np.all(sim >= values.min()) and np.all(sim <= values.max())  # clamped tails
    assert sim[:, :-4].std(axis=0).min() > 0


def _anisotropic_cov(model: VariogramModel):
    """Covariance matrix function with the anisotropy written out independently."""
    theta = np.deg2rad(model.angle)
    rot = np.array([[np.cos(theta), np.sin(theta)], [-np.sin(theta), np.cos(theta)]])
    scale = np.array([1.0, 1.0 / model.ratio])

    def cov(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return model.covariance(cdist((a @ rot.T) * scale, (b @ rot.T) * scale))

    return cov


@pytest.mark.parametrize("model, neighbours, allowance", [
    # All points in every neighbourhood: SGS is the exact sequential decomposition of the
    # conditional Gaussian, so only Monte-Carlo error remains (allowance for round-off).
    (VariogramModel("exponential", 0.05, 0.95, 8.0), 1000, 1e-9),
    (VariogramModel("spherical", 0.0, 1.0, 9.0, ratio=0.5, angle=60.0), 1000, 1e-9),
    # 16 neighbours: screened-off points shift the local moments; with 8,000 realisations
    # the largest deviation measured was 0.058 (mean) and 0.052 (variance), so 0.1.
    (VariogramModel("exponential", 0.05, 0.95, 8.0), 16, 0.1),
])
def test_mean_and_variance_approach_simple_kriging(small_case, model, neighbours, allowance):
    coords, _, targets, _ = small_case
    scores = np.random.default_rng(9).normal(size=coords.shape[0])
    n_real = 1000
    sim = simulate_normal_scores(coords, scores, targets, model, n_realisations=n_real,
                                 seed=11, neighbours=neighbours)
    mean_sk, var_sk = _global_simple_kriging(coords, scores, targets, _anisotropic_cov(model))
    # common practice, no source: standard errors of a sample mean, sqrt(var / N), and of a
    # Gaussian sample variance, var * sqrt(2 / (N - 1)); 4.5 of them per target, so that the
    # chance of any of the 144 targets failing by Monte-Carlo error alone is below 0.1 %.
    mean_tol = 4.5 * np.sqrt(var_sk / n_real) + allowance
    var_tol = 4.5 * var_sk * np.sqrt(2.0 / (n_real - 1)) + allowance
    assert np.all(np.abs(sim.mean(axis=0) - mean_sk) < mean_tol)
    assert np.all(np.abs(sim.var(axis=0, ddof=1) - var_sk) < var_tol)


LAGS = [1, 2, 4, 8]


@pytest.mark.parametrize("model", [
    VariogramModel("exponential", 0.0, 1.0, 15.0),
    VariogramModel("spherical", 0.0, 1.0, 12.0),
    VariogramModel("gaussian", 0.01, 0.99, 12.0),
])
def test_unconditional_variogram_matches_model(model):
    n, n_real = 40, 100
    sim = simulate_normal_scores(np.empty((0, 2)), np.empty(0), _grid(n), model,
                                 n_realisations=n_real, seed=2)
    gam = _axis_variogram(sim.reshape(n_real, n, n), LAGS)
    mean, se = gam.mean(axis=0), gam.std(axis=0, ddof=1) / np.sqrt(n_real)
    # common practice, no source: the mean of Matheron's estimator over realisations is
    # unbiased for the model; 4 standard errors plus 0.06 x sill for 16 neighbours (largest
    # shortfall measured: 0.043 spherical and 0.037 gaussian at lag 8, range 12).
    target = model(np.array(LAGS, dtype=float))
    assert np.all(np.abs(mean - target) < 4.0 * se + 0.06 * model.sill)
    assert abs(sim.var() - model.sill) < 0.1


def test_unconditional_variogram_matches_gstools():
    gs = pytest.importorskip("gstools")
    n = 40
    g = np.arange(n, dtype=float)
    # gstools' exponential len_scale is the scale, a third of pmap's practical range.
    srf = gs.SRF(gs.Exponential(dim=2, var=1.0, len_scale=5.0))
    ref = np.array([srf.structured([g, g], seed=100 + i) for i in range(40)])
    model = VariogramModel("exponential", 0.0, 1.0, 15.0)
    sim = simulate_normal_scores(np.empty((0, 2)), np.empty(0), _grid(n), model,
                                 n_realisations=100, seed=4).reshape(100, n, n)
    g_ref, g_sim = _axis_variogram(ref, LAGS), _axis_variogram(sim, LAGS)
    se = np.sqrt(g_ref.var(axis=0, ddof=1) / len(g_ref) + g_sim.var(axis=0, ddof=1) / len(g_sim))
    # Source: gstools SRF (randomization method) with the same exponential model; tolerance
    # 4 combined standard errors plus 0.04 (the two methods' approximations).
    assert np.all(np.abs(g_sim.mean(axis=0) - g_ref.mean(axis=0)) < 4.0 * se + 0.04)


def test_ill_conditioned_systems_warn_and_stay_finite():
    model = VariogramModel("gaussian", 0.0, 1.0, 30.0)  # no nugget, range >> spacing
    with pytest.warns(PmapWarning, match="ill-conditioned"):
        sim = simulate_normal_scores(np.empty((0, 2)), np.empty(0), _grid(15), model,
                                     n_realisations=50, seed=0)
    assert np.all(np.isfinite(sim))
    assert 0.3 < sim.var() < 2.0


def test_duplicate_targets_are_jittered_not_singular():
    # Two coincident targets in one neighbourhood make its system exactly singular.
    model = VariogramModel("exponential", 0.0, 1.0, 5.0)
    grid = _grid(6)
    targets = np.vstack([grid, grid[:10]])
    with pytest.warns(PmapWarning, match="ill-conditioned"):
        sim = simulate_normal_scores(np.empty((0, 2)), np.empty(0), targets, model,
                                     n_realisations=20, seed=0)
    assert np.all(np.isfinite(sim))
    # The copies agree up to the jitter's effect (measured 2e-4).
    assert np.abs(sim[:, :10] - sim[:, 36:]).max() < 1e-3


def test_radius_limits_the_neighbourhood():
    coords = np.array([[0.5, 0.5]])
    model = VariogramModel("exponential", 0.0, 1.0, 30.0)
    targets = np.array([[1.5, 0.5], [100.0, 100.0]])
    sim = simulate_normal_scores(coords, np.array([2.0]), targets, model,
                                 n_realisations=4000, seed=3, radius=5.0)
    # Target 2 has nothing within 5 m: an unconditional N(0, 1) draw.
    assert abs(sim[:, 1].mean()) < 4 / np.sqrt(4000)
    assert abs(sim[:, 1].var() - 1.0) < 4 * np.sqrt(2 / 4000)
    # Target 1 sits 1 m from the datum: rho = exp(-3 / 30), mean 2 rho (simple kriging).
    rho = np.exp(-0.1)
    assert abs(sim[:, 0].mean() - 2 * rho) < 4 * np.sqrt((1 - rho**2) / 4000)


def test_sill_far_from_one_warns():
    with pytest.warns(PmapWarning, match="sill"):
        simulate_normal_scores(np.empty((0, 2)), np.empty(0), _grid(3),
                               VariogramModel("spherical", 0.0, 3.0, 5.0),
                               n_realisations=2, seed=0)


def test_bad_arguments():
    coords = np.array([[0.0, 0.0], [0.0, 0.0]])
    model = VariogramModel("spherical", 0.0, 1.0, 5.0)
    with pytest.raises(ModelFitError, match="duplicate"):
        simulate_normal_scores(coords, np.zeros(2), _grid(2), model, n_realisations=2, seed=0)
    with pytest.raises(ValueError, match="n_realisations"):
        simulate_normal_scores(coords[:1], np.zeros(1), _grid(2), model, n_realisations=0,
                               seed=0)
    with pytest.raises(ValueError, match="normal_score"):
        sequential_gaussian_simulation(np.empty((0, 2)), np.empty(0), _grid(2), model,
                                       n_realisations=2, seed=0)


def test_realisation_probability_and_quantile():
    real = np.array([[1.0, 10.0], [2.0, 20.0], [3.0, 30.0], [4.0, 40.0]])
    np.testing.assert_allclose(realisation_probability(real, 2.5), [0.5, 0.0])
    np.testing.assert_allclose(realisation_probability(real, 20.0, below=False), [0.0, 0.5])
    np.testing.assert_allclose(realisation_probability(real, np.array([3.0, 30.0])), [0.5, 0.5])
    np.testing.assert_allclose(realisation_quantile(real, 0.5), [2.5, 25.0])
    np.testing.assert_allclose(realisation_quantile(real, [0.0, 1.0]), [[1.0, 10.0], [4.0, 40.0]])
    with pytest.raises(ValueError, match="quantiles"):
        realisation_quantile(real, 1.5)


def test_simulate_property_is_seeded_and_brackets_the_kriging_estimate():
    # common practice, no source: the realisations' median follows the kriged surface.
    from pmap.geostats.kriging import ordinary_kriging
    from pmap.geostats.simulation import simulate_property

    rng = np.random.default_rng(2)
    xy = rng.random((120, 2)) * 500.0
    z = 20.0 + 6.0 * np.sin(xy[:, 0] / 90.0) + rng.normal(0.0, 0.5, 120)
    gx, gy = np.meshgrid(np.arange(10.0, 500.0, 40.0), np.arange(10.0, 500.0, 40.0))
    targets = np.column_stack([gx.ravel(), gy.ravel()])
    a, model = simulate_property(xy, z, targets, "spherical", n_realisations=60, seed=5)
    b, _ = simulate_property(xy, z, targets, "spherical", n_realisations=60, seed=5)
    np.testing.assert_array_equal(a, b)
    assert a.shape == (60, targets.shape[0]) and model.sill == pytest.approx(1.0)
    est = ordinary_kriging(xy, z, targets, VariogramModel("spherical", 0.25, 18.0, 300.0))
    assert np.corrcoef(np.median(a, axis=0), est.estimate)[0, 1] > 0.95
