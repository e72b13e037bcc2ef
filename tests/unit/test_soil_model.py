"""Tests of the composed soil model (pools, fresh-P sorption and fixation on one set of inputs)."""

import numpy as np
import pytest

from pmap.soil.availability import PartitionParams, partition_total_p
from pmap.soil.fixation import FixationParams, psp_new_p
from pmap.soil.model import SoilInputs, recent_p_mg_kg, soil_model
from pmap.soil.sorption import psp_slightly_weathered


def test_recent_p2o5_to_mg_kg():
    # Source: SWAT2012 soil chemistry: kg/ha = mg/kg x bulk density (g/cm3) x depth (mm) / 100;
    # P2O5 -> P x 0.4364 (IUPAC masses)
    added = recent_p_mg_kg(100.0, depth_cm=15.0, bulk_density_g_cm3=1.3)
    assert float(added) == pytest.approx(100.0 * 0.43642 * 100.0 / (1.3 * 150.0), rel=1e-4)


def test_fertilizer_history_shows_in_available_p():
    ph = np.full(2, 6.5)
    total = np.full(2, 650.0)
    inputs = SoilInputs(recent_p2o5_kg_ha=np.array([0.0, 150.0]), depth_cm=15.0)
    model = soil_model(ph, total, inputs)
    assert model.pools.available[1] > model.pools.available[0] * 1.3
    np.testing.assert_allclose(model.pools.total, total, rtol=1e-12)
    # the labile share of the addition is the fresh-P PSP of the same model
    expected = partition_total_p(
        ph, total, recent_p_mg_kg=recent_p_mg_kg(np.array([0.0, 150.0]), 15.0, 1.3),
        fresh_labile_fraction=psp_new_p(ph)).available
    np.testing.assert_allclose(model.pools.available, expected, rtol=1e-12)


def test_slightly_weathered_uses_the_lab_soil_test():
    # Source: Jones et al. (1984): slightly weathered PSP = 0.02 + 0.0104 labile P
    params = PartitionParams(weathering="slight")
    ph = np.full(2, 6.5)
    lab = np.array([10.0, 40.0])
    model = soil_model(ph, np.full(2, 600.0), SoilInputs(lab_stp_mg_kg=lab), params)
    np.testing.assert_allclose(1.0 - model.risk.index, psp_slightly_weathered(lab), atol=1e-12)
    # without a lab value, the model's own available P stands in
    own = soil_model(ph, np.full(2, 600.0), SoilInputs(), params)
    available = partition_total_p(ph, 600.0, params).available
    np.testing.assert_allclose(1.0 - own.risk.index, psp_slightly_weathered(available),
                               atol=1e-12)


def test_conflicting_inputs_are_reported():
    model = soil_model(np.array([4.5, 7.8]), np.full(2, 500.0),
                       SoilInputs(caco3_pct=np.array([20.0, 20.0])))
    assert len(model.notes) == 1 and "1 cells have CaCO3" in model.notes[0]
    assert not soil_model(np.array([7.8]), None, SoilInputs(caco3_pct=np.array([20.0]))).notes


def test_fixation_only_without_total_p():
    model = soil_model(np.array([5.0, 6.5]), None, SoilInputs(), PartitionParams(),
                       FixationParams())
    assert model.pools is None
    np.testing.assert_allclose(model.fresh_labile_fraction, 1.0 - model.risk.index)
