"""Tests of the phosphorus saturation ratio, its classes and the rate cap."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from pmap.errors import ConfigError, InputError
from pmap.soil.environment import (
    PSR_CLASS_LABELS,
    PsrParams,
    cap_p2o5_rates,
    phosphorus_saturation_ratio,
    psr_class,
)


def test_psr_worked_value_by_hand():
    # Hand computation of the formula of UF/IFAS EDIS SS541, Equation 1 (no published
    # worked example found): P 50, Fe 150, Al 1000 mg/kg
    #   50/31 = 1.612903 mmol P/kg; 150/56 = 2.678571 and 1000/27 = 37.037037 mmol/kg,
    #   sum 39.715608; PSR = 1.612903 / 39.715608 = 0.0406113
    got = phosphorus_saturation_ratio(50.0, 150.0, 1000.0)
    assert float(got) == pytest.approx(0.0406113, abs=5e-7)


def test_psr_uses_the_published_rounded_molar_masses():
    # Source: UF/IFAS EDIS SS541 / SS539: PSR = (P/31) / (Fe/56 + Al/27)
    # 31 mg P with 56 mg Fe is 1 mmol each under the published divisors; exact molar
    # masses (30.97, 55.85) would give 0.99829, which this 1e-12 check rejects.
    assert float(phosphorus_saturation_ratio(31.0, 56.0, 0.0)) == pytest.approx(1.0, rel=1e-12)
    assert float(phosphorus_saturation_ratio(31.0, 0.0, 27.0)) == pytest.approx(1.0, rel=1e-12)
    # 1.5 mmol P on 10 mmol Al: exactly the 0.15 threshold
    assert float(phosphorus_saturation_ratio(46.5, 0.0, 270.0)) == pytest.approx(0.15, rel=1e-12)


def test_psr_monotonic():
    p = np.linspace(5, 300, 30)
    assert np.all(np.diff(phosphorus_saturation_ratio(p, 100.0, 800.0)) > 0)
    fe = np.linspace(10, 500, 30)
    assert np.all(np.diff(phosphorus_saturation_ratio(60.0, fe, 800.0)) < 0)
    al = np.linspace(100, 2000, 30)
    assert np.all(np.diff(phosphorus_saturation_ratio(60.0, 100.0, al)) < 0)


def test_psr_nan_and_zero_sorbing_term():
    got = phosphorus_saturation_ratio([np.nan, 50.0, 50.0, 50.0, 0.0],
                                      [100.0, np.nan, 100.0, 0.0, 100.0],
                                      [900.0, 900.0, np.nan, 0.0, 900.0])
    assert np.isnan(got[:4]).all()
    assert got[4] == 0.0


def test_psr_shape_and_broadcast():
    p = np.array([[20.0, 40.0], [np.nan, 80.0]])
    got = phosphorus_saturation_ratio(p, 100.0, np.full((2, 2), 800.0))
    assert got.shape == (2, 2)
    assert got[0, 1] == pytest.approx(2 * got[0, 0])
    with pytest.raises(InputError, match="same shape"):
        phosphorus_saturation_ratio([1.0, 2.0], [1.0, 2.0, 3.0], 1.0)


@pytest.mark.parametrize(("args", "name"), [
    (([-1.0, 5.0], 100.0, 800.0), "Mehlich-3 P"),
    ((50.0, [100.0, -3.0], 800.0), "Mehlich-3 Fe"),
    ((50.0, 100.0, -0.1), "Mehlich-3 Al"),
])
def test_psr_negative_input_is_named(args, name):
    with pytest.raises(InputError, match=name):
        phosphorus_saturation_ratio(*args)


def test_default_thresholds():
    params = PsrParams()
    # Source: Sims, Maguire, Leytem, Gartley & Pautler (2002), SSSAJ 66:2016-2032: a
    # Mehlich-3 P/(Al+Fe) of 0.10-0.15 matches DPSox limits; Delaware uses > 0.15
    assert (params.watch_psr, params.high_psr) == (0.10, 0.15)
    assert params.cap_rates is False and params.capped_rate_kg_ha == 0.0


def test_psr_class_boundaries():
    psr = np.array([0.0, 0.0999, 0.10, 0.1499, 0.15, 0.9, np.nan])
    got = psr_class(psr)
    np.testing.assert_array_equal(got, [1, 1, 2, 2, 3, 3, 0])
    assert got.dtype == np.uint8
    assert PSR_CLASS_LABELS == {1: "below watch", 2: "watch", 3: "high"}
    custom = PsrParams(watch_psr=0.06, high_psr=0.11)
    np.testing.assert_array_equal(psr_class([0.05, 0.06, 0.10, 0.11], custom), [1, 2, 2, 3])


def test_psr_class_keeps_shape():
    got = psr_class(np.array([[0.05, 0.2], [np.nan, 0.12]]))
    np.testing.assert_array_equal(got, [[1, 3], [0, 2]])


def test_params_errors_name_the_key():
    with pytest.raises(ConfigError, match=r"environment\.high_psr must exceed environment\.watch"):
        PsrParams(watch_psr=0.15, high_psr=0.15)
    with pytest.raises(ConfigError, match=r"environment\.watch_psr must be > 0"):
        PsrParams(watch_psr=0.0)
    with pytest.raises(ConfigError, match=r"environment\.high_psr"):
        PsrParams(high_psr=float("nan"))
    with pytest.raises(ConfigError, match=r"environment\.capped_rate_kg_ha must be >= 0"):
        PsrParams(capped_rate_kg_ha=-1.0)
    with pytest.raises(ConfigError, match=r"environment\.cap_rates must be true or false"):
        PsrParams(cap_rates="yes")


def test_cap_off_leaves_rates_alone():
    rates = np.array([60.0, 80.0, np.nan])
    out = cap_p2o5_rates(rates, np.array([0.3, 0.05, 0.3]))
    np.testing.assert_array_equal(out.rates_kg_ha, rates)
    assert out.n_capped == 0 and not out.capped.any() and out.n_without_psr == 0
    assert out.rates_kg_ha is not rates


def test_cap_on():
    params = PsrParams(cap_rates=True, capped_rate_kg_ha=20.0)
    rates = np.array([60.0, 60.0, 60.0, 10.0, np.nan, 60.0])
    psr = np.array([0.149, 0.15, 0.4, 0.4, 0.4, np.nan])
    out = cap_p2o5_rates(rates, psr, params)
    np.testing.assert_array_equal(out.rates_kg_ha[:4], [60.0, 20.0, 20.0, 10.0])
    assert np.isnan(out.rates_kg_ha[4]) and out.rates_kg_ha[5] == 60.0
    np.testing.assert_array_equal(out.capped, [False, True, True, False, False, False])
    assert out.n_capped == 2
    assert out.n_without_psr == 1
    # the default cap is no P at all on high-PSR ground
    zero = cap_p2o5_rates(rates, psr, PsrParams(cap_rates=True))
    np.testing.assert_array_equal(zero.rates_kg_ha[:4], [60.0, 0.0, 0.0, 0.0])
    assert zero.n_capped == 3


def test_cap_from_lab_values_end_to_end():
    params = PsrParams(cap_rates=True)
    p = np.array([[20.0, 46.5], [120.0, np.nan]])
    psr = phosphorus_saturation_ratio(p, 0.0, 270.0)
    out = cap_p2o5_rates(np.full((2, 2), 50.0), psr, params)
    np.testing.assert_array_equal(out.capped, [[False, True], [True, False]])
    np.testing.assert_array_equal(psr_class(psr), [[1, 3], [3, 0]])


def test_cap_shape_mismatch():
    with pytest.raises(InputError, match="shape"):
        cap_p2o5_rates(np.zeros(3), np.zeros(2), PsrParams(cap_rates=True))


def test_module_imports_no_io_plotting_or_cli():
    forbidden = ["rasterio", "geopandas", "pandas", "matplotlib", "click", "pmap.io",
                 "pmap.report", "pmap.cli", "pmap.pipeline", "pmap.outputs", "pmap.config"]
    code = ("import sys, pmap.soil.environment\n"
            f"print(','.join(m for m in {forbidden!r} if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
