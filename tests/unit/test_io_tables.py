"""The zone table as CSV, US-unit values, and output file-name stems."""

from __future__ import annotations

import csv
import io
import itertools

import numpy as np
import pytest

from pmap.io.tables import (
    US_TABLE_COLUMNS,
    ZONE_TABLE_COLUMNS,
    output_stem,
    us_values,
    write_zone_table_csv,
)


def _rows():
    return [
        {"zone_id": 1, "class_id": 1, "class_label": "très bas", "role": "build-up",
         "basis": "measured soil test", "area_ha": 1.23456, "mean_stp_mg_kg": 8.04,
         "mean_deficiency_probability": 0.9349, "p2o5_kg_ha": 112.08, "product": "MAP 11-52-0",
         "product_kg_ha": 215.54, "n_kg_ha": 23.71, "product_total_kg": 266.1, "n_cells": 494},
        {"zone_id": 2, "class_id": 4, "class_label": "not sampled", "role": "not sampled",
         "basis": "not sampled", "area_ha": 0.5, "mean_stp_mg_kg": float("nan"),
         "mean_deficiency_probability": np.float64("nan"), "p2o5_kg_ha": np.float32(0.0),
         "product": "MAP 11-52-0", "product_kg_ha": -0.0, "n_kg_ha": 0.0,
         "product_total_kg": 0.0},
    ]


def _read(path):
    text = path.read_bytes().decode("utf-8")
    return list(csv.reader(io.StringIO(text)))


def test_header_units_rounding_and_empty_cells(tmp_path):
    path = write_zone_table_csv(tmp_path / "field_zones.csv", _rows())
    table = _read(path)
    assert table[0] == [h for _, h, _ in ZONE_TABLE_COLUMNS]
    assert table[0][:5] == ["zone", "class", "role", "basis", "area (ha)"]
    assert "P2O5 rate (kg/ha)" in table[0] and "product total (kg)" in table[0]
    row = dict(zip(table[0], table[1], strict=True))
    assert row["class"] == "très bas" and row["area (ha)"] == "1.235"
    assert row["mean soil-test P (mg/kg)"] == "8.0"
    assert row["probability of deficiency (0-1)"] == "0.93"
    assert row["P2O5 rate (kg/ha)"] == "112.1" and row["zone"] == "1"
    row2 = dict(zip(table[0], table[2], strict=True))
    assert row2["mean soil-test P (mg/kg)"] == "" and row2["probability of deficiency (0-1)"] == ""
    assert row2["product rate (kg/ha)"] == "0.0"  # never "-0.0"
    assert row2["P2O5 rate (kg/ha)"] == "0.0"
    assert len(table) == 3 and "n_cells" not in table[0]


def test_same_rows_same_bytes_utf8_no_bom_no_leftovers(tmp_path):
    a = write_zone_table_csv(tmp_path / "a" / "z.csv", _rows()).read_bytes()
    b = write_zone_table_csv(tmp_path / "b" / "z.csv", _rows()).read_bytes()
    assert a == b
    assert not a.startswith(b"\xef\xbb\xbf") and b"\r\n" not in a and a.endswith(b"\n")
    assert "très".encode() in a
    write_zone_table_csv(tmp_path / "a" / "z.csv", _rows()[:1])  # replaces the file
    assert len(_read(tmp_path / "a" / "z.csv")) == 2
    assert sorted(p.name for p in (tmp_path / "a").iterdir()) == ["z.csv"]
    with pytest.raises(ValueError, match="units"):
        write_zone_table_csv(tmp_path / "c.csv", _rows(), units="imperial")


def test_us_columns_from_si_values(tmp_path):
    table = _read(write_zone_table_csv(tmp_path / "z.csv", _rows(), units="us"))
    assert table[0] == [h for _, h, _ in ZONE_TABLE_COLUMNS + US_TABLE_COLUMNS]
    row = dict(zip(table[0], table[1], strict=True))
    # Source: International Yard and Pound Agreement (1959): yard 0.9144 m, pound
    # 0.45359237 kg; acre = 4,840 square yards.
    acre_ha = 4840 * 0.9144**2 / 1e4
    assert row["area (acre)"] == f"{1.23456 / acre_ha:.2f}" == "3.05"
    assert row["P2O5 rate (lb/acre)"] == f"{112.08 * acre_ha / 0.45359237:.1f}" == "100.0"
    assert row["product total (lb)"] == f"{266.1 / 0.45359237:.1f}"
    assert row["P2O5 rate (kg/ha)"] == "112.1"  # SI columns stay


def test_us_values_definitions():
    # Source: International Yard and Pound Agreement (1959); 1 lb/acre = 1.12085 kg/ha.
    v = us_values({"area_ha": 1.0, "p2o5_kg_ha": 1.12085, "product_kg_ha": None,
                   "product_total_kg": 0.45359237, "out_rate_kg_ha": 0.0})
    assert v["area_acre"] == pytest.approx(2.4710538, rel=1e-7)
    assert v["p2o5_lb_acre"] == pytest.approx(1.0, rel=1e-5)
    assert v["product_lb_acre"] is None and v["out_rate_lb_acre"] == 0.0
    assert v["product_total_lb"] == pytest.approx(1.0, rel=1e-12)


def test_output_stem_examples():
    # common practice, no source: portable file names use [A-Za-z0-9._-] only.
    assert output_stem("north40", "", "2026-04-02") == "north40_2026-04-02"
    assert output_stem("north40") == "north40"
    assert output_stem("North 40", "Hillside Farm", "2026-04-02") == \
        "Hillside-Farm_North-40_2026-04-02"
    assert output_stem("Größe Äcker/1") == "Grosse-Acker-1"
    assert output_stem("") == "field" and output_stem("   ") == "field"
    assert output_stem("con") != "con"  # a Windows device name


def test_names_the_folding_cannot_spell_stay_distinct():
    names = ["北区", "南区", "..", "北区 1", "con", "CON"]
    stems = [output_stem(n) for n in names]
    assert len(set(stems)) == len(stems)
    for s in stems:
        assert s.isascii() and " " not in s and "/" not in s and not s.startswith(".")
    assert all(output_stem(n, f, d) != output_stem(m, f, d)
               for n, m in itertools.combinations(["North 40", "South 40", "Creek"], 2)
               for f in ("", "Farm A") for d in ("", "2026-04-02"))
