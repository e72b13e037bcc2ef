"""Tests of pmap.geostats.outliers: the median/MAD modified z-score and its flags."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from pmap.geostats.outliers import (
    DEFAULT_THRESHOLD,
    MAD_CONSISTENCY,
    Outlier,
    flag_outliers,
    modified_z,
)


def test_modified_z_by_hand():
    # median 3, |x - 3| = 2, 1, 0, 1, 97 -> MAD 1; M = 0.6745 (x - 3) / 1
    values = np.array([1.0, 2.0, 3.0, 4.0, 100.0])
    np.testing.assert_allclose(modified_z(values), 0.6745 * (values - 3.0))
    np.testing.assert_array_equal(flag_outliers(values), [False, False, False, False, True])


def test_modified_z_matches_scipy_mad():
    rng = np.random.default_rng(11)
    values = rng.lognormal(3.0, 0.5, size=301)
    # Source: scipy.stats.median_abs_deviation(scale="normal") is MAD / Phi^-1(0.75)
    sigma = stats.median_abs_deviation(values, scale="normal")
    expected = (values - np.median(values)) / sigma
    np.testing.assert_allclose(modified_z(values), expected, rtol=2e-5)
    # Source: Iglewicz & Hoaglin (1993): constant 0.6745 and cut-off 3.5
    assert MAD_CONSISTENCY == pytest.approx(stats.norm.ppf(0.75), abs=1e-4)
    assert DEFAULT_THRESHOLD == 3.5


def test_one_wild_value_cannot_hide_itself():
    # A plain z-score (mean, sd) can never exceed sqrt(n - 1), however wild the value:
    # the slip inflates the sd it is measured by. The modified z-score is not fooled.
    values = 600.0 + 60.0 * stats.norm.ppf((np.arange(30) + 0.5) / 30)
    values[4] *= 100.0
    plain = (values - values.mean()) / values.std()
    # Source: Samuelson (1968), "How deviant can you be?": |x - mean| / sd <= sqrt(n - 1)
    # with the population sd
    assert abs(plain[4]) <= np.sqrt(29) + 1e-9
    flags = flag_outliers(values)
    assert flags[4] and flags.sum() == 1
    assert modified_z(values)[4] > 100.0


def test_zero_mad_gives_nan_and_flags_nothing():
    values = np.array([0.0] * 60 + [0.5, 2.0, 3.0, 8.0])  # CaCO3 free in most of a field
    assert np.all(np.isnan(modified_z(values)))
    assert not flag_outliers(values).any()
    assert modified_z(np.empty(0)).size == 0


def test_threshold_and_bad_input():
    values = np.array([1.0, 2.0, 3.0, 4.0, 9.0])  # z of 9 is 0.6745 * 6 = 4.05
    assert flag_outliers(values, threshold=4.0)[-1]
    assert not flag_outliers(values, threshold=4.1)[-1]
    with pytest.raises(ValueError, match="threshold"):
        flag_outliers(values, threshold=0.0)
    with pytest.raises(ValueError, match="finite"):
        modified_z(np.array([1.0, np.nan]))
    with pytest.raises(ValueError, match="one-dimensional"):
        modified_z(np.ones((2, 2)))


def test_outlier_record_is_json_able():
    record = Outlier("S-8", 9, 64000.0, 38.2, "value")
    data = json.loads(json.dumps(record.as_dict()))
    assert data == {"id": "S-8", "row": 9, "value": 64000.0, "z": 38.2, "kind": "value",
                    "dropped": False}
    assert Outlier("7", None, 1.0, 4.0, "cross-validation", dropped=True).as_dict()["row"] is None
