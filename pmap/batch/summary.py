"""The batch summary: ``batch_summary.csv``, ``batch_summary.gpkg`` and ``index.html``.

One row per field, in the batch's order, with its status (``done``, ``skipped``,
``failed`` or ``cancelled``), the plan's action and reasons, the error, and the key
figures of its ``summary.json``: samples read and used, the leave-one-out RMSE of every
kriged property (in the property's unit: pH units, mg/kg or %), mean available P (mg/kg),
area per zone class (ha), P2O5 and product totals (kg), and where its outputs and log are
(paths relative to the batch's output directory).

The GeoPackage (layer ``fields``) holds the same rows with each field's boundary as a
MultiPolygon in **EPSG:4326** (WGS 84 longitude/latitude), the one CRS every field can
share; a field whose boundary cannot be read has no geometry.  The index page is
:func:`pmap.report.html.write_batch_index`.  Every file is written beside its target and
renamed into place.
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
import tempfile
import warnings
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

__all__ = [
    "SUMMARY_CSV",
    "SUMMARY_GPKG",
    "INDEX_HTML",
    "GPKG_LAYER",
    "field_figures",
    "summary_table",
    "write_batch_summary",
]

SUMMARY_CSV = "batch_summary.csv"
SUMMARY_GPKG = "batch_summary.gpkg"
INDEX_HTML = "index.html"
#: Layer of the field polygons in the GeoPackage.
GPKG_LAYER = "fields"
#: The CRS of the GeoPackage's polygons.
SUMMARY_CRS = "EPSG:4326"

_HEAD = ("name", "status", "action", "reason", "error_type", "error", "samples_read",
         "samples_used")
_TAIL = ("mean_available_p_mg_kg", "area_ha")
_TOTALS = ("p2o5_total_kg", "product", "product_total_kg", "mean_p2o5_kg_ha")
_WHERE = ("run_s", "output_dir", "report", "log", "origin", "worker")


def field_figures(summary: Mapping[str, Any]) -> dict[str, Any]:
    """The key figures of one field's ``summary.json`` (as read from the file).

    Returns
    -------
    dict
        ``samples_read``, ``samples_used``, ``cv_rmse`` ({property: leave-one-out RMSE in
        the property's unit}), ``mean_available_p_mg_kg`` (None when total P was not
        mapped), ``area_ha``, ``zone_area_ha`` ({zone class label: ha}),
        ``p2o5_total_kg``, ``product``, ``product_total_kg``, ``mean_p2o5_kg_ha``.
    """
    inputs = summary.get("inputs") or {}
    totals = summary.get("totals") or {}
    zone_area: dict[str, float] = {}
    for zone in summary.get("zones") or []:
        label = str(zone.get("class_label", zone.get("class_id", "")))
        zone_area[label] = zone_area.get(label, 0.0) + float(zone.get("area_ha") or 0.0)
    return {
        "samples_read": inputs.get("n_samples_read"),
        "samples_used": inputs.get("n_samples_used"),
        "cv_rmse": {name: (p.get("cv") or {}).get("rmse")
                    for name, p in (summary.get("properties") or {}).items()},
        "mean_available_p_mg_kg": (summary.get("soil_model") or {}).get(
            "mean_available_p_mg_kg"),
        "area_ha": totals.get("area_ha"),
        "zone_area_ha": zone_area,
        "p2o5_total_kg": totals.get("p2o5_total_kg"),
        "product": totals.get("product"),
        "product_total_kg": totals.get("product_total_kg"),
        "mean_p2o5_kg_ha": totals.get("mean_p2o5_kg_ha"),
    }


def _column(prefix: str, label: str) -> str:
    return prefix + (re.sub(r"[^0-9a-z]+", "_", label.lower()).strip("_") or "zone")


def _relative(path: Any, base: Path) -> str:
    if not path:
        return ""
    try:
        return Path(path).resolve().relative_to(base.resolve()).as_posix()
    except ValueError:
        return str(path)


def summary_table(records: Sequence[Mapping[str, Any]], out_dir: str | Path
                  ) -> tuple[list[str], list[dict[str, Any]]]:
    """The columns and rows of the batch summary (one row per record, in order).

    Column names of the per-property RMSE are ``cv_rmse_<property>``, of the zone-class
    areas ``area_ha_<class label>`` (lower case, ``_`` for other characters).
    """
    out_dir = Path(out_dir)
    props: list[str] = []
    zones: dict[str, str] = {}
    for rec in records:
        fig = rec.get("figures") or {}
        props += [p for p in fig.get("cv_rmse", {}) if p not in props]
        for label in fig.get("zone_area_ha", {}):
            if label not in zones:
                column, n = _column("area_ha_", label), 2
                while column in zones.values() or column in _TAIL:
                    column, n = f"{_column('area_ha_', label)}_{n}", n + 1
                zones[label] = column
    columns = [*_HEAD, *(f"cv_rmse_{p}" for p in props), *_TAIL, *zones.values(), *_TOTALS,
               *_WHERE]
    rows = []
    for rec in records:
        fig = rec.get("figures") or {}
        row: dict[str, Any] = dict.fromkeys(columns)
        row.update(name=rec.get("name"), status=rec.get("status"), action=rec.get("action"),
                   reason="; ".join(rec.get("reasons") or []), error_type=rec.get("error_type"),
                   error=rec.get("error"), origin=rec.get("origin"), worker=rec.get("worker"))
        for key in ("samples_read", "samples_used", *_TAIL, *_TOTALS):
            row[key] = fig.get(key)
        for p, value in (fig.get("cv_rmse") or {}).items():
            row[f"cv_rmse_{p}"] = value
        for label, value in (fig.get("zone_area_ha") or {}).items():
            row[zones[label]] = value
        run_s = (rec.get("timings") or {}).get("total")
        row["run_s"] = round(run_s, 2) if isinstance(run_s, float) else run_s
        if rec.get("status") in ("done", "skipped"):
            row["output_dir"] = _relative(rec.get("out_dir"), out_dir)
            report = Path(rec["out_dir"]) / "report.html" if rec.get("out_dir") else None
            row["report"] = _relative(report, out_dir) if report and report.is_file() else ""
        row["log"] = _relative(rec.get("log"), out_dir) if rec.get("log") and Path(
            rec["log"]).is_file() else ""
        rows.append(row)
    return columns, rows


def _atomic(target: Path, write: Callable[[Path], None]) -> Path:
    """``write(tmp)`` to a temporary file beside ``target`` (same suffix), then rename."""
    fd, name = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=f".tmp{target.suffix}",
                                dir=target.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        tmp.unlink()  # GDAL wants to create the file itself
        write(tmp)
        os.replace(tmp, target)
    finally:
        for leftover in (tmp, tmp.with_name(tmp.name + "-journal"),
                         tmp.with_name(tmp.name + "-wal"), tmp.with_name(tmp.name + "-shm")):
            if leftover.exists():
                leftover.unlink()
    return target


def _write_csv(path: Path, columns: list[str], rows: list[dict[str, Any]]) -> None:
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=columns, lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: ("" if v is None else v) for k, v in row.items()})
    path.write_text(buffer.getvalue(), encoding="utf-8")


def _outline(rec: Mapping[str, Any]) -> Any:
    """The field's boundary as a MultiPolygon in EPSG:4326, or None when it cannot be read."""
    import shapely

    from pmap.errors import PmapError
    from pmap.io.boundary import lonlat_geometry, read_boundary

    source = rec.get("geometry_source") or {}
    path = source.get("boundary")
    if not path or not Path(path).is_file():
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            geom, crs = read_boundary(path, crs=source.get("crs") or None,
                                      feature=source.get("feature") or None,
                                      name_attribute=source.get("name_attribute") or None)
            geom = lonlat_geometry(geom, crs)
    except (PmapError, OSError, ValueError):
        return None
    parts = list(getattr(geom, "geoms", [geom]))
    return shapely.MultiPolygon([p for p in parts if p.geom_type == "Polygon"])


def _write_gpkg(path: Path, columns: list[str], rows: list[dict[str, Any]],
                geometries: list[Any]) -> None:
    import geopandas as gpd
    import pandas as pd

    frame = pd.DataFrame(rows, columns=columns)
    for col in columns:  # numbers stay numbers, text stays text, empty is null
        values = [v for v in frame[col] if v is not None]
        if values and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                          for v in values):
            frame[col] = pd.to_numeric(frame[col], errors="coerce").astype("float64")
        else:
            frame[col] = frame[col].astype(object).where(frame[col].notna(), None)
    gdf = gpd.GeoDataFrame(frame, geometry=gpd.GeoSeries(geometries, crs=SUMMARY_CRS),
                           crs=SUMMARY_CRS)
    gdf.to_file(path, driver="GPKG", layer=GPKG_LAYER)


def _load_summary(rec: Mapping[str, Any]) -> dict[str, Any] | None:
    if rec.get("status") not in ("done", "skipped") or not rec.get("out_dir"):
        return None
    try:
        return json.loads((Path(rec["out_dir"]) / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def write_batch_summary(out_dir: str | Path, records: Sequence[Mapping[str, Any]]
                        ) -> dict[str, Path]:
    """Write the CSV, the GeoPackage and the index page of a batch; return their paths.

    Parameters
    ----------
    out_dir : path
        The batch's output directory.
    records : sequence of dict
        One per field, as :func:`pmap.batch.runner.run_task` returns them (skipped and
        invalid fields as the batch makes them); ``geometry_source`` (``boundary``,
        ``crs``, ``feature``, ``name_attribute``) locates the field's boundary.  The
        figures of done and skipped fields are read from their ``summary.json``.

    Returns
    -------
    dict
        ``{"csv": ..., "gpkg": ..., "index": ...}``.
    """
    from pmap.report.html import write_batch_index

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    summaries = [_load_summary(rec) for rec in records]
    records = [dict(rec, figures=field_figures(s)) if s is not None else dict(rec)
               for rec, s in zip(records, summaries, strict=True)]
    columns, rows = summary_table(records, out_dir)
    paths = {"csv": _atomic(out_dir / SUMMARY_CSV, lambda p: _write_csv(p, columns, rows))}
    geometries = [_outline(rec) for rec in records]
    paths["gpkg"] = _atomic(out_dir / SUMMARY_GPKG,
                            lambda p: _write_gpkg(p, columns, rows, geometries))
    status_word = {"done": "ok"}
    fields = [{"name": row["name"], "report": row["report"] or None,
               "status": status_word.get(str(row["status"]), row["status"]),
               "error": row["error"], "summary": summary}
              for row, summary in zip(rows, summaries, strict=True)]
    with tempfile.TemporaryDirectory(prefix=".index.", dir=out_dir) as tmp:
        written = write_batch_index(Path(tmp), fields)
        os.replace(written, out_dir / INDEX_HTML)
    paths["index"] = out_dir / INDEX_HTML
    return paths
