"""Tests of unit, oxide and extractant conversions and the soil-test equivalent."""

import numpy as np
import pytest

from pmap.errors import ConfigError
from pmap.soil.conversions import (
    KG_HA_PER_LB_ACRE,
    P2O5_PER_P,
    P_PER_P2O5,
    SoilTestEquivalent,
    bray1_from_mehlich3_icp,
    convert_soil_test,
    kg_ha_to_lb_acre,
    kg_ha_to_mg_kg,
    lb_acre_to_kg_ha,
    mehlich3_from_olsen,
    mehlich3_icp_from_bray1,
    mg_kg_to_kg_ha,
    olsen_from_mehlich3,
    p2o5_to_p,
    p_to_p2o5,
    ppm_to_lb_acre,
)


def test_oxide_factors():
    # Source: IUPAC masses via the periodictable package
    assert round(P2O5_PER_P, 4) == 2.2913
    assert round(P_PER_P2O5, 4) == 0.4364
    assert p2o5_to_p(p_to_p2o5(7.0)) == pytest.approx(7.0)


def test_lb_acre_definition():
    # Source: definitions of the pound and acre (0.45359237 kg, 0.40468564224 ha)
    assert round(KG_HA_PER_LB_ACRE, 5) == 1.12085
    assert lb_acre_to_kg_ha(100.0) == pytest.approx(112.085, abs=1e-3)
    assert kg_ha_to_lb_acre(lb_acre_to_kg_ha(55.0)) == pytest.approx(55.0)


def test_mg_kg_to_kg_ha_swat():
    # Source: SWAT2012 soil_chem: kg/ha = mg/kg * BD * depth(mm) / 100
    assert mg_kg_to_kg_ha(10.0, 1.3, 200.0) == pytest.approx(26.0)
    assert kg_ha_to_mg_kg(26.0, 1.3, 200.0) == pytest.approx(10.0)


def test_ppm_to_lb_acre_slices():
    # Source: Ohio State FAQ (x 2 for a 2 million lb furrow slice); UC Davis ANLAB (8 inch 2.4 M)
    assert ppm_to_lb_acre(15.0) == pytest.approx(30.0)
    assert ppm_to_lb_acre(10.0, slice_lb=2.4e6) == pytest.approx(24.0)


def test_bray_from_mehlich3_worked():
    # Source: Ohio State FAQ "Understanding Soil Test Reports for Phosphorus Values" (22 -> 10.2)
    assert round(float(bray1_from_mehlich3_icp(22.0)), 1) == 10.2
    assert mehlich3_icp_from_bray1(bray1_from_mehlich3_icp(37.0)) == pytest.approx(37.0)


def test_olsen_from_mehlich3():
    # Source: Montana State Extension (2020): Olsen = M3 / 2.05 - 14
    assert olsen_from_mehlich3(61.5) == pytest.approx(16.0)
    assert mehlich3_from_olsen(16.0) == pytest.approx(61.5)


def test_convert_soil_test_routes():
    m3 = np.array([40.0, 60.0, np.nan])
    bray = convert_soil_test(m3, "mehlich3_icp", "bray1")
    np.testing.assert_allclose(bray[:2], -8.08 + 0.832 * m3[:2])
    assert np.isnan(bray[2])
    # Bray-1 read as Mehlich-3 colorimetric (Source: Iowa State, 2023; non-calcareous soils)
    np.testing.assert_allclose(convert_soil_test(bray, "bray1", "mehlich3_colorimetric"), bray)
    back = convert_soil_test(
        convert_soil_test(m3, "mehlich3_icp", "olsen"), "olsen", "mehlich3_icp"
    )
    np.testing.assert_allclose(back[:2], m3[:2])
    assert convert_soil_test(5.0, "mehlich3_icp", "olsen") == 0.0  # negative regression result
    with pytest.raises(ConfigError, match="to_method"):
        convert_soil_test(m3, "mehlich3_icp", "morgan")


def test_soil_test_equivalent():
    eq = SoilTestEquivalent(intercept=2.0, slope=1.5)
    got = eq.to_soil_test(np.array([[0.0, 10.0], [np.nan, -5.0]]))
    np.testing.assert_array_equal(got[0], [2.0, 17.0])
    assert np.isnan(got[1, 0]) and got[1, 1] == 0.0
    default = SoilTestEquivalent()
    assert default.method == "mehlich3_icp"
    np.testing.assert_allclose(default.to_soil_test([12.5]), [12.5])


def test_soil_test_equivalent_validation():
    with pytest.raises(ConfigError, match="soil_test_equivalent.method"):
        SoilTestEquivalent(method="morgan")
    with pytest.raises(ConfigError, match="soil_test_equivalent.slope"):
        SoilTestEquivalent(slope=0.0)
