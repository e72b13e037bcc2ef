"""Per-polygon prescription: one rate per polygon, its probability of deficiency, its tables."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.spatial import cKDTree

from pmap.errors import InputError
from pmap.geostats.kriging import lognormal_back_transform, lognormal_log_moments
from pmap.prescribe import prescription as rx
from pmap.prescribe.rates import (
    RateRule,
    p2o5_rate_kg_ha,
    product_grade,
    product_rates,
    resolve_rule,
)
from pmap.soil.conversions import convert_soil_test


def test_deficiency_probability_matches_scipy_normal_and_lognormal():
    # Source: scipy.stats.norm / scipy.stats.lognorm cdf.
    mean = np.array([15.0, 20.0, 30.0, np.nan])
    var = np.array([16.0, 4.0, 25.0, 1.0])
    got = rx.deficiency_probability(mean, var, 20.0, log=False)
    np.testing.assert_allclose(got[:3], stats.norm.cdf(20.0, mean[:3], np.sqrt(var[:3])))
    assert np.isnan(got[3])
    m, s2 = np.array([np.log(18.0), np.log(25.0)]), np.array([0.09, 0.25])
    got_log = rx.deficiency_probability(m, s2, 20.0, log=True)
    np.testing.assert_allclose(got_log, stats.lognorm.cdf(20.0, np.sqrt(s2), scale=np.exp(m)))
    # variance 0: certain, and a value at the critical level is not deficient (as the rule)
    np.testing.assert_array_equal(
        rx.deficiency_probability([19.9, 20.0, 20.1], [0, 0, 0], 20.0, log=False), [1, 0, 0])


def test_quantile_is_consistent_with_the_probability():
    # Source: definition of a quantile; scipy.stats.norm.ppf as the reference.
    rng = np.random.default_rng(1)
    mean, var = rng.uniform(5, 40, 500), rng.uniform(0.5, 60, 500)
    for q in (0.1, 0.3, 0.5):
        quant = rx.stp_quantile(mean, var, q, log=False)
        np.testing.assert_allclose(quant, stats.norm.ppf(q, mean, np.sqrt(var)))
        prob = rx.deficiency_probability(mean, var, 20.0, log=False)
        assert ((quant < 20.0) == (prob > q)).all()
    lq = rx.stp_quantile(np.log(mean), var / 100, 0.2, log=True)
    np.testing.assert_allclose(lq, stats.lognorm.ppf(0.2, np.sqrt(var / 100), scale=mean))


def test_island_200_m_from_a_100_m_grid_gets_no_rate():
    # Geometry: on a regular grid of spacing d every point lies within d / sqrt(2) of a
    # sample; the default 1.5 spacings covers the field and its headland, not an island
    # 200 m beyond the last sample.
    gx, gy = np.meshgrid(np.arange(50, 500, 100.0), np.arange(50, 500, 100.0))
    samples = np.column_stack([gx.ravel(), gy.ravel()])
    spacing = rx.sample_spacing_m(samples)
    assert spacing == pytest.approx(100.0)
    # 10 m cells over the field (0..500 m) and an island at x = 640..660 m, 200 m beyond
    # the last sample column (x = 450 m)
    cx, cy = np.meshgrid(np.r_[np.arange(5, 500, 10.0), 645.0, 655.0],
                         np.arange(5, 500, 10.0))
    cells = np.column_stack([cx.ravel(), cy.ravel()])
    d = rx.distance_to_samples(cells, samples)
    # nearest sample to the island: (450, 50..450); cell centres lie 5 m off the sample rows
    assert d[cells[:, 0] > 600].min() == pytest.approx(np.hypot(195.0, 5.0))
    assert d[cells[:, 0] < 500].max() <= 100 / np.sqrt(2) + 1e-9
    covered = rx.rate_coverage(d, 1.5 * spacing)
    assert covered[cells[:, 0] < 500].all() and not covered[cells[:, 0] > 600].any()
    assert not rx.rate_coverage([np.nan], 150.0).any()
    with pytest.raises(InputError):
        rx.rate_coverage(d, 0.0)
    assert np.isnan(rx.sample_spacing_m(samples[:1]))


def test_scattered_dense_samples_leave_no_holes_without_a_rate():
    # Source: Clark & Evans (1954), Ecology 35: random points of density lambda have nearest
    # neighbours at a mean 0.5 / sqrt(lambda), half the spacing of a grid of that density,
    # so 1.5 nearest-neighbour spacings would leave scattered cells without a rate.
    rng = np.random.default_rng(0)
    samples = rng.random((20_000, 2)) * 1000.0
    d, _ = cKDTree(samples).query(samples, k=2)
    assert np.median(d[:, 1]) == pytest.approx(0.47 * np.sqrt(1e6 / 20_000), rel=0.05)
    spacing = rx.sample_spacing_m(samples)
    assert spacing == pytest.approx(np.sqrt(1e6 / 20_000), rel=0.02)
    cx, cy = np.meshgrid(np.arange(2.5, 1000, 5.0), np.arange(2.5, 1000, 5.0))
    cells = np.column_stack([cx.ravel(), cy.ravel()])
    covered = rx.rate_coverage(rx.distance_to_samples(cells, samples), 1.5 * spacing)
    assert covered.mean() > 0.998


def test_uncovered_cells_form_not_sampled_patches_with_the_no_data_rate():
    rule = resolve_rule(RateRule(), "mehlich3_icp")
    zones = np.ones((4, 10), np.uint8)
    stp = np.full(zones.shape, 10.0)
    covered = np.ones(zones.shape, bool)
    covered[:, 7:] = False  # e.g. the island of the test above
    patches, labels = rx.prescription_patches(
        zones, ("below critical",), cell_area_ha=0.01, stp=stp, rule_stp=stp,
        rate_fn=lambda s: p2o5_rate_kg_ha(s, rule), product_fn=lambda p: product_rates(p, rule),
        product="MAP 11-52-0", grade=(11.0, 52.0, 0.0), basis=rx.BASIS_MODEL,
        covered=covered, no_rate_product_kg_ha=20.0)
    assert [p.class_id for p in patches] == [1, rx.NOT_SAMPLED]
    assert (labels[:, 7:] == 2).all() and (labels[:, :7] == 1).all()
    far = patches[1]
    assert far.basis == rx.BASIS_NOT_SAMPLED and far.role == "not sampled"
    assert far.n_cells == 12 and np.isnan(far.mean_stp_mg_kg)
    # 20 kg/ha of 11-52-0 carries 10.4 kg P2O5 and 2.2 kg N (Source: the grade's definition)
    assert far.product_kg_ha == 20.0
    assert far.p2o5_kg_ha == pytest.approx(10.4) and far.n_kg_ha == pytest.approx(2.2)
    assert patches[0].basis == rx.BASIS_MODEL and patches[0].p2o5_kg_ha > 0
    with pytest.raises(InputError, match="no class label"):
        rx.prescription_patches(
            zones * 2, ("below critical",), cell_area_ha=0.01, stp=stp, rule_stp=stp,
            rate_fn=lambda s: s, product_fn=lambda p: (p, p, p), product="x",
            grade=(0.0, 100.0, 0.0), basis=rx.BASIS_MODEL)


def _field():
    zones = np.zeros((6, 8), np.uint8)
    zones[:, :4] = 1
    zones[:, 4:] = 2
    zones[0:2, 6:] = rx.NOT_SAMPLED
    stp = np.where(zones == 1, 12.0, 30.0)
    stp[3:, :4] = 16.0  # the class-1 block holds two soil-test levels
    return zones, stp


def _patches(zones, stp, rule_stp, rule):
    return rx.prescription_patches(
        zones, ("below critical", "maintenance range", "at or above limit"), cell_area_ha=0.01,
        stp=stp, rule_stp=rule_stp, rate_fn=lambda s: p2o5_rate_kg_ha(s, rule),
        product_fn=lambda p: product_rates(p, rule), product="MAP 11-52-0",
        grade=product_grade(rule), basis=rx.BASIS_MEASURED,
        roles=("build-up", "maintenance", "none"), no_rate_product_kg_ha=0.0)


def test_the_rule_is_fed_the_converted_soil_test():
    # A Bray-1 lab field under a Mehlich-3 rule: the polygon rate must come from the
    # converted values (Source: Ohio State FAQ regression Bray-1 = -8.08 + 0.832 M3, inverted
    # by pmap.soil.conversions), not from the lab's Bray numbers.
    rule = resolve_rule(RateRule(soil_test_method="mehlich3_icp"), "bray1")
    zones, bray = _field()
    m3 = convert_soil_test(bray, "bray1", "mehlich3_icp")
    patches, labels = _patches(zones, bray, m3, rule)
    first = patches[0]
    expected = product_rates(p2o5_rate_kg_ha(m3[labels == 1].mean(), rule), rule)[1]
    assert first.p2o5_kg_ha == pytest.approx(float(expected))
    wrong, _ = _patches(zones, bray, bray, rule)
    assert wrong[0].p2o5_kg_ha != pytest.approx(first.p2o5_kg_ha)
    assert first.mean_stp_mg_kg == pytest.approx(bray[labels == 1].mean())


def test_one_rate_per_polygon_and_tables_from_the_polygons():
    rule = resolve_rule(RateRule(), "mehlich3_icp")
    zones, stp = _field()
    patches, labels = _patches(zones, stp, stp, rule)
    assert [p.class_label for p in patches] == ["below critical", "maintenance range",
                                                 "not sampled"]
    unsampled = patches[-1]
    assert unsampled.product_kg_ha == 0.0 and unsampled.basis == rx.BASIS_NOT_SAMPLED
    table = rx.class_table(patches)
    totals = rx.field_totals(patches)
    for row in table:
        mine = [p for p in patches if p.class_id == row["class_id"]]
        assert row["area_ha"] == pytest.approx(sum(p.area_ha for p in mine))
        assert row["p2o5_total_kg"] == pytest.approx(sum(p.p2o5_kg_ha * p.area_ha for p in mine))
        assert row["min_p2o5_kg_ha"] <= row["mean_p2o5_kg_ha"] <= row["max_p2o5_kg_ha"]
    assert totals["area_ha"] == pytest.approx(0.48)
    assert totals["p2o5_total_kg"] == pytest.approx(sum(r["p2o5_total_kg"] for r in table))
    assert totals["area_without_rate_ha"] == pytest.approx(0.04)
    # Monotone: the lower-soil-test polygon gets the higher rate.
    assert patches[0].p2o5_kg_ha > patches[1].p2o5_kg_ha > 0
    assert rx.single_rate_notice(patches) is None
    flat = [p for p in patches if p.class_id == 2]
    assert "ONE RATE" in rx.single_rate_notice(flat)


def test_probability_from_the_log_moments_of_lognormal_kriging():
    # Source: scipy.stats.lognorm; the kriging distribution of log Z is N(m, s2) with m, s2
    # recovered from the back-transformed estimate by pmap.geostats.kriging.
    m, s2, mu = np.array([2.5, 3.0, 3.4]), np.array([0.05, 0.3, 0.6]), np.array([0.0, 0.1, -0.05])
    estimate, variance = lognormal_back_transform(m, s2, mu)
    m2, s22 = lognormal_log_moments(estimate, variance, mu)
    p = rx.deficiency_probability(m2, s22, 20.0, log=True)
    np.testing.assert_allclose(p, stats.lognorm.cdf(20.0, np.sqrt(s2), scale=np.exp(m)))
    # a normal distribution with the back-transformed moments gives other numbers
    assert not np.allclose(p, rx.deficiency_probability(estimate, variance, 20.0, log=False),
                           atol=0.01)
    # the median exp(m) has probability one half
    np.testing.assert_allclose(rx.deficiency_probability(m, s2, np.exp(m[1]), log=True)[1], 0.5)
    with pytest.raises(InputError):
        rx.deficiency_probability(m, s2, 0.0, log=True)


def test_quantile_with_zero_variance_and_nan():
    got = rx.stp_quantile([12.0, np.nan, 30.0], [0.0, 4.0, np.nan], 0.2, log=False)
    assert got[0] == 12.0 and np.isnan(got[1:]).all()
    assert rx.stp_quantile([np.log(12.0)], [0.0], 0.2, log=True)[0] == pytest.approx(12.0)
    with pytest.raises(ValueError):
        rx.stp_quantile([12.0], [1.0], 1.0, log=False)


def test_polygon_rate_is_rate_fn_of_the_rule_soil_test_mean():
    # The function hands rate_fn the patch means of rule_stp, not of stp.
    zones, bray = _field()
    rule_stp = bray * 1.3 + 5.0
    seen = []

    def rate_fn(s):
        seen.append(np.array(s, dtype=float))
        return 200.0 - 2.0 * np.asarray(s)

    patches, labels = rx.prescription_patches(
        zones, ("a", "b"), cell_area_ha=0.01, stp=bray, rule_stp=rule_stp, rate_fn=rate_fn,
        product_fn=lambda p: (np.asarray(p) * 2, np.asarray(p), np.zeros_like(p)),
        product="x", grade=(0.0, 50.0, 0.0), basis=rx.BASIS_MEASURED)
    expected = [rule_stp[labels == k].mean() for k in range(1, labels.max() + 1)]
    np.testing.assert_allclose(seen[0][:2], expected[:2])
    for p in patches[:2]:
        assert p.mean_rule_stp_mg_kg == pytest.approx(rule_stp[labels == p.zone_id].mean())
        assert p.mean_stp_mg_kg == pytest.approx(bray[labels == p.zone_id].mean())
        assert p.p2o5_kg_ha == pytest.approx(200.0 - 2.0 * p.mean_rule_stp_mg_kg)
        assert p.product_kg_ha == pytest.approx(2 * p.p2o5_kg_ha)


def test_higher_soil_test_never_gets_a_higher_rate():
    # The published rule's rate falls as soil-test P rises (Source: Tri-State 2020, Bulletin
    # 974, build-up + maintenance); per polygon the order must survive averaging.
    rule = resolve_rule(RateRule(), "mehlich3_icp")
    rng = np.random.default_rng(4)
    zones = rng.integers(1, 4, (15, 20)).astype(np.uint8)
    stp = rng.uniform(2.0, 60.0, zones.shape)
    deficiency = rx.deficiency_probability(stp, np.full(zones.shape, 25.0), 20.0, log=False)
    patches, _ = rx.prescription_patches(
        zones, ("a", "b", "c"), cell_area_ha=0.01, stp=stp, rule_stp=stp,
        rate_fn=lambda s: p2o5_rate_kg_ha(s, rule), product_fn=lambda p: product_rates(p, rule),
        product="MAP 11-52-0", grade=product_grade(rule), basis=rx.BASIS_MEASURED,
        deficiency=deficiency)
    order = np.argsort([p.mean_rule_stp_mg_kg for p in patches], kind="stable")
    rates = np.array([patches[i].p2o5_kg_ha for i in order])
    assert (np.diff(rates) <= 1e-9).all() and rates[0] > rates[-1]
    probs = np.array([patches[i].mean_deficiency_probability for i in order])
    assert np.isfinite(probs).all() and probs[0] > probs[-1]
    # the class table is the polygons' sum, class by class
    table = rx.class_table(patches)
    assert sum(r["n_polygons"] for r in table) == len(patches)
    for row in table:
        mine = [p for p in patches if p.class_id == row["class_id"]]
        area = sum(p.area_ha for p in mine)
        assert row["product_total_kg"] == pytest.approx(sum(p.product_kg_ha * p.area_ha
                                                            for p in mine))
        assert row["mean_stp_mg_kg"] == pytest.approx(
            sum(p.mean_stp_mg_kg * p.area_ha for p in mine) / area)
        assert row["mean_deficiency_probability"] == pytest.approx(
            sum(p.mean_deficiency_probability * p.area_ha for p in mine) / area)
