"""Tests of the one patch labelling, speckle merging and the minimum zone width."""

import numpy as np
import pytest
from scipy import ndimage

from pmap.errors import InputError
from pmap.prescribe import patches as pt
from pmap.prescribe import zones as zones_module

FOUR = ndimage.generate_binary_structure(2, 1)


# --- references: the code as it stood at commit bea2f60, before the labelling was merged ----
# (zones._components and zones.label_patches were two copies of this labelling; clean_speckles
# ran on _components).  Frozen here so the comparison outlives the copies in zones.py.

def _ref_components(classes):
    labels = np.zeros(classes.shape, dtype=np.int64)
    owner = [0]
    for value in np.unique(classes[classes > 0]):
        lab, n = ndimage.label(classes == value, structure=FOUR)
        labels[lab > 0] = lab[lab > 0] + (len(owner) - 1)
        owner.extend([int(value)] * n)
    return labels, np.asarray(owner, dtype=np.int64)


def _ref_merge_pass(classes, min_cells):
    labels, owner = _ref_components(classes)
    sizes = np.bincount(labels.ravel(), minlength=owner.size)
    a = np.concatenate([labels[:, :-1].ravel(), labels[:-1, :].ravel()])
    b = np.concatenate([labels[:, 1:].ravel(), labels[1:, :].ravel()])
    keep = (a > 0) & (b > 0) & (a != b)
    src, dst = np.concatenate([a[keep], b[keep]]), np.concatenate([b[keep], a[keep]])
    small = (sizes < min_cells) & (np.arange(owner.size) > 0)
    sel = small[src]
    if not sel.any():
        return False
    s_src, s_dst = src[sel], dst[sel]
    n_cls = int(owner.max()) + 1
    pair, length = np.unique(s_src * n_cls + owner[s_dst], return_counts=True)
    comp, neigh_cls = pair // n_cls, pair % n_cls
    order = np.lexsort((neigh_cls, np.abs(neigh_cls - owner[comp]), -length, comp))
    comp, neigh_cls = comp[order], neigh_cls[order]
    first = np.r_[True, comp[1:] != comp[:-1]]
    target = dict(zip(comp[first].tolist(), neigh_cls[first].tolist(), strict=True))
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
        blocked[a_dst[starts[c]:ends[c]]] = True
    move = relabel[labels]
    changed = move > 0
    classes[changed] = move[changed]
    return bool(changed.any())


def _ref_clean_speckles(classes, mask, min_cells):
    out = np.where(mask, classes, 0).astype(np.uint8)
    if min_cells <= 1:
        return out
    for _ in range(int(_ref_components(out)[1].size)):
        if not _ref_merge_pass(out, int(min_cells)):
            break
    return out


def _random_map(rng, shape=(40, 50), n_classes=4, smooth=2.0):
    field = ndimage.gaussian_filter(rng.normal(size=shape), smooth)
    field = field / field.std() + 0.4 * rng.normal(size=shape)
    classes = np.digitize(field, np.linspace(-1, 1, n_classes - 1)).astype(np.uint8) + 1
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    mask = ((yy - shape[0] / 2) / (shape[0] / 2)) ** 2 + ((xx - shape[1] / 2) / (shape[1] / 2)) ** 2 < 1
    return np.where(mask, classes, 0).astype(np.uint8), mask


# --- labelling -------------------------------------------------------------------------------

def test_numbering_identical_to_the_old_labelling_on_random_rasters():
    # Source: scipy.ndimage.label with 4-connectivity per class, numbered by class (the
    # frozen reference above, and zones.label_patches while zones.py keeps its copy).
    rng = np.random.default_rng(5)
    for _ in range(8):
        classes = rng.integers(0, 5, (30, 40)).astype(np.uint8)
        ref_labels, ref_owner = _ref_components(classes)
        labels, patch_class = pt.label_patches(classes)
        assert labels.dtype == np.int32
        np.testing.assert_array_equal(labels, ref_labels)
        np.testing.assert_array_equal(patch_class, ref_owner[1:])
        old_labels, old_class = zones_module.label_patches(classes)
        np.testing.assert_array_equal(labels, old_labels)
        np.testing.assert_array_equal(patch_class, old_class)


def test_numbering_is_by_class_then_row_major_first_cell():
    zones = np.array([[2, 2, 1, 0],
                      [0, 1, 1, 2],
                      [1, 0, 2, 2]], np.uint8)
    labels, patch_class = pt.label_patches(zones)
    # class 1: the patch at (0, 2) comes before the lone cell at (2, 0); then class 2
    np.testing.assert_array_equal(labels, [[3, 3, 1, 0], [0, 1, 1, 4], [2, 0, 4, 4]])
    assert patch_class.tolist() == [1, 1, 2, 2]
    # diagonal contact does not connect (4-connectivity)
    assert pt.label_patches(np.eye(3, dtype=np.uint8))[1].tolist() == [1, 1, 1]


def test_patch_means_ignore_nan_and_match_numpy():
    rng = np.random.default_rng(2)
    zones = rng.integers(0, 3, (12, 15)).astype(np.uint8)
    values = rng.uniform(0, 50, zones.shape)
    values[rng.random(zones.shape) < 0.2] = np.nan
    labels, _ = pt.label_patches(zones)
    means = pt.patch_means(labels, values)
    for k in range(1, labels.max() + 1):
        cell = values[labels == k]
        expected = np.nanmean(cell) if np.isfinite(cell).any() else np.nan
        np.testing.assert_allclose(means[k - 1], expected, equal_nan=True)
    with pytest.raises(InputError, match="shape"):
        pt.patch_means(labels, values[:-1])


# --- speckles --------------------------------------------------------------------------------

def test_clean_speckles_identical_to_the_old_one_on_random_rasters():
    # Source: the frozen implementation above (commit bea2f60) and zones.clean_speckles.
    rng = np.random.default_rng(11)
    for seed_cells in (3, 8, 20):
        for _ in range(3):
            classes, mask = _random_map(rng)
            expected = _ref_clean_speckles(classes, mask, seed_cells)
            got = pt.clean_speckles(classes, mask, seed_cells)
            np.testing.assert_array_equal(got, expected)
            np.testing.assert_array_equal(got, zones_module.clean_speckles(classes, mask,
                                                                           seed_cells))
    assert not (got == classes).all()  # the comparison ran on maps that did change


def test_speckle_takes_the_class_it_shares_the_longest_border_with():
    # common practice, no source
    classes = np.array([[1, 1, 1, 3, 3],
                        [1, 1, 2, 3, 3],
                        [1, 1, 1, 3, 3]], np.uint8)
    out = pt.clean_speckles(classes, np.ones_like(classes, bool), min_cells=2)
    assert out[1, 2] == 1  # three edges with class 1, one with class 3
    with pytest.raises(InputError, match="one shape"):
        pt.clean_speckles(classes, np.ones((2, 2), bool), 2)


def test_min_cells_and_width_cells():
    assert pt.min_cells_for_area(0.25, 0.01) == 25     # 10 m cells
    assert pt.min_cells_for_area(0.25, 0.0225) == 12   # 15 m cells: 11.1 -> 12
    assert pt.min_width_cells(24.0, 10.0) == 3         # a 24 m boom on 10 m cells
    assert pt.min_width_cells(30.0, 10.0) == 3
    assert pt.min_width_cells(0.0, 10.0) == 1
    with pytest.raises(InputError):
        pt.min_width_cells(24.0, 0.0)


# --- minimum width ---------------------------------------------------------------------------

def test_min_width_removes_a_one_cell_corridor_and_keeps_a_wide_band():
    # common practice, no source: a 1-cell-wide strip of class 2 through class 1 cannot be
    # followed by a 3-cell boom; it goes to the class around it.  A 4-cell band stays.
    classes = np.ones((20, 30), np.uint8)
    classes[:, 10] = 2
    classes[:, 20:24] = 3
    mask = np.ones_like(classes, bool)
    out = pt.enforce_min_width(classes, mask, 3)
    assert (out[:, 10] == 1).all()
    assert (out[:, 20:24] == 3).all()
    np.testing.assert_array_equal(pt.enforce_min_width(classes, mask, 1), classes)
    out5 = pt.enforce_min_width(classes, mask, 5)
    assert not (out5 == 2).any() and not (out5 == 3).any()


def test_narrow_part_goes_to_the_longest_border():
    # A 1-cell corridor of class 2 running along a wide class-3 block for 3 cells and
    # through class 1 for 14: class 1 gets it.
    classes = np.ones((18, 12), np.uint8)
    classes[:, 5] = 2
    classes[:3, 6:] = 3
    classes[:3, 5] = 2
    out = pt.enforce_min_width(classes, np.ones_like(classes, bool), 3)
    assert (out[:, 5] == 1).all()
    assert (out[:3, 6:] == 3).all()


def test_min_width_iterates_through_nested_narrow_parts():
    # Wide class 1 then three 1-cell columns 2 | 3 | 2 at the field's edge: only the first
    # touches a wide zone; once it is class 1 the next one does, and so on.
    classes = np.ones((10, 13), np.uint8)
    classes[:, 10], classes[:, 11], classes[:, 12] = 2, 3, 2
    out = pt.enforce_min_width(classes, np.ones_like(classes, bool), 3)
    assert (out == 1).all()


def _opening(member, width):
    """Cells of ``member`` covered by a width x width square inside ``member`` (by definition)."""
    out = np.zeros_like(member)
    rows, cols = member.shape
    for i in range(rows - width + 1):
        for j in range(cols - width + 1):
            if member[i:i + width, j:j + width].all():
                out[i:i + width, j:j + width] = True
    return out


def test_wide_cells_never_change_and_outside_stays_zero():
    # Source: scipy.ndimage.binary_opening for odd widths (a cell of the opening of its class
    # by a w x w square is wide and keeps its class); the definition itself for even widths.
    rng = np.random.default_rng(3)
    for width in (2, 3, 4):
        classes, mask = _random_map(rng, shape=(36, 44), smooth=3.0)
        out = pt.enforce_min_width(classes, mask, width)
        wide = np.zeros(mask.shape, bool)
        for value in range(1, 5):
            member = classes == value
            opened = _opening(member, width)
            if width % 2:
                np.testing.assert_array_equal(
                    opened, ndimage.binary_opening(member, np.ones((width, width), bool)))
            wide |= opened
        np.testing.assert_array_equal(out[wide], classes[wide])
        assert (out[~mask] == 0).all() and (out[mask] > 0).all()
        assert (out != classes).any()
        # every class present afterwards comes from a class present before
        assert set(np.unique(out[mask])) <= set(np.unique(classes[mask]))
        # what is left narrow and unmoved touches no wide cell of another class
        still = (out == classes) & ~pt._wide_cells(out, width) & mask
        wide_other = pt._wide_cells(out, width)
        for a, b in ((np.s_[:, :-1], np.s_[:, 1:]), (np.s_[:-1, :], np.s_[1:, :])):
            for x, y in ((a, b), (b, a)):
                assert not (still[x] & wide_other[y] & (out[y] != out[x])).any()


def test_field_narrower_than_the_width_is_left_alone():
    classes = np.array([[1, 2, 2, 1, 3, 3]], np.uint8)  # a 1-row field
    out = pt.enforce_min_width(classes, np.ones_like(classes, bool), 3)
    np.testing.assert_array_equal(out, classes)


def test_clean_zones_width_then_minimum_mapping_unit():
    # The corridor goes by width; a 2 x 2 speckle (4 cells, wider than 2) goes by the MMU.
    classes = np.ones((20, 20), np.uint8)
    classes[:, 10] = 2
    classes[3:5, 3:5] = 3
    mask = np.ones_like(classes, bool)
    out = pt.clean_zones(classes, mask, min_width_cells=2, min_cells=5)
    assert (out == 1).all()
    only_width = pt.clean_zones(classes, mask, min_width_cells=2, min_cells=1)
    assert (only_width[3:5, 3:5] == 3).all() and (only_width[:, 10] == 1).all()
