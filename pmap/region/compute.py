"""One tile of a region: kriging with the region's fitted variograms, then the soil model.

:class:`RegionModel` is everything a tile needs, small enough to send to every worker once
(the samples, the chosen variograms, the soil model's parameters, the boundary);
:func:`compute_tile` turns it and a :class:`~pmap.region.tiles.Tile` into the tile's
layers and their running statistics.  The same function runs in this process, in a local
worker process or as a Dask task.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pmap.config import FieldConfig
from pmap.geostats.interpolate import Interpolation, krige_at
from pmap.geostats.kriging import KrigingResult, KrigingSystem
from pmap.region.tiles import RegionGrid, Tile, tile_grid
from pmap.soil.availability import PartitionParams

__all__ = ["RegionModel", "TileOutput", "LayerStats", "compute_tile", "layer_names",
           "slim_fit", "CLASS_LAYERS"]

#: Layers written as uint8 classes (0 = no data).
CLASS_LAYERS: tuple[str, ...] = ("fixation_mechanism", "fixation_class")
_POOLS = (("available_p", "available"), ("fe_al_p", "fe_al"), ("ca_p", "ca"),
          ("occluded_p", "occluded"), ("organic_p", "organic"))


def slim_fit(interp: Interpolation) -> Interpolation:
    """``interp`` without what tiles never read (its candidates and target arrays)."""
    empty = np.empty(0)
    return dataclasses.replace(interp, candidates=(), result=KrigingResult(empty, empty, empty))


@dataclass
class RegionModel:
    """What every tile of a region is computed from.

    Attributes
    ----------
    grid : RegionGrid
        The region's grid.
    boundary : shapely geometry
        The region's boundary in ``grid.crs``.
    config : FieldConfig
        The run's configuration.
    fits : dict of str to Interpolation
        The chosen variogram, transform and neighbourhood per property (see
        :func:`slim_fit`), fitted once on all the samples.
    partition : PartitionParams
        The soil model's parameters (calibrated to the lab's pairs when they could be).
    limits : dict of str to (float, float)
        Physical range per property; estimates are clipped to it.
    """

    grid: RegionGrid
    boundary: Any
    config: FieldConfig
    fits: dict[str, Interpolation]
    partition: PartitionParams
    limits: dict[str, tuple[float, float]]
    _systems: dict[str, KrigingSystem] = field(default_factory=dict, repr=False, compare=False)

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        state["_systems"] = {}  # factorised per process, never sent
        return state

    def system(self, name: str) -> KrigingSystem | None:
        """The factorised global system of ``name`` (built once per process), or None."""
        fit = self.fits[name]
        if fit.kind == "constant" or (fit.neighbourhood and fit.neighbourhood.neighbours):
            return None
        if name not in self._systems:
            kriged = np.log(fit.sample_values) if fit.log else fit.sample_values
            self._systems[name] = KrigingSystem.factorise(fit.sample_coords, kriged, fit.model)
        return self._systems[name]


def layer_names(fits: dict[str, Interpolation]) -> tuple[str, ...]:
    """The layers a region writes, in order, for properties ``fits``."""
    names: list[str] = []
    for name in fits:
        names += [name, f"{name}_variance"]
    if "total_p" in fits:
        names += [layer for layer, _ in _POOLS]
    return (*names, "fixation_risk", *CLASS_LAYERS)


@dataclass
class LayerStats:
    """Running figures of one float layer over the cells inside the boundary."""

    count: int = 0
    total: float = 0.0
    total_sq: float = 0.0
    minimum: float = np.inf
    maximum: float = -np.inf
    classes: dict[int, int] = field(default_factory=dict)

    @classmethod
    def of(cls, values: np.ndarray, is_class: bool) -> LayerStats:
        """The figures of the cells ``values`` (NaN or class 0: no data)."""
        if is_class:
            codes, counts = np.unique(values[values > 0], return_counts=True)
            return cls(count=int(counts.sum()),
                       classes={int(c): int(n) for c, n in zip(codes, counts, strict=True)})
        v = values[np.isfinite(values)].astype(float)
        if v.size == 0:
            return cls()
        return cls(int(v.size), float(v.sum()), float(np.square(v).sum()), float(v.min()),
                   float(v.max()))

    def add(self, other: LayerStats) -> None:
        """Fold ``other`` into these figures."""
        self.count += other.count
        self.total += other.total
        self.total_sq += other.total_sq
        self.minimum = min(self.minimum, other.minimum)
        self.maximum = max(self.maximum, other.maximum)
        for code, n in other.classes.items():
            self.classes[code] = self.classes.get(code, 0) + n

    def as_dict(self, cell_area_ha: float, is_class: bool = False) -> dict[str, Any]:
        """Count, mean, standard deviation, min and max; for classes the area per class (ha)."""
        if is_class:
            return {"cells": self.count,
                    "area_ha": {str(c): n * cell_area_ha for c, n in sorted(self.classes.items())}}
        if self.count == 0:
            return {"cells": 0}
        mean = self.total / self.count
        var = max(self.total_sq / self.count - mean * mean, 0.0)
        return {"cells": self.count, "mean": mean, "sd": float(np.sqrt(var)),
                "min": self.minimum, "max": self.maximum}


@dataclass
class TileOutput:
    """A computed tile: its layers (2-D, the tile's shape) and their figures."""

    tile: Tile
    layers: dict[str, np.ndarray]
    stats: dict[str, LayerStats]
    notes: tuple[str, ...] = ()
    n_inside: int = 0


def compute_tile(model: RegionModel, tile: Tile) -> TileOutput:
    """Krige every property at the tile's inside cells and run the soil model on them.

    Float layers are float32 with NaN outside the boundary; class layers uint8 with 0.
    A tile whose cells all lie outside the boundary comes back with no layers.
    """
    import warnings

    from pmap.errors import PmapWarning
    from pmap.pipeline import soil_inputs_on_grid
    from pmap.soil.model import soil_model

    spec = tile_grid(model.grid, tile, model.boundary)
    n_inside = spec.n_inside
    if n_inside == 0:
        return TileOutput(tile, {}, {})
    targets = spec.inside_coords()
    chunk = model.config.kriging.chunk_size
    cells: dict[str, np.ndarray] = {}
    for name, fit in model.fits.items():
        result = krige_at(fit, targets, limits=model.limits.get(name), chunk_size=chunk,
                          system=model.system(name))
        cells[name] = result.estimate
        cells[f"{name}_variance"] = result.variance
    del targets
    estimates = {name: cells[name] for name in model.fits}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PmapWarning)
        inputs = soil_inputs_on_grid(estimates, spec, model.config)
        soil = soil_model(estimates["ph"], estimates.get("total_p"), inputs, model.partition,
                          model.config.fixation)
    notes = tuple(soil.notes) + tuple(str(w.message) for w in caught
                                      if issubclass(w.category, PmapWarning))
    if soil.pools is not None:
        for layer, attr in _POOLS:
            cells[layer] = getattr(soil.pools, attr)
    cells["fixation_risk"] = soil.risk.index
    cells["fixation_mechanism"] = soil.risk.mechanism
    cells["fixation_class"] = soil.risk.risk_class

    layers: dict[str, np.ndarray] = {}
    stats: dict[str, LayerStats] = {}
    for name in layer_names(model.fits):
        values = cells[name]
        is_class = name in CLASS_LAYERS
        stats[name] = LayerStats.of(values, is_class)
        if is_class:
            layers[name] = spec.fill(np.asarray(values, np.uint8), outside=0).astype(np.uint8)
        else:
            layers[name] = spec.fill(np.asarray(values, np.float32))
    return TileOutput(tile, layers, stats, notes, n_inside)
