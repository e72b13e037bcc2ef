"""One interpretation table drives both the zone classes and the rate rule."""

from __future__ import annotations

import numpy as np
import pytest

from pmap.errors import ConfigError
from pmap.prescribe.interpretation import BUILTIN_TABLES, interpretation_table
from pmap.prescribe.rates import (
    RateRule,
    nitrogen_kg_ha,
    p2o5_rate_kg_ha,
    parse_grade,
    product_cost,
    product_label,
    product_rates,
    removal_lb_acre,
    resolve_interpretation,
    resolve_rule,
    single_rate,
    to_display_units,
)
from pmap.soil.conversions import kg_ha_to_lb_acre, lb_acre_to_kg_ha


def test_tri_state_levels():
    # Source: Tri-State 2020 (Bulletin 974) via Ohio State agbmps.osu.edu "Soil Test P value
    # less than 50 PPM": Mehlich-3 critical 20 ppm corn/soybean, 30 with wheat/alfalfa; the
    # maintenance range runs to 50 ppm, at which no P is suggested.
    for crop, critical in (("corn", 20.0), ("soybean", 20.0), ("wheat", 30.0)):
        table = interpretation_table("mehlich3_icp", "tri-state", crop)
        assert (table.critical_ppm, table.limit_ppm) == (critical, 50.0)
        assert table.roles == ("build-up", "maintenance", "none")


def test_iowa_optimum_classes_differ_between_icp_and_colorimetric():
    # Source: Iowa State PM 1688 (Mallarino & Sawyer, rev. 2013) via Iowa State ICM News,
    # Oct 2016: optimum Mehlich-3 ICP 26-35 ppm, Mehlich-3 colorimetric and Bray-1 16-20,
    # Olsen 10-13.
    icp = interpretation_table("mehlich3_icp", "iowa", "corn")
    colorimetric = interpretation_table("mehlich3_colorimetric", "iowa", "corn")
    olsen = interpretation_table("olsen", "iowa", "soybean")
    assert (icp.critical_ppm, icp.limit_ppm) == (26.0, 36.0)
    assert (colorimetric.critical_ppm, colorimetric.limit_ppm) == (16.0, 21.0)
    assert (olsen.critical_ppm, olsen.limit_ppm) == (10.0, 14.0)
    assert icp.role_of(3) == "maintenance" and icp.labels[2] == "optimum"
    assert icp.classify([25.9, 26.0, 35.9, 36.0]).tolist() == [2, 3, 3, 4]


def test_methods_without_a_published_table_must_be_set():
    # Tri-State publishes no colorimetric Mehlich-3 values: the user must set them.
    with pytest.raises(ConfigError, match="rates.critical_ppm and rates.maintenance_limit_ppm"):
        interpretation_table("mehlich3_colorimetric", "tri-state", "corn")
    table = interpretation_table("mehlich3_colorimetric", "tri-state", "corn",
                                 critical_ppm=15.0, limit_ppm=35.0)
    assert table.breaks == (15.0, 35.0) and table.source == "set in the config"
    with pytest.raises(ConfigError, match="must be one of zones.breaks"):
        interpretation_table("mehlich3_icp", "tri-state", "corn", breaks=(10.0, 30.0, 50.0))
    fine = interpretation_table("mehlich3_icp", "tri-state", "corn", breaks=(10.0, 20.0, 50.0),
                                labels=("very low", "low", "ok", "high"))
    assert fine.roles == ("build-up", "build-up", "maintenance", "none")


@pytest.mark.parametrize("key", sorted(BUILTIN_TABLES))
def test_rates_never_rise_with_class_and_the_roles_hold(key):
    # Source: Tri-State 2020 framework (build-up below critical, crop removal in the
    # maintenance range, none at or above the limit) via Ohio State agbmps pages.
    region, method, crop = key
    table = interpretation_table(method, region, crop)
    rule = resolve_rule(RateRule(region=region, crop=crop, max_rate_kg_ha=500.0,
                                 increment_kg_ha=0.0, min_rate_kg_ha=0.0), method)
    removal = float(lb_acre_to_kg_ha(removal_lb_acre(rule)))
    edges = (0.0, *table.breaks, table.breaks[-1] * 2)
    previous_max = np.inf
    for cls in range(1, table.n_classes + 1):
        stp = np.linspace(edges[cls - 1], edges[cls], 50, endpoint=False)
        assert (table.classify(stp) == cls).all()
        rates = p2o5_rate_kg_ha(stp, rule)
        assert rates.max() <= previous_max + 1e-9
        previous_max = rates.min()
        role = table.role_of(cls)
        if role == "none":
            assert (rates == 0).all()
        elif role == "maintenance":
            np.testing.assert_allclose(rates, removal)
        else:
            assert (rates > removal).all()


def test_tri_state_worked_numbers():
    # Source: Culman et al. (2019), Ohioline ANR-74: 180 bu corn + 60 bu soybean remove
    # 111.6 lb P2O5, about 210 lb MAP (11-52-0) or 240 lb DAP (18-46-0); removal per bushel
    # from Villamil, Nafziger & Behnke (2019).
    corn = removal_lb_acre(RateRule(crop="corn", yield_goal=180.0))
    soy = removal_lb_acre(RateRule(crop="soybean", yield_goal=60.0))
    assert corn + soy == pytest.approx(111.6)
    assert removal_lb_acre(RateRule(crop="corn", yield_goal=150.0)) == pytest.approx(55.5)
    no_round = {"product_increment_kg_ha": 0.0}
    p2o5_kg = lb_acre_to_kg_ha(np.array([111.6]))
    map_lb = kg_ha_to_lb_acre(product_rates(p2o5_kg, RateRule(product="MAP", **no_round))[0])[0]
    dap_lb = kg_ha_to_lb_acre(product_rates(p2o5_kg, RateRule(product="DAP", **no_round))[0])[0]
    assert map_lb == pytest.approx(210, rel=0.03) and dap_lb == pytest.approx(240, rel=0.02)
    # The build-up: (20 - 12) ppm x 20 lb/ppm / 4 years + 66.6 = 106.6 lb/acre -> 120 kg/ha.
    assert p2o5_rate_kg_ha(12.0, resolve_rule(RateRule(), "mehlich3_icp")) == 120.0


def test_products_grades_nitrogen_cost_and_rounding():
    # Source: Ohioline ANR-74 grades MAP 11-52-0, DAP 18-46-0.
    assert parse_grade("10-34-0") == (10.0, 34.0, 0.0)
    for bad in ("10-34", "a-b-c", "60-60-0", "10-0-20"):
        with pytest.raises(ConfigError):
            parse_grade(bad)
    rule = RateRule(product="DAP", product_increment_kg_ha=5.0, product_price_per_t=800.0)
    product, p2o5, nitrogen = product_rates(np.array([80.0, np.nan]), rule)
    assert product[0] == 175.0  # 80 / 0.46 = 173.9 -> metered at 175
    assert p2o5[0] == pytest.approx(175.0 * 0.46) and nitrogen[0] == pytest.approx(175 * 0.18)
    assert np.isnan(product[1])
    assert nitrogen_kg_ha(100.0, RateRule(product="MAP")) == pytest.approx(11.0)
    assert product_cost(2500.0, rule) == pytest.approx(2000.0)
    assert product_cost(2500.0, RateRule()) is None
    user = RateRule(product="user", product_grade="10-34-0", product_name="APP liquid")
    assert product_label(user) == "APP liquid 10-34-0"
    with pytest.raises(ConfigError, match="rates.product_name"):
        RateRule(product="user", product_grade="10-34-0")


def test_single_rate_and_the_table_the_rule_uses():
    assert single_rate([80.0, 80.0, np.nan]) == 80.0 and single_rate([80.0, 75.0]) is None
    table = resolve_interpretation(RateRule(region="iowa"), "mehlich3_icp")
    assert table.breaks == (16.0, 26.0, 36.0, 46.0)
    converted = resolve_interpretation(RateRule(soil_test_method="bray1"), "mehlich3_icp")
    assert converted.method == "bray1"


def test_the_limit_is_in_the_no_p_class_and_the_critical_level_in_maintenance():
    # Source: Ohio State agbmps.osu.edu "Soil Test P value less than 50 PPM" (Tri-State 2020):
    # below 20 ppm build-up; from the critical level to 50 ppm maintenance; "once STP reaches
    # 50 PPM, no additional fertilizer".
    rule = resolve_rule(RateRule(increment_kg_ha=0.0, min_rate_kg_ha=0.0), "mehlich3_icp")
    removal = float(lb_acre_to_kg_ha(removal_lb_acre(rule)))
    rates = p2o5_rate_kg_ha(np.array([19.99, 20.0, 49.99, 50.0]), rule)
    assert rates[0] > removal
    np.testing.assert_allclose(rates[1:3], removal)
    assert rates[3] == 0.0
    table = interpretation_table("mehlich3_icp", "tri-state", "corn")
    assert table.classify([19.99, 20.0, 49.99, 50.0, np.nan]).tolist() == [1, 2, 2, 3, 0]
    assert [table.role_of(k) for k in (1, 2, 3)] == ["build-up", "maintenance", "none"]


def test_no_default_anywhere_names_the_keys():
    # Iowa publishes no wheat table in pmap; Olsen has no Tri-State calibration.
    for method, region, crop in (("mehlich3_icp", "iowa", "wheat"),
                                 ("olsen", "tri-state", "corn")):
        with pytest.raises(ConfigError) as err:
            interpretation_table(method, region, crop)
        assert "rates.critical_ppm" in str(err.value)
        assert "rates.maintenance_limit_ppm" in str(err.value)
        assert "zones.breaks" in str(err.value)
    with pytest.raises(ConfigError, match="rates.region"):
        RateRule(region="ontario")
    # user breaks without labels get role names, numbered within a role
    table = interpretation_table("olsen", "tri-state", "corn", breaks=(5.0, 10.0, 14.0),
                                 critical_ppm=10.0, limit_ppm=14.0)
    assert table.labels == ("below critical 1", "below critical 2", "maintenance range",
                            "at or above limit")
    assert table.as_dict()["roles"] == ["build-up", "build-up", "maintenance", "none"]


def test_display_units_use_the_exact_pound_per_acre():
    # Source: international yard and pound (1 lb = 0.45359237 kg) and the international acre
    # (0.40468564224 ha): 1 lb/acre = 1.12085 kg/ha.
    assert float(to_display_units(1.12085, "us")) == pytest.approx(1.0, rel=1e-5)
    assert float(to_display_units(100.0, "us")) == pytest.approx(89.218, abs=1e-3)
    assert float(to_display_units(100.0, "metric")) == 100.0
    with pytest.raises(ConfigError, match="rates.units"):
        to_display_units(1.0, "imperial")


def test_product_rounding_stays_under_the_cap_and_consistent():
    # common practice, no source: the metered product rate sits on the increment and the P2O5
    # delivered is the product rate x grade, never above the cap.
    rule = RateRule(product="MAP", product_increment_kg_ha=10.0, max_rate_kg_ha=150.0)
    p2o5 = np.array([150.0, 120.0, 0.0])
    product, delivered, nitrogen = product_rates(p2o5, rule)
    np.testing.assert_allclose(product % 10.0, 0.0)
    np.testing.assert_allclose(delivered, product * 0.52)
    np.testing.assert_allclose(nitrogen, nitrogen_kg_ha(product, "MAP"))
    assert (delivered <= 150.0).all() and product[0] == 280.0 and product[2] == 0.0
    assert np.all(np.abs(delivered - p2o5) <= 10.0 * 0.52)


def test_deficiency_probability_threshold_validation():
    # common practice, no source: a probability threshold must lie strictly between 0 and 1.
    assert RateRule(deficiency_probability_threshold=0.2).deficiency_probability_threshold == 0.2
    for bad in (0.0, 1.0, 1.5):
        with pytest.raises(ConfigError, match="rates.deficiency_probability_threshold"):
            RateRule(deficiency_probability_threshold=bad)
