"""Tests of pmap.geostats.simulation: normal scores, SGS moments, variogram reproduction."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import norm

from pmap.errors import ModelFitError, PmapWarning
from pmap.geostats import simulation
from pmap.geostats.neighbourhood import (
    NeighbourSearch,
    local_ordinary_kriging,
    numba_available,
)
from pmap.geostats.simulation import (
    NormalScore,
    _neighbour_sets,
    realisation_probability,
    realisation_quantile,
    sequential_gaussian_simulation,
    simulate_normal_scores,
)
from pmap.geostats.variogram import VariogramModel

ENGINES = ["numpy"] + (["numba"] if numba_available() else [])


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


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("radius", [None, 0.08])
def test_neighbour_sets_are_the_nearest_earlier_points(radius, engine):
    rng = np.random.default_rng(3)
    samples = rng.random((40, 2))
    nodes = rng.random((2500, 2))  # more than one search block
    k = 12
    idx = _neighbour_sets(samples, nodes, k, radius, engine)
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


@pytest.mark.parametrize("engine", ENGINES)
def test_neighbour_sets_on_a_grid_break_ties_by_index_whatever_the_blocks(engine, monkeypatch):
    # Grid nodes are equally distant in shells of 4 and 8: every step (the engine's search,
    # the brute force within a block, the union) orders by squared distance, then index,
    # so the sets are those of a brute force over all earlier points, for any block size.
    rng = np.random.default_rng(8)
    samples = rng.random((30, 2)) * 4.0
    nodes = _grid(40, 0.1)[rng.permutation(1600)]
    pts = np.vstack([samples, nodes])
    k = 16
    want = np.empty((1600, k), dtype=np.int64)
    for t in range(1600):
        dx = pts[: 30 + t, 0] - nodes[t, 0]
        dy = pts[: 30 + t, 1] - nodes[t, 1]
        order = np.lexsort((np.arange(30 + t), dx * dx + dy * dy))[:k]
        want[t] = np.pad(order, (0, k - order.size), constant_values=-1)
    for block, rows in [(1024, 128), (300, 7)]:
        monkeypatch.setattr(simulation, "_SEARCH_BLOCK", block)
        monkeypatch.setattr(simulation, "_BRUTE_ROWS", rows)
        np.testing.assert_array_equal(_neighbour_sets(samples, nodes, k, None, engine), want)


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


@pytest.mark.parametrize("engine", ENGINES)
def test_first_node_is_simple_kriging_from_the_engines_neighbour_set(engine):
    # A single target has no earlier node on the path: the simulation draws it from simple
    # kriging on the k nearest samples that the engine's search returns, the same set
    # local ordinary kriging uses.  The draws are reproduced from the seed's stream
    # (path first, then the noise).
    rng = np.random.default_rng(12)
    coords = rng.random((200, 2)) * 100.0
    scores = rng.normal(size=200)
    target = np.array([[41.3, 57.9]])
    model = VariogramModel("spherical", 0.1, 0.9, 40.0, ratio=0.6, angle=35.0)
    k, radius = 10, 30.0
    idx, _ = NeighbourSearch(model.isotropic_coords(coords), k, radius, engine=engine).query(
        model.isotropic_coords(target))
    assert np.all(idx >= 0)
    near = idx[0]
    # Local ordinary kriging from the search's set equals a dense solve on that set.
    from pmap.geostats.kriging import ordinary_kriging

    est, var, _, _ = local_ordinary_kriging(coords, scores, target, model, k, radius,
                                            engine=engine)
    dense = ordinary_kriging(coords[near], scores[near], target, model)
    assert est[0] == pytest.approx(dense.estimate[0], abs=1e-12)
    assert var[0] == pytest.approx(dense.variance[0], abs=1e-12)
    # The simulation: mean and sd of simple kriging on the same set, noise from the seed.
    c = _anisotropic_cov(model)
    w = np.linalg.solve(c(coords[near], coords[near]), c(coords[near], target))[:, 0]
    sd = np.sqrt(model.sill - w @ c(coords[near], target)[:, 0])
    sim = simulate_normal_scores(coords, scores, target, model, n_realisations=50, seed=21,
                                 neighbours=k, radius=radius, engine=engine)
    stream = np.random.default_rng(21)
    stream.permutation(1)
    noise = stream.standard_normal((1, 50))[0]
    np.testing.assert_allclose(sim[:, 0], w @ scores[near] + sd * noise, rtol=0, atol=1e-12)


def test_simulation_runs_the_engines_search(small_case, monkeypatch):
    calls = []
    query = NeighbourSearch.query

    def spy(self, queries, **kw):
        calls.append(self.engine)
        return query(self, queries, **kw)

    monkeypatch.setattr(NeighbourSearch, "query", spy)
    coords, values, targets, model = small_case
    for engine in ENGINES:
        calls.clear()
        simulate_normal_scores(coords, values, targets, model, n_realisations=2, seed=0,
                               engine=engine)
        # Once to find targets on the data, once per search block.
        assert calls == [engine, engine]
    # "auto" resolves as local kriging does: numpy under PMAP_NUMPY_ONLY or for a matern.
    calls.clear()
    simulate_normal_scores(coords, values, targets, VariogramModel("matern", 0.0, 1.0, 6.0, 1.5),
                           n_realisations=2, seed=0)
    monkeypatch.setenv("PMAP_NUMPY_ONLY", "1")
    simulate_normal_scores(coords, values, targets, model, n_realisations=2, seed=0)
    assert calls == ["numpy"] * 4


@pytest.mark.skipif(not numba_available(), reason="numba not installed")
@pytest.mark.parametrize("radius", [None, 3.5])
def test_numpy_and_numba_engines_give_the_same_realisations(radius):
    # A grid (ties everywhere), samples among the cells, more than one search block, an
    # anisotropic model: the same sets, and the weights to round-off.
    rng = np.random.default_rng(6)
    targets = _grid(48, 0.5)
    coords = np.vstack([rng.random((60, 2)) * 24.0, targets[[5, 700, 2000]]])
    values = rng.lognormal(1.0, 0.5, coords.shape[0])
    model = VariogramModel("exponential", 0.05, 0.95, 9.0, ratio=0.5, angle=30.0)
    a = sequential_gaussian_simulation(coords, values, targets, model, n_realisations=20,
                                       seed=4, radius=radius, engine="numpy")
    b = sequential_gaussian_simulation(coords, values, targets, model, n_realisations=20,
                                       seed=4, radius=radius, engine="numba")
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-10)


def test_ill_conditioned_systems_warn_and_stay_finite():
    # No nugget, range >> spacing.  The engine regularises a system whose reciprocal
    # condition estimate is below 1e-12 (as local kriging does): 53 of the 225 here.
    model = VariogramModel("gaussian", 0.0, 1.0, 60.0)
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


def test_each_property_gets_its_own_random_stream():
    # common practice, no source: independent properties simulated with one seed share the
    # random path and the noise, so their realisations would correlate cell by cell.
    from pmap.geostats.simulation import simulate_property
    from pmap.pipeline import property_seed

    rng = np.random.default_rng(4)
    xy = rng.random((80, 2)) * 400.0
    ph = 6.0 + 0.4 * np.sin(xy[:, 0] / 70.0) + rng.normal(0.0, 0.1, 80)
    total = 600.0 + 90.0 * np.cos(xy[:, 1] / 60.0) + rng.normal(0.0, 20.0, 80)
    gx, gy = np.meshgrid(np.arange(15.0, 400.0, 50.0), np.arange(15.0, 400.0, 50.0))
    targets = np.column_stack([gx.ravel(), gy.ravel()])

    def cell_correlation(seed_a: int, seed_b: int) -> float:
        a, _ = simulate_property(xy, ph, targets, "spherical", n_realisations=40, seed=seed_a)
        b, _ = simulate_property(xy, total, targets, "spherical", n_realisations=40,
                                 seed=seed_b)
        return float(np.median([np.corrcoef(a[:, j], b[:, j])[0, 1]
                                for j in range(targets.shape[0])]))

    assert property_seed(11, 0) == 11
    assert len({property_seed(11, k) for k in range(3)}) == 3
    assert property_seed(11, 2) == property_seed(11, 2)
    assert cell_correlation(11, 11) > 0.5
    assert abs(cell_correlation(property_seed(11, 1), property_seed(11, 2))) < 0.2
