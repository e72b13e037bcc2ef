"""Tests of the pH partition of total P into pools and its calibration."""

import dataclasses

import numpy as np
import pytest

from pmap.errors import ConfigError, InputError, InsufficientDataError
from pmap.soil.availability import (
    PartitionParams,
    availability_curve,
    fit_partition,
    occluded_fraction,
    partition_total_p,
    peak_ph,
)
from pmap.soil.sorption import psp_highly_weathered

PH = np.linspace(3.5, 9.5, 601)


def test_pools_sum_to_total_for_every_cell():
    rng = np.random.default_rng(1)
    ph = rng.uniform(3.5, 9.5, (40, 30))
    total = rng.uniform(50, 2000, (40, 30))
    extras = {
        "caco3_pct": rng.uniform(0, 30, (40, 30)),
        "clay_pct": rng.uniform(2, 70, (40, 30)),
        "om_pct": rng.uniform(0, 12, (40, 30)),
        "ca_mg_kg": rng.uniform(100, 6000, (40, 30)),
        "recent_p_mg_kg": rng.uniform(0, 80, (40, 30)),
        "fresh_labile_fraction": rng.uniform(0.05, 0.75, (40, 30)),
    }
    codes = rng.integers(0, 4, (40, 30)).astype(float)
    for weathering in ("slight", "moderate", "high"):
        params = PartitionParams(weathering=weathering)
        for per_cell in (None, codes):
            pools = partition_total_p(ph, total, params, weathering_code=per_cell, **extras)
            np.testing.assert_allclose(pools.total, total, rtol=1e-12)
        for pool in (pools.available, pools.fe_al, pools.ca, pools.occluded, pools.organic):
            assert pool.shape == (40, 30)
            assert (pool >= 0).all()
        fractions = pools.as_fractions()
        np.testing.assert_allclose(sum(fractions.values()), 1.0, rtol=1e-12)
        np.testing.assert_allclose(pools.labile_fraction, fractions["available"], rtol=1e-12)


def test_availability_peaks_strictly_between_6_and_7():
    # Source: Illinois Agronomy Handbook Fig. 8.3 (farmdoc, Fontes 2022): highest at pH 6.0-7.0
    top = peak_ph()
    assert 6.0 < top < 7.0
    curve = availability_curve(PH)
    assert 6.0 < PH[np.argmax(curve)] < 7.0
    assert curve.max() == pytest.approx(1.0, abs=1e-6)


def test_availability_reduced_below_5_5_and_above_7_3():
    # Source: New England Vegetable Management Guide, Phosphorus: reduced below 5.5 and above 7.3
    pools = partition_total_p(np.array([5.0, 5.5, 6.5, 7.3, 8.0]), 600.0)
    low_acid, acid_edge, best, alkaline_edge, high_alkaline = pools.available
    assert acid_edge < best and alkaline_edge < best
    assert low_acid < acid_edge and high_alkaline < alkaline_edge
    # at least a fifth less available P well outside the 5.5-7.3 window
    assert low_acid < 0.8 * best and high_alkaline < 0.8 * best


def test_curve_monotone_on_each_side_of_peak():
    curve = availability_curve(PH)
    top = peak_ph()
    assert (np.diff(curve[PH < top]) > 0).all()
    assert (np.diff(curve[PH > top]) < 0).all()


def test_fe_al_dominates_acid_ca_dominates_alkaline():
    pools = partition_total_p(np.array([4.5, 8.5]), 800.0)
    assert pools.fe_al[0] > pools.ca[0]
    assert pools.ca[1] > pools.fe_al[1]


def test_highly_weathered_high_total_low_available():
    # Source: Walker & Syers (1976), Geoderma 15:1-19 (occluded P dominates in highly weathered soils)
    ph = np.full(3, 6.5)
    # organic P in proportion to total P in both soils (OM 3 % and 6 %)
    moderate = partition_total_p(ph, 600.0, PartitionParams(weathering="moderate"), om_pct=3.0)
    high = partition_total_p(ph, 1200.0, PartitionParams(weathering="high"), om_pct=6.0)
    assert (high.occluded > high.available + high.fe_al + high.ca - 1e-9).all()
    # twice the total P need not give more available P than the moderately weathered soil
    assert high.available[0] < 1.2 * moderate.available[0]
    assert high.labile_fraction[0] < moderate.labile_fraction[0]


def test_caco3_strengthens_ca_arm():
    ph = np.array([7.0, 7.8, 8.3])
    plain = partition_total_p(ph, 700.0)
    calcareous = partition_total_p(ph, 700.0, caco3_pct=np.full(3, 20.0))
    assert (calcareous.available < plain.available).all()
    assert (calcareous.ca > plain.ca).all()


def test_clay_scales_occlusion_like_epic_highly_weathered():
    params = PartitionParams(weathering="high")
    clay = np.array([5.0, 25.0, 60.0])
    occ = occluded_fraction(params, clay_pct=clay)
    assert occ[1] == pytest.approx(params.occluded_fraction_high)
    assert occ[0] < occ[1] < occ[2]
    ratio = (1 - psp_highly_weathered(60.0)) / (1 - psp_highly_weathered(25.0))
    assert occ[2] / occ[1] == pytest.approx(ratio)


def test_base_saturation_does_not_count_acidity_twice():
    # Acidity enters availability once, through the pH curve: base saturation (which
    # falls with pH) no longer scales available P on top of it.
    ph = np.full(2, 5.0)
    pools = partition_total_p(ph, 600.0)
    assert pools.available[0] == pytest.approx(pools.available[1])
    with pytest.raises(TypeError):
        partition_total_p(ph, 600.0, base_saturation_pct=np.array([40.0, 80.0]))


def test_organic_pool_from_organic_matter():
    # common practice, no source: organic C = 0.58 x organic matter (van Bemmelen);
    # from memory, unverified: soil organic matter C:P about 100
    params = PartitionParams()
    pools = partition_total_p(np.full(3, 6.5), np.array([600.0, 600.0, 100.0]),
                              om_pct=np.array([2.0, 4.0, 4.0]))
    np.testing.assert_allclose(pools.organic[:2], [116.0, 232.0], rtol=1e-12)
    assert pools.organic[2] == pytest.approx(params.max_organic_fraction * 100.0)
    # more organic matter, less inorganic P for the other pools
    assert pools.available[1] < pools.available[0]
    # absent OM takes the default (3 %)
    default = partition_total_p(6.5, 600.0)
    assert float(default.organic) == pytest.approx(3.0 * 1e4 * 0.58 / 100.0)


def test_recent_additions_raise_available_p():
    # Source: Jones et al. (1984): PSP is the share of added P still labile after
    # incubation, so recently added P is more available than the old pool
    ph = np.full(2, 6.5)
    old = partition_total_p(ph, 600.0)
    # same total P, but 40 mg/kg of it added recently with PSP 0.456
    recent = partition_total_p(ph, 600.0, recent_p_mg_kg=np.array([0.0, 40.0]),
                               fresh_labile_fraction=np.full(2, 0.456))
    assert recent.available[0] == pytest.approx(old.available[0])
    share = old.available[0] / (600.0 - old.organic[0])
    expected = old.available[0] + 40.0 * (0.456 - share)
    assert recent.available[1] == pytest.approx(expected, rel=1e-12)
    assert recent.available[1] > 1.5 * old.available[1]
    np.testing.assert_allclose(recent.total, 600.0, rtol=1e-12)


def test_ca_bound_p_needs_carbonate_or_calcium():
    # common practice, no source: in a soil without CaCO3 near neutral pH, Ca phosphates
    # are a minor pool; with free carbonate they dominate the fixed P
    ph = np.array([6.5, 7.0, 8.0])
    none = partition_total_p(ph, 600.0, caco3_pct=np.zeros(3))
    share = none.ca / (none.ca + none.fe_al)
    assert share[0] < 0.10 and share[1] < 0.25
    calcareous = partition_total_p(ph, 600.0, caco3_pct=np.full(3, 10.0))
    assert (calcareous.ca > none.ca).all()
    assert calcareous.ca[2] > calcareous.fe_al[2]
    rich = partition_total_p(ph, 600.0, caco3_pct=np.zeros(3), ca_mg_kg=np.full(3, 5000.0))
    assert (rich.ca > none.ca).all()
    more = [partition_total_p(8.0, 600.0, caco3_pct=c).ca for c in (1.0, 5.0, 20.0)]
    assert more[0] < more[1] < more[2]


def test_nan_handling():
    pools = partition_total_p(
        np.array([6.0, np.nan, 6.0]),
        np.array([500.0, 500.0, np.nan]),
        caco3_pct=np.array([np.nan, 5.0, 5.0]),
    )
    assert np.isfinite(pools.available[0])
    assert np.isnan(pools.available[1:]).all() and np.isnan(pools.fe_al[1:]).all()
    # NaN in an optional input falls back to the default
    assert pools.available[0] == pytest.approx(float(partition_total_p(6.0, 500.0).available))


def test_input_and_config_validation():
    with pytest.raises(InputError, match="total P"):
        partition_total_p(6.0, -1.0)
    with pytest.raises(InputError, match="pH"):
        partition_total_p(16.0, 100.0)
    with pytest.raises(ConfigError, match="soil.weathering"):
        PartitionParams(weathering="extreme")
    with pytest.raises(ConfigError, match="soil.acid_midpoint_ph"):
        PartitionParams(acid_midpoint_ph=8.5, alkaline_midpoint_ph=8.0)
    with pytest.raises(ConfigError, match="soil.max_labile_fraction"):
        PartitionParams(max_labile_fraction=0.0)


def test_fit_recovers_known_parameters():
    rng = np.random.default_rng(7)
    truth = PartitionParams(
        max_labile_fraction=0.11, acid_midpoint_ph=5.4, alkaline_midpoint_ph=7.6
    )
    ph = rng.uniform(4.3, 8.8, 300)
    total = rng.uniform(300, 1100, 300)
    clean = partition_total_p(ph, total, truth).available
    measured = clean * (1 + rng.normal(0, 0.05, clean.size))
    fitted = fit_partition(ph, total, measured, PartitionParams())
    assert fitted.max_labile_fraction == pytest.approx(0.11, rel=0.05)
    assert fitted.acid_midpoint_ph == pytest.approx(5.4, abs=0.1)
    assert fitted.alkaline_midpoint_ph == pytest.approx(7.6, abs=0.1)
    # untouched fields are kept
    assert fitted.acid_width_ph == truth.acid_width_ph
    assert dataclasses.replace(fitted, max_labile_fraction=0.08).weathering == "moderate"


def test_fit_widths_and_nan_rows():
    rng = np.random.default_rng(3)
    truth = PartitionParams(acid_width_ph=0.45, alkaline_width_ph=0.8)
    ph = rng.uniform(4.0, 9.0, 400)
    total = rng.uniform(300, 1100, 400)
    measured = partition_total_p(ph, total, truth).available * (1 + rng.normal(0, 0.02, 400))
    measured[:20] = np.nan
    fitted = fit_partition(
        ph, total, measured, PartitionParams(), fit=("acid_width_ph", "alkaline_width_ph")
    )
    assert fitted.acid_width_ph == pytest.approx(0.45, abs=0.05)
    assert fitted.alkaline_width_ph == pytest.approx(0.8, abs=0.08)


def test_fit_needs_enough_samples():
    with pytest.raises(InsufficientDataError):
        fit_partition([6.0, 6.5, np.nan], [500, 600, 700], [30, 35, 40])
    with pytest.raises(ConfigError):
        fit_partition(np.ones(10) * 6, np.ones(10) * 500, np.ones(10) * 30, fit=("weathering",))
