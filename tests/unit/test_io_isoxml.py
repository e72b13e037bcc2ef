"""ISO 11783-10 task data: structure as the schema defines it, and the grid decoded back."""

from __future__ import annotations

import math
import re
import warnings
import xml.etree.ElementTree as ET
from decimal import Decimal

import numpy as np
import pytest
from pyproj import Transformer
from rasterio.transform import rowcol
from scipy.spatial import cKDTree
from shapely.geometry import MultiPolygon, Point, Polygon, box
from shapely.prepared import prep

from pmap.errors import ConfigError, InputError, OutputExistsError, PmapWarning
from pmap.grid import GridSpec
from pmap.io.boundary import field_mask
from pmap.io.isoxml import read_taskdata_grid, write_taskdata

# Source: ISO 11783-10 XML schema, ISO11783_TaskFile_V4-3.xsd and ISO11783_Common_V4-3.xsd
# (schema version 4.3, revision date 2018-06-04), as distributed unchanged in
# dev4Agriculture/isoxml-dotnet (isoxml_dotnet_core/resources/xsd_original) and
# Incentergy-GmbH/jaxb-iso-11783-part-10 (src/main/xsd).  Transcribed below for the elements
# pmap writes: every attribute the schema declares for them, whether it is required, and its
# type with the schema's facets; and the child elements each may hold (with maxOccurs 1 where
# the schema says so).
U32 = (0, 4294967294)  # the schema's xs:unsignedLong range for areas and lengths
I32 = (-2147483648, 2147483647)


def _id(prefix):
    return ("id", prefix)


def _ref(prefix):
    return ("idref", prefix)


def _str(n=32):
    return ("string", n)


def _int(lo, hi):
    return ("int", lo, hi)


def _dec(lo, hi, frac=None):
    return ("decimal", lo, hi, frac)


def _enum(*values):
    return ("enum", set(values))


SCHEMA = {
    "ISO11783_TaskData": {
        "attrs": {
            "VersionMajor": (True, _enum("4")),
            "VersionMinor": (True, _enum("0", "1", "2", "3")),
            "ManagementSoftwareManufacturer": (True, _str()),
            "ManagementSoftwareVersion": (True, _str()),
            "TaskControllerManufacturer": (False, _str()),
            "TaskControllerVersion": (False, _str()),
            "DataTransferOrigin": (True, _enum("1", "2")),
            "lang": (False, _str()),
        },
        "children": {t: None for t in ("AFE", "BSN", "CCT", "CCG", "CLD", "CTP", "CPC", "CTR",
                                       "DVC", "FRM", "OTQ", "PFD", "PDT", "PGP", "TSK", "VPN",
                                       "WKR", "XFR")} | {"TCC": 1},
    },
    "CTR": {"attrs": {"A": (True, _id("CTR")), "B": (True, _str()), "C": (False, _str()),
                      "D": (False, _str()), "E": (False, _str()), "F": (False, _str(10)),
                      "G": (False, _str()), "H": (False, _str()), "I": (False, _str()),
                      "J": (False, _str(20)), "K": (False, _str(20)), "L": (False, _str(20)),
                      "M": (False, _str(64))},
            "children": {}},
    "FRM": {"attrs": {"A": (True, _id("FRM")), "B": (True, _str()), "C": (False, _str()),
                      "D": (False, _str()), "E": (False, _str(10)), "F": (False, _str()),
                      "G": (False, _str()), "H": (False, _str()), "I": (False, _ref("CTR"))},
            "children": {}},
    "PFD": {"attrs": {"A": (True, _id("PFD")), "B": (False, _str()), "C": (True, _str()),
                      "D": (True, _int(*U32)), "E": (False, _ref("CTR")),
                      "F": (False, _ref("FRM")), "G": (False, _ref("CTP")),
                      "H": (False, _ref("CVT")), "I": (False, _ref("PFD"))},
            "children": {"PLN": None, "LSG": None, "PNT": None, "GGP": None}},
    "PLN": {"attrs": {"A": (True, _enum(*map(str, range(1, 13)))), "B": (False, _str()),
                      "C": (False, _int(*U32)), "D": (False, _int(0, 254)),
                      "E": (False, _id("PLN"))},
            "children": {"LSG": None}},
    "LSG": {"attrs": {"A": (True, _enum(*map(str, range(1, 10)))), "B": (False, _str()),
                      "C": (False, _int(*U32)), "D": (False, _int(*U32)),
                      "E": (False, _int(0, 254)), "F": (False, _id("LSG"))},
            "children": {"PNT": None}},
    "PNT": {"attrs": {"A": (True, _enum(*map(str, range(1, 12)))), "B": (False, _str()),
                      "C": (True, _dec(-90, 90, 9)), "D": (True, _dec(-180, 180, 9)),
                      "E": (False, _int(-2147483647, 2147483647)), "F": (False, _int(0, 254)),
                      "G": (False, _id("PNT")), "H": (False, _dec(0, 65)),
                      "I": (False, _dec(0, 65)), "J": (False, ("pattern", r"PNT[0-9]{5}")),
                      "K": (False, _int(*U32))},
            "children": {}},
    "PDT": {"attrs": {"A": (True, _id("PDT")), "B": (True, _str()), "C": (False, _ref("PGP")),
                      "D": (False, _ref("VPN")), "E": (False, ("hex", 2)),
                      "F": (False, _enum("1", "2", "3")), "G": (False, _int(0, I32[1])),
                      "H": (False, _int(0, I32[1])), "I": (False, _int(0, I32[1])),
                      "J": (False, _int(0, I32[1]))},
            "children": {"PRN": None}},
    "VPN": {"attrs": {"A": (True, _id("VPN")), "B": (True, _int(*I32)),
                      "C": (True, _dec(Decimal("0.000000001"), 100000000)),
                      "D": (True, _int(0, 7)), "E": (False, _str()), "F": (False, _ref("CLD"))},
            "children": {}},
    "TSK": {"attrs": {"A": (True, _id("TSK")), "B": (False, _str()), "C": (False, _ref("CTR")),
                      "D": (False, _ref("FRM")), "E": (False, _ref("PFD")),
                      "F": (False, _ref("WKR")), "G": (True, _enum(*map(str, range(1, 7)))),
                      "H": (False, _int(0, 254)), "I": (False, _int(0, 254)),
                      "J": (False, _int(0, 254))},
            "children": {"TZN": None, "TIM": None, "OTP": 1, "WAN": None, "DAN": None,
                         "CNN": None, "PAN": None, "DLT": None, "CAN": None, "TLG": None,
                         "GRD": 1, "CAT": None, "GAN": None}},
    "TZN": {"attrs": {"A": (True, _int(0, 254)), "B": (False, _str()), "C": (False, _int(0, 254))},
            "children": {"PLN": 1, "PDV": None}},
    "PDV": {"attrs": {"A": (True, ("hex", 2)), "B": (True, _int(*I32)),
                      "C": (False, _ref("PDT")), "D": (False, _ref("DET")),
                      "E": (False, _ref("VPN")), "F": (False, _int(*I32)),
                      "G": (False, _int(*I32))},
            "children": {"PDV": None}},
    "GRD": {"attrs": {"A": (True, _dec(-90, 90, 9)), "B": (True, _dec(-180, 180, 9)),
                      "C": (True, ("double", 0, 1)), "D": (True, ("double", 0, 1)),
                      "E": (True, _int(0, 4294967295)), "F": (True, _int(0, 4294967295)),
                      "G": (True, ("pattern", r"GRD[0-9]{5}")), "H": (False, _int(*U32)),
                      "I": (True, _enum("1", "2")), "J": (False, _int(0, 254))},
            "children": {}},
}


def _conforms(value: str, spec) -> bool:
    """Does ``value`` lie in the lexical and value space of the schema type ``spec``?"""
    kind = spec[0]
    if kind in ("id", "idref"):  # (PFX|PFX-)([0-9])+, length 4..14
        return bool(re.fullmatch(rf"({spec[1]}|{spec[1]}-)[0-9]+", value)) and 4 <= len(value) <= 14
    if kind == "string":
        return len(value) <= spec[1]
    if kind == "enum":
        return value in spec[1]
    if kind == "pattern":
        return bool(re.fullmatch(spec[1], value))
    if kind == "hex":  # xs:hexBinary of n octets: 2n hex digits
        return bool(re.fullmatch(f"[0-9A-Fa-f]{{{2 * spec[1]}}}", value))
    if kind == "int":
        return bool(re.fullmatch(r"[+-]?[0-9]+", value)) and spec[1] <= int(value) <= spec[2]
    if kind == "decimal":  # xs:decimal: no exponent; fractionDigits caps the digits after "."
        m = re.fullmatch(r"[+-]?([0-9]+)(\.([0-9]*))?", value)
        if not m or (spec[3] is not None and len(m.group(3) or "") > spec[3]):
            return False
        return Decimal(str(spec[1])) <= Decimal(value) <= Decimal(str(spec[2]))
    if kind == "double":
        try:
            number = float(value)
        except ValueError:
            return False
        return spec[1] <= number <= spec[2]
    raise AssertionError(kind)


def _schema_problems(root: ET.Element) -> list[str]:
    """Every departure from SCHEMA, plus xs:ID uniqueness and xs:IDREF resolution."""
    problems, ids, refs = [], {}, []
    for elem in root.iter():
        spec = SCHEMA.get(elem.tag)
        if spec is None:
            problems.append(f"{elem.tag}: not an element pmap's schema subset knows")
            continue
        for key, value in elem.attrib.items():
            if key not in spec["attrs"]:
                problems.append(f"{elem.tag}@{key}: not declared")
            elif not _conforms(value, spec["attrs"][key][1]):
                problems.append(f"{elem.tag}@{key}={value!r}: not a {spec['attrs'][key][1]}")
            else:
                kind = spec["attrs"][key][1][0]
                if kind == "id":
                    problems += [f"{value}: duplicate id"] if value in ids else []
                    ids[value] = elem.tag
                elif kind == "idref":
                    refs.append((elem.tag, key, value))
        problems += [f"{elem.tag}@{key}: required, missing"
                     for key, (required, _) in spec["attrs"].items()
                     if required and key not in elem.attrib]
        counts: dict[str, int] = {}
        for child in elem:
            counts[child.tag] = counts.get(child.tag, 0) + 1
        for tag, n in counts.items():
            if tag not in spec["children"]:
                problems.append(f"{elem.tag} may not hold {tag}")
            elif spec["children"][tag] is not None and n > spec["children"][tag]:
                problems.append(f"{elem.tag} holds {n} {tag}, at most {spec['children'][tag]}")
    problems += [f"{tag}@{key}={value}: refers to nothing" for tag, key, value in refs
                 if value not in ids]
    return problems


# -- a test field -------------------------------------------------------------------------

# (CRS, x0, y0, cell size m): fields in every quarter of the globe.
PLACES = {
    "north-west": ("EPSG:32616", 500_000.0, 4_400_000.0, 10.0),  # ~39.7 N, 87.0 W
    "south-west": ("EPSG:32720", 400_000.0, 6_200_000.0, 5.0),   # ~34.3 S, 64.1 W
    "south-east": ("EPSG:32736", 300_000.0, 8_000_000.0, 7.5),   # ~18.1 S, 31.1 E
    "north-east": ("EPSG:32633", 600_000.0, 5_800_000.0, 20.0),  # ~52.3 N, 16.5 E
}


def _field(place="north-west", blocks=False):
    crs, x0, y0, cell = PLACES[place]
    s = cell / 10.0  # the same shape at every cell size: about 62 x 54 cells
    boundary = Polygon([(x0 + 3 * s, y0 + 1 * s), (x0 + 611 * s, y0 + 42 * s),
                        (x0 + 590 * s, y0 + 497 * s), (x0 + 21 * s, y0 + 530 * s)],
                       holes=[[(x0 + 250 * s, y0 + 200 * s), (x0 + 330 * s, y0 + 200 * s),
                               (x0 + 330 * s, y0 + 280 * s), (x0 + 250 * s, y0 + 280 * s)]])
    grid = GridSpec.from_bounds(crs, (x0, y0, x0 + 620 * s, y0 + 540 * s), cell)
    grid = grid.with_mask(field_mask(grid, boundary))
    rows, cols = np.indices(grid.shape)
    if blocks:  # few distinct rates, for grid type 1
        values = 100.0 + 25.0 * (cols // 20) + 10.0 * (rows // 27)
    else:  # a different rate in every cell, so a misplaced cell shows
        values = 80.0 + 0.37 * cols + 1.9 * rows + 0.013 * cols * rows
    return grid, boundary, np.where(grid.mask, values, np.nan)


def _write(tmp_path, place="north-west", *, grid_type=2, blocks=False, out_of_field=12.5,
           zones=None, **kw):
    grid, boundary, rates = _field(place, blocks)
    if zones is None:
        west = box(*boundary.bounds).intersection(boundary).intersection(
            box(boundary.bounds[0], boundary.bounds[1], boundary.centroid.x, boundary.bounds[3]))
        zones = [(west, 150.0)]
    write_taskdata(tmp_path, rates_kg_ha=rates, grid=grid, boundary=boundary, zones=zones,
                   product_name="MAP 11-52-0", field_name="North 40", farm="Hillside",
                   customer="J. Doe", out_of_field_kg_ha=out_of_field, grid_type=grid_type, **kw)
    return grid, boundary, rates


def _root(tmp_path):
    return ET.parse(tmp_path / "TASKDATA" / "TASKDATA.XML").getroot()


def _ring_lonlat(lsg):
    # PNT C = PointNorth (latitude), D = PointEast (longitude)
    return [(float(p.get("D")), float(p.get("C"))) for p in lsg.findall("PNT")]


# -- structure ------------------------------------------------------------------------------

@pytest.mark.parametrize("grid_type", [2, 1])
def test_every_element_and_attribute_follows_the_schema(tmp_path, grid_type):
    _write(tmp_path, grid_type=grid_type, blocks=grid_type == 1)
    root = _root(tmp_path)
    assert root.tag == "ISO11783_TaskData"
    assert _schema_problems(root) == []
    for tag in ("CTR", "FRM", "PFD", "PDT", "TSK", "TZN", "PDV", "PLN", "LSG", "PNT", "GRD"):
        assert root.iter(tag), tag


def test_schema_check_can_fail(tmp_path):
    # The subset check itself must catch a wrong type, a missing attribute and a bad reference.
    _write(tmp_path)
    root = _root(tmp_path)
    root.find("TSK/TZN/PDV").set("A", "6")  # DDI not as 2 octets of hex
    del root.find("TSK/GRD").attrib["G"]
    root.find("TSK").set("E", "PFD9")
    problems = " ".join(_schema_problems(root))
    assert "PDV@A='6'" in problems and "GRD@G: required" in problems and "PFD9" in problems


def test_the_task_points_at_its_zones_product_and_ddi(tmp_path):
    _write(tmp_path, out_of_field=12.5)
    root = _root(tmp_path)
    tsk = root.find("TSK")
    zones = {t.get("A"): t for t in tsk.findall("TZN")}
    # Source: ISO 11783-11 data dictionary (isobus.net), DDI 6 = Setpoint Mass Per Area
    # Application Rate in mg/m2, resolution 1; PDV A holds it as 2 octets of hex.
    assert {p.get("A") for p in root.iter("PDV")} == {"0006"}
    assert {p.get("C") for p in root.iter("PDV")} == {"PDT1"}
    # Source: ISO 11783-10 schema - TSK J is the out-of-field zone, GRD J the zone whose PDVs
    # a type-2 grid's cells hold; PLN A 1 = partfield boundary, 2 = treatment zone.
    assert zones[tsk.get("J")].find("PDV").get("B") == "1250"  # 12.5 kg/ha x 100 mg/m2
    assert zones[tsk.find("GRD").get("J")].find("PLN") is None
    assert {p.get("A") for p in root.findall("PFD/PLN")} == {"1"}
    assert {p.get("A") for p in tsk.findall("TZN/PLN")} == {"2"}
    # LSG A 1 = polygon exterior, 2 = interior (the field's hole)
    assert [lsg.get("A") for lsg in root.find("PFD/PLN")] == ["1", "2"]
    # The value presentation shows mg/m2 as kg/ha: (value + B) x C.
    vpn = root.find("VPN")
    assert (15000 + int(vpn.get("B"))) * float(vpn.get("C")) == pytest.approx(150.0)


@pytest.mark.parametrize("grid_type", [2, 1])
def test_file_names_and_lengths(tmp_path, grid_type):
    _write(tmp_path, grid_type=grid_type, blocks=True)
    folder = tmp_path / "TASKDATA"
    # Source: ISO 11783-10 - 8.3 upper-case file names; GRD G = GRD + 5 digits, file .BIN
    assert sorted(p.name for p in folder.iterdir()) == ["GRD00001.BIN", "TASKDATA.XML"]
    grd = _root(tmp_path).find("TSK/GRD")
    size = (folder / "GRD00001.BIN").stat().st_size
    cells = int(grd.get("E")) * int(grd.get("F"))
    n_pdv = len(_root(tmp_path).find(f"TSK/TZN[@A='{grd.get('J')}']").findall("PDV")) \
        if grid_type == 2 else 0
    # type 2: a 4-byte signed integer per PDV per cell; type 1: a zone code byte per cell
    assert int(grd.get("H")) == size == (cells * 4 * n_pdv if grid_type == 2 else cells)
    assert grd.get("I") == str(grid_type)


def test_the_bytes_do_not_change_between_runs(tmp_path):
    _write(tmp_path / "a")
    _write(tmp_path / "b")
    for name in ("TASKDATA.XML", "GRD00001.BIN"):
        assert (tmp_path / "a" / "TASKDATA" / name).read_bytes() == \
            (tmp_path / "b" / "TASKDATA" / name).read_bytes()


# -- the grid decoded back ------------------------------------------------------------------

def _expected(grid, boundary, rates, lat, lon, out_of_field):
    """Per decoded cell: the set of allowed setpoints (mg/m2), computed without the writer."""
    lon2, lat2 = np.meshgrid(lon, lat)
    x, y = Transformer.from_crs("EPSG:4326", grid.crs, always_xy=True).transform(
        lon2.ravel(), lat2.ravel())
    field = prep(boundary)
    inside = np.array([field.contains(Point(a, b)) for a, b in zip(x, y, strict=True)])
    r, c = (np.asarray(v) for v in rowcol(grid.transform, x, y))
    finite = np.isfinite(rates)
    centres = np.column_stack([a[finite] for a in grid.cell_centres()])
    tree = cKDTree(centres)
    allowed, kinds = [], []
    for k in range(len(x)):
        if not inside[k]:
            allowed.append({out_of_field * 100.0})
            kinds.append("outside")
        elif finite[r[k], c[k]]:
            allowed.append({rates[r[k], c[k]] * 100.0})
            kinds.append("cell")
        else:  # edge strip pmap's mask leaves out: any of the nearest cells with a rate
            cx = grid.transform.c + (c[k] + 0.5) * grid.cell_size
            cy = grid.transform.f - (r[k] + 0.5) * grid.cell_size
            d, i = tree.query([cx, cy], k=8)
            allowed.append({rates[finite][j] * 100.0 for j in i[d <= d[0] + 1e-6]})
            kinds.append("edge")
    return allowed, np.array(kinds)


@pytest.mark.parametrize("place", list(PLACES))
def test_grid_decodes_back_to_the_rates_at_every_cell_centre(tmp_path, place):
    # The writer samples pmap's raster at each WGS 84 cell centre: the decoded setpoint is
    # the rate of the pmap cell holding that centre within rounding to 1 mg/m2, the
    # out-of-field rate outside the boundary.
    grid, boundary, rates = _write(tmp_path, place, out_of_field=12.5)
    lat, lon, values = read_taskdata_grid(tmp_path / "TASKDATA")
    assert values.shape == (lat.size, lon.size, 1)
    decoded = values[:, :, 0].ravel()
    allowed, kinds = _expected(grid, boundary, rates, lat, lon, 12.5)
    wrong = [k for k, ok in enumerate(allowed)
             if min(abs(decoded[k] - a) for a in ok) > 0.5 + 1e-6]
    assert wrong == [], f"{len(wrong)} of {decoded.size} cells, first {wrong[:5]}"
    assert (kinds == "cell").sum() > 0.6 * decoded.size  # the field fills most of the grid
    assert (kinds == "outside").sum() > 0 and (kinds == "edge").sum() > 0
    # the grid covers the whole field
    ll = Transformer.from_crs(grid.crs, "EPSG:4326", always_xy=True)
    lons, lats = ll.transform(*boundary.exterior.xy)
    west, south, east, north = min(lons), min(lats), max(lons), max(lats)
    grd = _root(tmp_path).find("TSK/GRD")
    a, b, cn, ce = (float(grd.get(k)) for k in "ABCD")
    assert a <= south and b <= west
    assert a + cn * int(grd.get("F")) >= north and b + ce * int(grd.get("E")) >= east


def test_type1_grid_decodes_back_through_its_zones(tmp_path):
    grid, boundary, rates = _write(tmp_path, "south-west", grid_type=1, blocks=True,
                                   out_of_field=0.0)
    lat, lon, values = read_taskdata_grid(tmp_path / "TASKDATA")
    allowed, _ = _expected(grid, boundary, rates, lat, lon, 0.0)
    decoded = values[:, :, 0].ravel()
    assert all(min(abs(decoded[k] - a) for a in ok) <= 0.5 for k, ok in enumerate(allowed))
    tsk = _root(tmp_path).find("TSK")
    grid_zones = [t for t in tsk.findall("TZN") if t.find("PLN") is None]
    # one zone per distinct in-field rate, plus the out-of-field zone
    assert len(grid_zones) == len(np.unique(rates[np.isfinite(rates)])) + 1
    codes = np.frombuffer((tmp_path / "TASKDATA" / "GRD00001.BIN").read_bytes(), np.uint8)
    assert set(codes.tolist()) <= {int(t.get("A")) for t in grid_zones}


def test_cells_are_as_large_on_the_ground_as_pmaps(tmp_path):
    grid, boundary, _ = _write(tmp_path, "north-east")
    root = _root(tmp_path)
    grd = root.find("TSK/GRD")
    lats = [float(p.get("C")) for p in root.find("PFD/PLN/LSG").findall("PNT")]
    phi = math.radians(0.5 * (min(lats) + max(lats)))
    # Source: WGS 84 ellipsoid a = 6378137 m, 1/f = 298.257223563 (NIMA TR8350.2); meridian
    # and prime-vertical radii of curvature M, N (Snyder 1987, Map Projections - A Working
    # Manual, USGS Professional Paper 1395).
    a, f = 6378137.0, 1 / 298.257223563
    e2 = f * (2 - f)
    w = 1 - e2 * math.sin(phi) ** 2
    m_north = a * (1 - e2) / w ** 1.5 * math.pi / 180
    m_east = a / math.sqrt(w) * math.cos(phi) * math.pi / 180
    assert float(grd.get("C")) * m_north == pytest.approx(grid.cell_size, rel=1e-6)
    assert float(grd.get("D")) * m_east == pytest.approx(grid.cell_size, rel=1e-6)


def test_an_explicit_cell_size_in_degrees(tmp_path):
    _write(tmp_path, cell_size_deg=(1e-4, 2e-4))
    grd = _root(tmp_path).find("TSK/GRD")
    assert float(grd.get("C")) == 1e-4 and float(grd.get("D")) == 2e-4
    lat, lon, _ = read_taskdata_grid(tmp_path / "TASKDATA")
    assert np.allclose(np.diff(lat), 1e-4) and np.allclose(np.diff(lon), 2e-4)


# -- polygons ------------------------------------------------------------------------------

def test_partfield_polygon_is_the_boundary_in_lat_lon(tmp_path):
    grid, boundary, _ = _write(tmp_path, "south-east")
    pfd = _root(tmp_path).find("PFD")
    rings = [_ring_lonlat(lsg) for lsg in pfd.find("PLN")]
    to_grid = Transformer.from_crs("EPSG:4326", grid.crs, always_xy=True)
    shell, *holes = ([to_grid.transform(lo, la) for lo, la in ring] for ring in rings)
    back = Polygon(shell, holes=holes)
    # 9 decimals of a degree are about 0.1 mm: the polygon comes back to well under 1 m2
    assert back.symmetric_difference(boundary).area < 1.0
    # Source: UTM's scale factor is 0.9996 on the central meridian and within about
    # +-0.001 across a zone (Snyder 1987), so planar and ellipsoidal areas agree to 0.2 %.
    assert int(pfd.get("D")) == pytest.approx(boundary.area, rel=2e-3)


def test_each_polygon_part_is_a_treatment_zone_of_its_own(tmp_path):
    grid, boundary, _ = _field()
    x0, y0, x1, y1 = boundary.bounds
    two = MultiPolygon([box(x0 + 50, y0 + 60, x0 + 150, y0 + 160),
                        box(x0 + 400, y0 + 300, x0 + 500, y0 + 420)])
    _write(tmp_path, zones=[(two, 171.25), (box(x0 + 200, y0 + 60, x0 + 260, y0 + 100), np.nan)],
           out_of_field=12.5)
    tsk = _root(tmp_path).find("TSK")
    with_plns = [t for t in tsk.findall("TZN") if t.find("PLN") is not None]
    assert [t.find("PDV").get("B") for t in with_plns] == ["17125", "17125", "1250"]
    to_grid = Transformer.from_crs("EPSG:4326", grid.crs, always_xy=True)
    got = [Polygon([to_grid.transform(lo, la) for lo, la in _ring_lonlat(t.find("PLN/LSG"))])
           for t in with_plns[:2]]
    for part, back in zip(two.geoms, got, strict=True):
        assert back.symmetric_difference(part).area < 0.01
    codes = [int(t.get("A")) for t in tsk.findall("TZN")]
    assert len(codes) == len(set(codes))


def test_too_many_polygons_are_left_out_with_a_warning(tmp_path):
    grid, boundary, _ = _field()
    x0, y0, _, _ = boundary.bounds
    many = [(box(x0 + 100 + 2 * i, y0 + 100, x0 + 101 + 2 * i, y0 + 101), 120.0)
            for i in range(260)]
    with pytest.warns(PmapWarning, match="treatment zone"):
        _write(tmp_path, zones=many)
    tsk = _root(tmp_path).find("TSK")
    assert tsk.find("TZN/PLN") is None and tsk.find("GRD") is not None
    assert _schema_problems(_root(tmp_path)) == []


# -- errors --------------------------------------------------------------------------------

def test_refuses_to_overwrite_unless_asked(tmp_path):
    _write(tmp_path)
    with pytest.raises(OutputExistsError, match="TASKDATA.XML"):
        _write(tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _write(tmp_path, overwrite=True)


def test_bad_inputs_are_named(tmp_path):
    grid, boundary, rates = _field()
    kw = dict(grid=grid, boundary=boundary, product_name="P", field_name="F")
    bad = rates.copy()
    bad[20, 20] = -5.0
    with pytest.raises(InputError, match="row 20, column 20"):
        write_taskdata(tmp_path, rates_kg_ha=bad, **kw)
    with pytest.raises(InputError, match="no cell"):
        write_taskdata(tmp_path, rates_kg_ha=np.full(grid.shape, np.nan), **kw)
    with pytest.raises(ConfigError, match="grid_type"):
        write_taskdata(tmp_path, rates_kg_ha=rates, grid_type=3, **kw)
    with pytest.raises(ConfigError, match="grid_type = 2"):  # every cell its own rate
        write_taskdata(tmp_path, rates_kg_ha=rates, grid_type=1, **kw)
    with pytest.raises(ConfigError, match="at most 1 degree"):
        write_taskdata(tmp_path, rates_kg_ha=rates, cell_size_deg=1.5, **kw)
    assert not (tmp_path / "TASKDATA").exists()


def test_reader_rejects_a_grid_file_of_the_wrong_length(tmp_path):
    _write(tmp_path)
    path = tmp_path / "TASKDATA" / "GRD00001.BIN"
    path.write_bytes(path.read_bytes()[:-4])
    with pytest.raises(InputError, match="GRD H"):
        read_taskdata_grid(tmp_path / "TASKDATA")


def test_decimal_check_rejects_exponents():
    # xs:decimal has no exponent form (XML Schema Part 2, 3.2.3): the subset check holds to it.
    assert not _conforms("1e-05", _dec(-90, 90, 9))
    assert _conforms("-18.123456789", _dec(-90, 90, 9))
    assert not _conforms("-18.1234567891", _dec(-90, 90, 9))
