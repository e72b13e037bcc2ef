"""What one field's run reads and produces: :class:`FieldInputs` and :class:`FieldResult`.

Plain records shared by the stages, so that the pipeline (which builds them) and the
writers (:mod:`pmap.outputs`, :mod:`pmap.report`) both depend on this module and not on
each other.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pmap.config import FieldConfig
from pmap.geostats.interpolate import Interpolation
from pmap.grid import GridSpec
from pmap.io.samples import SampleTable
from pmap.prescribe import prescription as rx
from pmap.prescribe.interpretation import InterpretationTable
from pmap.prescribe.rates import RateRule

__all__ = ["FieldInputs", "FieldResult", "IngestedField"]


@dataclass(frozen=True)
class IngestedField:
    """Checked samples and boundary in the working CRS ``crs``, before any grid is fixed.

    The fields mean what they mean in :class:`FieldInputs`; a tiled region
    (:mod:`pmap.region`) starts from this, since its grid is never held whole.
    """

    samples: SampleTable
    boundary: Any  # shapely (Multi)Polygon in crs
    crs: str
    n_read: int
    dropped_outside: tuple[str, ...]
    notes: tuple[str, ...] = ()
    crs_choice: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class FieldInputs:
    """Checked inputs of one field, all in the run's projected CRS.

    ``notes`` are sentences for the record (how the working CRS was chosen, the field's
    area in it and on the ellipsoid, then the samples' own notes).  ``crs_choice`` is the
    working-CRS record of :func:`pmap.io.crs.choose_working_crs` (``requested``, ``used``,
    ``reason``, ``scale_error``, ``requested_scale_error``, ``max_scale_error``) plus
    ``areas`` from :func:`pmap.io.boundary.check_field_area` (``working_crs_ha``,
    ``geodesic_ha``, ``difference``).
    """

    samples: SampleTable
    boundary: Any  # shapely (Multi)Polygon in grid.crs
    grid: GridSpec
    n_read: int
    dropped_outside: tuple[str, ...]
    notes: tuple[str, ...] = ()
    crs_choice: dict[str, Any] = field(default_factory=dict)


@dataclass
class FieldResult:
    """What one field's run produced; arrays are 2-D on ``grid`` with NaN outside the field.

    ``patches`` are the rate polygons' records (:class:`pmap.prescribe.prescription.Patch`,
    zone ids 1..n, areas from the polygons), ``polygons`` their geometries (zone id ->
    shapely geometry in ``grid.crs``, tiling the boundary), ``patch_labels`` the zone id of
    every cell, ``class_table`` and ``totals`` derived from ``patches`` only.
    """

    out_dir: Path
    grid: GridSpec
    config: FieldConfig
    interpolations: dict[str, Interpolation]
    layers: dict[str, np.ndarray]
    class_table: list[dict[str, Any]]
    patches: list[rx.Patch]
    polygons: dict[int, Any]
    patch_labels: np.ndarray
    totals: dict[str, Any]
    stp_source: dict[str, Any]
    rule: RateRule
    interpretation: InterpretationTable
    prescription: dict[str, Any]
    summary: dict[str, Any] = field(repr=False)
    soil: dict[str, Any] = field(default_factory=dict)
    calibration: Any = None
    outputs: dict[str, str] = field(default_factory=dict, repr=False)
    warnings: list[str] = field(default_factory=list)

    @property
    def zone_table(self) -> list[dict[str, Any]]:
        """The per-polygon table (one row per rate polygon), as the CSV holds it."""
        return [p.as_dict() for p in self.patches]
