"""A region too large to hold as one grid: fitted once, computed tile by tile, written by windows.

:func:`run_region` reads and checks the samples and the boundary as a field run does,
fits each property's variogram once on all the samples (the same selection as
:func:`pmap.run_field`), calibrates the soil model, then computes the tiles of the
region's grid (:mod:`pmap.region.tiles`) in this process, in local worker processes or
as Dask tasks, and writes each layer as a tiled GeoTIFF window by window.  Memory is
bounded by the tile size and the number of tiles in flight, not by the region: no array
of the whole grid is ever made.  Tiles are written in their planned order whatever the
backend, so the same inputs give the same files.

A region gets maps (kriged properties and their variance, the soil model's pools and
fixation); its rates are made per field (``pmap run`` / ``pmap batch``).
"""

from __future__ import annotations

import collections
import concurrent.futures as cf
import contextlib
import json
import logging
import multiprocessing
import os
import time
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pmap._version import __version__
from pmap._warnings import collect_warnings, issue_warnings
from pmap.cautions import CAUTIONS, CAUTIONS_SHORT
from pmap.config import FieldConfig, load_config
from pmap.errors import ConfigError, InputError, PmapWarning
from pmap.geostats.interpolate import Interpolation
from pmap.region.compute import (
    CLASS_LAYERS,
    LayerStats,
    RegionModel,
    TileOutput,
    compute_tile,
    layer_names,
    slim_fit,
)
from pmap.region.tiles import DEFAULT_TILE_CELLS, RegionGrid, Tile, plan_tiles

__all__ = ["run_region", "fit_region", "RegionResult", "RegionProgress"]

log = logging.getLogger(__name__)

#: GDAL block cache while a region is written (MB).
GDAL_CACHE_MB: int = 256


@dataclass(frozen=True)
class RegionProgress:
    """Where a region run is: tiles written of the tiles planned, seconds since the first tile."""

    written: int
    planned: int
    elapsed_s: float

    @property
    def eta_s(self) -> float | None:
        """Seconds left at the pace so far (None before the first tile)."""
        if self.written == 0:
            return None
        return self.elapsed_s / self.written * (self.planned - self.written)


@dataclass
class RegionResult:
    """What :func:`run_region` wrote: the grid, the fits, the summary and the files."""

    out_dir: Path
    grid: RegionGrid
    tiles: int
    cells_inside: int
    fits: dict[str, Interpolation]
    summary: dict[str, Any]
    outputs: dict[str, str]
    warnings: list[str] = field(default_factory=list)


# ---------------------------------------------------------------------------------------
# The fit


def _refuse_unsupported(config: FieldConfig) -> None:
    """Stop before any work on settings a tiled region cannot honour."""
    k = config.kriging
    if k.drift != "none" or k.covariates:
        raise ConfigError(
            "kriging.drift and kriging.covariates need global kriging of the whole grid, "
            "which a tiled region does not do: set kriging.drift = \"none\" and remove "
            "kriging.covariates for pmap region, or run the fields one by one (pmap batch)")


def fit_region(field_data: Any, config: FieldConfig) -> tuple[dict[str, Interpolation],
                                                               Any, dict[str, Any]]:
    """Variograms of every property on all the samples, and the soil model's parameters.

    Parameters
    ----------
    field_data : pmap.results.IngestedField
        Checked samples and boundary.
    config : FieldConfig

    Returns
    -------
    fits : dict of str to Interpolation
        Per property: the chosen variogram, transform and neighbourhood, with its
        cross-validation (no targets are kriged here).
    partition : PartitionParams
    calibration : dict
        The calibration record (as in a field's ``summary.json``).
    """
    from pmap.pipeline import calibrate_in_run, krige_properties, require_phosphorus

    samples = field_data.samples
    require_phosphorus(samples)
    if "ph" not in samples.values:
        raise InputError(f"{samples.source}: no pH column was found; the soil model needs "
                         "pH (name it in the config: samples.ph_column)")
    fits = krige_properties(samples, np.empty((0, 2)), config)
    partition, _, record = calibrate_in_run(samples, config)
    return fits, partition, record


# ---------------------------------------------------------------------------------------
# Backends: the same compute_tile here, in local worker processes, or on Dask


_WORKER_MODEL: dict[str, RegionModel] = {}


def _init_worker(model: RegionModel) -> None:
    from pmap.batch.runner import THREAD_VARS

    for key in THREAD_VARS:
        os.environ[key] = "1"
    _WORKER_MODEL["model"] = model


def _worker_tile(tile: Tile) -> TileOutput:
    from pmap.batch.runner import one_thread_numerics

    with one_thread_numerics():
        return compute_tile(_WORKER_MODEL["model"], tile)


def _dask_tile(model: RegionModel, tile: Tile) -> TileOutput:
    from pmap.batch.runner import one_thread_numerics

    with one_thread_numerics():
        return compute_tile(model, tile)


class _InProcess:
    kind = "this process"
    slots = 1

    def __init__(self, model: RegionModel):
        self.model = model

    def submit(self, tile: Tile) -> cf.Future:
        future: cf.Future = cf.Future()
        try:
            future.set_result(compute_tile(self.model, tile))
        except Exception as exc:  # noqa: BLE001 - handed to the caller through the future
            future.set_exception(exc)
        return future

    def close(self) -> None:
        pass


class _LocalPool:
    def __init__(self, model: RegionModel, workers: int):
        from pmap.batch.runner import thread_env

        self.kind = f"{workers} local processes"
        self.slots = workers
        with thread_env():  # workers spawned now start with one-thread numerics
            self._pool = cf.ProcessPoolExecutor(
                max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                initializer=_init_worker, initargs=(model,))

    def submit(self, tile: Tile) -> cf.Future:
        return self._pool.submit(_worker_tile, tile)

    def close(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)


class _DaskPool:
    def __init__(self, model: RegionModel, scheduler: Any):
        try:
            import distributed
        except ImportError as exc:
            raise ConfigError("running on a Dask cluster needs dask.distributed: "
                              "pip install 'pmap[dask]'") from exc
        self._own = not isinstance(scheduler, distributed.Client)
        try:
            self.client = distributed.Client(scheduler) if self._own else scheduler
        except (OSError, TimeoutError, ValueError) as exc:
            raise ConfigError(f"cannot reach the Dask scheduler at {scheduler}: {exc}") from exc
        self.kind = f"Dask ({self.client.scheduler.address})"
        self.slots = max(1, sum(self.client.nthreads().values()))
        self._model = self.client.scatter(model, broadcast=True, hash=False)

    def submit(self, tile: Tile) -> Any:
        return self.client.submit(_dask_tile, self._model, tile, pure=False,
                                  key=f"pmap-region-tile-{tile.index}-{os.urandom(4).hex()}")

    def close(self) -> None:
        if self._own:
            self.client.close()


def _backend(model: RegionModel, workers: int | None, scheduler: Any) -> Any:
    if scheduler is not None:
        return _DaskPool(model, scheduler)
    workers = workers or os.cpu_count() or 1
    return _InProcess(model) if workers == 1 else _LocalPool(model, workers)


def _in_order(backend: Any, tiles: list[Tile], max_pending: int) -> Iterator[TileOutput]:
    """Computed tiles in planned order, at most ``max_pending`` submitted and not yet taken."""
    queue: collections.deque = collections.deque()
    waiting = iter(tiles)
    try:
        while True:
            while len(queue) < max_pending:
                tile = next(waiting, None)
                if tile is None:
                    break
                queue.append(backend.submit(tile))
            if not queue:
                return
            yield queue.popleft().result()
    finally:
        for future in queue:
            future.cancel()


# ---------------------------------------------------------------------------------------
# The run


def _layer_tags(name: str, model: RegionModel, calibration: dict[str, Any]) -> dict[str, str]:
    from pmap.layers import MODEL_LAYERS

    tags = {"PMAP_LAYER": name, "FIELD": model.config.field.name, "CAUTION": CAUTIONS_SHORT}
    base = name[: -len("_variance")] if name.endswith("_variance") else name
    fit = model.fits.get(base)
    if fit is not None:
        hood = fit.neighbourhood
        tags["METHOD"] = ("lognormal ordinary kriging" if fit.log else "ordinary kriging") + (
            f", {hood.neighbours} nearest samples" if hood and hood.neighbours else ", global")
        tags["VARIOGRAM"] = json.dumps(fit.model.as_dict())
        tags["N_SAMPLES"] = str(fit.cv.n)
    elif name in MODEL_LAYERS:
        tags["METHOD"] = (f"pmap soil model v2 on kriged inputs, fixation model "
                          f"{model.config.fixation.model} (docs/soil-model.md)")
        status = calibration.get("status", "default")
        tags["CALIBRATION"] = (f"calibrated ({calibration.get('source', '')})"
                               if status == "calibrated" else
                               "NOT CALIBRATED: default parameters, starting values only")
    return tags


def _open_writers(directory: Path, model: RegionModel, names: tuple[str, ...],
                  calibration: dict[str, Any]) -> dict[str, Any]:
    from pmap.io.rasters import TiledGeoTIFF
    from pmap.layers import hex_to_rgba, layer_info

    directory.mkdir()
    writers = {}
    grid = model.grid
    for name in names:
        info = layer_info(name)
        writers[name] = TiledGeoTIFF(
            directory / f"{name}.tif", crs=grid.crs, transform=grid.transform,
            width=grid.width, height=grid.height, is_class=name in CLASS_LAYERS,
            description=info.title, unit=info.unit, tags=_layer_tags(name, model, calibration),
            class_labels=info.classes,
            colormap=({k: hex_to_rgba(v) for k, v in info.colours.items()}
                      if info.colours else None))
    return writers


def run_region(
    samples: str | Path,
    boundary: str | Path,
    out_dir: str | Path,
    config: FieldConfig | str | Path | None = None,
    *,
    tile_cells: int = DEFAULT_TILE_CELLS,
    workers: int | None = None,
    scheduler: Any = None,
    max_pending: int | None = None,
    overwrite: bool = False,
    config_path: str | Path | None = None,
    progress: Callable[[RegionProgress], None] | None = None,
) -> RegionResult:
    """Map a region tile by tile: kriged properties, their variance, soil pools, fixation.

    Parameters
    ----------
    samples, boundary : path
        As for :func:`pmap.run_field`; the boundary may be large (a farm) and hold
        several polygons, which are dissolved into one region.
    out_dir : path
        Output directory: ``rasters/<layer>.tif`` (tiled GeoTIFFs with overviews),
        ``summary.json`` and ``manifest.json``; written beside and renamed into place.
    config : FieldConfig, path to a TOML file, or None for the defaults.
        ``kriging.method = "auto"`` means local (neighbourhood) kriging in a region.
    tile_cells : int
        Tile edge in cells (default 512: 262,144 cells a tile).
    workers : int, optional
        Local processes (default: the CPUs); 1 computes in this process.
    scheduler : str or distributed.Client, optional
        A Dask scheduler address (or a client): tiles run as tasks on its workers.
    max_pending : int, optional
        Tiles submitted and not yet written, at most (default twice the workers, at
        least 2): with the tile size, this bounds the memory.
    overwrite : bool
        Replace a previous pmap output as :func:`pmap.run_field` does.
    config_path : path, optional
        Where ``config`` was read from, for the record.
    progress : callable, optional
        Called with a :class:`RegionProgress` after each tile is written.

    Returns
    -------
    RegionResult

    Raises
    ------
    ConfigError
        kriging.drift or kriging.covariates set (a region kriges without drift).
    """
    import rasterio

    from pmap.io.manifest import file_record, write_manifest
    from pmap.outputs import check_output_dir, json_safe
    from pmap.pipeline import PROPERTY_LIMITS, ingest_field

    if not isinstance(config, FieldConfig):
        config_path = config if config is not None else config_path
        config = load_config(config)
    _refuse_unsupported(config)
    if config.kriging.method == "auto":
        # Global kriging costs n^2 per cell: 2,000 samples over 10^8 cells would take hours.
        config = config.replace("kriging", method="local")
    inputs = [Path(samples), Path(boundary)] + ([Path(config_path)] if config_path else [])
    out_dir = Path(out_dir)
    transaction = check_output_dir(out_dir, overwrite, inputs)
    caught: list[warnings.WarningMessage] = []
    writers: dict[str, Any] = {}
    backend = None
    t0 = time.perf_counter()
    try:
        # GDAL's block cache defaults to 5 % of the machine's memory; the writers need only
        # the blocks of the tiles in hand, as each tile fills whole blocks.
        with collect_warnings() as caught, rasterio.Env(GDAL_CACHEMAX=GDAL_CACHE_MB):
            field_data = ingest_field(samples, boundary, config)
            fits, partition, calibration = fit_region(field_data, config)
            t_fit = time.perf_counter() - t0
            grid = RegionGrid.from_bounds(field_data.crs, tuple(field_data.boundary.bounds),
                                          config.grid.cell_size_m)
            tiles = plan_tiles(grid, field_data.boundary, tile_cells)
            model = RegionModel(grid, field_data.boundary, config,
                                {n: slim_fit(f) for n, f in fits.items()}, partition,
                                {n: PROPERTY_LIMITS[n] for n in fits if n in PROPERTY_LIMITS})
            names = layer_names(model.fits)
            log.info("region %s: %d x %d cells of %g m, %d tiles of %d cells planned",
                     config.field.name, grid.width, grid.height, grid.cell_size, len(tiles),
                     tile_cells)
            writers = _open_writers(transaction.staging / "rasters", model, names, calibration)
            backend = _backend(model, workers, scheduler)
            pending = max_pending or max(2, 2 * backend.slots)
            kind = backend.kind
            stats = {name: LayerStats() for name in names}
            notes: dict[str, None] = {}
            inside = 0
            t_start = time.perf_counter()
            for done, out in enumerate(_in_order(backend, tiles, pending), start=1):
                for name, array in out.layers.items():
                    writers[name].write(array, out.tile.row0, out.tile.col0)
                    stats[name].add(out.stats[name])
                inside += out.n_inside
                notes.update(dict.fromkeys(out.notes))
                if progress is not None:
                    progress(RegionProgress(done, len(tiles), time.perf_counter() - t_start))
                log.debug("tile %d (%d/%d) written", out.tile.index, done, len(tiles))
            backend.close()
            backend = None
            t_tiles = time.perf_counter() - t0 - t_fit
            for note in notes:
                warnings.warn(note, PmapWarning, stacklevel=2)
            if inside == 0:
                raise InputError(f"{boundary}: no cell centre of the {config.grid.cell_size_m:g} m "
                                 "grid lies inside the boundary: choose a smaller "
                                 "grid.cell_size_m")
            for writer in writers.values():
                writer.close()
            t_write = time.perf_counter() - t0 - t_fit - t_tiles
        issue_warnings(caught)
    except BaseException as exc:
        if backend is not None:
            with contextlib.suppress(Exception):
                backend.close()
        for writer in writers.values():
            with contextlib.suppress(Exception):
                writer.abort()
        with contextlib.suppress(Warning):
            issue_warnings(caught)
        transaction.fail(exc)
        raise
    recorded_warnings = [str(w.message) for w in caught if issubclass(w.category, PmapWarning)]
    outputs = {f"rasters/{name}.tif": name for name in names}
    try:
        summary = _region_summary(config, field_data, grid, tiles, tile_cells, inside, fits,
                                  calibration, stats, list(notes), recorded_warnings)
        summary["run"] = {"backend": kind, "fit_s": t_fit,
                          "tiles_s": t_tiles, "overviews_s": t_write}
        (transaction.staging / "summary.json").write_text(
            json.dumps(json_safe(summary), indent=2) + "\n", encoding="utf-8")
        outputs["summary.json"] = "the region's figures, fits, calibration and cautions"
        write_manifest(transaction.staging, json_safe({
            "pmap_version": __version__, "kind": "region", "field": config.field.name,
            "config": config.as_dict(),
            "inputs": {kind: file_record(path) for kind, path in
                       zip(("samples", "boundary", "config"), inputs, strict=False)},
            "warnings": recorded_warnings,
        }))
        transaction.publish()
    except BaseException as exc:
        transaction.fail(exc)
        raise
    return RegionResult(out_dir, grid, len(tiles), inside, fits, summary, outputs,
                        recorded_warnings)


def _region_summary(config: FieldConfig, field_data: Any, grid: RegionGrid, tiles: list[Tile],
                    tile_cells: int, inside: int, fits: dict[str, Interpolation],
                    calibration: dict[str, Any], stats: dict[str, LayerStats],
                    notes: list[str], recorded: list[str]) -> dict[str, Any]:
    from pmap.layers import layer_info

    area_ha = grid.cell_size ** 2 / 10_000.0
    samples = field_data.samples
    return {
        "pmap_version": __version__,
        "kind": "region",
        "cautions": CAUTIONS,
        "region": {
            "name": config.field.name, "farm": config.field.farm, "crs": grid.crs,
            "cell_size_m": grid.cell_size, "width": grid.width, "height": grid.height,
            "cells": grid.n_cells, "cells_inside": inside, "area_ha": inside * area_ha,
            "transform": list(grid.transform)[:6],
            "tile_cells": tile_cells, "tiles_planned": len(tiles),
            "tiles_in_grid": -(-grid.width // tile_cells) * -(-grid.height // tile_cells),
        },
        "samples": {"read": field_data.n_read, "used": len(samples.ids),
                    "dropped_outside": list(field_data.dropped_outside)},
        "notes": list(field_data.notes),
        "kriging": {name: fit.as_dict() for name, fit in fits.items()},
        "soil_model": {"calibration": calibration, "fixation_model": config.fixation.model,
                       "notes": notes},
        "layers": {name: {"file": f"rasters/{name}.tif", "title": layer_info(name).title,
                          "unit": layer_info(name).unit,
                          **s.as_dict(area_ha, name in CLASS_LAYERS)}
                   for name, s in stats.items()},
        "warnings": recorded,
    }
