"""Management zones by clustering: k-means, fuzzy c-means, FPI/NCE, zone order and rates."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.stats import zscore
from sklearn.cluster import KMeans
from sklearn.datasets import make_blobs
from sklearn.metrics import adjusted_rand_score

from pmap.errors import ConfigError, InputError
from pmap.prescribe.clustering import (
    ClusterParams,
    choose_n_zones,
    cluster_zones,
    fcm_memberships,
    fuzziness_performance_index,
    fuzzy_cmeans,
    kmeans,
    modified_partition_entropy,
    normalized_classification_entropy,
    standardise,
    zone_means,
    zone_rates,
)
from pmap.prescribe.rates import RateRule, p2o5_rate_kg_ha

# The planted field: three blocks of 30 columns, 60 rows; (STP mg/kg, pH) per block.  Block 2
# has the highest pH but not the highest STP, so an order by pH would differ from one by STP.
BLOCKS = {1: (12.0, 5.4), 2: (30.0, 6.8), 3: (55.0, 6.2)}


def _planted_field(seed=1, stp_sd=6.0, ph_sd=0.3, reverse=False):
    """Truth (1..3), STP and pH rasters with Gaussian noise."""
    rng = np.random.default_rng(seed)
    truth = np.repeat(np.arange(1, 4), 30)[None, :].repeat(60, axis=0)
    if reverse:
        truth = 4 - truth  # block 3 (richest) in the west
    stp = np.choose(truth - 1, [BLOCKS[k][0] for k in (1, 2, 3)]) + rng.normal(0, stp_sd, truth.shape)
    ph = np.choose(truth - 1, [BLOCKS[k][1] for k in (1, 2, 3)]) + rng.normal(0, ph_sd, truth.shape)
    return truth, stp, ph


def _blob_layers(n_centres, seed=0, per_blob=400, std=0.6):
    """Blobs around the vertices of a regular polygon (radius 5) as two layers of a 1-row
    grid, and their labels: well separated, none hidden between two others, and both layers
    informative (the polygon is turned by 45 degrees, so two blobs do not lie on one axis)."""
    angles = 2 * np.pi * np.arange(n_centres) / n_centres + np.pi / 4
    centres = 5 * np.c_[np.cos(angles), np.sin(angles)]
    points, labels = make_blobs(n_samples=[per_blob] * n_centres, centers=centres,
                                n_features=2, cluster_std=std, random_state=seed)
    n = len(points)
    layers = {"stp": points[:, 0][None, :] * 5 + 40, "ph": points[:, 1][None, :] * 0.2 + 6.5}
    return layers, np.ones((1, n), bool), labels


# --------------------------------------------------------------------------- recovery


@pytest.mark.parametrize("method", ["kmeans", "fuzzy_cmeans"])
def test_planted_zones_are_recovered(method):
    truth, stp, ph = _planted_field()
    mask = np.ones(truth.shape, bool)
    result = cluster_zones({"stp": stp, "ph": ph}, mask, ClusterParams(method=method))
    assert result.n_zones == 3 and result.chosen_by == "indices"
    # Source: scikit-learn adjusted_rand_score (Hubert & Arabie 1985).  Measured 0.956 for
    # both methods on this field (noise 6 mg/kg, 0.3 pH units); 1 would be perfect, 0 chance.
    ari = adjusted_rand_score(truth.ravel(), result.zones.ravel())
    assert ari > 0.9
    # Zone 1 is the poorest block, so zones and blocks carry the same numbers here.
    assert (result.zones == truth).mean() > 0.95
    np.testing.assert_allclose(result.means[:, 0], [12, 30, 55], atol=1.5)
    np.testing.assert_allclose(result.means[:, 1], [5.4, 6.8, 6.2], atol=0.1)


def test_fcm_matches_kmeans_on_separated_blobs():
    # Source: scikit-learn KMeans as the reference partition; on well separated blobs the
    # argmax of fuzzy c-means memberships is the same partition.
    X, _ = make_blobs(n_samples=900, centers=4, cluster_std=0.5, random_state=3)
    u, centres = fuzzy_cmeans(X, 4, m=2.0, seed=0)
    ref = KMeans(n_clusters=4, n_init=10, random_state=0).fit(X)
    assert adjusted_rand_score(ref.labels_, u.argmax(axis=1)) == 1.0
    labels, km_centres = kmeans(X, 4, seed=0)
    assert adjusted_rand_score(ref.labels_, labels) == 1.0
    # The centres agree too (matched by nearest pair).
    d = np.linalg.norm(centres[:, None, :] - km_centres[None, :, :], axis=2)
    assert d.min(axis=1).max() < 0.1


@pytest.mark.parametrize("method", ["kmeans", "fuzzy_cmeans"])
@pytest.mark.parametrize("planted", [2, 3, 4])
def test_indices_choose_the_planted_number(method, planted):
    # Source: Odeh et al. (1992), Fridgen et al. (2004): the number of zones is read where
    # the fuzziness indices are least; blobs are scikit-learn make_blobs with known centres.
    layers, mask, labels = _blob_layers(planted, seed=planted)
    result = cluster_zones(layers, mask, ClusterParams(method=method, max_zones=6))
    assert result.n_zones == planted
    assert adjusted_rand_score(labels, result.zones[0]) > 0.98
    table = {row["n_zones"]: row for row in result.index_table}
    assert sorted(table) == [2, 3, 4, 5, 6]
    assert min(table, key=lambda c: table[c]["fpi"]) == planted
    assert min(table, key=lambda c: table[c]["mpe"]) == planted


# --------------------------------------------------------------------------- fuzzy c-means


def test_memberships_follow_bezdek_update():
    # Source: Bezdek (1981) membership update u_1 = 1 / sum_k (d_1 / d_k) ** (2 / (m - 1)),
    # worked by hand: a point at 1 between centres at 0 and 3 has d = (1, 2).
    centres = np.array([[0.0], [3.0]])
    u2 = fcm_memberships(np.array([[1.0]]), centres, m=2.0)
    np.testing.assert_allclose(u2, [[0.8, 0.2]])  # 1 / (1 + (1/2)^2)
    u3 = fcm_memberships(np.array([[1.0]]), centres, m=3.0)
    np.testing.assert_allclose(u3, [[2 / 3, 1 / 3]])  # 1 / (1 + (1/2)^1)
    u15 = fcm_memberships(np.array([[1.0]]), centres, m=1.5)
    np.testing.assert_allclose(u15, [[1 / (1 + 0.5**4), 1 - 1 / (1 + 0.5**4)]])
    # A point on a centre belongs to it alone.
    np.testing.assert_array_equal(fcm_memberships(np.array([[3.0]]), centres, 2.0), [[0.0, 1.0]])


@pytest.mark.parametrize("m", [1.5, 2.0, 2.5])
def test_fcm_result_meets_both_necessary_conditions(m):
    # Source: Bezdek (1981): at a minimum of J_m the centres are the u^m-weighted means and
    # the memberships follow the update of the centres.
    X, _ = make_blobs(n_samples=400, centers=3, cluster_std=1.5, random_state=7)
    u, centres = fuzzy_cmeans(X, 3, m=m, seed=1, tol=1e-9)
    w = u**m
    np.testing.assert_allclose(centres, (w.T @ X) / w.sum(axis=0)[:, None], atol=1e-6)
    np.testing.assert_allclose(u, fcm_memberships(X, centres, m), atol=1e-7)
    # Memberships partition each point: in [0, 1], rows summing to 1.
    assert (u >= 0).all() and (u <= 1).all()
    np.testing.assert_allclose(u.sum(axis=1), 1.0)


def test_fuzzier_exponent_gives_fuzzier_partition():
    # Source: Bezdek (1981): memberships tend to 1/c as m grows and harden as m -> 1.
    X, _ = make_blobs(n_samples=300, centers=3, cluster_std=1.5, random_state=2)
    fpi = [fuzziness_performance_index(fuzzy_cmeans(X, 3, m=m, seed=0)[0]) for m in (1.3, 2, 3)]
    assert fpi[0] < fpi[1] < fpi[2]


def test_same_seed_same_zones():
    truth, stp, ph = _planted_field(stp_sd=12, ph_sd=0.6)  # noisy: starts matter
    mask = np.ones(truth.shape, bool)
    for method in ("kmeans", "fuzzy_cmeans"):
        params = ClusterParams(method=method, seed=5)
        a = cluster_zones({"stp": stp, "ph": ph}, mask, params, max_fit_cells=2000)
        b = cluster_zones({"stp": stp, "ph": ph}, mask, params, max_fit_cells=2000)
        np.testing.assert_array_equal(a.zones, b.zones)
        assert a.index_table == b.index_table
    u1, _ = fuzzy_cmeans(np.c_[stp.ravel(), ph.ravel()], 3, seed=9)
    u2, _ = fuzzy_cmeans(np.c_[stp.ravel(), ph.ravel()], 3, seed=9)
    np.testing.assert_array_equal(u1, u2)


# --------------------------------------------------------------------------- indices


def test_index_bounds_crisp_and_uniform():
    # Source: Odeh, Chittleborough & McBratney (1992) (FPI); Bezdek (1981): the partition
    # entropy lies in [0, ln c], 0 for a crisp partition and ln c for the uniform one.
    n, c = 50, 4
    crisp = np.eye(c)[np.arange(n) % c]
    uniform = np.full((n, c), 1 / c)
    assert fuzziness_performance_index(crisp) == pytest.approx(0.0, abs=1e-12)
    assert normalized_classification_entropy(crisp) == pytest.approx(0.0, abs=1e-12)
    assert modified_partition_entropy(crisp) == pytest.approx(0.0, abs=1e-12)
    assert fuzziness_performance_index(uniform) == pytest.approx(1.0)
    assert modified_partition_entropy(uniform) == pytest.approx(1.0)
    # Source: Fridgen et al. (2004): NCE = n / (n - c) * H with the natural logarithm.
    assert normalized_classification_entropy(uniform) == pytest.approx(n / (n - c) * math.log(c))


def test_indices_worked_example():
    # Worked by hand from the published definitions (Odeh et al. 1992; Fridgen et al. 2004):
    # F = (0.5 + 1 + 1 + 0.5) / 4 = 0.75, FPI = 1 - (2 * 0.75 - 1) / 1 = 0.5;
    # H = 2 ln 2 / 4, NCE = 4 / (4 - 2) * H = ln 2, MPE = H / ln 2 = 0.5.
    u = np.array([[0.5, 0.5], [1.0, 0.0], [0.0, 1.0], [0.5, 0.5]])
    assert fuzziness_performance_index(u) == pytest.approx(0.5)
    assert normalized_classification_entropy(u) == pytest.approx(math.log(2))
    assert modified_partition_entropy(u) == pytest.approx(0.5)


def test_choice_rule_sums_ranks_and_ties_go_to_fewer_zones():
    # common practice, no source: the rule pmap states for indices that disagree.
    table = [{"n_zones": 2, "fpi": 0.30, "mpe": 0.10},   # ranks 3 + 1 = 4
             {"n_zones": 3, "fpi": 0.10, "mpe": 0.20},   # ranks 1 + 2 = 3
             {"n_zones": 4, "fpi": 0.20, "mpe": 0.30}]   # ranks 2 + 3 = 5
    assert choose_n_zones(table) == 3
    table[0]["fpi"] = 0.15                               # 2: ranks 2 + 1 = 3, 3: 1 + 2 = 3
    table[2]["fpi"] = 0.40
    assert choose_n_zones(table) == 2
    agree = [{"n_zones": c, "fpi": abs(c - 5) + 0.1, "mpe": abs(c - 5) + 0.2} for c in range(2, 7)]
    assert choose_n_zones(agree) == 5


# --------------------------------------------------------------------------- zones


@pytest.mark.parametrize("method", ["kmeans", "fuzzy_cmeans"])
def test_zones_are_numbered_by_ascending_mean_stp(method):
    truth, stp, ph = _planted_field(reverse=True)  # richest block in the west
    mask = np.ones(truth.shape, bool)
    result = cluster_zones({"ph": ph, "stp": stp}, mask, ClusterParams(method=method, n_zones=3,
                                                                       layers=("ph", "stp")))
    assert result.order_layer == "stp" and result.chosen_by == "user"
    means = zone_means(result.zones, stp, result.n_zones)
    assert np.all(np.diff(means) > 10)
    # The poorest block (12 mg/kg) is now in the east and is zone 1.
    assert np.bincount(result.zones[:, -30:].ravel()).argmax() == 1
    assert result.labels == ("zone 1", "zone 2", "zone 3")
    # Without stp, the first layer numbers the zones: pH 5.4 < 6.2 < 6.8.
    by_ph = cluster_zones({"ph": ph}, mask, ClusterParams(method=method, n_zones=3,
                                                          layers=("ph",)))
    assert by_ph.order_layer == "ph"
    assert np.all(np.diff(zone_means(by_ph.zones, ph, 3)) > 0.3)


def test_zone_raster_outside_and_missing_cells():
    truth, stp, ph = _planted_field()
    mask = np.ones(truth.shape, bool)
    mask[:5, :] = False
    ph[10, 10] = np.nan
    result = cluster_zones({"stp": stp, "ph": ph}, mask, ClusterParams(method="kmeans"))
    assert result.zones.dtype == np.uint8
    assert (result.zones[:5] == 0).all() and result.zones[10, 10] == 0
    assert (result.zones[mask & np.isfinite(ph)] > 0).all()
    assert result.n_unzoned_cells == 1 and result.n_valid_cells == mask.sum() - 1
    assert sum(result.n_cells) == result.n_valid_cells
    assert np.isnan(result.max_membership[10, 10])
    inside = result.zones > 0
    assert (result.max_membership[inside] >= 1 / 3).all() and (result.max_membership[inside] <= 1).all()


def test_big_fields_are_fitted_on_a_subsample():
    truth, stp, ph = _planted_field()
    mask = np.ones(truth.shape, bool)
    result = cluster_zones({"stp": stp, "ph": ph}, mask, ClusterParams(method="fuzzy_cmeans"),
                           max_fit_cells=600)
    assert result.n_fit_cells == 600 and result.n_valid_cells == truth.size
    assert any("subsample of 600" in note for note in result.notes)
    assert (result.zones > 0).all()
    # Source: scikit-learn adjusted_rand_score; measured 0.96 (0.956 with every cell fitted).
    assert adjusted_rand_score(truth.ravel(), result.zones.ravel()) > 0.9


def test_constant_layer_is_dropped_with_a_note():
    truth, stp, ph = _planted_field()
    mask = np.ones(truth.shape, bool)
    flat = np.full(truth.shape, 7.0)
    result = cluster_zones({"stp": stp, "ph": flat}, mask, ClusterParams(method="kmeans"))
    assert result.layers == ("stp",) and result.dropped == ("ph",)
    assert any("ph is constant" in note for note in result.notes)
    with pytest.raises(InputError, match="every clustering layer is constant"):
        cluster_zones({"stp": flat, "ph": flat}, mask, ClusterParams(method="kmeans"))


def test_standardise_gives_zscores():
    truth, stp, ph = _planted_field()
    mask = np.ones(truth.shape, bool)
    mask[0] = False
    std = standardise({"stp": stp, "ph": ph}, mask)
    # Source: scipy.stats.zscore (population standard deviation, ddof=0).
    np.testing.assert_allclose(std.X[:, 0], zscore(stp[mask]))
    np.testing.assert_allclose(std.X[:, 1], zscore(ph[mask]))
    np.testing.assert_allclose(std.to_original(std.X)[:, 0], stp[mask])
    with pytest.raises(InputError, match="'ph' has shape"):
        standardise({"stp": stp, "ph": ph[:-1]}, mask)
    with pytest.raises(InputError, match="no cell of the field"):
        standardise({"stp": np.full(truth.shape, np.nan)}, mask)


def test_run_errors_name_the_key():
    truth, stp, ph = _planted_field()
    mask = np.ones(truth.shape, bool)
    with pytest.raises(ConfigError, match="clusters.layers names clay"):
        cluster_zones({"stp": stp, "ph": ph}, mask,
                      ClusterParams(method="kmeans", layers=("stp", "clay")))
    with pytest.raises(ConfigError, match="clusters.method"):
        cluster_zones({"stp": stp, "ph": ph}, mask, ClusterParams())
    tiny = np.array([[1.0, 2.0, 1.0]])
    with pytest.raises(ConfigError, match="clusters.n_zones = 3"):
        cluster_zones({"stp": tiny}, np.ones((1, 3), bool),
                      ClusterParams(method="kmeans", layers=("stp",), n_zones=3))


@pytest.mark.parametrize("method", ["kmeans", "fuzzy_cmeans"])
def test_summary_dict_is_json(method):
    truth, stp, ph = _planted_field()
    result = cluster_zones({"stp": stp, "ph": ph}, np.ones(truth.shape, bool),
                           ClusterParams(method=method))
    data = json.loads(json.dumps(result.as_dict()))
    assert data["n_zones"] == 3 and data["method"] == method
    assert [z["label"] for z in data["zones"]] == ["zone 1", "zone 2", "zone 3"]
    assert [row["n_zones"] for row in data["indices"]] == [2, 3, 4, 5, 6]
    if method == "kmeans":
        assert all(-1 <= row["silhouette"] <= 1 for row in data["indices"])
        wcss = [row["wcss"] for row in data["indices"]]
        assert np.all(np.diff(wcss) < 0)  # more zones, less scatter


# --------------------------------------------------------------------------- rates


def test_zone_rates_from_rule_and_from_table():
    truth, stp, ph = _planted_field()
    result = cluster_zones({"stp": stp, "ph": ph}, np.ones(truth.shape, bool),
                           ClusterParams(method="kmeans"))
    means = zone_means(result.zones, stp, result.n_zones)
    rule = RateRule()
    rates = zone_rates(result, ClusterParams(method="kmeans"),
                       lambda s: p2o5_rate_kg_ha(s, rule), means)
    np.testing.assert_array_equal(rates, p2o5_rate_kg_ha(means, rule))
    # Zone 1 is the poorest: it never gets less P2O5 than a richer zone.
    assert np.all(np.diff(rates) <= 0) and rates[0] > rates[-1]
    table = ClusterParams(method="kmeans", rates_kg_ha=(90, 40, 0))
    np.testing.assert_array_equal(zone_rates(result, table, lambda s: s, means), [90, 40, 0])
    wrong = ClusterParams(method="kmeans", rates_kg_ha=(90, 0))
    with pytest.raises(ConfigError, match="clusters.rates_kg_ha has 2 rates but the run found 3"):
        zone_rates(result, wrong, lambda s: s, means)


def test_zone_means_ignore_nan():
    zones = np.array([[1, 1, 2], [2, 0, 3]], np.uint8)
    values = np.array([[10.0, np.nan, 4.0], [6.0, 99.0, np.nan]])
    np.testing.assert_array_equal(zone_means(zones, values, 3), [10.0, 5.0, np.nan])


# --------------------------------------------------------------------------- config


def test_valid_config_with_a_user_raster():
    p = ClusterParams(method="fuzzy_cmeans", layers=["stp", "elevation"],
                      rasters={"elevation": "dem.tif"}, n_zones=3, rates_kg_ha=[80, 40, 0])
    assert p.layers == ("stp", "elevation") and p.rates_kg_ha == (80.0, 40.0, 0.0)


@pytest.mark.parametrize(
    ("changes", "key"),
    [
        ({"method": "kmean"}, "clusters.method"),
        ({"layers": ()}, "clusters.layers"),
        ({"layers": ("stp", "stp")}, "clusters.layers"),
        ({"layers": ("stp", "elevation")}, "clusters.layers"),
        ({"layers": ("stp", "ph"), "rasters": {"ph": "ph.tif"}}, "clusters.rasters.ph"),
        ({"rasters": {"elevation": "dem.tif"}}, "clusters.rasters.elevation"),
        ({"layers": ("elevation",), "rasters": {"elevation": ""}}, "clusters.rasters.elevation"),
        ({"n_zones": 1}, "clusters.n_zones"),
        ({"n_zones": -2}, "clusters.n_zones"),
        ({"n_zones": 2.5}, "clusters.n_zones"),
        ({"n_zones": 21}, "clusters.n_zones"),
        ({"max_zones": 1}, "clusters.max_zones"),
        ({"fuzziness": 1.0}, "clusters.fuzziness"),
        ({"fuzziness": float("nan")}, "clusters.fuzziness"),
        ({"seed": -1}, "clusters.seed"),
        ({"rates_kg_ha": (50.0, -5.0)}, "clusters.rates_kg_ha"),
        ({"n_zones": 3, "rates_kg_ha": (50.0, 0.0)}, "clusters.rates_kg_ha"),
    ],
)
def test_config_errors_name_the_key(changes, key):
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
        ClusterParams(**changes)


def test_every_field_is_documented():
    # common practice, no source: docs/configuration.md is generated from this metadata.
    import dataclasses

    for f in dataclasses.fields(ClusterParams):
        assert {"unit", "doc", "source"} <= set(f.metadata), f.name
