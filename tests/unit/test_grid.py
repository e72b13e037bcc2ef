"""GridSpec: snapping, cell centres, scatter/gather and point lookup agree with each other."""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from pmap.config import GridSettings
from pmap.errors import ConfigError
from pmap.grid import BYTES_PER_CELL, GridSpec, estimate_grid, estimate_memory_bytes


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


# ----------------------------------------------------------------- size before allocation


@settings(max_examples=200, deadline=None)
@given(
    xmin=st.floats(-1e6, 1e6), ymin=st.floats(-1e7, 1e7),
    dx=st.floats(0.0, 5000.0), dy=st.floats(0.0, 5000.0),
    cell=st.sampled_from([1.0, 2.5, 5.0, 7.3, 10.0, 33.3, 100.0]),
)
def test_estimate_grid_is_the_shape_from_bounds_builds(xmin, ymin, dx, dy, cell):
    bounds = (xmin, ymin, xmin + dx, ymin + dy)
    grid = GridSpec.from_bounds("EPSG:32616", bounds, cell)
    assert estimate_grid(bounds, cell) == (grid.width, grid.height, grid.width * grid.height)


def test_estimate_grid_of_a_tiny_cell_is_instant_and_allocates_nothing():
    import tracemalloc

    tracemalloc.start()
    width, height, n = estimate_grid((330_000.0, 4_443_000.0, 331_100.0, 4_443_900.0), 0.01)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert (width, height, n) == (110_000, 90_000, 9_900_000_000)
    assert peak < 100_000  # bytes: no grid was built
    with pytest.raises(ValueError, match="cell size must be positive"):
        estimate_grid((0.0, 0.0, 10.0, 10.0), 0.0)
    with pytest.raises(ValueError, match="bounds must be finite"):
        estimate_grid((0.0, 0.0, float("nan"), 10.0), 1.0)


def test_memory_estimate_matches_the_measured_demo_runs():
    # Measured: run_field on the demo field (93 samples, every layer, map and
    # polygon), peak resident memory 494 MiB at 2 m and 856 MiB at 1 m cells, on Linux with
    # Python 3.11; see pmap.grid.BYTES_PER_CELL.  The budget must stay within 10 % of both.
    for cells, measured_mib in [(249_504, 494), (994_004, 856)]:
        estimate = estimate_memory_bytes(cells, n_samples=93, chunk_size=20_000) / 2**20
        assert estimate == pytest.approx(measured_mib, rel=0.10)
    # Kriging blocks grow with samples x chunk, not with cells beyond one chunk.
    assert (estimate_memory_bytes(10**6, 1000) - estimate_memory_bytes(10**6, 0)
            == 3 * 1000 * 20_000 * 8)
    assert estimate_memory_bytes(2 * 10**6) - estimate_memory_bytes(10**6) == BYTES_PER_CELL * 10**6


@pytest.mark.parametrize("value", [0.01, 0.5, 0.999, 100.5, float("nan"), float("inf")])
def test_cell_size_outside_1_to_100_m_is_a_config_error(value):
    with pytest.raises(ConfigError, match=r"grid\.cell_size_m must lie in \[1, 100\]"):
        GridSettings(cell_size_m=value)


def test_grid_settings_bounds():
    assert GridSettings(cell_size_m=1.0).cell_size_m == 1.0
    assert GridSettings(cell_size_m=100.0).cell_size_m == 100.0
    assert GridSettings().max_cells == 10_000_000
    assert GridSettings().max_scale_error == 0.005
    for bad in (0, -5, 1.5, True):
        with pytest.raises(ConfigError, match=r"grid\.max_cells must be a whole number >= 1"):
            GridSettings(max_cells=bad)
    for bad in (0.0, 0.0005, 0.006, 0.31):
        with pytest.raises(ConfigError, match=r"grid\.max_scale_error must lie in \[0\.001, 0\.005\]"):
            GridSettings(max_scale_error=bad)
