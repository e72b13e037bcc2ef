"""GridSpec: snapping, cell centres, scatter/gather and point lookup agree with each other."""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine

from pmap.grid import GridSpec


def test_from_bounds_snaps_outward_and_covers_the_bounds():
    grid = GridSpec.from_bounds("EPSG:32616", (1003.0, 2001.0, 1048.0, 2029.0), 10.0)
    assert grid.transform == Affine(10.0, 0.0, 1000.0, 0.0, -10.0, 2030.0)
    xmin, ymin, xmax, ymax = grid.bounds
    assert xmin <= 1003.0 and ymin <= 2001.0 and xmax >= 1048.0 and ymax >= 2029.0
    assert (grid.width, grid.height) == (5, 3)
    assert grid.cell_area_ha == pytest.approx(0.01)


def test_cell_centres_are_north_up():
    grid = GridSpec.from_bounds("EPSG:32616", (0.0, 0.0, 30.0, 20.0), 10.0)
    x, y = grid.cell_centres()
    assert x[0, 0] == 5.0 and y[0, 0] == 15.0  # row 0 is the northern edge
    assert x[-1, -1] == 25.0 and y[-1, -1] == 5.0


def test_fill_and_inside_coords_are_one_order_and_rowcol_inverts_them():
    mask = np.array([[True, False, True], [False, True, True]])
    grid = GridSpec.from_bounds("EPSG:32616", (0.0, 0.0, 30.0, 20.0), 10.0, mask)
    coords = grid.inside_coords()
    assert coords.shape == (4, 2)
    full = grid.fill(np.arange(4.0))
    assert np.isnan(full[~mask]).all()
    r, c = grid.rowcol(coords[:, 0], coords[:, 1])
    assert np.array_equal(full[r, c], np.arange(4.0))
    with pytest.raises(ValueError, match="values for 4 inside cells"):
        grid.fill(np.arange(5.0))


def test_rejects_rotated_or_non_square_grids():
    mask = np.ones((2, 2), bool)
    with pytest.raises(ValueError, match="north-up"):
        GridSpec("EPSG:32616", Affine(10, 0, 0, 0, 10, 0), 2, 2, mask)
    with pytest.raises(ValueError, match="square"):
        GridSpec("EPSG:32616", Affine(10, 0, 0, 0, -5, 0), 2, 2, mask)
    with pytest.raises(ValueError, match="mask shape"):
        GridSpec("EPSG:32616", Affine(10, 0, 0, 0, -10, 0), 3, 2, mask)
