"""The edges of pmap: samples and boundaries in, GeoTIFFs and zone polygons out.

Submodules: :mod:`~pmap.io.crs` (CRS normalisation, working-CRS choice by scale error),
:mod:`~pmap.io.samples` (reading sample tables), with :mod:`~pmap.io.delimited` (encodings,
separators, preambles, spreadsheet detection), :mod:`~pmap.io.columns` (which column holds
what), :mod:`~pmap.io.units` (units in headers, conversions, plausibility) and
:mod:`~pmap.io.values` (messy lab values), :mod:`~pmap.io.boundary` (field polygons, area
check, grid), :mod:`~pmap.io.rasters` (Cloud-Optimized GeoTIFF), :mod:`~pmap.io.vectors`
(GeoPackage, Shapefile, GeoJSON), :mod:`~pmap.io.manifest` (``manifest.json``, SHA-256) and
:mod:`~pmap.io.publish` (the output directory as a locked, atomic transaction).  Import from
the submodules.
"""

__all__ = ["crs", "samples", "delimited", "columns", "units", "values", "boundary", "rasters",
           "vectors", "manifest", "publish"]
