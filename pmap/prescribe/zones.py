"""Soil-test classes, the ``[zones]`` settings and per-zone statistics.

Zones are the soil-test classes of a map (the classes of the run's interpretation table,
:mod:`pmap.prescribe.interpretation`), cleaned by :mod:`pmap.prescribe.patches` (minimum
width, minimum mapping unit, 4-connected patch labelling).  The clean-up names are
re-exported here.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from pmap._checks import check_number
from pmap.errors import ConfigError, InputError
from pmap.prescribe.patches import (
    clean_speckles,
    enforce_min_width,
    label_patches,
    min_cells_for_area,
    patch_means,
)

__all__ = [
    "label_patches",
    "patch_means",
    "ZoneParams",
    "classify",
    "min_cells_for_area",
    "clean_speckles",
    "make_zones",
    "enforce_min_width",
    "zone_statistics",
]

def _check_breaks(breaks: Sequence[float], key: str) -> tuple[float, ...]:
    values = tuple(float(b) for b in breaks)
    if not values:
        raise ConfigError(f"{key} needs at least one break")
    if not all(np.isfinite(values)) or any(
        a >= b for a, b in zip(values[:-1], values[1:], strict=True)
    ):
        raise ConfigError(f"{key} must be finite and strictly increasing, got {values}")
    if len(values) > 254:
        raise ConfigError(f"{key} allows at most 254 breaks, got {len(values)}")
    return values


@dataclass(frozen=True)
class ZoneParams:
    """Zone classes and clean-up (config section ``[zones]``)."""

    breaks: tuple[float, ...] | None = field(
        default=None,
        metadata={
            "unit": "mg/kg",
            "doc": "soil-test P class breaks; unset = the interpretation table of the "
            "soil-test method and rates.region. Set, they must include the critical level and "
            "the no-response limit",
            "source": "Tri-State 2020 (Bulletin 974); Iowa State PM 1688",
        },
    )
    labels: tuple[str, ...] | None = field(
        default=None,
        metadata={
            "unit": "",
            "doc": "class names, lowest first (one more than the breaks); unset = the table's",
            "source": "common practice, no source",
        },
    )
    min_mapping_unit_ha: float = field(
        default=0.25,
        metadata={
            "unit": "ha",
            "doc": "zones smaller than this are merged into a neighbour",
            "source": "common practice, no source",
        },
    )
    min_width_m: float = field(
        default=0.0,
        metadata={
            "unit": "m",
            "doc": "parts of a zone narrower than this (e.g. the applicator's boom width) are "
            "merged into the neighbouring zone they share most border with; 0 = off",
            "source": "common practice, no source",
        },
    )

    def __post_init__(self) -> None:
        if self.breaks is not None:
            object.__setattr__(self, "breaks", _check_breaks(self.breaks, "zones.breaks"))
        if self.labels is not None:
            object.__setattr__(self, "labels", tuple(str(x) for x in self.labels))
            if self.breaks is not None and len(self.labels) != len(self.breaks) + 1:
                raise ConfigError(
                    f"zones.labels needs {len(self.breaks) + 1} names (one more than the "
                    f"breaks), got {len(self.labels)}")
        check_number("zones.min_mapping_unit_ha", self.min_mapping_unit_ha, ge=0)
        check_number("zones.min_width_m", self.min_width_m, ge=0, finite=True)


def classify(values: ArrayLike, breaks: Sequence[float]) -> np.ndarray:
    """Class codes 1..len(breaks)+1 of ``values``; a value equal to a break goes up.

    Parameters
    ----------
    values : array_like
        Values to classify (e.g. soil-test P, mg/kg), any shape.
    breaks : sequence of float
        Strictly increasing class breaks (same unit as ``values``).

    Returns
    -------
    numpy.ndarray of uint8
        Class codes; 0 where ``values`` is NaN.
    """
    edges = np.asarray(_check_breaks(breaks, "breaks"))
    x = np.asarray(values, dtype=float)
    classes = (np.searchsorted(edges, x, side="right") + 1).astype(np.uint8)
    return np.where(np.isnan(x), 0, classes).astype(np.uint8)


def make_zones(
    values: ArrayLike,
    mask: np.ndarray,
    cell_area_ha: float,
    breaks: Sequence[float],
    min_mapping_unit_ha: float = 0.25,
) -> np.ndarray:
    """Classify a soil-test P map (mg/kg) by ``breaks`` and clean speckles below the MMU (ha).

    Returns
    -------
    numpy.ndarray of uint8
        Zone codes 1..n (0 outside the mask or where ``values`` is NaN).
    """
    classes = classify(values, breaks)
    min_cells = min_cells_for_area(min_mapping_unit_ha, cell_area_ha)
    return clean_speckles(classes, np.asarray(mask, bool) & (classes > 0), min_cells)


def zone_statistics(
    zones: np.ndarray,
    values: Mapping[str, np.ndarray],
    cell_area_ha: float,
    labels: Sequence[str] | None = None,
) -> list[dict]:
    """Area and mean values of each zone class present.

    Parameters
    ----------
    zones : numpy.ndarray, shape (rows, cols)
        Zone codes (0 = outside).
    values : mapping of str to numpy.ndarray
        Layers of the same shape (e.g. ``{"stp_mg_kg": ..., "rate_kg_ha": ...}``).
    cell_area_ha : float
        Area of one cell (ha).
    labels : sequence of str, optional
        Class names, lowest first; adds a ``"label"`` entry.

    Returns
    -------
    list of dict
        One dict per class, ascending: ``class_id``, ``label`` (if given), ``n_cells``,
        ``area_ha`` and ``<name>_mean`` for each layer (NaN-ignoring; NaN if none).
    """
    zones = np.asarray(zones)
    for name, layer in values.items():
        if np.shape(layer) != zones.shape:
            raise InputError(f"layer {name!r} has shape {np.shape(layer)}, zones {zones.shape}")
    rows = []
    for class_id in np.unique(zones[zones > 0]).tolist():
        inside = zones == class_id
        n = int(inside.sum())
        row: dict = {"class_id": int(class_id)}
        if labels is not None and 1 <= class_id <= len(labels):
            row["label"] = labels[class_id - 1]
        row["n_cells"] = n
        row["area_ha"] = n * float(cell_area_ha)
        for name, layer in values.items():
            sample = np.asarray(layer, dtype=float)[inside]
            sample = sample[~np.isnan(sample)]
            row[f"{name}_mean"] = float(sample.mean()) if sample.size else float("nan")
        rows.append(row)
    return rows
