"""Rate polygons tile the field boundary: cut exactly, gaps filled, simplified as a coverage."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from shapely.geometry import MultiPolygon, Polygon, box

from pmap.grid import GridSpec
from pmap.io.vectors import coverage_polygons, patch_polygons, polygon_labels
from pmap.prescribe.zones import label_patches, make_zones

CELL = 5.0


def field_mask(grid: GridSpec, boundary) -> np.ndarray:
    """Cells whose centre lies inside ``boundary`` (the field mask's definition)."""
    x, y = grid.cell_centres()
    return shapely.contains_xy(boundary, x, y)


def _grid_and_zones(boundary, seed=0):
    xmin, ymin, xmax, ymax = boundary.bounds
    grid = GridSpec.from_bounds("EPSG:32616", (xmin - CELL, ymin - CELL, xmax + CELL, ymax + CELL),
                                CELL)
    grid = GridSpec(grid.crs, grid.transform, grid.width, grid.height, field_mask(grid, boundary))
    rows, cols = np.indices(grid.shape)
    rng = np.random.default_rng(seed)
    field = 20 + 15 * np.sin(cols / 9.0) + 10 * np.cos(rows / 13.0) + rng.normal(0, 2, grid.shape)
    zones = make_zones(np.where(grid.mask, field, np.nan), grid.mask, grid.cell_area_ha,
                       (15.0, 25.0, 35.0), 0.25)
    return grid, zones


BOUNDARIES = {
    # An irregular quadrilateral whose edges cut cells diagonally.
    "skewed": Polygon([(500003, 4400001), (500611, 4400042), (500590, 4400497), (500021, 4400530)]),
    "L-shaped": Polygon([(500000, 4400000), (500600, 4400000), (500600, 4400200),
                         (500230, 4400200), (500230, 4400500), (500000, 4400500)]),
    "holed": Polygon([(500000, 4400000), (500600, 4400000), (500600, 4400500), (500000, 4400500)],
                     [[(500250, 4400200), (500352, 4400200), (500352, 4400303), (500250, 4400303)]]),
    # A centre-pivot circle: 256 vertices 6 m apart, which a simplified outer edge would lose.
    "round": shapely.Point(500250, 4400250).buffer(240, quad_segs=64),
    "two parts": MultiPolygon([box(500000, 4400000, 500300, 4400300),
                               box(500420.5, 4400080.5, 500650.5, 4400330.5)]),
}


@pytest.mark.parametrize("name", sorted(BOUNDARIES))
def test_polygons_tile_the_boundary(name):
    # Source: shapely coverage semantics (coverage_is_valid: no overlaps, edges matched);
    # the tolerance: union equal to the boundary within 0.1 % of its area.
    boundary = BOUNDARIES[name]
    grid, zones = _grid_and_zones(boundary)
    labels, patch_class = label_patches(zones)
    min_area = 0.25 * 10_000
    polys, merged = coverage_polygons(labels, patch_class, grid, boundary, min_area_m2=min_area)
    geoms = list(polys.values())
    union = shapely.union_all(geoms)
    assert abs(union.area - boundary.area) <= 1e-3 * boundary.area
    assert shapely.symmetric_difference(union, boundary).area <= 1e-3 * boundary.area
    assert abs(sum(g.area for g in geoms) - union.area) <= 1e-6 * union.area  # no overlaps
    tree = shapely.STRtree(geoms)
    left, right = tree.query(geoms, predicate="intersects")
    overlap = [shapely.intersection(geoms[i], geoms[j]).area
               for i, j in zip(left, right, strict=True) if i < j]
    assert max(overlap, default=0.0) < 1e-6  # m2: neighbours share edges, never area
    assert all(g.is_valid for g in geoms)
    assert min(p.area for g in geoms for p in getattr(g, "geoms", [g])) >= min_area
    assert bool(shapely.coverage_is_valid(np.array(geoms, dtype=object)))
    # the outer edge is the boundary's, not simplified (within the 1 mm snapping)
    assert shapely.hausdorff_distance(union.boundary, boundary.boundary) < 0.01
    assert set(polys) | set(merged) <= set(range(1, len(patch_class) + 1))
    labels_back = polygon_labels(polys, grid)
    assert (labels_back[grid.mask] > 0).all() and (labels_back[~grid.mask] == 0).all()


def test_simplification_removes_the_staircase():
    # common practice, no source: a boom follows edges, not cell staircases.
    boundary = BOUNDARIES["skewed"]
    grid, zones = _grid_and_zones(boundary, seed=3)
    labels, patch_class = label_patches(zones)
    raw = patch_polygons(labels, patch_class, grid)
    polys, _ = coverage_polygons(labels, patch_class, grid, boundary)
    n_raw = sum(shapely.get_num_coordinates(g) for g, _ in raw)
    n_new = sum(shapely.get_num_coordinates(g) for g in polys.values())
    # on this 5 m raster 3,096 traced vertices become 1,194 (ratio 0.39) at one cell
    assert n_new < 0.45 * n_raw, (n_raw, n_new)
    kept, _ = coverage_polygons(labels, patch_class, grid, boundary, tolerance_m=0.0)
    assert sum(shapely.get_num_coordinates(g) for g in kept.values()) >= n_raw


def test_uncut_staircase_would_spill_outside():
    # The traced polygons alone spill outside the skewed boundary; the cut removes that.
    boundary = BOUNDARIES["skewed"]
    grid, zones = _grid_and_zones(boundary)
    labels, patch_class = label_patches(zones)
    raw = shapely.union_all([g for g, _ in patch_polygons(labels, patch_class, grid)])
    assert shapely.difference(raw, boundary).area > 10.0
    polys, _ = coverage_polygons(labels, patch_class, grid, boundary)
    assert shapely.difference(shapely.union_all(list(polys.values())), boundary).area < 1.0


def test_small_pieces_join_their_longest_neighbour():
    # A 2-cell patch at the edge of a field: below the minimum area it joins the neighbour.
    boundary = box(0, 0, 50, 50)
    grid = GridSpec.from_bounds("EPSG:32616", (0, 0, 50, 50), 5.0)
    grid = GridSpec(grid.crs, grid.transform, grid.width, grid.height, field_mask(grid, boundary))
    zones = np.ones(grid.shape, dtype=np.uint8)
    zones[:, 5:] = 2
    zones[0, 0:2] = 3
    labels, patch_class = label_patches(zones)
    polys, merged = coverage_polygons(labels, patch_class, grid, boundary, min_area_m2=100.0)
    small = int(labels[0, 0])
    assert small in merged and merged[small] == int(labels[5, 0])
    assert abs(sum(g.area for g in polys.values()) - 2500.0) < 1e-6


def _split_field():
    # Two parts 1 m apart; no cell centre lies in the gap, so patch 1 (x < 60) spans it.
    boundary = MultiPolygon([box(0, 0, 46, 50), box(47, 0, 100, 50)])
    grid = GridSpec.from_bounds("EPSG:32616", (0, 0, 100, 50), 5.0)
    grid = grid.with_mask(field_mask(grid, boundary))
    zones = np.where(np.indices(grid.shape)[1] < 12, 1, 2).astype(np.uint8)
    labels, patch_class = label_patches(zones)
    return boundary, grid, labels, patch_class


def test_a_zone_the_boundary_splits_stays_one_multipolygon():
    boundary, grid, labels, patch_class = _split_field()
    assert grid.mask.all() and len(patch_class) == 2
    polys, merged = coverage_polygons(labels, patch_class, grid, boundary, tolerance_m=0.0)
    assert not merged and polys[1].geom_type == "MultiPolygon" and len(polys[1].geoms) == 2
    assert polys[1].area == pytest.approx(46 * 50 + 13 * 50)
    assert polys[2].area == pytest.approx(40 * 50)


def test_a_small_part_of_a_split_zone_joins_its_neighbour():
    # The 13 m x 50 m part of zone 1 (650 m2) is below 1,000 m2 and borders zone 2 only.
    boundary, grid, labels, patch_class = _split_field()
    polys, merged = coverage_polygons(labels, patch_class, grid, boundary, min_area_m2=1000.0,
                                      tolerance_m=0.0)
    assert not merged and polys[1].geom_type == "Polygon"
    assert polys[1].area == pytest.approx(46 * 50)
    assert polys[2].area == pytest.approx(53 * 50)
    assert shapely.equals(polys[2], box(47, 0, 100, 50))


def test_a_boundary_piece_without_cells_goes_to_the_nearest_zone_and_stays():
    # A 1.5 m x 1.5 m outlier of the boundary holds no cell centre and touches no zone.
    boundary = MultiPolygon([box(0, 0, 50, 50), box(60.5, 0.5, 62, 2)])
    grid = GridSpec.from_bounds("EPSG:32616", (0, 0, 65, 50), 5.0)
    grid = grid.with_mask(field_mask(grid, boundary))
    zones = np.where(np.indices(grid.shape)[1] < 5, 1, 2).astype(np.uint8)
    labels, patch_class = label_patches(np.where(grid.mask, zones, 0))
    polys, merged = coverage_polygons(labels, patch_class, grid, boundary, min_area_m2=100.0,
                                      tolerance_m=0.0)
    assert not merged
    assert sum(g.area for g in polys.values()) == pytest.approx(boundary.area)
    assert polys[2].geom_type == "MultiPolygon" and polys[2].area == pytest.approx(25 * 50 + 2.25)


def test_a_corner_is_not_a_border():
    # A 100 m2 zone filling a boundary part that meets the rest at one corner: no border
    # to join across, so it stays (joining would only make a two-part zone).
    boundary = MultiPolygon([box(0, 0, 50, 50), box(50, 50, 60, 60)])
    grid = GridSpec.from_bounds("EPSG:32616", (0, 0, 60, 60), 5.0)
    grid = grid.with_mask(field_mask(grid, boundary))
    rows, cols = np.indices(grid.shape)
    zones = np.where(grid.mask, np.where((cols >= 10) & (rows < 2), 2, 1), 0).astype(np.uint8)
    labels, patch_class = label_patches(zones)
    small, big = int(labels[0, 10]), int(labels[5, 0])
    assert sorted(patch_class) == [1, 2] and small != big
    polys, merged = coverage_polygons(labels, patch_class, grid, boundary, min_area_m2=200.0)
    assert not merged and polys[small].area == pytest.approx(100.0)
    assert polys[big].area == pytest.approx(2500.0)
