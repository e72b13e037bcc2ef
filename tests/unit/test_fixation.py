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
    assert MECHANISM_LABELS[4].startswith("near-neutral")
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
    assert set(np.unique(risk.mechanism)) <= {1, 2, 4}


def test_index_is_one_minus_epic_psp_at_best_ph():
    # Source: Jones et al. (1984): 1 - PSP is the fraction of applied P that is fixed
    top = peak_ph()
    risk = fixation_risk(np.array([top]), base_saturation_pct=np.array([70.0]))
    assert risk.index[0] == pytest.approx(1 - float(psp_moderately_weathered(70.0, top)), abs=1e-9)


def test_acid_side_tracks_epic_moderately_weathered():
    # Source: Jones et al. (1984) moderately weathered PSP, base saturation 80 %
    # (check values 0.282, 0.340, 0.398, 0.456 at pH 5.0, 5.5, 6.0, 6.5): the published
    # model uses the equation as published up to the availability peak
    ph = np.linspace(5.0, 6.5, 16)
    np.testing.assert_allclose(psp_new_p(ph), psp_moderately_weathered(80.0, ph), atol=1e-12)
    np.testing.assert_allclose(psp_new_p(np.array([5.0, 5.5, 6.0, 6.5])),
                               [0.282, 0.340, 0.398, 0.456], atol=1e-12)
    # the first model (curve) only approximates it
    curve = psp_new_p(ph, params=FixationParams(model="curve"))
    np.testing.assert_allclose(curve, psp_moderately_weathered(80.0, ph), atol=0.04)


def test_slightly_weathered_uses_labile_p():
    # Source: Jones et al. (1984) slightly weathered PSP = 0.02 + 0.0104 labile P
    top = peak_ph()
    params = PartitionParams(weathering="slight")
    psp = psp_new_p(np.array([top, top]), params, labile_p_mg_kg=np.array([30.0, np.nan]))
    assert psp[0] == pytest.approx(0.332, abs=1e-9)
    assert psp[1] == pytest.approx(float(psp_moderately_weathered(80.0, top)), abs=1e-9)
    # Below the peak, the fallback to the moderate equation keeps its own pH term as
    # published (0.282 at pH 5.0, base saturation 80 %); the acid arm is not put on top
    acid = psp_new_p(np.array([5.0, 5.0]), params, labile_p_mg_kg=np.array([np.nan, 30.0]))
    assert acid[0] == pytest.approx(0.282, abs=1e-12)
    assert acid[1] < 0.332


def test_published_model_uses_the_calcareous_equation():
    # Source: Jones et al. (1984), SSSAJ 48:800-805: calcareous PSP = 0.58 - 0.0061 CaCO3;
    # at pH 8 and 10 % CaCO3 that is 0.519, so 48 % of fresh P is fixed
    risk = fixation_risk(np.array([8.0, 7.2, 7.6]), caco3_pct=np.array([10.0, 10.0, 40.0]))
    np.testing.assert_allclose(risk.index, 1 - psp_calcareous(np.array([10.0, 10.0, 40.0])),
                               atol=1e-12)
    assert risk.index[0] == pytest.approx(0.481, abs=1e-3)
    # below the calcareous threshold the soil's own group equation applies
    low = fixation_risk(np.array([6.5]), caco3_pct=np.array([0.5]))
    plain = fixation_risk(np.array([6.5]))
    assert low.index[0] == pytest.approx(plain.index[0])


def test_more_carbonate_more_ca_fixation():
    # Source: Jones et al. (1984): calcareous PSP falls with CaCO3 (more fixation)
    caco3 = np.array([2.0, 5.0, 10.0, 20.0, 40.0])
    for model in ("published", "curve"):
        risk = fixation_risk(np.full(5, 8.0), FixationParams(model=model), caco3_pct=caco3)
        assert (np.diff(risk.index) > 0).all()
        assert (risk.mechanism == 2).all()


def test_curve_model_caps_by_the_calcareous_psp():
    ph = np.array([6.5, 7.5, 8.0])
    caco3 = np.full(3, 40.0)
    params = FixationParams(model="curve")
    psp = psp_new_p(ph, base_saturation_pct=np.full(3, 100.0), caco3_pct=caco3, params=params)
    assert (psp <= psp_calcareous(40.0) + 1e-12).all()
    plain = psp_new_p(ph, base_saturation_pct=np.full(3, 100.0), params=params)
    assert (psp <= plain).all()
    # the two models agree at the peak without carbonate (same group equation)
    top = np.array([peak_ph()])
    assert psp_new_p(top, params=params)[0] == pytest.approx(psp_new_p(top)[0], abs=1e-12)


def test_neutral_band_between_acid_and_alkaline_mechanisms():
    # Source: New England Vegetable Management Guide, Phosphorus: availability reduced
    # below pH 5.5 (Al) and above 7.3 (Ca); between them neither mechanism dominates
    risk = fixation_risk(PH)
    assert (risk.mechanism[PH <= 5.5] == 1).all()
    assert (risk.mechanism[(PH >= 5.8) & (PH <= 7.25)] == 4).all()
    assert (risk.mechanism[PH >= 7.5] == 2).all()
    # no flip from Fe/Al straight to Ca: the neutral class lies between
    codes = risk.mechanism[(PH > 5.0) & (PH < 8.0)]
    changes = codes[1:][codes[1:] != codes[:-1]]
    assert list(changes) == [4, 2]


def test_ca_mechanism_needs_calcium():
    # common practice, no source: Ca phosphates need Ca; a soil measured free of CaCO3 and
    # low in Ca at pH 7.8 is not mapped as Ca fixation
    ph = np.full(3, 7.8)
    risk = fixation_risk(ph, caco3_pct=np.array([0.0, 0.0, 5.0]),
                         ca_mg_kg=np.array([100.0, 4000.0, np.nan]))
    assert list(risk.mechanism) == [4, 2, 2]


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
    # Source: Jones et al. (1984): highly weathered PSP (clay 25 %) is below the moderately
    # weathered one at BS 80 %, so such soils fix more fresh P at every pH up to the peak
    acid_side = PH <= peak_ph()
    assert (risk.index[acid_side] > moderate.index[acid_side]).all()


def test_weathering_per_cell_matches_field_wide_runs():
    ph = np.array([5.0, 6.5, 8.0])
    codes = np.array([3, 1, np.nan])
    mixed = fixation_risk(ph, weathering_code=codes)
    for i, weathering in enumerate(("high", "slight", "moderate")):
        single = fixation_risk(ph[i:i + 1], partition=PartitionParams(weathering=weathering))
        assert mixed.index[i] == pytest.approx(single.index[0], abs=1e-12)
        assert mixed.mechanism[i] == single.mechanism[0]


def test_classes_follow_breaks():
    params = FixationParams(class_breaks=(0.6, 0.75))
    risk = fixation_risk(PH, params)
    expected = np.where(risk.index >= 0.75, 3, np.where(risk.index >= 0.6, 2, 1))
    np.testing.assert_array_equal(risk.risk_class, expected)
    assert {1, 2, 3} <= set(np.unique(risk.risk_class))
    # from memory, unverified (pmap's default breaks 0.65 / 0.80): a BS 80 % soil at
    # pH 6-7 is low risk, at pH 5 moderate; a highly weathered clay soil is high risk
    assert (fixation_risk(np.array([6.0, 6.5, 7.0])).risk_class == 1).all()
    assert fixation_risk(np.array([5.0])).risk_class[0] == 2
    high = fixation_risk(np.array([6.0]), partition=PartitionParams(weathering="high"),
                         clay_pct=np.array([40.0]))
    assert high.risk_class[0] == 3


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
    with pytest.raises(ConfigError, match="fixation.model"):
        FixationParams(model="lookup")
    assert FixationParams(class_breaks=[0.4, 0.8]).class_breaks == (0.4, 0.8)
