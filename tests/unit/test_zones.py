"""Tests of soil-test classes, speckle clean-up and zone statistics."""

import numpy as np
import pytest
from scipy import ndimage

from pmap.errors import ConfigError
from pmap.prescribe.interpretation import interpretation_table
from pmap.prescribe.zones import (
    ZoneParams,
    classify,
    clean_speckles,
    enforce_min_width,
    label_patches,
    make_zones,
    min_cells_for_area,
    zone_statistics,
)

IOWA_ICP = interpretation_table("mehlich3_icp", "iowa", "corn")
CLASS_LABELS = IOWA_ICP.labels

FOUR = ndimage.generate_binary_structure(2, 1)


def _small_components_with_neighbours(classes, mask, min_cells):
    """Count 4-connected components below min_cells that touch another class in the mask."""
    count = 0
    for value in np.unique(classes[classes > 0]):
        labels, n = ndimage.label(classes == value, structure=FOUR)
        for i in range(1, n + 1):
            comp = labels == i
            if comp.sum() >= min_cells:
                continue
            ring = ndimage.binary_dilation(comp, structure=FOUR) & ~comp & mask
            if (classes[ring] > 0).any():
                count += 1
    return count


def test_classify_edges_and_nan():
    values = np.array([[0.0, 15.99, 16.0, 25.9], [26.0, 35.5, 46.0, np.nan]])
    got = classify(values, IOWA_ICP.breaks)
    np.testing.assert_array_equal(got, [[1, 1, 2, 2], [3, 3, 5, 0]])
    assert got.dtype == np.uint8
    with pytest.raises(ConfigError):
        classify(values, (10, 5))


def test_lone_cell_vanishes():
    classes = np.full((7, 7), 2, np.uint8)
    classes[3, 3] = 4
    out = clean_speckles(classes, np.ones((7, 7), bool), min_cells=3)
    assert (out == 2).all()


def test_longest_border_wins():
    classes = np.array(
        [
            [1, 1, 1, 3, 3],
            [1, 1, 2, 3, 3],
            [1, 1, 1, 3, 3],
        ],
        np.uint8,
    )
    out = clean_speckles(classes, np.ones_like(classes, bool), min_cells=2)
    assert out[1, 2] == 1  # three edges with class 1, one with class 3


def test_large_regions_untouched_and_outside_zero():
    classes = np.zeros((20, 20), np.uint8)
    classes[:, :10] = 1
    classes[:, 10:] = 3
    mask = np.ones((20, 20), bool)
    mask[0, :] = False
    out = clean_speckles(classes, mask, min_cells=25)
    np.testing.assert_array_equal(out[mask], classes[mask])
    assert (out[~mask] == 0).all()


def test_isolated_component_without_neighbour_stays():
    classes = np.zeros((5, 5), np.uint8)
    classes[2, 2] = 4
    mask = classes > 0
    out = clean_speckles(classes, mask, min_cells=5)
    assert out[2, 2] == 4


def test_two_lone_cells_do_not_oscillate():
    classes = np.array([[1, 2]], np.uint8)
    out = clean_speckles(classes, np.ones((1, 2), bool), min_cells=2)
    assert len(np.unique(out)) == 1


def test_random_map_clean_and_idempotent():
    rng = np.random.default_rng(11)
    smooth = ndimage.gaussian_filter(rng.normal(size=(60, 80)), 4)
    field = smooth / smooth.std() + 0.3 * rng.normal(size=smooth.shape)
    classes = classify(field, (-1.0, -0.3, 0.3, 1.0))
    yy, xx = np.mgrid[:60, :80]
    mask = (yy - 30) ** 2 / 900 + (xx - 40) ** 2 / 1600 < 1
    classes = np.where(mask, classes, 0).astype(np.uint8)
    min_cells = 12
    assert _small_components_with_neighbours(classes, mask, min_cells) > 10
    out = clean_speckles(classes, mask, min_cells)
    assert _small_components_with_neighbours(out, mask, min_cells) == 0
    assert (out[~mask] == 0).all() and (out[mask] > 0).all()
    np.testing.assert_array_equal(clean_speckles(out, mask, min_cells), out)
    # most cells keep their class
    assert (out[mask] == classes[mask]).mean() > 0.8


def test_min_cells_for_area():
    assert min_cells_for_area(0.25, 0.01) == 25  # 10 m cells
    assert min_cells_for_area(0.25, 0.0225) == 12  # 15 m cells: 11.1 -> 12
    assert min_cells_for_area(0.0, 0.01) == 1


def test_make_zones_and_statistics():
    stp = np.full((10, 10), 30.0)
    stp[:, :5] = 12.0
    stp[4, 7] = 50.0  # speckle in the optimum half
    stp[0, 0] = np.nan
    mask = np.ones((10, 10), bool)
    zones = make_zones(stp, mask, 0.01, IOWA_ICP.breaks, 0.25)
    assert zones[4, 7] == 3 and zones[0, 0] == 0
    layers = {"stp": stp, "rate": np.where(zones == 1, 80.0, 0.0)}
    stats = zone_statistics(zones, layers, 0.01, labels=CLASS_LABELS)
    assert [row["class_id"] for row in stats] == [1, 3]
    low, optimum = stats
    assert low["label"] == "very low" and optimum["label"] == "optimum"
    assert low["n_cells"] == 49 and low["area_ha"] == pytest.approx(0.49)
    assert low["stp_mean"] == pytest.approx(12.0) and low["rate_mean"] == 80.0
    assert optimum["stp_mean"] == pytest.approx((49 * 30 + 50) / 50)


def test_zone_params_validation():
    with pytest.raises(ConfigError, match="zones.labels"):
        ZoneParams(breaks=(10, 20), labels=("a", "b"))
    with pytest.raises(ConfigError, match="zones.breaks"):
        ZoneParams(breaks=(20, 10), labels=("a", "b", "c"))
    with pytest.raises(ConfigError, match="zones.min_mapping_unit_ha"):
        ZoneParams(min_mapping_unit_ha=-1)
    with pytest.raises(ConfigError, match="zones.min_width_m"):
        ZoneParams(min_width_m=-5)


def _old_components(classes):
    """The labelling zones.py used before it was merged into label_patches (reference)."""
    labels = np.zeros(classes.shape, dtype=np.int64)
    owner = [0]
    for value in np.unique(classes[classes > 0]):
        lab, n = ndimage.label(classes == value, structure=FOUR)
        labels[lab > 0] = lab[lab > 0] + (len(owner) - 1)
        owner.extend([int(value)] * n)
    return labels, np.asarray(owner)


def test_one_labelling_for_components_and_patches():
    # Source: scipy.ndimage.label with 4-connectivity, per class (the reference above).
    from pmap.prescribe.patches import _components

    rng = np.random.default_rng(5)
    for _ in range(5):
        classes = rng.integers(0, 4, (30, 40)).astype(np.uint8)
        ref_labels, ref_owner = _old_components(classes)
        labels, owner = _components(classes)
        np.testing.assert_array_equal(labels, ref_labels)
        np.testing.assert_array_equal(owner, ref_owner)
        lab2, patch_class = label_patches(classes)
        np.testing.assert_array_equal(lab2, ref_labels)
        np.testing.assert_array_equal(patch_class, ref_owner[1:])


def test_min_width_removes_a_corridor_narrower_than_the_boom():
    # common practice, no source: a 1-cell-wide strip of class 2 through class 1 cannot be
    # followed by a 3-cell boom; it goes to the class around it.  A 4-cell-wide band stays.
    classes = np.ones((20, 30), np.uint8)
    classes[:, 10] = 2           # corridor 1 cell wide
    classes[:, 20:24] = 3        # band 4 cells wide
    out = enforce_min_width(classes, np.ones_like(classes, bool), 3)
    assert (out[:, 10] == 1).all()
    assert (out[:, 20:24] == 3).all()
    assert enforce_min_width(classes, np.ones_like(classes, bool), 1).tolist() == classes.tolist()
    # a class with no part wide enough anywhere still gives way
    out5 = enforce_min_width(classes, np.ones_like(classes, bool), 5)
    assert not (out5 == 3).any() and not (out5 == 2).any()
