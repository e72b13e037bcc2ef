"""Patches of a zone map: one 4-connected labelling, and the clean-up built on it.

A patch is a 4-connected region of one zone class (rook: cells sharing an edge), the unit a
prescription gives one rate and the polygon tracer turns into one polygon.  Every step here
(per-patch means, speckle merging below a minimum mapping unit, minimum zone width) uses
the single labelling of :func:`label_patches`.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from pmap.errors import InputError

__all__ = [
    "label_patches",
    "patch_means",
    "min_cells_for_area",
    "min_width_cells",
    "clean_speckles",
    "enforce_min_width",
    "clean_zones",
]

_FOUR = ndimage.generate_binary_structure(2, 1)


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
    if zones.ndim != 2:
        raise InputError(f"zones must be a 2-D raster, got shape {zones.shape}")
    labels = np.zeros(zones.shape, dtype=np.int32)
    patch_class: list[int] = []
    for class_id in np.unique(zones[zones > 0]).tolist():
        lab, n = ndimage.label(zones == class_id, structure=_FOUR)
        labels[lab > 0] = lab[lab > 0] + len(patch_class)
        patch_class.extend([int(class_id)] * n)
    return labels, np.asarray(patch_class, dtype=int)


def patch_means(labels: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Mean of ``values`` over each patch of :func:`label_patches` (NaN cells ignored).

    Returns
    -------
    numpy.ndarray of float, shape (n_patches,)
        Item k - 1 is the mean over patch k, in the unit of ``values``; NaN for a patch
        without a finite value.
    """
    labels = np.asarray(labels)
    values = np.asarray(values, dtype=float)
    if values.shape != labels.shape:
        raise InputError(f"values have shape {values.shape}, the patch labels {labels.shape}")
    index = np.arange(1, int(labels.max(initial=0)) + 1)
    finite = np.isfinite(values)
    sums = ndimage.sum_labels(np.where(finite, values, 0.0), labels, index)
    counts = ndimage.sum_labels(finite.astype(float), labels, index)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)


def min_cells_for_area(min_mapping_unit_ha: float, cell_area_ha: float) -> int:
    """Smallest patch size (cells) that covers ``min_mapping_unit_ha`` (ha)."""
    if not cell_area_ha > 0:
        raise InputError(f"cell area must be > 0 ha, got {cell_area_ha}")
    return max(1, math.ceil(min_mapping_unit_ha / cell_area_ha - 1e-9))


def min_width_cells(min_width_m: float, cell_size_m: float) -> int:
    """Smallest whole number of cells (of side ``cell_size_m``, m) spanning ``min_width_m`` (m)."""
    if not cell_size_m > 0:
        raise InputError(f"cell size must be > 0 m, got {cell_size_m}")
    return max(1, math.ceil(min_width_m / cell_size_m - 1e-9))


def _check_pair(classes: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    classes = np.asarray(classes)
    mask = np.asarray(mask, dtype=bool)
    if classes.ndim != 2 or classes.shape != mask.shape:
        raise InputError(
            f"classes and mask must be 2-D arrays of one shape, got {classes.shape} and "
            f"{mask.shape}"
        )
    return classes, mask


def _components(classes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`label_patches` with the class array indexed by label (index 0 = none)."""
    labels, patch_class = label_patches(classes)
    return labels.astype(np.int64), np.r_[0, patch_class].astype(np.int64)


def _edges(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Label pairs across every cell edge where both sides are labelled and differ (both ways)."""
    a = np.concatenate([labels[:, :-1].ravel(), labels[:-1, :].ravel()])
    b = np.concatenate([labels[:, 1:].ravel(), labels[1:, :].ravel()])
    keep = (a > 0) & (b > 0) & (a != b)
    a, b = a[keep], b[keep]
    return np.concatenate([a, b]), np.concatenate([b, a])


def _longest_border_class(src: np.ndarray, dst_class: np.ndarray,
                          own_class: np.ndarray) -> dict[int, int]:
    """For each patch in ``src``, the neighbouring class it shares most cell edges with.

    ``src[i]`` is a patch, ``dst_class[i]`` the class across edge i and ``own_class`` the
    class of each patch (indexed by patch).  Ties go to the class nearest in code to the
    patch's own, then to the lower code.
    """
    n_cls = int(max(int(own_class.max()), int(dst_class.max(initial=0)))) + 1
    pair, length = np.unique(src * n_cls + dst_class, return_counts=True)
    comp, neigh = pair // n_cls, pair % n_cls
    order = np.lexsort((neigh, np.abs(neigh - own_class[comp]), -length, comp))
    comp, neigh = comp[order], neigh[order]
    first = np.r_[True, comp[1:] != comp[:-1]]
    return dict(zip(comp[first].tolist(), neigh[first].tolist(), strict=True))


def _merge_pass(classes: np.ndarray, min_cells: int) -> bool:
    """Merge one independent set of small patches in place; True if anything changed."""
    labels, owner = _components(classes)
    sizes = np.bincount(labels.ravel(), minlength=owner.size)
    src, dst = _edges(labels)
    small = (sizes < min_cells) & (np.arange(owner.size) > 0)
    sel = small[src]
    if not sel.any():
        return False
    s_src, s_dst = src[sel], dst[sel]
    target = _longest_border_class(s_src, owner[s_dst], owner)

    # neighbours of each small patch, for the independent-set rule
    adj_order = np.argsort(s_src, kind="stable")
    a_src, a_dst = s_src[adj_order], s_dst[adj_order]
    starts = np.searchsorted(a_src, np.arange(owner.size))
    ends = np.searchsorted(a_src, np.arange(owner.size), side="right")

    blocked = np.zeros(owner.size, dtype=bool)
    relabel = np.zeros(owner.size, dtype=classes.dtype)
    for c in sorted(target, key=lambda c: (sizes[c], c)):
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
    """Merge class patches smaller than ``min_cells`` into a neighbouring class.

    Patches are those of :func:`label_patches` (4-connected).  Each small patch takes the
    class with which it shares the longest border (ties: the class nearest in code, then
    the lower code).  Passes merge an independent set of small patches (smallest first,
    none adjacent to another merged in the same pass) until no small patch has a neighbour
    inside the mask; patches without any neighbour stay as they are.

    Parameters
    ----------
    classes : numpy.ndarray of uint8, shape (rows, cols)
        Class codes (0 = no data).
    mask : numpy.ndarray of bool, shape (rows, cols)
        Cells inside the field; cells outside become 0.
    min_cells : int
        Minimum patch size (cells), e.g. :func:`min_cells_for_area`; 1 or less leaves the
        map unchanged.

    Returns
    -------
    numpy.ndarray of uint8
        Cleaned class codes.
    """
    classes, mask = _check_pair(classes, mask)
    out = np.where(mask, classes, 0).astype(np.uint8)
    if min_cells <= 1:
        return out
    # each pass removes at least one patch, so the patch count bounds the passes
    max_passes = int(_components(out)[1].size)
    for _ in range(max_passes):
        if not _merge_pass(out, int(min_cells)):
            break
    return out


def _square_cover(member: np.ndarray, width: int) -> np.ndarray:
    """Cells of ``member`` covered by a ``width x width`` square lying wholly in ``member``.

    The morphological opening of ``member`` by the square (squares may not leave the
    raster), computed with two summed-area tables so it costs O(cells) for any width.
    """
    rows, cols = member.shape
    if width > rows or width > cols:
        return np.zeros_like(member, dtype=bool)
    table = np.zeros((rows + 1, cols + 1), dtype=np.int64)
    table[1:, 1:] = member.astype(np.int64).cumsum(0).cumsum(1)
    w = width
    window = table[w:, w:] - table[:-w, w:] - table[w:, :-w] + table[:-w, :-w]
    full = (window == w * w).astype(np.int64)  # full[i, j]: square with top-left (i, j)
    # a cell (r, c) is covered when a full square has its top-left in [r-w+1, r] x [c-w+1, c]
    padded = np.zeros((rows + w, cols + w), dtype=np.int64)
    padded[w : w + full.shape[0], w : w + full.shape[1]] = full
    table2 = np.zeros((rows + w + 1, cols + w + 1), dtype=np.int64)
    table2[1:, 1:] = padded.cumsum(0).cumsum(1)
    r0, c0 = np.arange(rows) + 1, np.arange(cols) + 1   # padded index of top-left r-w+1
    r1, c1 = r0 + w, c0 + w                              # exclusive end: r + 1 (+ w pad)
    count = (table2[np.ix_(r1, c1)] - table2[np.ix_(r0, c1)] - table2[np.ix_(r1, c0)]
             + table2[np.ix_(r0, c0)])
    return (count > 0) & member


def _wide_cells(out: np.ndarray, width: int) -> np.ndarray:
    """Cells covered by a ``width`` square of their own class."""
    kept = np.zeros(out.shape, dtype=bool)
    for value in np.unique(out[out > 0]).tolist():
        kept |= _square_cover(out == value, width)
    return kept


def enforce_min_width(classes: np.ndarray, mask: np.ndarray, min_width_cells: int) -> np.ndarray:
    """Hand the parts of each zone narrower than ``min_width_cells`` to a neighbouring zone.

    A cell is *wide* when some ``w x w`` square (``w = min_width_cells``) lying wholly in its
    own class covers it: the morphological opening of each class by the square.  The other
    (narrow) cells of a class form narrow parts, the 4-connected patches of
    :func:`label_patches` restricted to narrow cells.  Each narrow part is handed to the
    class of the wide cells it shares the most cell edges with (ties: the class nearest in
    code, then the lower code); a narrow part touching no wide cell of another class waits.
    This repeats until nothing changes, because a handed-over part can bring a waiting part
    next to wide cells.  Each cell changes class at most once, so the loop ends and no cell
    flips back and forth; wide cells never change.  Narrow parts that never touch a wide
    cell of another class (a strip of field narrower than the width, a spur of a zone that
    touches only its own class) keep their class.

    Parameters
    ----------
    classes : numpy.ndarray of uint8, shape (rows, cols)
        Class codes (0 = none).
    mask : numpy.ndarray of bool, shape (rows, cols)
        Cells inside the field; cells outside become 0 and never count as a neighbour.
    min_width_cells : int
        Width in cells (e.g. :func:`min_width_cells` of the boom width); 1 or less leaves
        the map unchanged.

    Returns
    -------
    numpy.ndarray of uint8
        Class codes with narrow parts merged.
    """
    classes, mask = _check_pair(classes, mask)
    out = np.where(mask, classes, 0).astype(np.uint8)
    width = int(min_width_cells)
    if width <= 1:
        return out
    moved = np.zeros(out.shape, dtype=bool)
    for _ in range(out.size):
        wide = _wide_cells(out, width)
        narrow = (out > 0) & ~wide & ~moved
        if not narrow.any():
            break
        parts, part_class = label_patches(np.where(narrow, out, 0))
        owner = np.r_[0, part_class].astype(np.int64)
        # edges between a narrow part and a wide cell of another class, both directions
        wide_class = np.where(wide, out, 0).astype(np.int64)
        p = parts.astype(np.int64)
        a = np.concatenate([p[:, :-1].ravel(), p[:, 1:].ravel(), p[:-1, :].ravel(),
                            p[1:, :].ravel()])
        b = np.concatenate([wide_class[:, 1:].ravel(), wide_class[:, :-1].ravel(),
                            wide_class[1:, :].ravel(), wide_class[:-1, :].ravel()])
        keep = (a > 0) & (b > 0)
        keep[keep] = owner[a[keep]] != b[keep]
        if not keep.any():
            break
        target = _longest_border_class(a[keep], b[keep], owner)
        relabel = np.zeros(owner.size, dtype=np.uint8)
        for part, cls in target.items():
            relabel[part] = cls
        move = relabel[parts]
        changed = move > 0
        out[changed] = move[changed]
        moved |= changed
    return out


def clean_zones(classes: np.ndarray, mask: np.ndarray, *, min_width_cells: int,
                min_cells: int) -> np.ndarray:
    """The clean-up a zone map gets: :func:`enforce_min_width`, then :func:`clean_speckles`.

    Width first, because merging narrow parts can leave or create small patches that the
    minimum mapping unit (``min_cells``, cells) then removes.  Cells outside ``mask`` or of
    class 0 stay 0.
    """
    classes, mask = _check_pair(classes, mask)
    out = enforce_min_width(classes, mask, min_width_cells)
    return clean_speckles(out, mask & (out > 0), min_cells)
