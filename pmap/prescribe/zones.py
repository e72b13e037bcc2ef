"""Soil-test classes, speckle clean-up and per-zone statistics.

Zones are the soil-test classes of a map, with regions smaller than the minimum mapping
unit merged into a neighbouring class.  Connectivity is 4 (rook: cells sharing an edge) for
both components and shared borders, matching edge-based polygon tracing, so each cleaned
component becomes exactly one polygon.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike
from scipy import ndimage

from pmap._checks import check_number
from pmap.errors import ConfigError, InputError
from pmap.soil.conversions import SOIL_TEST_METHODS

__all__ = [
    "label_patches",
    "patch_means",
    "DEFAULT_CLASS_BREAKS",
    "CLASS_LABELS",
    "ZoneParams",
    "class_breaks_for",
    "classify",
    "min_cells_for_area",
    "clean_speckles",
    "make_zones",
    "zone_statistics",
]

#: Soil-test P class breaks (mg/kg) between very low | low | optimum | high | very high.
#: The optimum class (between the 2nd and 3rd break) is from Iowa State PM 1688 (Mallarino &
#: Sawyer, rev. 2013) via Iowa State ICM News, Oct 2016; the other breaks are from memory,
#: unverified.
DEFAULT_CLASS_BREAKS: dict[str, tuple[float, ...]] = {
    "mehlich3_icp": (16.0, 26.0, 36.0, 46.0),
    "mehlich3_colorimetric": (9.0, 16.0, 21.0, 31.0),
    "bray1": (9.0, 16.0, 21.0, 31.0),
    "olsen": (6.0, 10.0, 14.0, 21.0),
}

#: Names of the five default classes, lowest first.
CLASS_LABELS: tuple[str, ...] = ("very low", "low", "optimum", "high", "very high")

_FOUR = ndimage.generate_binary_structure(2, 1)


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
    """Zone classification and clean-up (config section ``[zones]``)."""

    breaks: tuple[float, ...] | None = field(
        default=None,
        metadata={
            "unit": "mg/kg",
            "doc": "soil-test P class breaks; empty = by soil-test method",
            "source": "Iowa State PM 1688 (optimum); others from memory, unverified",
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
    labels: tuple[str, ...] = field(
        default=CLASS_LABELS,
        metadata={
            "unit": "",
            "doc": "class names, lowest first (one more than the breaks)",
            "source": "common practice, no source",
        },
    )

    def __post_init__(self) -> None:
        if self.breaks is not None:
            object.__setattr__(self, "breaks", _check_breaks(self.breaks, "zones.breaks"))
        object.__setattr__(self, "labels", tuple(str(x) for x in self.labels))
        n_classes = (len(self.breaks) if self.breaks is not None else 4) + 1
        if len(self.labels) != n_classes:
            raise ConfigError(
                f"zones.labels needs {n_classes} names (one more than the breaks), "
                f"got {len(self.labels)}"
            )
        check_number("zones.min_mapping_unit_ha", self.min_mapping_unit_ha, ge=0)


def class_breaks_for(params: ZoneParams, method: str) -> tuple[float, ...]:
    """The breaks to use (mg/kg): ``params.breaks`` or the default for ``method``."""
    if params.breaks is not None:
        return params.breaks
    if method not in DEFAULT_CLASS_BREAKS:
        raise ConfigError(
            f"no default class breaks for soil-test method {method!r}; use one of "
            f"{', '.join(SOIL_TEST_METHODS)} or set zones.breaks"
        )
    return DEFAULT_CLASS_BREAKS[method]


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


def min_cells_for_area(min_mapping_unit_ha: float, cell_area_ha: float) -> int:
    """Smallest component size (cells) that covers ``min_mapping_unit_ha`` (ha)."""
    if not cell_area_ha > 0:
        raise InputError(f"cell area must be > 0 ha, got {cell_area_ha}")
    return max(1, math.ceil(min_mapping_unit_ha / cell_area_ha - 1e-9))


def _components(classes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """4-connected components of each class: (labels, class of each label; index 0 = none)."""
    labels = np.zeros(classes.shape, dtype=np.int64)
    owner = [0]
    for value in np.unique(classes[classes > 0]):
        lab, n = ndimage.label(classes == value, structure=_FOUR)
        labels[lab > 0] = lab[lab > 0] + (len(owner) - 1)
        owner.extend([int(value)] * n)
    return labels, np.asarray(owner, dtype=np.int64)


def _edges(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Component pairs across every cell edge where both sides are in components and differ."""
    a = np.concatenate([labels[:, :-1].ravel(), labels[:-1, :].ravel()])
    b = np.concatenate([labels[:, 1:].ravel(), labels[1:, :].ravel()])
    keep = (a > 0) & (b > 0) & (a != b)
    a, b = a[keep], b[keep]
    return np.concatenate([a, b]), np.concatenate([b, a])


def _merge_pass(classes: np.ndarray, min_cells: int) -> bool:
    """Merge one independent set of small components in place; True if anything changed."""
    labels, owner = _components(classes)
    sizes = np.bincount(labels.ravel(), minlength=owner.size)
    src, dst = _edges(labels)
    small = (sizes < min_cells) & (np.arange(owner.size) > 0)
    sel = small[src]
    if not sel.any():
        return False
    s_src, s_dst = src[sel], dst[sel]
    # border length of each small component with each neighbouring class
    n_cls = int(owner.max()) + 1
    pair, length = np.unique(s_src * n_cls + owner[s_dst], return_counts=True)
    comp, neigh_cls = pair // n_cls, pair % n_cls
    # longest border first; ties to the class nearest in code, then the lower code
    order = np.lexsort((neigh_cls, np.abs(neigh_cls - owner[comp]), -length, comp))
    comp, neigh_cls = comp[order], neigh_cls[order]
    first = np.r_[True, comp[1:] != comp[:-1]]
    target = dict(zip(comp[first].tolist(), neigh_cls[first].tolist(), strict=True))

    # neighbours of each small component, for the independent-set rule
    adj_order = np.argsort(s_src, kind="stable")
    a_src, a_dst = s_src[adj_order], s_dst[adj_order]
    starts = np.searchsorted(a_src, np.arange(owner.size))
    ends = np.searchsorted(a_src, np.arange(owner.size), side="right")

    blocked = np.zeros(owner.size, dtype=bool)
    relabel = np.zeros(owner.size, dtype=classes.dtype)
    candidates = sorted(target, key=lambda c: (sizes[c], c))
    for c in candidates:
        if blocked[c]:
            continue
        relabel[c] = target[c]
        blocked[c] = True
        blocked[a_dst[starts[c] : ends[c]]] = True
    move = relabel[labels]
    changed = move > 0
    classes[changed] = move[changed]
    return bool(changed.any())


def clean_speckles(classes: np.ndarray, mask: np.ndarray, min_cells: int) -> np.ndarray:
    """Merge class components smaller than ``min_cells`` into a neighbouring class.

    Components are 4-connected.  Each small component takes the class with which it
    shares the longest border (ties: the class nearest in code, then the lower code).
    Passes merge an independent set of small components (smallest first, none adjacent
    to another merged in the same pass) until no small component has a neighbour inside
    the mask; components without any neighbour stay as they are.

    Parameters
    ----------
    classes : numpy.ndarray of uint8, shape (rows, cols)
        Class codes (0 = no data).
    mask : numpy.ndarray of bool, shape (rows, cols)
        Cells inside the field; cells outside become 0.
    min_cells : int
        Minimum component size (cells); 1 or less leaves the map unchanged.

    Returns
    -------
    numpy.ndarray of uint8
        Cleaned class codes.
    """
    classes = np.asarray(classes)
    mask = np.asarray(mask, dtype=bool)
    if classes.ndim != 2 or classes.shape != mask.shape:
        raise InputError(
            f"classes and mask must be 2-D arrays of one shape, got {classes.shape} and "
            f"{mask.shape}"
        )
    out = np.where(mask, classes, 0).astype(np.uint8)
    if min_cells <= 1:
        return out
    # each pass removes at least one component, so the component count bounds the passes
    max_passes = int(_components(out)[1].size)
    for _ in range(max_passes):
        if not _merge_pass(out, int(min_cells)):
            break
    return out


def make_zones(
    values: ArrayLike,
    mask: np.ndarray,
    cell_area_ha: float,
    params: ZoneParams = ZoneParams(),
    method: str = "mehlich3_icp",
) -> np.ndarray:
    """Classify a soil-test P map (mg/kg) and clean speckles below the minimum mapping unit.

    Returns
    -------
    numpy.ndarray of uint8
        Zone codes 1..n (0 outside the mask or where ``values`` is NaN).
    """
    classes = classify(values, class_breaks_for(params, method))
    min_cells = min_cells_for_area(params.min_mapping_unit_ha, cell_area_ha)
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


def label_patches(zones: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Number every 4-connected patch of one class: the units of a zone prescription.

    Parameters
    ----------
    zones : numpy.ndarray of int, shape (rows, cols)
        Zone codes (0 = outside the field).

    Returns
    -------
    labels : numpy.ndarray of int32
        Patch numbers 1..n (0 outside), numbered by class, then in row-major order of each
        patch's first cell.
    patch_class : numpy.ndarray of int
        Class code of patch k at index k - 1.
    """
    zones = np.asarray(zones)
    labels = np.zeros(zones.shape, dtype=np.int32)
    patch_class: list[int] = []
    for class_id in np.unique(zones[zones > 0]).tolist():
        lab, n = ndimage.label(zones == class_id, structure=_FOUR)
        labels[lab > 0] = lab[lab > 0] + len(patch_class)
        patch_class.extend([int(class_id)] * n)
    return labels, np.asarray(patch_class, dtype=int)


def patch_means(labels: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Mean of ``values`` over each patch of :func:`label_patches` (NaN cells ignored)."""
    labels = np.asarray(labels)
    values = np.asarray(values, dtype=float)
    index = np.arange(1, int(labels.max(initial=0)) + 1)
    finite = np.isfinite(values)
    sums = ndimage.sum_labels(np.where(finite, values, 0.0), labels, index)
    counts = ndimage.sum_labels(finite.astype(float), labels, index)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
