"""Tests of the EPIC P sorption coefficient and initial pools."""

import numpy as np
import pytest

from pmap.soil.sorption import (
    initial_pools,
    psp_calcareous,
    psp_dynamic,
    psp_highly_weathered,
    psp_moderately_weathered,
    psp_slightly_weathered,
)


def test_moderately_weathered_check_values():
    ph = np.array([5.0, 5.5, 6.0, 6.5, 7.0])
    got = psp_moderately_weathered(80.0, ph)
    # Source: Jones, Cole, Sharpley & Williams (1984), SSSAJ 48:800-805
    np.testing.assert_allclose(got, [0.282, 0.340, 0.398, 0.456, 0.514], atol=5e-4)


def test_calcareous_check_value():
    # Source: Jones, Cole, Sharpley & Williams (1984), SSSAJ 48:800-805
    assert psp_calcareous(10.0) == pytest.approx(0.519, abs=5e-4)


def test_highly_weathered_check_value():
    # Source: Jones, Cole, Sharpley & Williams (1984), SSSAJ 48:800-805
    assert psp_highly_weathered(40.0) == pytest.approx(0.1221, abs=5e-5)


def test_slightly_weathered_equation():
    # Source: Jones, Cole, Sharpley & Williams (1984): PSP = 0.02 + 0.0104 labile P
    assert psp_slightly_weathered(30.0) == pytest.approx(0.332)


def test_initial_pools_check_values():
    active, stable = initial_pools(25.0, 0.4)
    # Source: EPIC pool initialisation (Jones et al. 1984)
    assert active == pytest.approx(37.5)
    assert stable == pytest.approx(150.0)


def test_clamps():
    assert psp_calcareous(200.0) == pytest.approx(0.05)
    assert psp_slightly_weathered(500.0) == pytest.approx(0.75)
    assert psp_moderately_weathered(0.0, 3.0) == pytest.approx(0.05)
    assert psp_highly_weathered(0.5) <= 0.75
    assert psp_dynamic(1.0, 1000.0, 0.0) == pytest.approx(0.7)
    assert psp_dynamic(100.0, 0.0, 10.0) == pytest.approx(0.1)


def test_dynamic_equation():
    # Source: Vadas & White (2010), as used in SWAT2012
    expected = -0.045 * np.log(30.0) + 0.001 * 20.0 - 0.035 * 1.5 + 0.43
    assert psp_dynamic(30.0, 20.0, 1.5) == pytest.approx(expected)


def test_nan_and_shape_preserved():
    ph = np.array([[5.0, np.nan], [6.0, 7.0]])
    got = psp_moderately_weathered(np.full((2, 2), 80.0), ph)
    assert got.shape == (2, 2)
    assert np.isnan(got[0, 1]) and np.isfinite(got[1, 1])
    assert np.isnan(psp_highly_weathered(np.array([0.0, np.nan]))).all()
    active, stable = initial_pools(np.array([10.0, np.nan]), np.array([0.0, 0.5]))
    assert np.isnan(active).all() and np.isnan(stable).all()
