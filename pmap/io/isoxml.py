"""ISO 11783-10 task data: the prescription as a task controller loads it.

:func:`write_taskdata` writes ``<out>/TASKDATA/TASKDATA.XML`` and its grid file
``GRD00001.BIN`` with the standard library (:mod:`xml.etree.ElementTree`, UTF-8):

* the root ``ISO11783_TaskData`` (version 4.3, data transfer origin 1 = FMIS), a customer
  (CTR) and farm (FRM) when named, the partfield (PFD) with the field boundary as polygons of
  type 1 (partfield boundary), the product (PDT), a value presentation (VPN) that shows the
  setpoints in kg/ha, and one planned task (TSK, status 1);
* in the task, treatment zones (TZN), each with one process data variable (PDV) of DDI 6,
  "Setpoint Mass Per Area Application Rate", in mg/m2 (resolution 1; 1 kg/ha = 100 mg/m2):
  zone 1 is the out-of-field zone (TSK J), then the grid's zones, then one zone per part of
  each rate polygon given (PLN of type 2, treatment zone);
* a grid (GRD) in WGS 84 of type 2 (the default: one little-endian signed 32-bit setpoint per
  PDV of the template zone GRD J, per cell) or type 1 (one byte per cell: the code of a
  treatment zone, one zone per distinct setpoint).  Cells are stored row by row from the
  grid's minimum north and east position: the first row is the southernmost, each row runs
  west to east, and the PDV values of a cell follow each other.

The WGS 84 grid covers the field's longitude/latitude extent from its south-west corner.
Its cells are as large on the ground, at the field's central latitude, as pmap's cells:
``cell_north = cell_size / (metres per degree of latitude)`` and ``cell_east = cell_size /
(metres per degree of longitude)``, both measured on the WGS 84 ellipsoid with
:class:`pyproj.Geod`.  Each cell gets the rate of the pmap cell holding the cell's centre
(nearest neighbour, through the grid's inverse transform); a centre inside the boundary whose
pmap cell has no rate (the half-cell strip along the edge that pmap's field mask leaves out)
takes the rate of the nearest pmap cell that has one, and a centre outside the boundary gets
the out-of-field rate.

Sources: element codes, attribute letters, types and ranges follow the ISO 11783-10 XML
schema, ISO11783_TaskFile_V4-3.xsd with ISO11783_Common_V4-3.xsd (schema version 4.3,
revision date 2018-06-04).  DDI 6 and its unit and resolution are from the ISO 11783-11
data dictionary (isobus.net).  The cell order of the grid file is that of ISO 11783-10's
grid description (cells in ascending order from the minimum north/east position).  The file
is deterministic: no timestamps, ids numbered in order ("CTR1", "PFD1", "TSK1", ...).
"""

from __future__ import annotations

import math
import warnings
import xml.etree.ElementTree as ET
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from shapely.geometry import MultiPolygon, Polygon
from shapely.geometry.base import BaseGeometry

from pmap._version import __version__
from pmap.errors import ConfigError, InputError, OutputExistsError, PmapWarning
from pmap.grid import GridSpec

__all__ = [
    "DDI_SETPOINT_MASS_PER_AREA",
    "MG_M2_PER_KG_HA",
    "MAX_ZONE_CODE",
    "WGS84Grid",
    "wgs84_grid_for",
    "write_taskdata",
    "read_taskdata_grid",
]

#: DDI 6: Setpoint Mass Per Area Application Rate, mg/m2, resolution 1 (ISO 11783-11).
DDI_SETPOINT_MASS_PER_AREA: int = 6
#: 1 kg/ha = 1e6 mg / 1e4 m2.
MG_M2_PER_KG_HA: float = 100.0
#: Highest treatment zone code (TZN A, xs:unsignedByte 0..254).
MAX_ZONE_CODE: int = 254

_MAX_SETPOINT = 2_147_483_647  # DDI 6 range 0 .. 2^31 - 1 (mg/m2)
_MAX_FILE_LENGTH = 4_294_967_294  # GRD H, xs:unsignedLong 0 .. 4294967294 (bytes)
_GRID_FILE = "GRD00001"  # GRD G, pattern GRD[0-9]{5}; the file adds ".BIN"
_OUT_OF_FIELD_CODE = 1


def _text(value: str, fallback: str) -> str:
    """A designator within the schema's 32 characters (whitespace collapsed)."""
    text = " ".join(str(value).split()) or fallback
    return text[:32]


def _deg(value: float) -> str:
    """Decimal degrees with the schema's 9 fraction digits (about 0.1 mm)."""
    return f"{value:.9f}"


def _metres_per_degree(lat: float) -> tuple[float, float]:
    """Ground length (m) of one degree of latitude and of longitude at ``lat`` (WGS 84)."""
    from pyproj import Geod

    geod = Geod(ellps="WGS84")
    h = 1e-3  # degrees: short enough that chord and arc agree to < 1e-9
    _, _, north = geod.inv(0.0, lat - h / 2, 0.0, lat + h / 2)
    _, _, east = geod.inv(0.0, lat, h, lat)
    return north / h, east / h


@dataclass(frozen=True)
class WGS84Grid:
    """A task-data grid: south-west corner, cell size (decimal degrees) and shape.

    The values are exactly those written into GRD A-F, so the cell centres a reader computes
    are the ones the writer sampled.
    """

    min_north: float
    min_east: float
    cell_north: float
    cell_east: float
    n_cols: int
    n_rows: int

    def lat_centres(self) -> np.ndarray:
        """Latitudes of the cell centres, south to north (degrees), shape (n_rows,)."""
        return self.min_north + (np.arange(self.n_rows) + 0.5) * self.cell_north

    def lon_centres(self) -> np.ndarray:
        """Longitudes of the cell centres, west to east (degrees), shape (n_cols,)."""
        return self.min_east + (np.arange(self.n_cols) + 0.5) * self.cell_east


def wgs84_grid_for(boundary_lonlat: BaseGeometry, cell_m: float | None = None, *,
                   cell_size_deg: float | tuple[float, float] | None = None) -> WGS84Grid:
    """The WGS 84 grid covering a field, with cells about ``cell_m`` metres on a side.

    Parameters
    ----------
    boundary_lonlat : shapely geometry
        The field in longitude/latitude (degrees, x = longitude).
    cell_m : float, optional
        Ground size of a cell at the field's central latitude (m); used when
        ``cell_size_deg`` is not given.
    cell_size_deg : float or (float, float), optional
        Cell size (north, east) in decimal degrees; one number for both.

    Returns
    -------
    WGS84Grid
        Origin floored to 1e-9 degree and cell sizes rounded to 15 decimals, as written.
    """
    lon0, lat0, lon1, lat1 = boundary_lonlat.bounds
    if cell_size_deg is not None:
        d_n, d_e = ((cell_size_deg, cell_size_deg) if np.isscalar(cell_size_deg)
                    else cell_size_deg)
    elif cell_m is not None and cell_m > 0:
        m_n, m_e = _metres_per_degree(0.5 * (lat0 + lat1))
        d_n, d_e = cell_m / m_n, cell_m / m_e
    else:
        raise ConfigError(f"cell size {cell_m!r} m: give a positive cell size or cell_size_deg")
    d_n, d_e = float(f"{float(d_n):.15f}"), float(f"{float(d_e):.15f}")
    if not (0 < d_n <= 1 and 0 < d_e <= 1):
        raise ConfigError(f"cell_size_deg: grid cells of {d_n:g} x {d_e:g} degrees; ISO 11783-10 "
                          "needs more than 0 and at most 1 degree (GRD C, D)")
    min_n = float(_deg(math.floor(lat0 * 1e9) / 1e9))
    min_e = float(_deg(math.floor(lon0 * 1e9) / 1e9))
    n_cols = max(1, math.ceil((lon1 - min_e) / d_e - 1e-9))
    n_rows = max(1, math.ceil((lat1 - min_n) / d_n - 1e-9))
    return WGS84Grid(min_n, min_e, d_n, d_e, n_cols, n_rows)


def _fill_nearest(rates: np.ndarray) -> np.ndarray:
    """``rates`` with every non-finite cell set to the value of the nearest finite cell."""
    finite = np.isfinite(rates)
    if finite.all():
        return rates
    from scipy.ndimage import distance_transform_edt

    _, (ri, ci) = distance_transform_edt(~finite, return_indices=True)
    return rates[ri, ci]


def _check_rate(value: float, what: str) -> None:
    if not (0.0 <= value * MG_M2_PER_KG_HA <= _MAX_SETPOINT):
        raise InputError(f"{what}: a product rate of {value:g} kg/ha cannot be a DDI 6 setpoint "
                         f"(0 to {_MAX_SETPOINT / MG_M2_PER_KG_HA:,.0f} kg/ha); check the rates")


def _sample(rates: np.ndarray, grid: GridSpec, boundary: BaseGeometry, wgs: WGS84Grid,
            out_of_field_kg_ha: float) -> tuple[np.ndarray, np.ndarray]:
    """Rates (kg/ha) at the WGS 84 cell centres and which centres lie inside the field.

    Both arrays have shape (n_rows, n_cols), row 0 southernmost.
    """
    import shapely
    from pyproj import Transformer

    from pmap.io.crs import to_pyproj

    finite = np.isfinite(rates)
    if not finite.any():
        raise InputError("rates_kg_ha: no cell holds a product rate; nothing to write as task data")
    bad = finite & ~((rates >= 0) & (rates * MG_M2_PER_KG_HA <= _MAX_SETPOINT))
    if bad.any():
        r, c = np.argwhere(bad)[0]
        _check_rate(float(rates[r, c]), f"rates_kg_ha at row {r}, column {c}")
    from_lonlat = Transformer.from_crs("EPSG:4326", to_pyproj(grid.crs), always_xy=True)
    lon2, lat2 = np.meshgrid(wgs.lon_centres(), wgs.lat_centres())  # row 0 = southernmost
    x, y = from_lonlat.transform(lon2.ravel(), lat2.ravel())
    x, y = np.asarray(x), np.asarray(y)
    inside = shapely.contains_xy(boundary, x, y)
    row, col = grid.rowcol(x, y)
    row = np.clip(row, 0, grid.height - 1)
    col = np.clip(col, 0, grid.width - 1)
    values = np.where(inside, _fill_nearest(rates)[row, col], out_of_field_kg_ha)
    shape = (wgs.n_rows, wgs.n_cols)
    return values.reshape(shape), inside.reshape(shape)


def _setpoint(kg_ha: float) -> int:
    return int(np.rint(kg_ha * MG_M2_PER_KG_HA))


def _ring(parent: ET.Element, coords: np.ndarray, line_type: str) -> None:
    """A line string of a polygon ring; the closing point is not repeated."""
    pts = np.asarray(coords, dtype=float)[:, :2]
    if len(pts) > 1 and np.allclose(pts[0], pts[-1]):
        pts = pts[:-1]
    lsg = ET.SubElement(parent, "LSG", {"A": line_type})
    for lon, lat in pts:
        # PNT A = 2 ("other"); C = north (latitude), D = east (longitude)
        ET.SubElement(lsg, "PNT", {"A": "2", "C": _deg(lat), "D": _deg(lon)})


def _polygon(parent: ET.Element, part: Polygon, polygon_type: str, designator: str) -> None:
    pln = ET.SubElement(parent, "PLN", {"A": polygon_type, "B": _text(designator, "polygon")})
    _ring(pln, np.asarray(part.exterior.coords), "1")  # LSG A = 1: polygon exterior
    for hole in part.interiors:
        _ring(pln, np.asarray(hole.coords), "2")  # LSG A = 2: polygon interior


def _parts(geom: BaseGeometry) -> list[Polygon]:
    parts = geom.geoms if isinstance(geom, MultiPolygon) else [geom]
    return [p for p in parts if isinstance(p, Polygon) and not p.is_empty]


def write_taskdata(
    out_dir: str | Path,
    *,
    rates_kg_ha: np.ndarray,
    grid: GridSpec,
    boundary: BaseGeometry,
    zones: Sequence[tuple[BaseGeometry, float]] | None = None,
    product_name: str,
    field_name: str,
    farm: str = "",
    customer: str = "",
    task_name: str | None = None,
    out_of_field_kg_ha: float = 0.0,
    grid_type: int = 2,
    cell_size_deg: float | tuple[float, float] | None = None,
    overwrite: bool = False,
    basis: str = "",
) -> list[Path]:
    """Write ``out_dir/TASKDATA/TASKDATA.XML`` and ``GRD00001.BIN`` for a product-rate map.

    Parameters
    ----------
    out_dir : path
        Directory that receives the ``TASKDATA`` folder (created if missing).
    rates_kg_ha : numpy.ndarray, shape grid.shape
        Product rate per cell (kg product/ha); NaN where pmap gives no rate.
    grid : GridSpec
        pmap's projected grid of ``rates_kg_ha``.
    boundary : shapely (Multi)Polygon
        The field in ``grid.crs``.
    zones : sequence of (geometry, kg/ha), optional
        Rate polygons in ``grid.crs`` with their product rate (NaN: the out-of-field rate),
        written as treatment zones with polygons.  If they need more zone codes than the
        schema allows (254 in all), they are left out with a warning; the grid holds the rates.
    product_name, field_name, farm, customer, task_name : str
        Designators, cut to the schema's 32 characters.  CTR and FRM are written only when
        ``customer`` and ``farm`` are given; the task is called "<field> P" by default.
    out_of_field_kg_ha : float
        Product rate outside the field (kg/ha): the out-of-field zone and the grid cells whose
        centre lies outside ``boundary``.
    grid_type : {2, 1}
        2: a setpoint per cell (mg/m2); 1: a treatment zone code per cell, one zone per
        distinct setpoint (at most 253).
    cell_size_deg : float or (float, float), optional
        WGS 84 cell size (north, east) in degrees; default: cells as large as pmap's.
    overwrite : bool
        Replace an existing TASKDATA.XML or grid file in ``out_dir/TASKDATA``.
    basis : str
        What the rates rest on ("measured soil test", "model estimate"); it leads each rate
        polygon's zone designator, so a terminal shows it.

    Returns
    -------
    list of Path
        ``[TASKDATA.XML, GRD00001.BIN]``.

    Raises
    ------
    ConfigError
        ``grid_type`` not 1 or 2, a cell size outside (0, 1] degree, a grid file over the
        schema's 4,294,967,294 bytes, or more distinct rates than grid type 1 can code.
    InputError
        Rates that are all missing, negative or beyond DDI 6's range.
    OutputExistsError
        The files exist and ``overwrite`` is False.
    """
    from pmap.io.boundary import geodesic_area_m2, lonlat_geometry

    if grid_type not in (1, 2):
        raise ConfigError(f"grid_type = {grid_type!r}: ISO 11783-10 grids are of type 1 "
                          "(zone codes) or 2 (setpoints); use 1 or 2")
    rates = np.asarray(rates_kg_ha, dtype=float)
    if rates.shape != grid.shape:
        raise InputError(f"rates_kg_ha: shape {rates.shape} does not match the grid {grid.shape}")
    _check_rate(float(out_of_field_kg_ha), "out_of_field_kg_ha")

    field_ll = lonlat_geometry(boundary, grid.crs)
    wgs = wgs84_grid_for(field_ll, grid.cell_size, cell_size_deg=cell_size_deg)
    bytes_per_cell = 4 if grid_type == 2 else 1  # type 2: one int32 per PDV (one PDV here)
    if wgs.n_rows * wgs.n_cols * bytes_per_cell > _MAX_FILE_LENGTH:
        raise ConfigError(f"cell_size_deg: a grid of {wgs.n_cols} x {wgs.n_rows} cells exceeds "
                          f"the schema's {_MAX_FILE_LENGTH:,} bytes (GRD H); use larger cells")
    values, inside = _sample(rates, grid, boundary, wgs, float(out_of_field_kg_ha))
    setpoints = np.rint(values * MG_M2_PER_KG_HA).astype(np.int64)

    ddi = f"{DDI_SETPOINT_MASS_PER_AREA:04X}"  # PDV A: xs:hexBinary of 2 octets
    name = _text(field_name, "field")
    root = ET.Element("ISO11783_TaskData", {
        "VersionMajor": "4", "VersionMinor": "3",
        "ManagementSoftwareManufacturer": "pmap",
        "ManagementSoftwareVersion": _text(__version__, "0"),
        "DataTransferOrigin": "1",  # 1 = FMIS
    })
    refs: dict[str, str] = {}
    if customer.strip():
        ET.SubElement(root, "CTR", {"A": "CTR1", "B": _text(customer, "customer")})
        refs["customer"] = "CTR1"
    if farm.strip():
        attrs = {"A": "FRM1", "B": _text(farm, "farm")}
        if "customer" in refs:
            attrs["I"] = refs["customer"]
        ET.SubElement(root, "FRM", attrs)
        refs["farm"] = "FRM1"
    pfd_attrs = {"A": "PFD1", "C": name,
                 "D": str(int(round(geodesic_area_m2(boundary, grid.crs))))}  # m2
    if "customer" in refs:
        pfd_attrs["E"] = refs["customer"]
    if "farm" in refs:
        pfd_attrs["F"] = refs["farm"]
    pfd = ET.SubElement(root, "PFD", pfd_attrs)
    for part in _parts(field_ll):
        _polygon(pfd, part, "1", name)  # PLN A = 1: partfield boundary
    ET.SubElement(root, "PDT", {"A": "PDT1", "B": _text(product_name, "product"), "F": "1"})
    # Shown value = (setpoint + offset B) x scale C: mg/m2 x 0.01 = kg/ha.
    ET.SubElement(root, "VPN", {"A": "VPN1", "B": "0", "C": "0.01", "D": "0", "E": "kg/ha"})
    tsk_attrs = {"A": "TSK1", "B": _text(task_name or f"{name} P", "task")}
    for key, ref in (("C", "customer"), ("D", "farm")):
        if ref in refs:
            tsk_attrs[key] = refs[ref]
    tsk_attrs.update({"E": "PFD1", "G": "1", "J": str(_OUT_OF_FIELD_CODE)})  # G 1 = planned
    tsk = ET.SubElement(root, "TSK", tsk_attrs)

    def zone(code: int, designator: str, setpoint: int, part: Polygon | None = None) -> None:
        tzn = ET.SubElement(tsk, "TZN", {"A": str(code), "B": _text(designator, "zone")})
        if part is not None:
            _polygon(tzn, part, "2", designator)  # PLN A = 2: treatment zone
        ET.SubElement(tzn, "PDV", {"A": ddi, "B": str(setpoint), "C": "PDT1", "E": "VPN1"})

    zone(_OUT_OF_FIELD_CODE, "out of field", _setpoint(out_of_field_kg_ha))
    if grid_type == 2:
        template = _OUT_OF_FIELD_CODE + 1
        zone(template, "grid", 0)  # the grid's cells hold this zone's PDV values
        payload = setpoints.astype("<i4").tobytes()  # row 0 (south) first, west to east
        next_code = template + 1
    else:
        levels = np.unique(setpoints[inside])
        if _OUT_OF_FIELD_CODE + len(levels) > MAX_ZONE_CODE:
            raise ConfigError(f"grid_type = 1: the field has {len(levels)} distinct setpoints but "
                              f"type-1 grids code at most {MAX_ZONE_CODE - _OUT_OF_FIELD_CODE} "
                              "zones; use grid_type = 2")
        codes = np.full(setpoints.shape, _OUT_OF_FIELD_CODE, dtype=np.uint8)
        for k, level in enumerate(levels):
            code = _OUT_OF_FIELD_CODE + 1 + k
            zone(code, f"rate {level / MG_M2_PER_KG_HA:g} kg/ha", int(level))
            codes[inside & (setpoints == level)] = code
        payload = codes.tobytes()  # one byte per cell, same order
        next_code = _OUT_OF_FIELD_CODE + 1 + len(levels)

    polygon_zones = []
    for k, (geom, kg_ha) in enumerate(zones or ()):
        kg = float(kg_ha) if np.isfinite(kg_ha) else float(out_of_field_kg_ha)
        _check_rate(kg, f"zones[{k}]")
        parts = _parts(lonlat_geometry(geom, grid.crs))
        for j, part in enumerate(parts):
            label = f"zone {k + 1}" + (f" part {j + 1}" if len(parts) > 1 else "")
            label = f"{basis}: {label}" if basis else label
            polygon_zones.append((label, _setpoint(kg), part))
    if next_code + len(polygon_zones) - 1 > MAX_ZONE_CODE:
        warnings.warn(f"task data: {len(polygon_zones)} rate polygons need more treatment zone "
                      f"codes than ISO 11783-10 allows ({MAX_ZONE_CODE}); they are left out of "
                      "TASKDATA.XML and the grid alone carries the rates", PmapWarning,
                      stacklevel=2)
        polygon_zones = []
    for i, (label, setpoint, part) in enumerate(polygon_zones):
        zone(next_code + i, label, setpoint, part)

    grd = {"A": _deg(wgs.min_north), "B": _deg(wgs.min_east),
           "C": f"{wgs.cell_north:.15f}", "D": f"{wgs.cell_east:.15f}",
           "E": str(wgs.n_cols), "F": str(wgs.n_rows), "G": _GRID_FILE,
           "H": str(len(payload)), "I": str(grid_type)}
    if grid_type == 2:
        grd["J"] = str(template)
    ET.SubElement(tsk, "GRD", grd)

    target = Path(out_dir) / "TASKDATA"
    xml_path = target / "TASKDATA.XML"
    bin_path = target / f"{_GRID_FILE}.BIN"
    existing = [p for p in (xml_path, bin_path) if p.exists()]
    if existing and not overwrite:
        raise OutputExistsError(f"{existing[0]} exists; remove it or pass overwrite=True")
    ET.indent(root)
    document = (b'<?xml version="1.0" encoding="UTF-8"?>\n'
                + ET.tostring(root, encoding="utf-8") + b"\n")
    # An OSError (e.g. no space left) propagates: inside a run the output transaction turns
    # it into an OutputError naming the directory and leaves no half-written output.
    target.mkdir(parents=True, exist_ok=True)
    bin_path.write_bytes(payload)
    xml_path.write_bytes(document)
    return [xml_path, bin_path]


def read_taskdata_grid(taskdata_dir: str | Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Decode the grid of a TASKDATA folder: cell-centre latitudes, longitudes and values.

    Grids of type 2 give the stored setpoints; grids of type 1 give, per cell, the PDV values
    of the treatment zone whose code the cell holds.

    Parameters
    ----------
    taskdata_dir : path
        The folder holding TASKDATA.XML and its grid file.

    Returns
    -------
    lat : numpy.ndarray, shape (rows,)
        Cell-centre latitudes, south to north (degrees).
    lon : numpy.ndarray, shape (cols,)
        Cell-centre longitudes, west to east (degrees).
    values : numpy.ndarray of int64, shape (rows, cols, n_pdv)
        Process data values per cell (mg/m2 for DDI 6), row 0 southernmost.
    """
    folder = Path(taskdata_dir)
    xml_path = folder / "TASKDATA.XML"
    try:
        root = ET.parse(xml_path).getroot()
    except (OSError, ET.ParseError) as exc:
        raise InputError(f"{xml_path}: cannot read the task data ({exc})") from exc
    tsk = next((t for t in root.iter("TSK") if t.find("GRD") is not None), None)
    if tsk is None:
        raise InputError(f"{xml_path}: no task holds a grid (TSK/GRD)")
    grd = tsk.find("GRD")
    zones = {int(t.get("A", "-1")): [int(p.get("B")) for p in t.findall("PDV")]
             for t in tsk.findall("TZN")}
    n_cols, n_rows, kind = int(grd.get("E")), int(grd.get("F")), grd.get("I")
    name = grd.get("G", "")
    path = next((p for p in (folder / f"{name}.BIN", folder / f"{name}.bin") if p.exists()),
                folder / f"{name}.BIN")
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: cannot read the grid file named in GRD G ({exc})") from exc
    if grd.get("H") is not None and int(grd.get("H")) != len(raw):
        raise InputError(f"{path}: {len(raw)} bytes, but GRD H says {grd.get('H')}")
    if kind == "2":
        n_pdv = len(zones.get(int(grd.get("J", "-1")), []))
        if n_pdv == 0 or len(raw) != n_rows * n_cols * n_pdv * 4:
            raise InputError(f"{path}: {len(raw)} bytes for {n_rows} x {n_cols} cells of "
                             f"{n_pdv} PDV(s) of 4 bytes; the grid or its zone GRD J is wrong")
        values = np.frombuffer(raw, dtype="<i4").astype(np.int64).reshape(n_rows, n_cols, n_pdv)
    elif kind == "1":
        if len(raw) != n_rows * n_cols:
            raise InputError(f"{path}: {len(raw)} bytes for {n_rows} x {n_cols} one-byte cells")
        codes = np.frombuffer(raw, dtype=np.uint8).reshape(n_rows, n_cols)
        missing = sorted(set(np.unique(codes).tolist()) - set(zones))
        if missing:
            raise InputError(f"{path}: cells hold zone codes {missing} that no TZN defines")
        n_pdv = max((len(v) for v in zones.values()), default=0)
        table = np.zeros((256, n_pdv), dtype=np.int64)
        for code, pdvs in zones.items():
            if 0 <= code < 256 and len(pdvs) == n_pdv:
                table[code] = pdvs
        values = table[codes]
    else:
        raise InputError(f"{xml_path}: GRD I = {kind!r}; grids are of type 1 or 2")
    lat = float(grd.get("A")) + (np.arange(n_rows) + 0.5) * float(grd.get("C"))
    lon = float(grd.get("B")) + (np.arange(n_cols) + 0.5) * float(grd.get("D"))
    return lat, lon, values
