"""The edges of pmap: samples and boundaries in, GeoTIFFs and zone polygons out.

Submodules: :mod:`~pmap.io.crs` (CRS normalisation, UTM zones), :mod:`~pmap.io.samples`
(reading sample tables), with :mod:`~pmap.io.columns` (which column holds what) and
:mod:`~pmap.io.values` (messy lab values), :mod:`~pmap.io.boundary`,
:mod:`~pmap.io.rasters` (Cloud-Optimized GeoTIFF) and :mod:`~pmap.io.vectors` (GeoPackage,
Shapefile, GeoJSON).  Import from the submodules.
"""

__all__ = ["crs", "samples", "columns", "values", "boundary", "rasters", "vectors"]
