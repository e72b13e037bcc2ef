"""A region too large for one grid in memory (a whole farm at 1 m): ``pmap region``.

::

    import pmap.region
    result = pmap.region.run_region("samples.csv", "farm.gpkg", "farm-out/", workers=2)
    result.summary["layers"]["available_p"]["mean"]

The variograms are fitted once on all the samples; the grid is then computed in tiles
(neighbourhood kriging, soil model) on this process, local processes or a Dask cluster,
and each layer is written as a tiled GeoTIFF window by window.  One module per idea:
:mod:`~pmap.region.tiles` (the grid and its tiles), :mod:`~pmap.region.compute` (one
tile), :mod:`~pmap.region.run` (fit, backends, writing; :func:`run_region`).  See
docs/region.md.
"""

from __future__ import annotations

from pmap.region.compute import RegionModel, TileOutput, compute_tile, layer_names
from pmap.region.run import RegionProgress, RegionResult, fit_region, run_region
from pmap.region.tiles import DEFAULT_TILE_CELLS, RegionGrid, Tile, plan_tiles, tile_grid

__all__ = [
    "run_region", "fit_region", "RegionResult", "RegionProgress", "RegionModel", "TileOutput",
    "compute_tile", "layer_names", "RegionGrid", "Tile", "plan_tiles", "tile_grid",
    "DEFAULT_TILE_CELLS",
]
