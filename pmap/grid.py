"""The raster carrier: one object holding a grid's CRS, transform, shape and field mask.

Every raster array in pmap travels with a :class:`GridSpec`; no function takes a loose
transform or CRS.  Grids are north-up: row 0 is the northern edge, and the transform's
``e`` term is negative.  Numerics in :mod:`pmap.geostats` work on point lists built by
:meth:`GridSpec.inside_coords` and come back through :meth:`GridSpec.fill`, so no array
is ever flipped.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from affine import Affine

__all__ = [
    "GridSpec",
    "NODATA",
    "BYTES_PER_CELL",
    "BASE_BYTES",
    "estimate_grid",
    "snap_bounds",
    "estimate_memory_bytes",
]

#: Value written for cells outside the field in float rasters.
NODATA: float = -9999.0

#: Memory a whole run needs per grid cell (bytes): 64 float64 values.  Measured on the demo
#: field (``run_field`` with every layer, map and polygon): the peak resident memory was
#: 494 MiB at 2 m (249,504 cells) and 856 MiB at 1 m (994,004 cells), 510 bytes more per
#: cell.  The result's layers (kriged properties and variances, soil pools, fixation, zones,
#: rates) are about 30 full-grid float64 arrays; the rest is the per-property kriging
#: results and the temporary arrays of masking, polygonising, map drawing and writing.
BYTES_PER_CELL: int = 64 * 8
#: Memory of a run apart from its grid and kriging blocks (bytes): the interpreter, pmap's
#: libraries and the inputs.  The line through the two measurements above meets zero cells
#: at 373 MiB, of which the demo's kriging blocks (93 samples) are 43 MiB.
BASE_BYTES: int = 336 * 2**20


def snap_bounds(
    bounds: tuple[float, float, float, float], cell_size: float
) -> tuple[float, float, int, int]:
    """Origin (x0, y0) snapped outward to multiples of ``cell_size``, and width, height."""
    if not (cell_size > 0 and math.isfinite(cell_size)):
        raise ValueError(f"cell size must be positive and finite, got {cell_size}")
    xmin, ymin, xmax, ymax = (float(b) for b in bounds)
    if not all(math.isfinite(b) for b in (xmin, ymin, xmax, ymax)) or xmax < xmin or ymax < ymin:
        raise ValueError(f"bounds must be finite (xmin, ymin, xmax, ymax), got {bounds}")
    x0 = math.floor(xmin / cell_size) * cell_size
    y0 = math.ceil(ymax / cell_size) * cell_size
    width = max(1, math.ceil((xmax - x0) / cell_size - 1e-9))
    height = max(1, math.ceil((y0 - ymin) / cell_size - 1e-9))
    return x0, y0, width, height


def estimate_grid(
    bounds: tuple[float, float, float, float], cell_size: float
) -> tuple[int, int, int]:
    """Shape of the grid :meth:`GridSpec.from_bounds` would build, without building it.

    Parameters
    ----------
    bounds : tuple of float
        (xmin, ymin, xmax, ymax) of the field (m).
    cell_size : float
        Cell edge length (m), > 0.

    Returns
    -------
    width, height, n_cells : int
        Columns, rows and their product (cells of the whole grid, inside the field or not).
    """
    _, _, width, height = snap_bounds(bounds, cell_size)
    return width, height, width * height


def estimate_memory_bytes(n_cells: int, n_samples: int = 0, chunk_size: int = 20_000) -> int:
    """Peak memory a run needs for a grid of ``n_cells`` cells (bytes), by pmap's budget.

    ``BASE_BYTES + BYTES_PER_CELL * n_cells`` plus the kriging blocks: per block of
    ``chunk_size`` targets, the distance, right-hand-side and solution matrices of
    ``n_samples + 1`` rows (three float64 arrays).  A budget, not a promise: it was measured
    on the demo and is meant to be right within a factor of about 1.5.

    Parameters
    ----------
    n_cells : int
        Cells of the whole grid (width x height).
    n_samples : int
        Samples kriged (0 when not yet known).
    chunk_size : int
        Targets per kriging block (``kriging.chunk_size``).
    """
    blocks = 3 * (n_samples + 1) * min(chunk_size, max(n_cells, 1)) * 8
    return BASE_BYTES + BYTES_PER_CELL * int(n_cells) + blocks


@dataclass(frozen=True, eq=False)
class GridSpec:
    """A north-up raster grid in a projected CRS, with the field mask.

    Parameters
    ----------
    crs : str
        Projected CRS as ``"EPSG:NNNN"`` (or WKT when no EPSG code exists); units metres.
    transform : affine.Affine
        Pixel-to-CRS transform of the upper-left corner; square cells, north-up.
    width, height : int
        Number of columns and rows.
    mask : numpy.ndarray of bool, shape (height, width)
        True for cells whose centre lies inside the field boundary.
    """

    crs: str
    transform: Affine
    width: int
    height: int
    mask: np.ndarray = field(repr=False)

    def __post_init__(self) -> None:
        if self.mask.shape != (self.height, self.width):
            raise ValueError(
                f"mask shape {self.mask.shape} does not match grid ({self.height}, {self.width})"
            )
        if self.transform.b != 0 or self.transform.d != 0 or self.transform.e >= 0:
            raise ValueError("GridSpec needs a north-up transform without rotation")
        if not np.isclose(self.transform.a, -self.transform.e):
            raise ValueError("GridSpec needs square cells")

    @classmethod
    def from_bounds(
        cls,
        crs: str,
        bounds: tuple[float, float, float, float],
        cell_size: float,
        mask: np.ndarray | None = None,
    ) -> GridSpec:
        """Build a grid covering ``bounds`` (xmin, ymin, xmax, ymax, metres).

        The origin is snapped outward to a multiple of ``cell_size`` so that grids of
        neighbouring fields line up.  Without ``mask`` every cell counts as inside.
        """
        x0, y0, width, height = snap_bounds(bounds, cell_size)
        transform = Affine(cell_size, 0.0, x0, 0.0, -cell_size, y0)
        if mask is None:
            mask = np.ones((height, width), dtype=bool)
        return cls(crs, transform, width, height, np.asarray(mask, dtype=bool))

    def with_mask(self, mask: np.ndarray) -> GridSpec:
        """The same grid with another field mask."""
        return GridSpec(self.crs, self.transform, self.width, self.height, np.asarray(mask, bool))

    @property
    def shape(self) -> tuple[int, int]:
        """(rows, columns)."""
        return (self.height, self.width)

    @property
    def cell_size(self) -> float:
        """Cell edge length (m)."""
        return float(self.transform.a)

    @property
    def cell_area_ha(self) -> float:
        """Area of one cell (ha)."""
        return self.cell_size**2 / 10_000.0

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(xmin, ymin, xmax, ymax) of the whole grid (m)."""
        t = self.transform
        return (t.c, t.f + t.e * self.height, t.c + t.a * self.width, t.f)

    @property
    def n_inside(self) -> int:
        """Number of cells inside the field."""
        return int(self.mask.sum())

    def cell_centres(self) -> tuple[np.ndarray, np.ndarray]:
        """x and y of every cell centre, each of shape (height, width) (m)."""
        t = self.transform
        cols = t.c + t.a * (np.arange(self.width) + 0.5)
        rows = t.f + t.e * (np.arange(self.height) + 0.5)
        return np.meshgrid(cols, rows)

    def inside_coords(self) -> np.ndarray:
        """Centres of the cells inside the field as an (m, 2) array of x, y (m), row-major."""
        x, y = self.cell_centres()
        return np.column_stack([x[self.mask], y[self.mask]])

    def fill(self, values: np.ndarray, outside: float = np.nan) -> np.ndarray:
        """Scatter per-cell ``values`` (order of :meth:`inside_coords`) into a full 2-D array."""
        values = np.asarray(values)
        if values.shape[0] != self.n_inside:
            raise ValueError(f"got {values.shape[0]} values for {self.n_inside} inside cells")
        dtype = np.result_type(values.dtype, np.float32 if np.isnan(outside) else values.dtype)
        out = np.full(self.shape, outside, dtype=dtype)
        out[self.mask] = values
        return out

    def rowcol(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Row and column indices of the cells holding points ``x``, ``y`` (may fall outside)."""
        t = self.transform
        col = (np.asarray(x, float) - t.c) / t.a
        row = (np.asarray(y, float) - t.f) / t.e
        return np.floor(row).astype(int), np.floor(col).astype(int)
