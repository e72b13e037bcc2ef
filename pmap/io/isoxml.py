"""ISO 11783-10 task data: the prescription as a task controller loads it.

Writes ``TASKDATA/TASKDATA.XML`` and its grid file ``TASKDATA/GRD00001.BIN`` with the standard
library only:

* ``ISO11783_TaskData`` (version 4.3) holding a customer (CTR), a farm (FRM), the
  partfield (PFD) with the field boundary as a polygon of type 1, the product (PDT) and one
  task (TSK);
* in the task, treatment zones (TZN): the grid's template zone, an out-of-field zone, and
  one zone per rate polygon (PLN of type 2) - each with a process data variable (PDV) of
  DDI 6, "setpoint mass per area application rate", in mg/m2 (1 kg/ha = 100 mg/m2);
* a grid of type 2 (GRD) in WGS 84: each cell holds one little-endian signed 32-bit
  setpoint per PDV of the template zone, cells ordered row by row from the south-west
  corner (the grid's minimum north and east position) eastwards, rows northwards.

Element codes and attribute letters follow the ISO 11783-10 XML schema (version 4); the
letters, types and ranges used were checked against a schema-generated model
(Josephinum-Research/isoxml-py, ``isoxml/models/base/v4``).  The file is deterministic:
no timestamps, ids numbered in order.
"""

from __future__ import annotations

import struct
import xml.etree.ElementTree as ET
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from shapely.geometry import MultiPolygon, Polygon
from shapely.geometry.base import BaseGeometry

from pmap._version import __version__
from pmap.errors import OutputError
from pmap.grid import GridSpec

__all__ = ["DDI_SETPOINT_MASS_PER_AREA", "MG_M2_PER_KG_HA", "write_taskdata",
           "read_taskdata_grid", "wgs84_grid_for"]

#: DDI 6: Setpoint Mass Per Area Application Rate, mg/m2 (ISO 11783-11 data dictionary).
DDI_SETPOINT_MASS_PER_AREA: int = 6
#: 1 kg/ha = 1e6 mg / 1e4 m2.
MG_M2_PER_KG_HA: float = 100.0

_GRID_FILE = "GRD00001"
_M_PER_DEG_LAT = 111_320.0  # mean length of a degree of latitude near mid-latitudes (m)


def _text(value: str, limit: int = 32) -> str:
    """A designator within the schema's length limit (32 characters)."""
    value = " ".join(str(value).split())
    return value[:limit]


def _deg(value: float) -> str:
    return f"{value:.9f}"


def wgs84_grid_for(boundary_lonlat: BaseGeometry, cell_m: float) -> tuple[float, float, float,
                                                                        float, int, int]:
    """A WGS 84 grid covering a field with cells about ``cell_m`` metres on a side.

    Returns
    -------
    min_north, min_east, cell_north, cell_east : float
        South-west corner and cell size (decimal degrees).
    n_cols, n_rows : int
    """
    lon0, lat0, lon1, lat1 = boundary_lonlat.bounds
    cell_north = cell_m / _M_PER_DEG_LAT
    cell_east = cell_m / (_M_PER_DEG_LAT * np.cos(np.radians(0.5 * (lat0 + lat1))))
    n_cols = max(1, int(np.ceil((lon1 - lon0) / cell_east)))
    n_rows = max(1, int(np.ceil((lat1 - lat0) / cell_north)))
    return lat0, lon0, cell_north, cell_east, n_cols, n_rows


def _ring_element(parent: ET.Element, coords: np.ndarray, line_type: str) -> None:
    lsg = ET.SubElement(parent, "LSG", {"A": line_type})
    pts = np.asarray(coords)[:-1] if len(coords) > 1 and np.allclose(coords[0], coords[-1]) \
        else np.asarray(coords)
    for lon, lat in pts[:, :2]:
        ET.SubElement(lsg, "PNT", {"A": "2", "C": _deg(lat), "D": _deg(lon)})


def _polygon_elements(parent: ET.Element, geom: BaseGeometry, polygon_type: str,
                      designator: str) -> None:
    parts = geom.geoms if isinstance(geom, MultiPolygon) else [geom]
    for part in parts:
        if not isinstance(part, Polygon) or part.is_empty:
            continue
        pln = ET.SubElement(parent, "PLN", {"A": polygon_type, "B": _text(designator)})
        _ring_element(pln, np.asarray(part.exterior.coords), "1")
        for hole in part.interiors:
            _ring_element(pln, np.asarray(hole.coords), "2")


def write_taskdata(
    out_dir: str | Path,
    *,
    rates_kg_ha: np.ndarray,
    grid: GridSpec,
    boundary: BaseGeometry,
    zones: Sequence[tuple[BaseGeometry, float]] = (),
    product_name: str,
    field_name: str,
    farm: str = "",
    customer: str = "",
    task_name: str | None = None,
    out_of_field_kg_ha: float = 0.0,
) -> list[Path]:
    """Write ``out_dir/TASKDATA/TASKDATA.XML`` and ``GRD00001.BIN`` for a product-rate map.

    Parameters
    ----------
    rates_kg_ha : numpy.ndarray, shape grid.shape
        Product rate per cell (kg product/ha); NaN where pmap gives no rate (the cell then
        gets the out-of-field rate).
    grid : GridSpec
        pmap's projected grid of ``rates_kg_ha``.
    boundary : shapely (Multi)Polygon
        The field in ``grid.crs``.
    zones : sequence of (geometry, kg/ha)
        Rate polygons in ``grid.crs`` with their product rate, written as treatment zones.
    product_name, field_name, farm, customer, task_name : str
        Designators (cut to the schema's 32 characters).
    out_of_field_kg_ha : float
        Product rate outside the field and where no rate is given.

    Returns
    -------
    list of Path
        The two files written.
    """
    import shapely
    from pyproj import Transformer

    rates = np.asarray(rates_kg_ha, dtype=float)
    if rates.shape != grid.shape:
        raise ValueError(f"rates shape {rates.shape} does not match grid {grid.shape}")
    to_lonlat = Transformer.from_crs(grid.crs, "EPSG:4326", always_xy=True)
    from_lonlat = Transformer.from_crs("EPSG:4326", grid.crs, always_xy=True)

    def lonlat(geom: BaseGeometry) -> BaseGeometry:
        return shapely.transform(
            geom, lambda xy: np.column_stack(to_lonlat.transform(xy[:, 0], xy[:, 1])))

    field_ll = lonlat(boundary)

    # Grid of type 2: sample pmap's raster at each WGS 84 cell centre.
    min_n, min_e, d_n, d_e, n_cols, n_rows = wgs84_grid_for(field_ll, grid.cell_size)
    lat = min_n + (np.arange(n_rows) + 0.5) * d_n
    lon = min_e + (np.arange(n_cols) + 0.5) * d_e
    lon2, lat2 = np.meshgrid(lon, lat)  # row 0 = southernmost
    x, y = from_lonlat.transform(lon2.ravel(), lat2.ravel())
    t = grid.transform
    col = np.floor((np.asarray(x) - t.c) / t.a).astype(np.int64)
    row = np.floor((np.asarray(y) - t.f) / t.e).astype(np.int64)
    inside = (row >= 0) & (row < grid.height) & (col >= 0) & (col < grid.width)
    values = np.full(row.shape, np.nan)
    values[inside] = rates[row[inside], col[inside]]
    values = np.where(np.isfinite(values), values, out_of_field_kg_ha)
    setpoints = np.rint(values * MG_M2_PER_KG_HA).astype("<i4")

    root = ET.Element("ISO11783_TaskData", {
        "VersionMajor": "4", "VersionMinor": "3",
        "ManagementSoftwareManufacturer": "pmap", "ManagementSoftwareVersion": __version__,
        "DataTransferOrigin": "1",
    })
    ET.SubElement(root, "CTR", {"A": "CTR1", "B": _text(customer or farm or "unknown")})
    ET.SubElement(root, "FRM", {"A": "FRM1", "B": _text(farm or field_name), "I": "CTR1"})
    pfd = ET.SubElement(root, "PFD", {
        "A": "PFD1", "C": _text(field_name), "D": str(int(round(boundary.area))),
        "E": "CTR1", "F": "FRM1"})
    _polygon_elements(pfd, field_ll, "1", field_name)
    ET.SubElement(root, "PDT", {"A": "PDT1", "B": _text(product_name)})
    tsk = ET.SubElement(root, "TSK", {
        "A": "TSK1", "B": _text(task_name or f"{field_name} P"), "C": "CTR1", "D": "FRM1",
        "E": "PFD1", "G": "1", "J": "2"})
    ddi = f"{DDI_SETPOINT_MASS_PER_AREA:04X}"

    def zone(code: int, designator: str, kg_ha: float) -> ET.Element:
        tzn = ET.SubElement(tsk, "TZN", {"A": str(code), "B": _text(designator)})
        ET.SubElement(tzn, "PDV", {"A": ddi, "B": str(int(round(kg_ha * MG_M2_PER_KG_HA))),
                                   "C": "PDT1"})
        return tzn

    zone(1, "grid", 0.0)
    zone(2, "out of field", out_of_field_kg_ha)
    for k, (geom, kg_ha) in enumerate(zones):
        if 3 + k > 254:
            break
        value = float(kg_ha) if np.isfinite(kg_ha) else out_of_field_kg_ha
        tzn = zone(3 + k, f"zone {k + 1}", value)
        _polygon_elements(tzn, lonlat(geom), "2", f"zone {k + 1}")
    ET.SubElement(tsk, "GRD", {
        "A": _deg(min_n), "B": _deg(min_e), "C": f"{d_n:.12g}", "D": f"{d_e:.12g}",
        "E": str(n_cols), "F": str(n_rows), "G": _GRID_FILE,
        "H": str(setpoints.nbytes), "I": "2", "J": "1"})

    target = Path(out_dir) / "TASKDATA"
    try:
        target.mkdir(parents=True, exist_ok=True)
        xml_path = target / "TASKDATA.XML"
        ET.indent(root)
        xml_path.write_bytes(b'<?xml version="1.0" encoding="UTF-8"?>\n'
                             + ET.tostring(root, encoding="utf-8") + b"\n")
        bin_path = target / f"{_GRID_FILE}.BIN"
        bin_path.write_bytes(setpoints.tobytes())
    except OSError as exc:
        raise OutputError(f"{target}: cannot write the ISO 11783-10 task data "
                          f"({exc.strerror or exc})") from exc
    return [xml_path, bin_path]


def read_taskdata_grid(taskdata_dir: str | Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Decode the type-2 grid of a TASKDATA folder: cell-centre latitudes, longitudes, values.

    Returns
    -------
    lat, lon : numpy.ndarray, shapes (rows,) and (cols,)
        Cell centres (decimal degrees), south to north and west to east.
    values : numpy.ndarray of int32, shape (rows, cols, n_pdv)
        The setpoints (mg/m2 for DDI 6), row 0 southernmost.
    """
    folder = Path(taskdata_dir)
    root = ET.parse(folder / "TASKDATA.XML").getroot()
    grd = root.find("TSK/GRD")
    if grd is None or grd.get("I") != "2":
        raise ValueError(f"{folder}: no grid of type 2 in TASKDATA.XML")
    n_cols, n_rows = int(grd.get("E")), int(grd.get("F"))
    template = grd.get("J")
    tzn = next(t for t in root.findall("TSK/TZN") if t.get("A") == template)
    n_pdv = len(tzn.findall("PDV"))
    raw = (folder / f"{grd.get('G')}.BIN").read_bytes()
    if len(raw) != int(grd.get("H")) or len(raw) != n_rows * n_cols * n_pdv * 4:
        raise ValueError(f"{folder}: grid file holds {len(raw)} bytes, expected "
                         f"{n_rows * n_cols * n_pdv * 4}")
    values = np.array(struct.unpack(f"<{n_rows * n_cols * n_pdv}i", raw), dtype=np.int32)
    lat = float(grd.get("A")) + (np.arange(n_rows) + 0.5) * float(grd.get("C"))
    lon = float(grd.get("B")) + (np.arange(n_cols) + 0.5) * float(grd.get("D"))
    return lat, lon, values.reshape(n_rows, n_cols, n_pdv)
