"""ISO 11783-10 task data: structure as the schema defines it, and the grid decoded back."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from pyproj import Transformer
from shapely.geometry import Polygon, box

from pmap.grid import GridSpec
from pmap.io.boundary import field_mask
from pmap.io.isoxml import MG_M2_PER_KG_HA, read_taskdata_grid, write_taskdata

# Source: ISO 11783-10 XML schema v4, as generated into Josephinum-Research/isoxml-py
# (isoxml/models/base/v4: grid.py, task.py, partfield.py, process_data_variable.py,
# point.py): required attributes and id patterns.
REQUIRED = {
    "TSK": {"A": r"TSK-?[0-9]+", "G": r"[1-6]"},
    "PFD": {"A": r"PFD-?[0-9]+", "C": r".{1,32}", "D": r"[0-9]+"},
    "PDV": {"A": r"[0-9A-F]{4}", "B": r"-?[0-9]+"},
    "PNT": {"A": r"(1[01]|[1-9])", "C": r"-?[0-9]+\.[0-9]{1,9}", "D": r"-?[0-9]+\.[0-9]{1,9}"},
    "GRD": {"A": r"-?[0-9.]+", "B": r"-?[0-9.]+", "C": r"[0-9.eE-]+", "D": r"[0-9.eE-]+",
            "E": r"[0-9]+", "F": r"[0-9]+", "G": r"GRD[0-9]{5}", "I": r"[12]"},
    "TZN": {"A": r"[0-9]{1,3}"},
}


def _field(crs="EPSG:32616", x0=500_000.0, y0=4_400_000.0, cell=10.0):
    boundary = Polygon([(x0 + 3, y0 + 1), (x0 + 611, y0 + 42), (x0 + 590, y0 + 497),
                        (x0 + 21, y0 + 530)])
    grid = GridSpec.from_bounds(crs, (x0, y0, x0 + 620, y0 + 540), cell)
    grid = GridSpec(grid.crs, grid.transform, grid.width, grid.height, field_mask(grid, boundary))
    rows, cols = np.indices(grid.shape)
    rates = np.where(grid.mask, 100.0 + 7.3 * (cols // 9) + 3.1 * (rows // 11), np.nan)
    return grid, boundary, rates


def _write(tmp_path, **kw):
    grid, boundary, rates = _field(**kw)
    zones = [(box(*boundary.bounds).intersection(boundary), 150.0)]
    write_taskdata(tmp_path, rates_kg_ha=rates, grid=grid, boundary=boundary, zones=zones,
                   product_name="MAP 11-52-0", field_name="North 40", farm="Hillside",
                   out_of_field_kg_ha=0.0)
    return grid, boundary, rates


def test_structure_follows_the_schema(tmp_path):
    _write(tmp_path)
    root = ET.parse(tmp_path / "TASKDATA" / "TASKDATA.XML").getroot()
    assert root.tag == "ISO11783_TaskData"
    assert root.get("VersionMajor") == "4" and root.get("DataTransferOrigin") == "1"
    for tag, attrs in REQUIRED.items():
        found = root.iter(tag)
        elems = list(found)
        assert elems, tag
        for elem in elems:
            for key, pattern in attrs.items():
                assert re.fullmatch(pattern, elem.get(key, "")), (tag, key, elem.get(key))
    # Source: ISO 11783-11 data dictionary, DDI 6 = Setpoint Mass Per Area Application Rate.
    assert {p.get("A") for p in root.iter("PDV")} == {"0006"}
    tsk = root.find("TSK")
    # every id reference resolves
    ids = {e.get("A") for e in root if e.get("A")}
    for ref in ("C", "D", "E"):
        assert tsk.get(ref) in ids
    assert tsk.get("J") in {t.get("A") for t in tsk.findall("TZN")}  # out-of-field zone
    grd = tsk.find("GRD")
    assert grd.get("J") in {t.get("A") for t in tsk.findall("TZN")}
    # Source: schema - PLN type 1 partfield boundary, type 2 treatment zone; LSG type 1 exterior.
    assert root.find("PFD/PLN").get("A") == "1"
    assert tsk.find("TZN/PLN").get("A") == "2"
    assert root.find("PFD/PLN/LSG").get("A") == "1"
    size = (tmp_path / "TASKDATA" / "GRD00001.BIN").stat().st_size
    assert int(grd.get("H")) == size == int(grd.get("E")) * int(grd.get("F")) * 4


@pytest.mark.parametrize("where", ["north-west", "south-east"])
def test_grid_decodes_back_to_the_rates_at_every_cell_centre(tmp_path, where):
    # The raster is sampled at each WGS 84 cell centre: decoding must give the rate of the
    # pmap cell holding that centre, within rounding to 1 mg/m2, and 0 outside the field.
    kw = {} if where == "north-west" else {"crs": "EPSG:32736", "x0": 300_000.0,
                                           "y0": 8_000_000.0, "cell": 5.0}
    grid, boundary, rates = _write(tmp_path, **kw)
    lat, lon, values = read_taskdata_grid(tmp_path / "TASKDATA")
    assert values.shape[2] == 1
    lon2, lat2 = np.meshgrid(lon, lat)
    x, y = Transformer.from_crs("EPSG:4326", grid.crs, always_xy=True).transform(lon2, lat2)
    # rasterio's own row/col arithmetic, independent of the writer's
    from rasterio.transform import rowcol

    r, c = rowcol(grid.transform, np.ravel(x), np.ravel(y))
    r, c = np.asarray(r), np.asarray(c)
    ok = (r >= 0) & (r < grid.height) & (c >= 0) & (c < grid.width)
    expected = np.zeros(r.shape)
    expected[ok] = np.nan_to_num(rates[r[ok], c[ok]], nan=0.0)
    decoded = values[:, :, 0].ravel() / MG_M2_PER_KG_HA
    np.testing.assert_allclose(decoded, expected, atol=0.01 + 1e-9)
    assert (decoded > 0).sum() > 0.5 * decoded.size  # the field fills most of the grid


def test_cells_match_pmap_cells_in_size(tmp_path):
    grid, boundary, _ = _write(tmp_path)
    grd = ET.parse(tmp_path / "TASKDATA" / "TASKDATA.XML").getroot().find("TSK/GRD")
    # common practice, no source: a degree of latitude is about 111 km.
    assert float(grd.get("C")) * 111_320 == pytest.approx(grid.cell_size, rel=1e-6)
