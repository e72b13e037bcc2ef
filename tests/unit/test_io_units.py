"""Units named in headers: how they are found, converted, refused, and the plausibility bands."""

from __future__ import annotations

import numpy as np
import pytest

from pmap.errors import InputError
from pmap.io.columns import is_recognised_header
from pmap.io.units import CANONICAL_UNITS, PLAUSIBLE_RANGES, split_unit, to_canonical
from pmap.soil.conversions import P2O5_PER_P


@pytest.mark.parametrize(
    ("header", "name", "unit"),
    [("Total P (%)", "Total P", "%"),
     ("total_p (mg/kg)", "total_p", "mg/kg"),
     ("total_p [mg kg-1]", "total_p", "mg/kg"),
     ("P (µg g⁻¹)", "P", "mg/kg"),
     ("P (Olsen, mg/kg)", "P (Olsen)", "mg/kg"),
     ("p_m3_ppm", "p_m3", "mg/kg"),
     ("P_M3 ppm", "P_M3", "mg/kg"),
     ("p_mg_kg", "p", "mg/kg"),
     ("clay_pct", "clay", "%"),
     ("clay_percent", "clay", "%"),
     ("OM %", "OM", "%"),
     ("% Base Saturation", "Base Saturation", "%"),
     ("clay (g/kg)", "clay", "g/kg"),
     ("Total_P_g_kg", "Total_P", "g/kg"),
     ("P2O5 (mg/100g)", "P2O5", "mg/100g"),
     ("P_M3_lb_ac", "P_M3", "lb/acre"),
     ("P lbs/ac", "P", "lb/acre"),
     ("bray_p_lb_a", "bray_p", "lb/acre"),
     ("P (lb/acre)", "P", "lb/acre"),
     ("Ca (meq/100g)", "Ca", "meq/100g"),
     ("Ca (cmol(+)/kg)", "Ca", "meq/100g"),
     ("P kg/ha", "P", "kg/ha"),
     ("P (mg/dm3)", "P", "mg/L"),
     ("Easting (m)", "Easting", "m"),
     ("P (mmol/kg)", "P", "mmol/kg"),
     ("P (ug per ml)", "P", "mg/L"),
     ("P (nmol/g)", "P", "?"),  # looks like a unit, but not one pmap knows
     ("P (ppm) (%)", "P", "?"),  # two different units
     # no unit: brackets that name a method or a ratio stay in the name
     ("pH (1:1)", "pH (1:1)", None), ("pH (H2O)", "pH (H2O)", None),
     ("P (Bray/Kurtz)", "P (Bray/Kurtz)", None), ("mehlich3_p", "mehlich3_p", None),
     ("ppm", "ppm", None), ("Ca", "Ca", None), ("p_m3", "p_m3", None)],
)
def test_split_unit(header, name, unit):
    assert split_unit(header)[:2] == (name, unit)


@pytest.mark.parametrize(
    ("header", "known"),
    [("Total P (%)", True), ("P (Olsen, mg/kg)", True), ("P_M3_lb_ac", True), ("% OM", True),
     ("pH (H2O)", True), ("Latitude (deg)", True), ("clay [g/kg]", True),
     ("Ton %", False), ("Report date: 2024-03-01", False), ("Acme Soil Lab", False)],
)
def test_column_matching_ignores_the_unit(header, known):
    assert is_recognised_header(header) is known


@pytest.mark.parametrize(
    ("prop", "header", "given", "expected", "says"),
    [("total_p", "Total P (%)", 0.05, 500.0, "(x 10000)"),
     ("total_p", "total_p (g/kg)", 0.5, 500.0, "(x 1000)"),
     ("stp", "P (mg/100g)", 2.5, 25.0, "(x 10)"),
     # Source: Ohio State University Extension, ppm x 2 = lb/acre for a 6.7-inch furrow slice
     ("stp", "P_M3_lb_ac", 50.0, 25.0, "lb/acre / 2, assuming a 2-million-lb furrow slice"),
     ("fe", "Fe (%)", 1.2, 12_000.0, "(x 10000)"),
     ("clay", "clay (g/kg)", 250.0, 25.0, "(x 0.1)"),
     ("om", "OM (mg/kg)", 32_000.0, 3.2, "(x 0.0001)"),
     # Source: IUPAC standard atomic weights: Ca 40.078 g/mol (charge 2), Al 26.9815 (charge 3)
     ("ca", "Ca (meq/100g)", 10.0, 2003.9, "(x 200.4"),
     ("al", "Al (cmol(+)/kg)", 1.0, 89.938, "(x 89.94"),
     # Source: IUPAC atomic masses P 30.973762, O 15.999: P2O5 is 43.64 % P
     ("stp", "P2O5 (mg/kg)", 100.0, 43.64, "P2O5 converted to P (x 0.4364)"),
     ("total_p", "P2O5 (%)", 0.1, 436.4, "(x 10000; P2O5 converted to P (x 0.4364))")],
)
def test_conversions_to_the_canonical_unit(prop, header, given, expected, says):
    out, note = to_canonical(prop, header, np.array([given, np.nan]), "lab.csv")
    assert out[0] == pytest.approx(expected, rel=1e-4) and np.isnan(out[1])
    assert f"column {header!r} read as" in note and says in note
    assert note.split(":")[0] in ("total P", "soil-test P", "Fe", "clay", "OM", "Ca", "Al")


def test_p2o5_factor_is_the_oxide_ratio():
    _, note = to_canonical("stp", "P2O5 (mg/kg)", np.array([1.0]), "lab.csv")
    assert f"x {1 / P2O5_PER_P:.4f}" in note


@pytest.mark.parametrize(
    ("prop", "header"),
    [("ph", "pH"), ("ph", "pH (pH units)"), ("total_p", "total_p (mg/kg)"), ("clay", "clay %"),
     ("base_saturation", "base_sat (%)"), ("stp", "p_m3"), ("stp", "P_Bray (ppm)")],
)
def test_canonical_units_pass_through_without_a_note(prop, header):
    values = np.array([6.0, 7.0])
    out, note = to_canonical(prop, header, values, "lab.csv")
    assert note is None and np.array_equal(out, values)


@pytest.mark.parametrize(
    ("prop", "header", "found"),
    [("ph", "pH (ppm)", "'ppm'"),
     ("ph", "pH_mg_kg", "'mg_kg'"),
     ("total_p", "total_p (meq/100g)", "'meq/100g' (a charge unit"),
     ("fe", "Fe (meq/100g)", "'meq/100g'"),
     ("stp", "P kg/ha", "'kg/ha' (an amount per area: needs the sampling depth"),
     ("stp", "P (mg/dm3)", "'mg/dm3' (per volume"),
     ("base_saturation", "base_sat (g/kg)", "'g/kg'"),
     ("clay", "clay (lb/acre)", "'lb/acre'"),
     ("stp", "P (nmol/g)", "'nmol/g' (a unit pmap does not know)")],
)
def test_units_that_cannot_be_converted_are_refused_naming_column_and_unit(prop, header, found):
    with pytest.raises(InputError, match=r"^lab\.csv: column " + repr(header).replace("(", r"\(")
                       .replace(")", r"\)").replace("[", r"\[") + r" \(.*\) is in "
                       + found.replace("(", r"\(").replace(")", r"\)")):
        to_canonical(prop, header, np.array([1.0]), "lab.csv")


def test_every_property_has_a_plausibility_band_inside_its_physical_limits():
    # from memory, unverified: the bands; the test checks only their consistency.
    hard = {"ph": (2, 11), "buffer_ph": (2, 11), "caco3": (0, 100), "clay": (0, 100),
            "om": (0, 100), "base_saturation": (0, 100)}
    assert set(PLAUSIBLE_RANGES) == set(CANONICAL_UNITS)
    for key, band in PLAUSIBLE_RANGES.items():
        lo, hi = hard.get(key, (0, np.inf))
        assert lo <= band.low < band.high <= hi, key
        assert band.below and band.above and band.source, key
