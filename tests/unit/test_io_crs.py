"""CRS parsing, UTM zones, measured scale error and the choice of the working CRS."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pmap.errors import InputError
from pmap.io.crs import (
    choose_working_crs,
    is_projected_metres,
    normalise_crs,
    scale_error,
    utm_crs_for,
)

# A field near Champaign, Illinois (UTM zone 16N, 2 degrees west of its central meridian):
# centroid first, then the corners of a 0.01 x 0.01 degree extent.
LON = np.array([-89.0, -89.005, -88.995, -88.995, -89.005])
LAT = np.array([40.1, 40.095, 40.095, 40.105, 40.105])


def test_normalise_and_parse():
    assert normalise_crs("epsg:32616") == "EPSG:32616"
    assert normalise_crs(32616) == "EPSG:32616"
    assert normalise_crs(" 4326 ") == "EPSG:4326"
    with pytest.raises(InputError, match="cannot read a CRS from 'EPSG:999999'"):
        normalise_crs("EPSG:999999")


def test_utm_zone_numbers():
    # Source: the UTM zone rule (6-degree zones from 180 W), as in Snyder 1987, USGS PP 1395
    assert utm_crs_for(-89.0, 40.1) == "EPSG:32616"
    assert utm_crs_for(3.0, 52.0) == "EPSG:32631"
    assert utm_crs_for(151.2, -33.9) == "EPSG:32756"
    assert utm_crs_for(180.0, 0.0) == "EPSG:32660"


def test_is_projected_metres():
    assert is_projected_metres("EPSG:32616")
    assert is_projected_metres("EPSG:3857")  # in metres, but see the scale error below
    assert not is_projected_metres("EPSG:4326")
    assert not is_projected_metres("EPSG:2272")  # Pennsylvania South, US survey feet


def test_utm_scale_on_the_central_meridian():
    # Source: Snyder 1987, Map Projections - A Working Manual, USGS PP 1395: UTM k0 = 0.9996
    assert scale_error("EPSG:32616", -87.0, 40.0) == pytest.approx(0.0004, abs=1e-9)


def test_transverse_mercator_scale_off_the_meridian():
    # Source: Snyder 1987, USGS PP 1395, transverse Mercator on the sphere:
    # k = k0 / sqrt(1 - B^2), B = cos(lat) sin(lon - lon0); the ellipsoid adds < 2e-5 here.
    for lat, dlon in [(0.0, 3.0), (40.0, 2.0), (55.0, 3.0)]:
        b = math.cos(math.radians(lat)) * math.sin(math.radians(dlon))
        k = 0.9996 / math.sqrt(1.0 - b * b)
        assert scale_error("EPSG:32616", -87.0 - dlon, lat) == pytest.approx(abs(k - 1), abs=2e-5)


def test_web_mercator_scale_is_sec_lat():
    # Source: Snyder 1987, USGS PP 1395: Mercator on the sphere, h = k = sec(lat)
    # (EPSG:3857 applies the spherical formulas to WGS 84 coordinates).
    for lat in (10.0, 40.0, 60.0):
        assert scale_error("EPSG:3857", 0.0, lat) == pytest.approx(
            1 / math.cos(math.radians(lat)) - 1, rel=1e-6)


def test_equal_area_projection_is_judged_by_its_lengths():
    # Albers equal-area (EPSG:5070, CONUS): areal scale 1 everywhere, but h and k part
    # away from the standard parallels 29.5 and 45.5 N; at 40 N they differ from 1 by ~0.9 %.
    # Source: pyproj Proj.get_factors (PROJ) reference values
    from pyproj import Proj

    f = Proj("EPSG:5070").get_factors(-89.0, 40.1)
    assert f.areal_scale == pytest.approx(1.0, abs=1e-9)
    err = scale_error("EPSG:5070", -89.0, 40.1)
    assert err == pytest.approx(max(abs(f.meridional_scale - 1), abs(f.parallel_scale - 1)))
    assert err > 0.005


def test_scale_error_is_inf_where_the_projection_fails():
    # British National Grid (a transverse Mercator on 2 W) cannot place a point 88 degrees
    # away on the equator: PROJ returns inf factors.  A geographic CRS has none at all.
    assert scale_error("EPSG:27700", -90.0, 0.0) == math.inf
    assert scale_error("EPSG:27700", -89.0, 40.1) > 0.5  # finite there, but far off
    assert scale_error("EPSG:4326", -89.0, 40.1) == math.inf


def test_no_crs_gives_the_centroids_utm_zone():
    crs, record = choose_working_crs(None, LON, LAT, 0.005)
    assert crs == "EPSG:32616" and record["used"] == crs and record["requested"] is None
    assert "no grid.crs" in record["reason"] and "EPSG:32616" in record["reason"]
    assert record["scale_error"] < 0.0004  # k0 = 0.9996 raised back towards 1 off the meridian


def test_web_mercator_is_only_read_and_the_run_works_in_utm():
    crs, record = choose_working_crs("EPSG:3857", LON, LAT, 0.005)
    assert crs == "EPSG:32616"
    assert record["requested"] == "EPSG:3857" and record["used"] == "EPSG:32616"
    # Source: Snyder 1987 (sec 40.105 deg - 1 = 0.3074, at the field's northern corners)
    assert record["requested_scale_error"] == pytest.approx(
        1 / math.cos(math.radians(40.105)) - 1, rel=1e-3)
    for word in ("EPSG:3857", "0.307", "grid.max_scale_error = 0.005", "EPSG:32616",
                 "read the coordinates only"):
        assert word in record["reason"], word


def test_geographic_crs_reads_lonlat_and_never_becomes_the_working_crs():
    for geographic in ("EPSG:4326", "EPSG:4269"):
        crs, record = choose_working_crs(geographic, LON, LAT, 0.005)
        assert crs == "EPSG:32616"
        assert "geographic" in record["reason"] and "longitude/latitude" in record["reason"]
        assert record["requested_scale_error"] is None


def test_feet_crs_is_only_read():
    crs, record = choose_working_crs("EPSG:2272", LON, LAT, 0.005)
    assert crs == "EPSG:32616" and "not a projection in metres" in record["reason"]


def test_a_local_metric_crs_is_kept():
    crs, record = choose_working_crs("EPSG:32616", LON, LAT, 0.005)
    assert crs == "EPSG:32616" and record["used"] == "EPSG:32616"
    assert record["scale_error"] == record["requested_scale_error"] < 0.005
    assert "within grid.max_scale_error" in record["reason"]
    # Illinois East state plane (metres) is kept too: a few parts in 100,000 there.
    crs, record = choose_working_crs("EPSG:26971", LON + 1.0, LAT, 0.005)
    assert crs == "EPSG:26971" and record["scale_error"] < 1e-4


def test_a_utm_zone_far_from_the_field_is_refused():
    # Zone 18N's central meridian is 75 W, 14 degrees from the field: k ~ 1.018.
    crs, record = choose_working_crs("EPSG:32618", LON, LAT, 0.005)
    assert crs == "EPSG:32616"
    assert record["requested_scale_error"] > 0.01


def test_the_tolerance_decides_and_a_zone_edge_passes_the_strictest_setting():
    # A UTM zone's own field at its edge on the equator: k = 0.9996/sqrt(1 - sin^2 3 deg)
    # = 1.00097 (Source: Snyder 1987, USGS PP 1395), inside the lowest allowed 0.001.
    lon, lat = np.array([-89.99, -89.995, -89.985]), np.array([0.0, -0.005, 0.005])
    crs, record = choose_working_crs("EPSG:32616", lon, lat, 0.001)
    assert crs == "EPSG:32616"
    assert record["scale_error"] == pytest.approx(0.00097, abs=3e-5)
    # EPSG:3857 at 2 degrees latitude: sec(2 deg) - 1 = 0.00061: kept at 0.001, refused at less.
    lon, lat = np.array([-89.0]), np.array([2.0])
    assert choose_working_crs("EPSG:3857", lon, lat, 0.001)[0] == "EPSG:3857"
    assert choose_working_crs("EPSG:3857", lon, lat, 0.0005)[0] == "EPSG:32616"
