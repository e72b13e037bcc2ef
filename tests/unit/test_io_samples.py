"""Reading sample tables: formats, column detection, messy values, errors, CRS handling."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pytest
from pyproj import CRS, Transformer
from shapely.geometry import Point, Polygon

from pmap.errors import ConfigError, InputError, PmapWarning
from pmap.io.crs import is_projected_metres, normalise_crs, utm_crs_for
from pmap.io.samples import SampleColumns, load_samples, read_samples

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


def test_salt_ph_only_is_accepted_with_a_warning(tmp_path):
    text = "id,lat,lon,ph_cacl2,total_p\na,40.1,-88.9,5.5,400\n"
    with pytest.warns(PmapWarning, match="salt pH column 'ph_cacl2'"):
        table = load_samples(_write(tmp_path, "salt.csv", text))
    assert table.values["ph"][0] == 5.5


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
    pytest.param("lb.csv", "id,lat,lon,ph,P_M3_lb_ac\na,40.1,-88.9,6.0,40\n",
                 "looks like lb/acre",
                 id="lb_per_acre_column_is_refused"),
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
    path = _write(tmp_path, "lab.xlsx", "binary")
    with pytest.raises(InputError, match="unsupported samples format '.xlsx'"):
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
