"""Tests of the lime requirement, lime rates, the pH payoff and lime-rate classes."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from pmap.errors import ConfigError, InputError
from pmap.soil.conversions import KG_HA_PER_LB_ACRE
from pmap.soil.lime import (
    NO_LIME_CLASS,
    T_HA_PER_T_ACRE,
    LimeParams,
    lime_coverage,
    lime_rate_t_ha,
    lime_requirement_t_acre,
    lime_requirement_t_ha,
    lime_zones,
    mehlich_buffer_acidity,
    p_rate_ph_flag,
    ph_correction_payoff,
)

TO_6 = LimeParams(target_ph=6.0)


# --- the Mehlich buffer calculation ------------------------------------------------------

def test_ncda_worked_example_exact():
    # Source: NCDA&CS Agronomic Division, Mehlich buffer lime requirement (ncagr.gov
    # agronomi/bufftab1.htm): pH 5.0 -> 6.0, acidity 1.2, factor 0.625; the page prints
    # "0.76 ton/acre", the exact product is 1.2 x 0.625 = 0.75 US tons/acre.
    assert mehlich_buffer_acidity(6.3) == pytest.approx(1.2, rel=1e-12)
    got = lime_requirement_t_acre(5.0, 6.3, TO_6)
    assert float(got) == pytest.approx(0.75, rel=1e-9)


def test_ncda_factor_formula_by_hand():
    # Source: NCDA&CS Agronomic Division: LR = (6.6 - BpH) * 4 * (target - pH) / (6.6 - pH)
    ph, buf, target = 4.8, 5.9, 6.2
    by_hand = (6.6 - buf) * 4 * (target - ph) / (6.6 - ph)
    got = lime_requirement_t_acre(ph, buf, LimeParams(target_ph=target))
    assert float(got) == pytest.approx(by_hand, rel=1e-12)
    assert by_hand == pytest.approx(2.1777777777777776, rel=1e-12)


def test_short_ton_per_acre_to_tonnes_per_hectare():
    # Source: NIST definitions: 1 lb = 0.45359237 kg, 1 acre = 4046.8564224 m2; the NCDA&CS
    # unit is "U.S. tons per acre" (2000 lb), so 1 t/acre = 907.18474 kg / 0.40468564224 ha.
    assert T_HA_PER_T_ACRE == pytest.approx(2.2417023, abs=1e-7)
    # the project's own lb/acre constant, independently: 2000 lb/acre in kg/ha, / 1000
    assert T_HA_PER_T_ACRE == pytest.approx(2000 * KG_HA_PER_LB_ACRE / 1000, rel=1e-12)


def test_t_ha_is_t_acre_times_the_factor_everywhere():
    rng = np.random.default_rng(1)
    ph = rng.uniform(4.0, 7.0, 200)
    buf = rng.uniform(5.0, 6.8, 200)
    buf[::17] = np.nan
    per_acre = lime_requirement_t_acre(ph, buf)
    per_ha = lime_requirement_t_ha(ph, buf)
    np.testing.assert_allclose(per_ha, per_acre * T_HA_PER_T_ACRE, rtol=1e-12)
    np.testing.assert_array_equal(np.isnan(per_ha), np.isnan(per_acre))
    assert float(lime_requirement_t_ha(5.0, 6.3, TO_6)) == pytest.approx(0.75 * 2.2417, rel=1e-4)


def test_lower_ph_needs_more_lime():
    ph = np.linspace(4.0, 6.45, 50)
    lr = lime_requirement_t_acre(ph, np.full(50, 6.0))  # target 6.5 < 6.6
    assert np.all(np.diff(lr) < 0)


def test_lower_buffer_ph_needs_more_lime():
    buf = np.linspace(4.5, 6.55, 50)
    lr = lime_requirement_t_acre(np.full(50, 5.2), buf)
    assert np.all(np.diff(lr) < 0)
    assert np.all(lr > 0)


def test_zero_at_and_above_target_and_at_buffer_reference():
    params = LimeParams(target_ph=6.2)
    got = lime_requirement_t_acre([6.2, 6.5, 7.4], [5.5, 5.5, 5.5], params)
    np.testing.assert_array_equal(got, [0.0, 0.0, 0.0])
    # a soil at its target needs no buffer pH
    np.testing.assert_array_equal(lime_requirement_t_acre([6.2, 7.0], [np.nan, np.nan], params),
                                  [0.0, 0.0])
    np.testing.assert_array_equal(lime_requirement_t_acre([6.2, 7.0], None, params), [0.0, 0.0])
    # buffer pH at or above 6.6: no exchangeable acidity
    np.testing.assert_array_equal(lime_requirement_t_acre([5.0, 5.0], [6.6, 6.9], params),
                                  [0.0, 0.0])
    # continuous at the target: just below it the requirement is small and positive
    assert 0 < float(lime_requirement_t_acre(6.1999, 5.5, params)) < 0.002


def test_nan_propagation_and_no_guess_without_buffer():
    got = lime_requirement_t_acre([np.nan, 5.0, 5.0], [6.0, np.nan, 6.0])
    assert np.isnan(got[0]) and np.isnan(got[1]) and got[2] > 0
    assert np.isnan(lime_requirement_t_acre([5.0, 5.8], None)).all()
    assert np.isnan(lime_requirement_t_ha(np.nan, np.nan))


def test_shape_preserved_and_broadcast_buffer():
    ph = np.array([[5.0, 6.0], [np.nan, 7.0]])
    got = lime_requirement_t_ha(ph, 6.0)
    assert got.shape == (2, 2)
    assert got[0, 0] > got[0, 1] > 0 and np.isnan(got[1, 0]) and got[1, 1] == 0


def test_ph_outside_0_14_is_an_input_error():
    with pytest.raises(InputError, match="ph must lie in"):
        lime_requirement_t_acre([5.0, 55.0], [6.0, 6.0])
    with pytest.raises(InputError, match="buffer_ph"):
        lime_requirement_t_acre([5.0], [-1.0])
    with pytest.raises(InputError, match="shape"):
        lime_requirement_t_acre([5.0, 5.5], [6.0, 6.1, 6.2])


# --- the user's linear equation ----------------------------------------------------------

def test_linear_equation_by_hand_and_its_units():
    params = LimeParams(method="linear", target_ph=6.8, linear_a=40.0, linear_b=-6.0,
                        linear_c=-0.5)
    # LR = 40 - 6 * 6.2 - 0.5 * 5.0 = 0.3 t/acre (invented coefficients)
    assert float(lime_requirement_t_acre(5.0, 6.2, params)) == pytest.approx(0.3, rel=1e-12)
    assert float(lime_requirement_t_ha(5.0, 6.2, params)) == pytest.approx(0.3 * T_HA_PER_T_ACRE)
    in_ha = LimeParams(method="linear", target_ph=6.8, linear_a=40.0, linear_b=-6.0,
                       linear_c=-0.5, linear_unit="t/ha")
    assert float(lime_requirement_t_ha(5.0, 6.2, in_ha)) == pytest.approx(0.3, rel=1e-12)
    assert float(lime_requirement_t_acre(5.0, 6.2, in_ha)) == pytest.approx(0.3 / T_HA_PER_T_ACRE)
    # negative equation values are no lime; pH at target is 0; NaN buffer is NaN
    got = lime_requirement_t_acre([5.0, 6.8, 5.0], [7.0, 5.0, np.nan], params)
    assert got[0] == 0.0 and got[1] == 0.0 and np.isnan(got[2])


def test_linear_equation_without_buffer_term_needs_no_buffer():
    params = LimeParams(method="linear", target_ph=6.5, linear_a=13.0, linear_b=0.0,
                        linear_c=-2.0)
    got = lime_requirement_t_acre([5.0, 6.0], None, params)
    np.testing.assert_allclose(got, [3.0, 1.0])
    assert lime_coverage([5.0, 6.0], None, params).fraction_computed == 1.0


def test_linear_method_without_coefficients_names_the_keys():
    with pytest.raises(ConfigError, match=r"lime\.linear_a, lime\.linear_b, lime\.linear_c"):
        LimeParams(method="linear")
    with pytest.raises(ConfigError, match=r"lime\.linear_c must be set") as info:
        LimeParams(method="linear", linear_a=1.0, linear_b=-0.1)
    assert "linear_a" not in str(info.value)


def test_config_errors_name_the_key():
    with pytest.raises(ConfigError, match=r"lime\.method must be one of"):
        LimeParams(method="smp")
    with pytest.raises(ConfigError, match=r"lime\.target_ph must be <= 6\.6"):
        LimeParams(target_ph=6.8)  # beyond the Mehlich buffer's own pH
    LimeParams(method="linear", target_ph=6.8, linear_a=1.0, linear_b=0.0, linear_c=0.0)
    with pytest.raises(ConfigError, match=r"lime\.target_ph must lie in \[4, 8\]"):
        LimeParams(target_ph=float("nan"))
    with pytest.raises(ConfigError, match=r"lime\.min_rate_t_ha must be < lime\.max_rate_t_ha"):
        LimeParams(min_rate_t_ha=9.0, max_rate_t_ha=9.0)
    with pytest.raises(ConfigError, match=r"lime\.max_rate_t_ha must be > 0"):
        LimeParams(max_rate_t_ha=0.0)
    with pytest.raises(ConfigError, match=r"lime\.linear_unit"):
        LimeParams(linear_unit="kg/ha")
    with pytest.raises(ConfigError, match=r"lime\.linear_b must be finite"):
        LimeParams(method="linear", linear_a=1.0, linear_b=float("inf"), linear_c=0.0)
    with pytest.raises(ConfigError, match=r"lime\.zone_breaks_t_ha must be strictly increasing"):
        LimeParams(zone_breaks_t_ha=(2.0, 2.0))
    with pytest.raises(ConfigError, match=r"lime\.zone_breaks_t_ha must be > 0"):
        LimeParams(zone_breaks_t_ha=(0.0, 2.0))
    with pytest.raises(ConfigError, match=r"lime\.zone_breaks_t_ha needs at least one"):
        LimeParams(zone_breaks_t_ha=())
    with pytest.raises(ConfigError, match=r"lime\.rate_step_t_ha must be > 0"):
        LimeParams(rate_step_t_ha=0.0)
    with pytest.raises(ConfigError, match=r"lime\.ph_floor_for_p_rates"):
        LimeParams(ph_floor_for_p_rates=1.0)


def test_method_off_refuses_to_compute():
    with pytest.raises(ConfigError, match=r'lime\.method is "off"'):
        lime_requirement_t_ha(5.0, 6.0, LimeParams(method="off"))


def test_defaults():
    params = LimeParams()
    assert params.method == "mehlich"
    assert params.target_ph == 6.5  # common practice, no source
    assert params.ph_floor_for_p_rates == 5.5  # Source: New England Vegetable Management Guide
    assert params.linear_a is None and params.linear_b is None and params.linear_c is None


# --- rates, coverage, flags --------------------------------------------------------------

def test_rate_minimum_and_cap():
    params = LimeParams(min_rate_t_ha=0.5, max_rate_t_ha=9.0)
    got = lime_rate_t_ha([0.0, 0.49, 0.5, 3.2, 9.0, 12.0, np.nan], params)
    np.testing.assert_array_equal(got[:-1], [0.0, 0.0, 0.5, 3.2, 9.0, 9.0])
    assert np.isnan(got[-1])


def test_coverage_counts():
    ph = np.array([[5.0, 5.5, 6.6], [7.0, np.nan, 6.0]])
    buf = np.array([[6.0, np.nan, np.nan], [np.nan, 6.0, np.nan]])
    cov = lime_coverage(ph, buf)  # target 6.5
    assert cov.cells == 5
    assert cov.at_or_above_target == 2
    assert cov.below_target == 3
    assert cov.below_target_without_buffer == 2
    assert cov.fraction_computed == pytest.approx(3 / 5)
    # the count matches the NaNs of the requirement over cells with a pH
    lr = lime_requirement_t_acre(ph, buf)
    assert int(np.isnan(lr[~np.isnan(ph)]).sum()) == cov.below_target_without_buffer
    masked = lime_coverage(ph, buf, mask=np.array([[True, False, False], [False, False, True]]))
    assert (masked.cells, masked.below_target_without_buffer) == (2, 1)
    assert np.isnan(lime_coverage([np.nan], None).fraction_computed)


def test_p_rate_ph_flag_boundary():
    got = p_rate_ph_flag([5.0, 5.49, 5.5, 6.0, np.nan])
    np.testing.assert_array_equal(got, [True, True, False, False, False])
    assert got.dtype == bool
    np.testing.assert_array_equal(p_rate_ph_flag([5.9, 6.0], LimeParams(ph_floor_for_p_rates=6.0)),
                                  [True, False])


# --- the payoff of correcting pH ---------------------------------------------------------

def test_payoff_linear_availability():
    def avail(ph):
        return 10.0 * ph

    got = ph_correction_payoff([5.0, 6.0, 6.5, 7.0, np.nan], 6.5, avail)
    np.testing.assert_allclose(got[:4], [15.0, 5.0, 0.0, 0.0])
    assert np.isnan(got[4])


def test_payoff_uses_each_cells_own_model():
    total_p = np.array([[400.0, 800.0], [400.0, 800.0]])
    ph = np.array([[5.0, 5.0], [6.8, np.nan]])

    def avail(values):  # available P rises with pH, in proportion to each cell's total P
        return total_p * 0.01 * (values - 4.0)

    got = ph_correction_payoff(ph, 6.0, avail)
    np.testing.assert_allclose(got[0], [4.0, 8.0])
    assert got[1, 0] == 0.0 and np.isnan(got[1, 1])


def test_payoff_can_be_negative_past_the_peak():
    def peaked(ph):
        return 30.0 - 10.0 * (ph - 6.2) ** 2

    got = ph_correction_payoff([6.1, 5.0], 7.0, peaked)
    assert got[0] < 0 < got[1]


def test_payoff_rejects_a_wrong_shape():
    with pytest.raises(ValueError, match="shape"):
        ph_correction_payoff([5.0, 5.5], 6.5, lambda ph: np.zeros(3))


# --- lime-rate classes -------------------------------------------------------------------

def test_zone_class_boundaries():
    params = LimeParams(zone_breaks_t_ha=(2.0, 4.0), rate_step_t_ha=0.5)
    rates = np.array([[0.0, 0.5, 1.99, 2.0], [3.99, 4.0, 8.0, np.nan]])
    zones = lime_zones(rates, None, params)
    np.testing.assert_array_equal(zones.codes, [[1, 2, 2, 3], [3, 4, 4, 0]])
    assert zones.codes.dtype == np.uint8
    labels = {row.class_code: row.label for row in zones.table}
    assert labels == {1: "no lime", 2: "< 2 t/ha", 3: "2-4 t/ha", 4: ">= 4 t/ha"}


def test_zone_rates_are_rounded_class_means():
    params = LimeParams(zone_breaks_t_ha=(2.0, 4.0), rate_step_t_ha=0.5, max_rate_t_ha=9.0)
    rates = np.array([0.0, 0.0, 0.6, 1.6, 2.0, 3.0, 9.0, 8.9])
    zones = lime_zones(rates, np.ones(8, bool), params)
    by_code = {row.class_code: row for row in zones.table}
    assert by_code[NO_LIME_CLASS].rate_t_ha == 0.0 and by_code[NO_LIME_CLASS].cells == 2
    assert by_code[2].rate_t_ha == 1.0  # mean 1.1 -> 1.0
    assert by_code[3].rate_t_ha == 2.5  # mean 2.5 stays
    assert by_code[4].rate_t_ha == 9.0  # mean 8.95 -> 9.0, within the cap
    assert sum(row.cells for row in zones.table) == 8
    for row in zones.table:
        assert row.rate_t_acre == pytest.approx(row.rate_t_ha / T_HA_PER_T_ACRE, rel=1e-12)
    np.testing.assert_array_equal(zones.rates_t_ha, [0, 0, 1, 1, 2.5, 2.5, 9, 9])


def test_zone_rounding_halves_up_and_cap():
    params = LimeParams(zone_breaks_t_ha=(5.0,), rate_step_t_ha=0.5, max_rate_t_ha=7.4)
    zones = lime_zones(np.array([1.2, 1.3, 7.3, 7.3]), None, params)
    by_code = {row.class_code: row.rate_t_ha for row in zones.table}
    assert by_code[2] == 1.5  # mean 1.25 -> 1.5 (half up, not to even)
    assert by_code[3] == 7.4  # mean 7.3 rounds to 7.5, above the cap of 7.4
    one_step = LimeParams(zone_breaks_t_ha=(5.0,), rate_step_t_ha=1.0)
    zones = lime_zones(np.array([0.4, 0.45]), None, one_step)
    assert zones.table[0].rate_t_ha == 0.0  # a class may round to nothing


def test_zone_mask_and_errors():
    rates = np.array([[1.0, 3.0], [5.0, 0.0]])
    mask = np.array([[True, False], [True, True]])
    zones = lime_zones(rates, mask)
    np.testing.assert_array_equal(zones.codes, [[2, 0], [4, 1]])
    assert np.isnan(zones.rates_t_ha[0, 1])
    assert [row.class_code for row in zones.table] == [1, 2, 4]
    with pytest.raises(InputError, match="mask has shape"):
        lime_zones(rates, np.ones(3, bool))
    with pytest.raises(InputError, match=">= 0 t/ha"):
        lime_zones(np.array([1.0, -0.5]))


def test_requirement_to_zones_end_to_end():
    ph = np.array([[5.0, 5.6, 6.0], [6.4, 6.9, np.nan]])
    buf = np.array([[5.8, 6.2, 6.3], [6.5, 6.5, 6.0]])
    rate = lime_rate_t_ha(lime_requirement_t_ha(ph, buf))
    zones = lime_zones(rate, ~np.isnan(ph))
    assert zones.codes[1, 2] == 0
    assert zones.codes[1, 1] == NO_LIME_CLASS  # above target
    assert zones.codes[1, 0] == NO_LIME_CLASS  # requirement below the minimum rate
    assert zones.codes[0, 0] >= zones.codes[0, 1] >= zones.codes[0, 2]


def test_module_imports_no_io_plotting_or_cli():
    forbidden = ["rasterio", "geopandas", "pandas", "matplotlib", "click", "pmap.io",
                 "pmap.report", "pmap.cli", "pmap.pipeline", "pmap.outputs", "pmap.config"]
    code = ("import sys, pmap.soil.lime\n"
            f"print(','.join(m for m in {forbidden!r} if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
