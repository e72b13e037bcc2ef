"""Tests of the fixation-risk index, mechanism and classes."""

import numpy as np
import pytest

from pmap.errors import ConfigError
from pmap.soil.availability import PartitionParams, peak_ph
from pmap.soil.fixation import (
    MECHANISM_LABELS,
    RISK_CLASS_LABELS,
    FixationParams,
    fixation_risk,
    psp_new_p,
)
from pmap.soil.sorption import psp_calcareous, psp_moderately_weathered

PH = np.linspace(3.5, 9.5, 601)


def test_labels():
    assert MECHANISM_LABELS[1] == "acid Fe/Al phosphates"
    assert MECHANISM_LABELS[2] == "alkaline Ca phosphates"
    assert MECHANISM_LABELS[3] == "occluded in weathered oxides"
    assert RISK_CLASS_LABELS == {1: "low", 2: "moderate", 3: "high"}


@pytest.mark.parametrize("weathering", ["slight", "moderate", "high"])
def test_minimum_between_6_and_7_and_monotone_away(weathering):
    # Source: Illinois Agronomy Handbook Fig. 8.3 (availability highest at pH 6.0-7.0)
    risk = fixation_risk(PH, partition=PartitionParams(weathering=weathering))
    i = int(np.argmin(risk.index))
    assert 6.0 < PH[i] < 7.0
    assert (np.diff(risk.index[: i + 1]) <= 0).all()
    assert (np.diff(risk.index[i:]) >= 0).all()
    assert risk.index[0] > risk.index[i] and risk.index[-1] > risk.index[i]
    assert ((risk.index >= 0) & (risk.index <= 1)).all()


def test_range_with_extreme_inputs():
    rng = np.random.default_rng(5)
    n = 2000
    risk = fixation_risk(
        rng.uniform(2, 12, n),
        caco3_pct=rng.uniform(0, 80, n),
        clay_pct=rng.uniform(0.1, 90, n),
        base_saturation_pct=rng.uniform(0, 100, n),
    )
    assert ((risk.index >= 0) & (risk.index <= 1)).all()
    assert set(np.unique(risk.risk_class)) <= {1, 2, 3}
    assert set(np.unique(risk.mechanism)) <= {1, 2}


def test_index_is_one_minus_epic_psp_at_best_ph():
    # Source: Jones et al. (1984): 1 - PSP is the fraction of applied P that is fixed
    top = peak_ph()
    risk = fixation_risk(np.array([top]), base_saturation_pct=np.array([70.0]))
    assert risk.index[0] == pytest.approx(1 - float(psp_moderately_weathered(70.0, top)), abs=1e-9)


def test_acid_side_tracks_epic_moderately_weathered():
    # Source: Jones et al. (1984) moderately weathered PSP, base saturation 80 %
    ph = np.linspace(5.0, 6.5, 16)
    np.testing.assert_allclose(psp_new_p(ph), psp_moderately_weathered(80.0, ph), atol=0.04)


def test_slightly_weathered_uses_labile_p():
    # Source: Jones et al. (1984) slightly weathered PSP = 0.02 + 0.0104 labile P
    top = peak_ph()
    params = PartitionParams(weathering="slight")
    psp = psp_new_p(np.array([top, top]), params, labile_p_mg_kg=np.array([30.0, np.nan]))
    assert psp[0] == pytest.approx(0.332, abs=1e-9)
    assert psp[1] == pytest.approx(float(psp_moderately_weathered(80.0, top)), abs=1e-9)


def test_calcareous_cap():
    ph = np.array([6.5, 7.5, 8.0])
    caco3 = np.full(3, 40.0)
    psp = psp_new_p(ph, base_saturation_pct=np.full(3, 100.0), caco3_pct=caco3)
    assert (psp <= psp_calcareous(40.0) + 1e-12).all()
    plain = psp_new_p(ph, base_saturation_pct=np.full(3, 100.0))
    assert (psp <= plain).all()


def test_mechanism_flips_at_neutral_crossover():
    risk = fixation_risk(PH)
    acid = risk.mechanism[PH < 6.4]
    alkaline = risk.mechanism[PH > 6.6]
    assert (acid == 1).all() and (alkaline == 2).all()
    flip = PH[np.argmax(risk.mechanism == 2)]
    assert 6.0 < flip < 7.0


def test_carbonate_moves_crossover_to_acid_side():
    plain = fixation_risk(PH)
    calcareous = fixation_risk(PH, caco3_pct=np.full(PH.shape, 20.0))
    flip_plain = PH[np.argmax(plain.mechanism == 2)]
    flip_calc = PH[np.argmax(calcareous.mechanism == 2)]
    assert flip_calc < flip_plain


def test_occlusion_mechanism_in_highly_weathered_soils():
    risk = fixation_risk(PH, partition=PartitionParams(weathering="high"))
    near_neutral = (PH > 5.5) & (PH < 7.5)
    assert (risk.mechanism[near_neutral] == 3).all()
    assert risk.mechanism[0] == 1 and risk.mechanism[-1] == 2
    moderate = fixation_risk(PH)
    assert not (moderate.mechanism == 3).any()
    assert (risk.index > moderate.index).all()


def test_classes_follow_breaks():
    params = FixationParams(class_breaks=(0.6, 0.75))
    risk = fixation_risk(PH, params)
    expected = np.where(risk.index >= 0.75, 3, np.where(risk.index >= 0.6, 2, 1))
    np.testing.assert_array_equal(risk.risk_class, expected)
    assert {1, 2, 3} <= set(np.unique(risk.risk_class))
    # pmap defaults (not an outside reference): BS 80 % soil at pH 6-7 is low risk
    assert (fixation_risk(np.array([6.0, 6.5, 7.0])).risk_class == 1).all()


def test_nan_gives_zero_codes():
    risk = fixation_risk(np.array([[np.nan, 6.5]]))
    assert np.isnan(risk.index[0, 0])
    assert risk.mechanism.dtype == np.uint8 and risk.risk_class.dtype == np.uint8
    assert risk.mechanism[0, 0] == 0 and risk.risk_class[0, 0] == 0
    assert risk.mechanism[0, 1] > 0 and risk.risk_class[0, 1] > 0


def test_params_validation():
    with pytest.raises(ConfigError, match="fixation.class_breaks"):
        FixationParams(class_breaks=(0.7, 0.5))
    with pytest.raises(ConfigError, match="fixation.class_breaks"):
        FixationParams(class_breaks=(0.5,))
    assert FixationParams(class_breaks=[0.4, 0.8]).class_breaks == (0.4, 0.8)
