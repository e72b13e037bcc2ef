"""Neighbourhood (local) ordinary kriging against pykrige and the global solve."""

from __future__ import annotations

import numpy as np
import pytest

from pmap.errors import PmapWarning
from pmap.geostats.crossval import loo_kriging
from pmap.geostats.kriging import KrigingSystem, ordinary_kriging
from pmap.geostats.neighbourhood import (
    NeighbourSearch,
    local_leave_one_out,
    local_ordinary_kriging,
    merge_close_samples,
    numba_available,
    resolve_engine,
    simple_kriging_weights,
)
from pmap.geostats.variogram import VariogramModel

ENGINES = ["numpy"] + (["numba"] if numba_available() else [])


@pytest.fixture(scope="module")
def field():
    rng = np.random.default_rng(7)
    xy = rng.random((400, 2)) * 1000.0
    z = np.sin(xy[:, 0] / 180.0) + 0.5 * np.cos(xy[:, 1] / 90.0) + rng.normal(0, 0.2, 400)
    targets = rng.random((3000, 2)) * 1100.0 - 50.0
    return xy, z, targets


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("kind,k", [("spherical", 16), ("exponential", 32), ("spherical", 5)])
def test_local_matches_pykrige_c_backend(field, engine, kind, k):
    from pykrige.ok import OrdinaryKriging

    xy, z, targets = field
    model = VariogramModel(kind, 0.04, 0.6, 250.0)
    # Source: pykrige 1.7 OrdinaryKriging.execute(backend="C", n_closest_points=k); its
    # exponential and spherical ranges are practical ranges like pmap's.
    ok = OrdinaryKriging(xy[:, 0], xy[:, 1], z, variogram_model=kind,
                         variogram_parameters={"psill": 0.6, "range": 250.0, "nugget": 0.04})
    ref_e, ref_v = ok.execute("points", targets[:, 0], targets[:, 1], backend="C",
                              n_closest_points=k)
    est, var, _, stats = local_ordinary_kriging(xy, z, targets, model, k, engine=engine)
    np.testing.assert_allclose(est, np.asarray(ref_e), rtol=0, atol=1e-6)
    np.testing.assert_allclose(var, np.asarray(ref_v), rtol=0, atol=1e-6)
    assert stats.distinct_sets < targets.shape[0]


def test_local_matches_gstools_with_all_samples(field):
    import gstools as gs

    xy, z, targets = field
    xy, z = xy[:120], z[:120]
    model = VariogramModel("exponential", 0.05, 0.8, 300.0)
    # Source: gstools 1.7 krige.Ordinary (exact=True), exponential len_scale = range / 3.
    cov = gs.Exponential(dim=2, var=0.8, len_scale=100.0, nugget=0.05)
    krig = gs.krige.Ordinary(cov, cond_pos=[xy[:, 0], xy[:, 1]], cond_val=z, exact=True)
    ref_e, ref_v = krig(targets[:500].T, mesh_type="unstructured", return_var=True)
    est, var, _, _ = local_ordinary_kriging(xy, z, targets[:500], model, 120)
    np.testing.assert_allclose(est, ref_e, atol=1e-6)
    np.testing.assert_allclose(var, ref_v, atol=1e-6)


@pytest.mark.parametrize("engine", ENGINES)
def test_all_neighbours_equal_global_kriging(field, engine):
    # common practice, no source: with k = n the local system is the global one.
    xy, z, targets = field
    xy, z = xy[:60], z[:60]
    model = VariogramModel("gaussian", 0.1, 1.0, 200.0)
    ref = ordinary_kriging(xy, z, targets[:400], model)
    est, var, mu, _ = local_ordinary_kriging(xy, z, targets[:400], model, 60, engine=engine)
    np.testing.assert_allclose(est, ref.estimate, atol=1e-10)
    np.testing.assert_allclose(var, ref.variance, atol=1e-10)
    np.testing.assert_allclose(mu, ref.lagrange, atol=1e-10)


def test_engines_agree_with_radius_and_anisotropy(field):
    if not numba_available():
        pytest.skip("numba not installed")
    xy, z, targets = field
    model = VariogramModel("exponential", 0.05, 1.0, 400.0, ratio=0.4, angle=30.0)
    a = local_ordinary_kriging(xy, z, targets, model, 12, radius=60.0, engine="numpy")
    b = local_ordinary_kriging(xy, z, targets, model, 12, radius=60.0, engine="numba")
    for x, y in zip(a[:3], b[:3], strict=True):
        np.testing.assert_allclose(x, y, atol=1e-10, equal_nan=True)
    assert a[3].no_neighbours == b[3].no_neighbours > 0


@pytest.mark.parametrize("engine", ENGINES)
def test_cells_without_samples_in_the_radius_are_nodata(engine):
    xy = np.array([[0.0, 0.0], [10.0, 0.0], [0.0, 10.0], [10.0, 10.0]])
    z = np.array([1.0, 2.0, 3.0, 4.0])
    targets = np.array([[5.0, 5.0], [100.0, 100.0], [10.0, 3.0]])
    model = VariogramModel("spherical", 0.0, 1.0, 30.0)
    est, var, _, stats = local_ordinary_kriging(xy, z, targets, model, 4, radius=8.0,
                                                engine=engine)
    assert np.isnan(est[1]) and np.isnan(var[1])
    assert np.all(np.isfinite(est[[0, 2]]))
    assert stats.no_neighbours == 1
    # Only samples 1 (3 m) and 3 (7 m) are within 8 m of (10, 3): a two-point system.
    two = ordinary_kriging(xy[[1, 3]], z[[1, 3]], targets[2:], model)
    assert est[2] == pytest.approx(two.estimate[0], abs=1e-12)
    assert var[2] == pytest.approx(two.variance[0], abs=1e-12)


@pytest.mark.parametrize("engine", ENGINES)
def test_local_leave_one_out_equals_global_with_all_neighbours(field, engine):
    xy, z, _ = field
    xy, z = xy[:80], z[:80]
    model = VariogramModel("spherical", 0.05, 0.9, 300.0)
    ref = loo_kriging(xy, z, model)
    got = local_leave_one_out(xy, z, model, 79, engine=engine)
    for a, b in zip(got, ref, strict=True):
        np.testing.assert_allclose(a, b, atol=1e-10)


def test_singular_local_systems_are_regularised_with_a_warning():
    rng = np.random.default_rng(1)
    xy = rng.random((200, 2)) * 100.0
    z = np.sin(xy[:, 0] / 30.0)
    model = VariogramModel("gaussian", 0.0, 1.0, 400.0)   # smooth, no nugget: singular
    with pytest.warns(PmapWarning, match="regularised"):
        est, var, _, stats = local_ordinary_kriging(xy, z, rng.random((300, 2)) * 100.0,
                                                    model, 16)
    assert stats.regularised > 0
    assert np.all(np.isfinite(est)) and np.all(var >= 0)


def test_near_duplicates_are_merged_before_the_local_solve():
    xy = np.array([[0.0, 0.0], [0.0, 0.0004], [50.0, 0.0], [0.0, 50.0], [50.0, 50.0]])
    z = np.array([1.0, 3.0, 5.0, 7.0, 9.0])
    merged_xy, merged_z, n = merge_close_samples(xy, z, 1e-3)
    assert n == 1 and merged_z[0] == pytest.approx(2.0)
    model = VariogramModel("exponential", 0.1, 1.0, 100.0)
    with pytest.warns(PmapWarning, match="averaged"):
        res = ordinary_kriging(xy, z, np.array([[20.0, 20.0]]), model, neighbours=4)
    ref = ordinary_kriging(merged_xy, merged_z, np.array([[20.0, 20.0]]), model)
    assert res.estimate[0] == pytest.approx(ref.estimate[0], abs=1e-12)


def test_radius_without_neighbours_is_refused(field):
    xy, z, targets = field
    with pytest.raises(ValueError, match="radius needs neighbours"):
        ordinary_kriging(xy, z, targets, VariogramModel("spherical", 0, 1, 100), radius=50.0)


def test_global_system_is_shared_by_map_and_leave_one_out(field):
    # Source: Dubrule (1983), Math. Geol. 15: leave-one-out from the inverse of the full
    # system equals kriging each sample from the other n - 1 (checked here by brute force).
    xy, z, _ = field
    xy, z = xy[:50], z[:50]
    model = VariogramModel("exponential", 0.05, 1.3, 250.0)
    system = KrigingSystem.factorise(xy, z, model)
    est, var, mu = system.leave_one_out()
    for i in (0, 17, 49):
        keep = np.arange(50) != i
        one = ordinary_kriging(xy[keep], z[keep], xy[i:i + 1], model)
        assert est[i] == pytest.approx(one.estimate[0], abs=1e-10)
        assert var[i] == pytest.approx(one.variance[0], abs=1e-10)
        assert mu[i] == pytest.approx(one.lagrange[0], abs=1e-10)
    folds = np.arange(50) % 5
    f_est, f_var, f_mu = system.held_out(folds)
    out = folds == 2
    ref = ordinary_kriging(xy[~out], z[~out], xy[out], model)
    np.testing.assert_allclose(f_est[out], ref.estimate, atol=1e-10)
    np.testing.assert_allclose(f_var[out], ref.variance, atol=1e-10)
    np.testing.assert_allclose(f_mu[out], ref.lagrange, atol=1e-10)


def test_block_size_does_not_change_results(field):
    xy, z, targets = field
    model = VariogramModel("spherical", 0.05, 0.9, 300.0)
    a = local_ordinary_kriging(xy, z, targets, model, 10, engine="numpy", block=97)
    b = local_ordinary_kriging(xy, z, targets, model, 10, engine="numpy", block=100000)
    for x, y in zip(a[:3], b[:3], strict=True):
        np.testing.assert_allclose(x, y, atol=1e-12)


def test_updated_factors_match_fresh_factorisations():
    # common practice, no source: along a grid of cells each neighbour set mostly differs
    # from the previous one by a sample or two, and the kernel updates the previous
    # Cholesky factor (drop a row by a rank-one update, append a row) instead of
    # refactorising; the numpy path factorises every set afresh.
    if not numba_available():
        pytest.skip("numba not installed")
    rng = np.random.default_rng(3)
    xy = rng.random((2000, 2)) * 500.0
    z = np.sin(xy[:, 0] / 60.0) + rng.normal(0, 0.1, 2000)
    gx, gy = np.meshgrid(np.arange(0.5, 500, 2.0), np.arange(0.5, 500, 2.0))
    targets = np.column_stack([gx.ravel(), gy.ravel()])
    model = VariogramModel("exponential", 0.02, 1.0, 150.0)
    fast = local_ordinary_kriging(xy, z, targets, model, 32, engine="numba")
    fresh = local_ordinary_kriging(xy, z, targets, model, 32, engine="numpy")
    for a, b in zip(fast[:3], fresh[:3], strict=True):
        np.testing.assert_allclose(a, b, atol=1e-9)



@pytest.mark.parametrize("layout", ["lattice", "scattered"])
def test_compiled_kernel_picks_the_same_sets_as_the_exact_search(layout):
    # common practice, no source: the compiled kernel ranks each target's candidates
    # itself (a band around the previous target's k-th distance, else a quickselect); on a
    # lattice of samples many are equally distant, and a set cut differently at the k-th
    # place changes the estimate.  The numpy path takes the exact KD-tree search.
    if not numba_available():
        pytest.skip("numba not installed")
    rng = np.random.default_rng(11)
    g = np.arange(0.0, 200.0, 10.0)
    lattice = np.column_stack([a.ravel() for a in np.meshgrid(g, g)])
    xy = {"lattice": lattice[rng.permutation(lattice.shape[0])[:360]],
          "scattered": rng.random((400, 2)) * 200.0}[layout]
    z = np.sin(xy[:, 0] / 40.0) + np.cos(xy[:, 1] / 30.0) + rng.normal(0, 0.1, xy.shape[0])
    c = np.arange(-5.0, 205.0, 2.5)
    cells = np.column_stack([a.ravel() for a in np.meshgrid(c, c)])
    targets = np.vstack([cells, rng.random((500, 2)) * 220.0 - 10.0, xy[:40] + 5.0])
    model = VariogramModel("exponential", 0.05, 1.0, 80.0)
    for k in (1, 4, 12, 33):
        for radius in (None, 25.0):
            fast = local_ordinary_kriging(xy, z, targets, model, k, radius, engine="numba")
            exact = local_ordinary_kriging(xy, z, targets, model, k, radius, engine="numpy")
            for a, b in zip(fast[:3], exact[:3], strict=True):
                np.testing.assert_allclose(a, b, atol=1e-9)
            assert fast[3].no_neighbours == exact[3].no_neighbours
    fast = local_leave_one_out(xy, z, model, 12, engine="numba")
    exact = local_leave_one_out(xy, z, model, 12, engine="numpy")
    for a, b in zip(fast[:2], exact[:2], strict=True):
        np.testing.assert_allclose(a, b, atol=1e-9)


def _nearest_by_brute_force(points, queries, k, radius=None, exclude=None):
    """The k nearest by squared distance dx*dx + dy*dy, then index; -1 / inf padding."""
    dx = points[None, :, 0] - queries[:, None, 0]
    dy = points[None, :, 1] - queries[:, None, 1]
    d2 = dx * dx + dy * dy
    if exclude is not None:
        d2[np.arange(len(queries)), exclude] = np.inf
    if radius is not None:
        d2[d2 > (radius * (1.0 + 1e-12)) ** 2] = np.inf
    index = np.broadcast_to(np.arange(len(points)), d2.shape)
    order = np.lexsort((index, d2))[:, :k]
    dist = np.sqrt(np.take_along_axis(d2, order, axis=1))
    order[~np.isfinite(dist)] = -1
    pad = k - order.shape[1]
    return (np.pad(order, ((0, 0), (0, pad)), constant_values=-1),
            np.pad(dist, ((0, 0), (0, pad)), constant_values=np.inf))


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("layout", ["grid", "scattered", "mixed"])
def test_neighbour_search_is_exact_with_ties_broken_by_index(engine, layout):
    # On a grid many points are equally distant (often only to the last bit): both engines
    # must order them, and cut them at the k-th place, by index.
    rng = np.random.default_rng(4)
    g = np.arange(30) * 0.1 + 0.05
    grid = np.column_stack([a.ravel() for a in np.meshgrid(g, g)])
    points = {"grid": grid, "scattered": rng.random((500, 2)) * 3.0,
              "mixed": np.vstack([grid[rng.permutation(900)[:400]], rng.random((50, 2)) * 3.0])
              }[layout]
    queries = np.vstack([grid[:300], rng.random((200, 2)) * 3.2 - 0.1])
    for k in (1, 5, 16, 33):
        for radius in (None, 0.25):
            index, dist = NeighbourSearch(points, k, radius, engine=engine).query(queries)
            want_i, want_d = _nearest_by_brute_force(points, queries, k, radius)
            np.testing.assert_array_equal(index, want_i)
            np.testing.assert_array_equal(dist, want_d)
    own = np.arange(300)
    index, dist = NeighbourSearch(points, 16, engine=engine).query(points[:300], exclude=own)
    want_i, want_d = _nearest_by_brute_force(points, points[:300], 16, exclude=own)
    np.testing.assert_array_equal(index, want_i)
    np.testing.assert_array_equal(dist, want_d)


@pytest.mark.parametrize("engine", ENGINES)
def test_neighbour_search_pads_when_points_are_few(engine):
    points = np.array([[0.0, 0.0], [1.0, 0.0], [3.0, 0.0]])
    index, dist = NeighbourSearch(points, 5, radius=2.0, engine=engine).query([[0.5, 0.0]])
    np.testing.assert_array_equal(index, [[0, 1, -1, -1, -1]])
    np.testing.assert_array_equal(dist, [[0.5, 0.5, np.inf, np.inf, np.inf]])
    index, dist = NeighbourSearch(np.empty((0, 2)), 2, engine=engine).query([[0.0, 0.0]])
    np.testing.assert_array_equal(index, [[-1, -1]])
    assert resolve_engine(engine) == engine


def _dense_simple_kriging(points, target, model):
    """Simple kriging by a dense solve; the covariance sill - gamma(h) in the model's
    isotropic coordinates."""
    xy = model.isotropic_coords(points)
    t = model.isotropic_coords(target)
    c = model.covariance(np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1)))
    c0 = model.covariance(np.hypot(*(xy - t).T))
    w = np.linalg.solve(c, c0)
    return w, np.sqrt(model.sill - w @ c0)


@pytest.mark.parametrize("engine", ENGINES)
def test_simple_kriging_weights_match_a_dense_solve(field, engine):
    # common practice, no source: simple kriging weights C^-1 c0, variance sill - w'c0.
    xy, _, targets = field
    model = VariogramModel("exponential", 0.05, 1.4, 300.0, ratio=0.5, angle=20.0)
    sets = NeighbourSearch(model.isotropic_coords(xy), 12, radius=120.0, engine=engine).query(
        model.isotropic_coords(targets[:300]))[0]
    sets[0] = -1                                            # no conditioning point at all
    weights, sd, regularised = simple_kriging_weights(xy, targets[:300], sets, model,
                                                      engine=engine)
    assert regularised == 0
    assert sd[0] == pytest.approx(np.sqrt(model.sill)) and np.all(weights[0] == 0.0)
    for t in range(1, 300):
        filled = sets[t] >= 0
        w, s = _dense_simple_kriging(xy[sets[t][filled]], targets[t], model)
        np.testing.assert_allclose(weights[t][filled], w, atol=1e-10)
        assert np.all(weights[t][~filled] == 0.0)
        assert sd[t] == pytest.approx(s, abs=1e-10)


def test_local_kriging_numpy_path_uses_the_neighbour_search(field, monkeypatch):
    calls = []
    query = NeighbourSearch.query

    def spy(self, queries, **kw):
        calls.append(len(queries))
        return query(self, queries, **kw)

    monkeypatch.setattr(NeighbourSearch, "query", spy)
    xy, z, targets = field
    local_ordinary_kriging(xy, z, targets, VariogramModel("spherical", 0.1, 1.0, 300.0), 8,
                           engine="numpy", block=1000)
    assert calls == [1000, 1000, 1000]


@pytest.mark.parametrize("engine", ENGINES)
def test_a_target_on_a_sample_takes_its_value_exactly(field, engine):
    # common practice, no source: ordinary kriging with gamma(0) = 0 is an exact
    # interpolator; a target on a sample is given that sample's value and variance 0
    # directly, not through a solve that would return them to round-off only.
    xy, z, _ = field
    model = VariogramModel("spherical", 0.05, 0.9, 300.0)
    est, var, mu, _ = local_ordinary_kriging(xy, z, xy[:50], model, 16, engine=engine)
    np.testing.assert_array_equal(est, z[:50])
    np.testing.assert_array_equal(var, 0.0)
    np.testing.assert_array_equal(mu, 0.0)


def test_compiled_z_order_is_a_stable_morton_sort():
    # common practice, no source: Morton order interleaves the bits of the cell column
    # (even bits) and row (odd bits); equal keys keep their input order.
    if not numba_available():
        pytest.skip("numba not installed")
    from pmap.geostats._local_numba import z_order

    rng = np.random.default_rng(5)
    pts = np.vstack([rng.random((3000, 2)) * 5000.0, np.repeat([[10.0, 10.0]], 5, axis=0)])
    cell = 0.7
    q = np.floor((pts - pts.min(axis=0)) / cell).astype(np.int64)
    key = np.zeros(len(pts), dtype=np.int64)
    for bit in range(21):
        key |= ((q[:, 0] >> bit) & 1) << (2 * bit)
        key |= ((q[:, 1] >> bit) & 1) << (2 * bit + 1)
    np.testing.assert_array_equal(z_order(pts, cell), np.argsort(key, kind="stable"))


@pytest.mark.parametrize("engine", ENGINES)
def test_no_targets_give_empty_results(field, engine):
    # common practice, no source: a fit with no map to draw (pmap check, a region's fit)
    coords, values = field[0], field[1]
    model = VariogramModel("spherical", 0.1, 1.0, 300.0)
    est, var, mu, stats = local_ordinary_kriging(coords, values, np.empty((0, 2)), model, 8,
                                                 engine=engine)
    assert est.shape == var.shape == mu.shape == (0,)
    assert stats.targets == 0
