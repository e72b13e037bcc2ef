"""Reading sample tables: formats, column detection, messy values, errors, CRS handling."""

from __future__ import annotations

import re
import warnings

import geopandas as gpd
import numpy as np
import pytest
from pyproj import CRS, Transformer
from shapely.geometry import Point, Polygon

from pmap.errors import ConfigError, InputError, PmapWarning
from pmap.io.crs import is_projected_metres, normalise_crs, utm_crs_for
from pmap.io.samples import SampleColumns, duplicate_tolerance_m, load_samples, read_samples

LATLON_CSV = """sample_id,lat,lon,ph,total_p,p_m3
S1,40.1000,-88.9000,6.1,520,18
S2,40.1010,-88.9000,6.5,480,25
S3,40.1000,-88.9015,5.8,610,12
S4,40.1012,-88.9012,7.2,550,40
"""


def _write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _load(path, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapWarning)
        return load_samples(path, **kwargs)


# ----------------------------------------------------------------------------- CRS helpers


@pytest.mark.parametrize(
    ("lon", "lat", "expected"),
    [
        (-88.9, 40.1, "EPSG:32616"),  # Source: UTM zone definition (6-degree zones from 180 W)
        (151.2, -33.9, "EPSG:32756"),  # Source: UTM zone definition (Sydney, zone 56 south)
        (2.35, 48.85, "EPSG:32631"),  # Source: UTM zone definition (Paris, zone 31 north)
        (-180.0, 10.0, "EPSG:32601"),  # Source: UTM zone definition (zone 1 starts at 180 W)
        (180.0, 10.0, "EPSG:32660"),  # Source: UTM zone definition (180 E closes zone 60)
        (-3.0, 0.0, "EPSG:32630"),  # Source: UTM zone definition (equator counts as north)
    ],
)
def test_utm_zone_of_known_places(lon, lat, expected):
    assert utm_crs_for(lon, lat) == expected


def test_utm_zone_rejects_points_off_the_globe():
    with pytest.raises(InputError, match="outside the globe"):
        utm_crs_for(200.0, 10.0)


@pytest.mark.parametrize("given", ["EPSG:32616", "epsg:32616", 32616, "32616", CRS.from_epsg(32616),
                                   CRS.from_epsg(32616).to_wkt()])
def test_normalise_crs_forms(given):
    assert normalise_crs(given) == "EPSG:32616"


def test_normalise_crs_without_epsg_code_returns_wkt():
    custom = "+proj=tmerc +lat_0=0 +lon_0=-88.7 +k=0.9999 +x_0=300000 +y_0=0 +ellps=GRS80 +units=m"
    out = normalise_crs(custom)
    assert out.startswith(("PROJCRS", "PROJCS")) and is_projected_metres(out)


def test_normalise_crs_unparseable():
    with pytest.raises(InputError, match="cannot read a CRS from 'EPSG:notacode'"):
        normalise_crs("EPSG:notacode")


def test_is_projected_metres():
    assert is_projected_metres("EPSG:32616")
    assert not is_projected_metres("EPSG:4326")
    # EPSG:2236 is Florida East in US survey feet. Source: EPSG registry
    assert not is_projected_metres("EPSG:2236")


# ----------------------------------------------------------------------------- formats


def test_latlon_csv_reprojects_to_the_utm_zone_like_pyproj(tmp_path):
    table = _load(_write(tmp_path, "field.csv", LATLON_CSV))
    assert table.crs == "EPSG:32616"
    expected = Transformer.from_crs("EPSG:4326", "EPSG:32616", always_xy=True).transform(
        [-88.9, -88.9, -88.9015, -88.9012], [40.1, 40.101, 40.1, 40.1012])
    np.testing.assert_allclose(table.coords, np.column_stack(expected), atol=1e-6)
    np.testing.assert_allclose(table.lonlat[:, 1], [40.1, 40.101, 40.1, 40.1012])
    assert list(table.ids) == ["S1", "S2", "S3", "S4"]
    assert list(table.rows) == [2, 3, 4, 5]  # spreadsheet rows: header is row 1
    assert table.stp_method == "mehlich3_icp"
    np.testing.assert_array_equal(table.values["stp"], [18, 25, 12, 40])
    assert table.values["ph"].dtype == np.float64


def test_xy_csv_with_crs_round_trips_through_another_zone(tmp_path):
    text = "id,easting,northing,ph,tp\na,338000.0,4440500.0,6.0,500\nb,338100.5,4440620.25,6.4,450\n"
    path = _write(tmp_path, "xy.csv", text)
    same = _load(path, input_crs="EPSG:32616")
    assert same.crs == "EPSG:32616"
    np.testing.assert_allclose(same.coords, [[338000.0, 4440500.0], [338100.5, 4440620.25]])
    other = _load(path, input_crs="EPSG:32616", working_crs="EPSG:32617")
    back = Transformer.from_crs("EPSG:32617", "EPSG:32616", always_xy=True).transform(
        other.coords[:, 0], other.coords[:, 1])
    np.testing.assert_allclose(np.column_stack(back), same.coords, atol=1e-6)
    assert "stp" not in other.values and other.stp_method is None


def test_semicolon_csv_with_decimal_commas(tmp_path):
    text = ("Probe;Latitude;Longitude;pH_H2O;P_Bray (ppm);Ton %\n"
            "1;40,1000;-88,9000;6,25;15,5;22,5\n"
            "2;40,1010;-88,9000;5,9;1.234,5;30\n")
    table = _load(_write(tmp_path, "semi.csv", text))
    np.testing.assert_allclose(table.values["ph"], [6.25, 5.9])
    np.testing.assert_allclose(table.values["stp"], [15.5, 1234.5])
    assert table.stp_method == "bray1"
    np.testing.assert_allclose(table.lonlat, [[-88.9, 40.1], [-88.9, 40.101]])


def test_quoted_thousands_in_comma_csv(tmp_path):
    text = 'id,lat,lon,ph,total_p\na,40.1,-88.9,6.0,"1,234"\nb,40.2,-88.9,6.0,"5,5"\n'
    table = _load(_write(tmp_path, "q.csv", text))
    np.testing.assert_allclose(table.values["total_p"], [1234.0, 5.5])


def _points_gdf(crs="EPSG:4326"):
    return gpd.GeoDataFrame(
        {"SampleID": ["p1", "p2", "p3"], "pH": [6.0, 6.6, 7.1], "Olsen_P": [8.0, 12.5, 20.0]},
        geometry=[Point(-88.90, 40.10), Point(-88.901, 40.1005), Point(-88.902, 40.101)], crs=crs)


@pytest.mark.parametrize("name", ["pts.geojson", "pts.gpkg", "pts.shp"])
def test_vector_samples(tmp_path, name):
    path = tmp_path / name
    _points_gdf().to_file(path)
    table = _load(path)
    assert table.crs == "EPSG:32616" and table.stp_method == "olsen"
    assert list(table.ids) == ["p1", "p2", "p3"] and list(table.rows) == [1, 2, 3]
    np.testing.assert_allclose(table.lonlat[:, 0], [-88.90, -88.901, -88.902])
    np.testing.assert_allclose(table.values["stp"], [8.0, 12.5, 20.0])


def test_vector_samples_without_crs(tmp_path):
    shp = tmp_path / "nocrs.shp"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # pyogrio: "'crs' was not provided"
        _points_gdf().set_crs(None, allow_override=True).to_file(shp)
    assert not shp.with_suffix(".prj").exists()
    with pytest.raises(InputError, match=r"nocrs\.shp has no CRS; .*\.prj"):
        read_samples(shp)
    table = _load(shp, input_crs="EPSG:4326")
    assert table.crs == "EPSG:32616"


def test_vector_samples_must_be_points(tmp_path):
    path = tmp_path / "poly.gpkg"
    gpd.GeoDataFrame({"ph": [6.0], "total_p": [400.0]},
                     geometry=[Polygon([(0, 0), (1, 0), (1, 1)])], crs="EPSG:32616").to_file(path)
    with pytest.raises(InputError, match=r"poly\.gpkg: samples must be points; features 1 are Polygon"):
        read_samples(path)


# ----------------------------------------------------------------------------- values


def test_below_detection_is_half_the_limit_with_one_warning(tmp_path):
    text = "id,lat,lon,ph,p_m3\na,40.1,-88.9,6.0,<5\nb,40.2,-88.9,6.0,< 10\nc,40.3,-88.9,6.0,12\n"
    with pytest.warns(PmapWarning, match=r"2 value\(s\) in column 'p_m3' were below detection") as rec:
        table = load_samples(_write(tmp_path, "bdl.csv", text))
    assert len([w for w in rec if "below detection" in str(w.message)]) == 1
    np.testing.assert_allclose(table.values["stp"], [2.5, 5.0, 12.0])


def test_plain_mehlich3_header_is_read_as_icp_with_a_warning(tmp_path):
    text = "id,lat,lon,ph,mehlich3_p\na,40.1,-88.9,6.0,20\n"
    with pytest.warns(PmapWarning, match="read as Mehlich-3 P measured by ICP"):
        assert load_samples(_write(tmp_path, "m3.csv", text)).stp_method == "mehlich3_icp"
    named = "id,lat,lon,ph,p_m3_icp\na,40.1,-88.9,6.0,20\n"
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert load_samples(_write(tmp_path, "icp.csv", named)).stp_method == "mehlich3_icp"


def test_missing_tokens_are_nan_and_rows_kept(tmp_path):
    text = "id,lat,lon,ph,total_p\na,40.1,-88.9,n.d.,400\nb,40.2,-88.9, ,nd\nc,40.3,-88.9,-,NA\nd,40.4,-88.9,6.1,\n"
    table = _load(_write(tmp_path, "nd.csv", text))
    assert len(table) == 4
    assert np.isnan(table.values["ph"][:3]).all() and table.values["ph"][3] == 6.1
    assert np.isnan(table.values["total_p"][1:]).all()


def test_non_numeric_value_names_file_column_row_and_value(tmp_path):
    text = "id,lat,lon,ph,total_p\na,40.1,-88.9,6.0,400\nb,40.2,-88.9,six,410\n"
    with pytest.raises(InputError, match=r"bad\.csv: column 'ph' .* rows 3 \('six'\)"):
        load_samples(_write(tmp_path, "bad.csv", text))


def test_duplicates_are_averaged_with_a_warning_naming_ids(tmp_path):
    text = ("id,x,y,ph,total_p\nA,500000,4440000,6.0,400\nB,500000,4440000,7.0,\n"
            "C,500050,4440000,6.5,500\n")
    with pytest.warns(PmapWarning, match=r"A\+B"):
        table = load_samples(_write(tmp_path, "dup.csv", text), input_crs="EPSG:32616")
    assert list(table.ids) == ["A+B", "C"]
    np.testing.assert_allclose(table.values["ph"], [6.5, 6.5])
    np.testing.assert_allclose(table.values["total_p"], [400.0, 500.0])  # NaN ignored
    assert list(table.rows) == [2, 4]


def test_salt_ph_is_converted_to_water_ph_with_a_warning(tmp_path):
    # Source: Rayment & Lyons, Soil Chemical Methods - Australasia, method 4B1: CaCl2 pH
    # reads 0.5-1.0 below water pH (pmap's default offset 0.6 lies in that range)
    text = "id,lat,lon,ph_cacl2,total_p\na,40.1,-88.9,5.4,400\n"
    with pytest.warns(PmapWarning, match="'ph_cacl2' read as CaCl2 pH and converted"):
        table = load_samples(_write(tmp_path, "salt.csv", text))
    assert table.values["ph"][0] == pytest.approx(6.0)
    assert any("ph_cacl2_offset" in note for note in table.notes)


def test_kcl_ph_and_explicit_kinds(tmp_path):
    text = "id,lat,lon,ph_kcl,total_p\na,40.1,-88.9,5.0,400\n"
    with pytest.warns(PmapWarning, match="KCl pH"):
        table = load_samples(_write(tmp_path, "kcl.csv", text))
    assert table.values["ph"][0] == pytest.approx(5.8)
    # a plain "ph" column the user says is CaCl2, with their own offset
    text = "id,lat,lon,ph,total_p\na,40.1,-88.9,5.0,400\n"
    cols = SampleColumns(ph_kind="cacl2", ph_cacl2_offset=0.5)
    with pytest.warns(PmapWarning, match="CaCl2"):
        table = load_samples(_write(tmp_path, "c.csv", text), cols)
    assert table.values["ph"][0] == pytest.approx(5.5)
    # and a salt-named column the user says is water pH stays as it is
    text = "id,lat,lon,ph_salt,total_p\na,40.1,-88.9,6.0,400\n"
    table = load_samples(_write(tmp_path, "w.csv", text), SampleColumns(ph_kind="water"))
    assert table.values["ph"][0] == 6.0
    with pytest.raises(ConfigError, match="samples.ph_kind"):
        SampleColumns(ph_kind="acetate")


def test_optional_columns_detected(tmp_path):
    text = "id,lat,lon,ph,total_p,CaCO3 %,clay_pct,organic_matter,base_sat,Fe,Al,Ca,buffer_ph\n" \
           "a,40.1,-88.9,7.9,400,4.5,28,3.2,95,120,30,2500,7.0\n"
    table = _load(_write(tmp_path, "opt.csv", text))
    for key, value in {"caco3": 4.5, "clay": 28, "om": 3.2, "base_saturation": 95, "fe": 120,
                       "al": 30, "ca": 2500, "buffer_ph": 7.0}.items():
        assert table.values[key][0] == value, key


def test_named_columns_override_detection(tmp_path):
    text = "Probe,E,N,acidity,P\na,338000,4440500,6.0,14\n"
    cols = SampleColumns(x_column="E", y_column="N", id_column="Probe", ph_column="acidity",
                         stp_column="P", stp_method="bray1")
    table = _load(_write(tmp_path, "named.csv", text), columns=cols, input_crs="EPSG:32616")
    assert table.stp_method == "bray1" and table.ids[0] == "a"
    np.testing.assert_allclose(table.coords, [[338000, 4440500]])


# ----------------------------------------------------------------------------- errors


def test_missing_file():
    with pytest.raises(InputError, match="samples file not found: .*nowhere.csv"):
        load_samples("/nonexistent/nowhere.csv")


# A table the reader refuses: (file name, contents, pattern of the message), one case a row.
REFUSED_TABLES = [
    pytest.param("noph.csv", "id,lat,lon,total_p\na,40.1,-88.9,400\n",
                 r"noph\.csv: no pH column found \(columns: id, lat, lon, total_p\).*samples\.ph_column",
                 id="missing_ph_column_lists_columns_and_config_key"),
    pytest.param("nop.csv", "id,lat,lon,ph,k\na,40.1,-88.9,6.0,120\n",
                 r"nop\.csv: no phosphorus column.*samples\.total_p_column",
                 id="missing_p_column"),
    pytest.param("utm.csv", "id,lat,lon,ph,total_p\na,4440500,338000,6.0,400\n",
                 r"latitude outside .*projected coordinates\? name the columns x/y",
                 id="latitude_and_longitude_both_impossible"),
    pytest.param("lon.csv", "id,lat,lon,ph,total_p\na,40.1,338000,6.0,400\n",
                 r"lon\.csv: longitude outside -180\.\.180 in column 'lon'",
                 id="longitude_out_of_range"),
    pytest.param("nocoord.csv", "id,lat,lon,ph,total_p\na,40.1,-88.9,6.0,400\nb,,-88.9,6.0,400\n",
                 r"nocoord\.csv: missing coordinates in rows 3",
                 id="missing_coordinates"),
    pytest.param("phr.csv", "id,lat,lon,ph,total_p\na,40.1,-88.9,6.0,400\nb,40.2,-88.9,6.1,400\n"
                            "c,40.3,-88.9,61,400\n",
                 r"phr\.csv: column 'ph' \(ph\) out of range in rows 4 \(61\)",
                 id="ph_out_of_range_names_row_and_value"),
    pytest.param("neg.csv", "id,lat,lon,ph,total_p,p_m3\na,40.1,-88.9,6.0,400,-3\n",
                 r"neg\.csv: column 'p_m3' \(stp\) out of range in rows 2 \(-3\)",
                 id="negative_p"),
    pytest.param("xy.csv", "id,x,y,ph,total_p\na,338000,4440500,6.0,400\n",
                 r"xy\.csv has projected x/y columns \(x, y\) but no CRS: "
                 r"pass --crs EPSG:NNNN or set grid\.crs$",
                 id="projected_xy_without_crs"),
    pytest.param("deg.csv", "id,x,y,ph,total_p\na,-88.9,40.1,6.0,400\n",
                 "look like degrees",
                 id="xy_in_degrees_without_crs_gets_a_hint"),
    pytest.param("phppm.csv", "id,lat,lon,pH (ppm),total_p\na,40.1,-88.9,6.0,400\n",
                 r"phppm\.csv: column 'pH \(ppm\)' \(pH\) is in 'ppm', which pmap cannot convert "
                 r"to pH units",
                 id="ppm_for_ph_is_refused_naming_column_and_unit"),
    pytest.param("meq.csv", "id,lat,lon,ph,total_p (meq/100g)\na,40.1,-88.9,6.0,4\n",
                 r"meq\.csv: column 'total_p \(meq/100g\)' \(total P\) is in 'meq/100g' \(a "
                 r"charge unit.*cannot convert to mg/kg.*e\.g\. 'total_p \(mg/kg\)'",
                 id="meq_for_p_is_refused"),
    pytest.param("kgha.csv", "id,lat,lon,ph,p_m3_icp_kg_ha\na,40.1,-88.9,6.0,40\n",
                 r"kgha\.csv: column 'p_m3_icp_kg_ha' \(soil-test P\) is in 'kg_ha' \(an amount "
                 r"per area: needs the sampling depth",
                 id="kg_per_ha_without_depth_is_refused"),
    pytest.param("clay.csv", "id,lat,lon,ph,total_p,clay\na,40.1,-88.9,6.0,400,250\n",
                 r"clay\.csv: column 'clay' \(clay\) out of range in rows 2 \(250\): .*is the "
                 r"column in g/kg\? name the unit in the header, e\.g\. 'clay \(g/kg\)'",
                 id="percentage_over_100_suggests_g_per_kg"),
]


@pytest.mark.parametrize(("name", "text", "match"), REFUSED_TABLES)
def test_refused_table_names_the_problem(tmp_path, name, text, match):
    with pytest.raises(InputError, match=match):
        load_samples(_write(tmp_path, name, text))


@pytest.mark.parametrize(
    ("lat", "lon"),
    [(151.2, -33.9),  # beyond 90: cannot be a latitude
     (-88.9, 40.1)],  # within 90 but polar: a Midwest longitude in the latitude column
)
def test_swapped_lat_lon(tmp_path, lat, lon):
    text = f"id,lat,lon,ph,total_p\na,{lat},{lon},6.0,400\nb,{lat + 0.01},{lon},6.0,400\n"
    with pytest.raises(InputError, match=rf"swap\.csv: latitude outside -80\.\.80 .*'lat', rows "
                                         rf"2 \({lat:g}\).*look swapped"):
        load_samples(_write(tmp_path, "swap.csv", text))


def test_stp_method_not_inferable(tmp_path):
    text = "id,lat,lon,ph,stp\na,40.1,-88.9,6.0,20\n"
    with pytest.raises(InputError, match=r"method of column 'stp': set samples\.stp_method"):
        load_samples(_write(tmp_path, "stp.csv", text))
    table = _load(tmp_path / "stp.csv", columns=SampleColumns(stp_method="olsen"))
    assert table.stp_method == "olsen"


def test_several_stp_columns_need_a_choice(tmp_path):
    text = "id,lat,lon,ph,p_m3,bray1_p\na,40.1,-88.9,6.0,20,15\n"
    path = _write(tmp_path, "two.csv", text)
    with pytest.raises(InputError, match=r"several soil-test P columns \(p_m3, bray1_p\)"):
        load_samples(path)
    table = _load(path, columns=SampleColumns(stp_method="bray1"))
    assert table.values["stp"][0] == 15


def test_unknown_named_column(tmp_path):
    path = _write(tmp_path, "f.csv", LATLON_CSV)
    with pytest.raises(InputError, match=r"samples\.ph_column = 'acidity' is not a column"):
        load_samples(path, SampleColumns(ph_column="acidity"))


def test_unsupported_format(tmp_path):
    path = _write(tmp_path, "lab.dbf", "binary")
    with pytest.raises(InputError, match="unsupported samples format '.dbf'"):
        load_samples(path)


def test_working_crs_must_be_metric(tmp_path):
    with pytest.raises(InputError, match="not projected in metres"):
        load_samples(_write(tmp_path, "f.csv", LATLON_CSV), working_crs="EPSG:4326")


def test_sample_columns_validation():
    with pytest.raises(ConfigError, match="samples.stp_method must be one of"):
        SampleColumns(stp_method="mehlich1")
    with pytest.raises(ConfigError, match="x_column and samples.y_column"):
        SampleColumns(x_column="E")


def test_subset_keeps_arrays_aligned(tmp_path):
    table = _load(_write(tmp_path, "f.csv", LATLON_CSV))
    sub = table.subset(np.array([True, False, True, False]))
    assert list(sub.ids) == ["S1", "S3"] and list(sub.rows) == [2, 4]
    np.testing.assert_array_equal(sub.values["stp"], [18, 12])
    assert sub.coords.shape == (2, 2) and sub.lonlat.shape == (2, 2)


# ----------------------------------------------------------------------------- units in headers

ICP_TABLE = ("sample_id,lat,lon,ph,{tp},p_m3_icp\n"
             "S1,40.1000,-88.9000,6.1,{a},18\n"
             "S2,40.1010,-88.9000,6.5,{b},25\n")


def _strict(path, **kwargs):
    """load_samples with every PmapWarning turned into an error."""
    with warnings.catch_warnings():
        warnings.simplefilter("error", PmapWarning)
        return load_samples(path, **kwargs)


def test_total_p_in_percent_is_converted_with_a_note(tmp_path):
    # The header says %: 0.052 % is 520 mg/kg (1 % = 10 000 mg/kg, by definition).
    path = _write(tmp_path, "pct.csv", ICP_TABLE.format(tp="Total P (%)", a="0.052", b="0.048"))
    table = _strict(path)  # no plausibility warning: the converted values are usual
    np.testing.assert_allclose(table.values["total_p"], [520.0, 480.0])
    assert table.notes == ("total P: column 'Total P (%)' read as % and converted to mg/kg "
                           "(x 10000)",)
    assert table.subset(np.array([True, False])).notes == table.notes


@pytest.mark.parametrize(
    ("header", "cells", "expected"),
    [("total_p (g/kg)", ("0.52", "0.48"), [520.0, 480.0]),
     ("TP [mg/100g]", ("52", "48"), [520.0, 480.0]),
     ("total_p_pct", ("0.052", "0.048"), [520.0, 480.0]),  # the old reader took pct for mg/kg
     ("total_p_ppm", ("520", "480"), [520.0, 480.0]),
     ("Total P, mg kg-1", ("520", "480"), [520.0, 480.0])],
)
def test_total_p_units_in_every_spelling(tmp_path, header, cells, expected):
    text = ICP_TABLE.format(tp=f'"{header}"', a=cells[0], b=cells[1])
    table = _strict(_write(tmp_path, "u.csv", text))
    np.testing.assert_allclose(table.values["total_p"], expected)


def test_lb_per_acre_soil_test_p_is_halved_with_the_assumption_in_the_note(tmp_path):
    # Source: Ohio State University Extension, ppm x 2 = lb/acre for a 6.7-inch furrow slice
    text = "id,lat,lon,ph,P_M3_ICP_lb_ac\na,40.1,-88.9,6.0,40\nb,40.2,-88.9,6.0,<10\n"
    table = _load(_write(tmp_path, "lb.csv", text))
    np.testing.assert_allclose(table.values["stp"], [20.0, 2.5])  # <10 lb/acre -> 5 -> 2.5 mg/kg
    (note,) = table.notes
    assert note.startswith("soil-test P: column 'P_M3_ICP_lb_ac' read as lb/acre and converted "
                           "to mg/kg") and "2-million-lb furrow slice" in note


def test_percent_properties_in_g_per_kg_and_prefix_percent(tmp_path):
    text = "id,lat,lon,ph,total_p,clay (g/kg),% OM,CaCO3 [g kg-1],Ca (cmol(+)/kg)\n" \
           "a,40.1,-88.9,7.9,400,250,3.2,45,10\n"
    table = _strict(_write(tmp_path, "pct.csv", text))
    assert table.values["clay"][0] == pytest.approx(25.0)
    assert table.values["om"][0] == pytest.approx(3.2)
    assert table.values["caco3"][0] == pytest.approx(4.5)
    # Source: IUPAC standard atomic weights: Ca 40.078 g/mol, charge 2 -> 200.39 mg/kg per cmol(+)/kg
    assert table.values["ca"][0] == pytest.approx(2003.9)
    assert len(table.notes) == 3 and all("converted to" in n for n in table.notes)


# ----------------------------------------------------------------------------- plausibility


def test_total_p_in_percent_without_a_unit_is_questioned(tmp_path):
    path = _write(tmp_path, "tp.csv", ICP_TABLE.format(tp="total_p", a="0.05", b="480"))
    with pytest.warns(PmapWarning) as rec:
        table = load_samples(path)
    (msg,) = [str(w.message) for w in rec if "usual" in str(w.message)]
    assert msg.startswith("tp.csv: column 'total_p' (total P, no unit in the header, read as mg/kg)")
    assert "outside the usual 50-5000 mg/kg in rows 2 (0.05):" in msg
    assert msg.endswith("is the column in % or g/kg? name the unit in the header, e.g. "
                        "'total_p (mg/kg)'")
    np.testing.assert_allclose(table.values["total_p"], [0.05, 480.0])  # questioned, not changed


def test_soil_test_p_of_5000_is_questioned(tmp_path):
    text = "id,lat,lon,ph,p_m3_icp\na,40.1,-88.9,6.0,5000\nb,40.2,-88.9,6.0,40\nc,40.3,-88.9,6.0,0\n"
    with pytest.warns(PmapWarning, match=r"p5k\.csv: column 'p_m3_icp' \(soil-test P.*rows 3? ?2 "
                                         r"\(5000\): is the column in lb/acre, or P2O5") as rec:
        load_samples(_write(tmp_path, "p5k.csv", text))
    assert not any("(0)" in str(w.message) for w in rec)  # a zero is no unit mistake


def test_physical_limits_stay_errors_inside_which_plausibility_warns(tmp_path):
    text = "id,lat,lon,ph,total_p\na,40.1,-88.9,3.0,400\n"
    with pytest.warns(PmapWarning, match=r"column 'ph' \(pH.*usual 3\.5-9\.5 pH units in rows 2 \(3\)"):
        load_samples(_write(tmp_path, "ph3.csv", text))
    with pytest.raises(InputError, match=r"column 'ph' \(ph\) out of range in rows 2 \(1\.5\)"):
        load_samples(_write(tmp_path, "ph1.csv", text.replace("3.0", "1.5")))


# ----------------------------------------------------------------------------- non-finite values


@pytest.mark.parametrize(
    ("cell", "said"),
    [("1e400", "'1e400': too large for a number, it reads as infinity"),
     ("inf", "'inf': infinity"),
     ("-Infinity", "'-Infinity': infinity"),
     ("-nan(ind)", "'-nan(ind)': not-a-number"),
     ("#DIV/0!", "'#DIV/0!': a spreadsheet formula error")],
)
def test_non_finite_values_name_file_row_column_and_value(tmp_path, cell, said):
    text = f"id,lat,lon,ph,total_p\na,40.1,-88.9,6.0,400\nb,40.2,-88.9,6.0,{cell}\n"
    with pytest.raises(InputError, match=r"^inf\.csv: column 'total_p' has values that are not "
                                         rf"measurements in rows 3 \({re.escape(said)}"):
        load_samples(_write(tmp_path, "inf.csv", text))


def test_infinite_value_in_a_vector_file(tmp_path):
    path = tmp_path / "inf.gpkg"
    gdf = _points_gdf()
    gdf["Olsen_P"] = [8.0, np.inf, 20.0]
    gdf.to_file(path)
    with pytest.raises(InputError, match=r"inf\.gpkg: column 'Olsen_P' holds infinite values in "
                                         r"rows 2 \(inf\)"):
        load_samples(path)


# ----------------------------------------------------------------------------- encodings

TAB_TABLE = "sample_id\tlat\tlon\tph\ttotal_p\nMüller-1\t40.1\t-88.9\t6.1\t520\nS2\t40.2\t-88.9\t6.5\t480\n"


@pytest.mark.parametrize("encoding", ["utf-16", "utf-16-be-bom", "utf-16-le", "utf-8-sig"])
def test_unicode_text_exports_are_decoded(tmp_path, encoding):
    # A spreadsheet's "Unicode text" export: UTF-16 (LE with a byte-order mark), tab separated.
    if encoding == "utf-16-be-bom":
        data = b"\xfe\xff" + TAB_TABLE.encode("utf-16-be")
    else:
        data = TAB_TABLE.encode(encoding)
    path = tmp_path / "unicode.txt"
    path.write_bytes(data)
    table = _load(path)
    assert list(table.ids) == ["Müller-1", "S2"]
    np.testing.assert_allclose(table.values["total_p"], [520.0, 480.0])
    assert table.source_columns["ph"] == "ph"


@pytest.mark.parametrize("codec", ["utf-16-le", "utf-16-be"])
def test_utf16_with_mostly_non_latin_text_is_decoded_by_its_byte_order_mark(tmp_path, codec):
    # Cyrillic ids: too few zero bytes to guess UTF-16, so only the byte-order mark tells.
    names = ["Участок-Северный-Склон", "Участок-Южный-Берег"]
    text = "sample_id\tlat\tlon\tph\ttotal_p\n" + "".join(
        f"{n}\t40.{i}\t-88.9\t6.{i}\t50{i}\n" for i, n in enumerate(names))
    path = tmp_path / "cyr.txt"
    path.write_bytes("\ufeff".encode(codec) + text.encode(codec))
    table = _load(path)
    assert list(table.ids) == names
    assert f"cyr.txt: read as UTF-16 {codec[-2:].upper()} text" in table.notes


def test_cp1252_file_is_read_with_a_note(tmp_path):
    path = tmp_path / "win.csv"
    path.write_bytes(TAB_TABLE.encode("cp1252"))
    table = _load(path)
    assert table.ids[0] == "Müller-1"
    assert table.notes == ("win.csv: not UTF-8 (byte 30 is 0xfc); read as cp1252 (Windows "
                           "Western European): check accented characters in ids and headers",)


def test_broken_utf16_names_file_and_encoding(tmp_path):
    path = tmp_path / "broken.csv"
    path.write_bytes(b"\xff\xfe" + TAB_TABLE.encode("utf-16-le")[:40] + b"\x00\xdc" + b"a\x00")
    with pytest.raises(InputError, match=r"broken\.csv: looks like UTF-16 LE text but byte \d+ "
                                         r"cannot be decoded as UTF-16 LE: export the table again"):
        read_samples(path)


# ----------------------------------------------------------------------------- preamble


def test_lab_preamble_above_the_header_is_skipped_with_a_note(tmp_path):
    text = "Acme Soil Testing, Springfield\nReport date: 2024-03-01\n\n" + LATLON_CSV
    table = _load(_write(tmp_path, "pre.csv", text))
    assert list(table.ids) == ["S1", "S2", "S3", "S4"]
    assert list(table.rows) == [5, 6, 7, 8]  # file lines: the header is line 4
    assert "pre.csv: skipped 3 line(s) above the header on line 4" in table.notes
    bad = text.replace("S3,40.1000,-88.9015,5.8", "S3,40.1000,-88.9015,five")
    with pytest.raises(InputError, match=r"pre\.csv: column 'ph' .* rows 7 \('five'\)"):
        load_samples(_write(tmp_path, "pre.csv", bad))


def test_no_header_line_names_the_file(tmp_path):
    text = "Acme Soil Testing\nReport date: 2024-03-01\n\nfoo,bar,baz\n1,2,3\n4,5,6\n"
    with pytest.raises(InputError, match=r"nohead\.csv: cannot find the header line: .*3 "
                                         r"comma-separated columns"):
        read_samples(_write(tmp_path, "nohead.csv", text))


def test_rows_wider_than_the_header_are_refused(tmp_path):
    text = "id,lat,lon,ph,total_p\na,40.1,-88.9,6,1,400\nb,40.2,-88.9,6.0,400\n"
    with pytest.raises(InputError, match=r"wide\.csv: rows 2 have more fields than the 5 columns "
                                         r"of the header on line 1 \(decimal commas"):
        read_samples(_write(tmp_path, "wide.csv", text))


def test_a_column_named_twice_is_refused(tmp_path):
    text = "id,lat,lon,ph,total_p,ph \na,40.1,-88.9,6.0,400,7.0\n"
    with pytest.raises(InputError, match=r"twice\.csv: column 'ph' appears more than once in the "
                                         r"header \(line 1\)"):
        read_samples(_write(tmp_path, "twice.csv", text))


# ----------------------------------------------------------------------------- spreadsheets


@pytest.mark.parametrize(
    ("name", "data", "kind"),
    [("lab.csv", b"PK\x03\x04\x14\x00\x06\x00[Content_Types].xml", "xlsx"),
     ("lab.csv", b"PK\x03\x04\x14\x00\x00\x00mimetypeapplication/vnd.oasis.opendocument.spreadsheet", "ods"),
     ("lab.txt", b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(64), "xls"),
     ("lab.xlsx", b"not really a spreadsheet", "xlsx"),
     ("lab.ods", b"", "ods")],
)
def test_spreadsheet_files_are_recognised_whatever_the_suffix(tmp_path, name, data, kind):
    # Source: ZIP local file header signature (PKWARE APPNOTE) and the OLE2 compound file
    # signature (Microsoft [MS-CFB]); the first zip entry names an ODF mimetype.
    path = tmp_path / name
    path.write_bytes(data)
    with pytest.raises(InputError, match=rf"^{re.escape(name)} is a spreadsheet file \({kind}\), "
                                         r"not CSV: save it as CSV \(comma separated\) and run again$"):
        read_samples(path)


# ----------------------------------------------------------------------------- near duplicates


def _resampled_field(n_grid=6, spacing=30.0, n_resampled=10, offset=0.01, seed=1):
    """A grid of samples with a smooth pH trend, and re-samples 1 cm beside some of them
    whose pH is very different."""
    rng = np.random.default_rng(seed)
    gx, gy = np.meshgrid(np.arange(n_grid) * spacing, np.arange(n_grid) * spacing)
    x, y = 500_000 + gx.ravel(), 4_440_000 + gy.ravel()
    ph = 5.5 + 0.02 * gx.ravel() / spacing * 5
    lines = ["id,x,y,ph,total_p"]
    lines += [f"G{i},{x[i]:.2f},{y[i]:.2f},{ph[i]:.2f},500" for i in range(x.size)]
    picks = rng.choice(x.size, n_resampled, replace=False)
    lines += [f"R{k},{x[i] + offset:.2f},{y[i]:.2f},{ph[i] + 1.5:.2f},500"
              for k, i in enumerate(picks)]
    return "\n".join(lines) + "\n", picks


def test_samples_closer_than_the_tolerance_are_merged_with_ids_rows_and_spread(tmp_path):
    text, picks = _resampled_field()
    path = _write(tmp_path, "resampled.csv", text)
    with pytest.warns(PmapWarning) as rec:
        table = load_samples(path, input_crs="EPSG:32616", duplicate_tolerance_m=1.25)
    (msg,) = [str(w.message) for w in rec if "group(s)" in str(w.message)]
    first = int(picks.min())
    assert msg.startswith("resampled.csv: 10 group(s) of samples lie within 1.25 m of each other (")
    k = int(np.flatnonzero(picks == first)[0])
    assert f"G{first}+R{k} (rows {first + 2}, {36 + k + 2})" in msg
    assert f"values differ by more than the lab error in G{first}+R{k}: pH " in msg
    assert len(table) == 36
    merged = list(table.ids).index(f"G{first}+R{k}")
    base = 5.5 + 0.1 * (first % 6)
    assert table.values["ph"][merged] == pytest.approx(base + 0.75, abs=0.006)  # the mean
    assert table.notes[-1] == "resampled.csv: 20 samples within 1.25 m of another merged into 10"


def test_without_a_tolerance_only_exact_duplicates_merge(tmp_path):
    text, _ = _resampled_field()
    with warnings.catch_warnings():
        warnings.simplefilter("error", PmapWarning)
        table = load_samples(_write(tmp_path, "r.csv", text), input_crs="EPSG:32616")
    assert len(table) == 46


def test_chains_of_close_samples_merge_into_one(tmp_path):
    text = ("id,x,y,ph,total_p\nA,500000.0,4440000,6.0,400\nB,500000.8,4440000,6.1,400\n"
            "C,500001.6,4440000,6.2,400\nD,500050,4440000,6.5,500\n")
    with pytest.warns(PmapWarning, match=r"1 group\(s\) .*A\+B\+C \(rows 2, 3, 4\)") as rec:
        table = load_samples(_write(tmp_path, "chain.csv", text), input_crs="EPSG:32616",
                             duplicate_tolerance_m=1.0)
    assert "lab error" not in str(rec[0].message)  # 6.0-6.2 is within the 0.2 pH lab error
    assert list(table.ids) == ["A+B+C", "D"]
    np.testing.assert_allclose(table.coords[0], [500000.8, 4440000.0])


def test_duplicate_tolerance_from_config_or_cell_size():
    # common practice, no source: a quarter of the cell by default
    assert duplicate_tolerance_m(SampleColumns(), 5.0) == 1.25
    assert duplicate_tolerance_m(SampleColumns(duplicate_tolerance_m=0.1), 5.0) == 0.1
    with pytest.raises(ConfigError, match=r"samples\.duplicate_tolerance_m must be >= 0, got -1"):
        SampleColumns(duplicate_tolerance_m=-1.0)
