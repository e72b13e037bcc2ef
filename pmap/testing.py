"""Assertion helpers for tests of pmap and of code built on it.

:func:`assert_raster_equal` compares a raster file (or array) with expected values and,
for files, with the expected CRS, transform and nodata, in the spirit of
:func:`shapely.testing.assert_geometries_equal`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from affine import Affine

__all__ = ["assert_raster_equal"]


def assert_raster_equal(
    path_or_array: str | Path | np.ndarray,
    expected_array: np.ndarray,
    *,
    crs: str | None = None,
    transform: Affine | None = None,
    nodata: float | None = None,
    rtol: float = 1e-6,
    atol: float = 0.0,
) -> None:
    """Assert that a raster holds the expected values (and, for a file, georeferencing).

    Parameters
    ----------
    path_or_array : str, Path or numpy.ndarray
        A raster file (band 1 is compared) or an array.
    expected_array : numpy.ndarray
        Expected values; NaN where nodata is expected.  A file's nodata cells read as NaN
        for float rasters; integer rasters compare as stored.
    crs : str, optional
        Expected CRS (any form :func:`pmap.io.crs.normalise_crs` accepts); files only.
    transform : affine.Affine, optional
        Expected transform, compared to 1e-9 of a cell; files only.
    nodata : float, optional
        Expected nodata value; files only.
    rtol, atol : float
        Tolerances for the values, as in :func:`numpy.testing.assert_allclose`.

    Raises
    ------
    AssertionError
        With a message naming what differs.
    """
    expected = np.asarray(expected_array)
    if isinstance(path_or_array, (str, Path)):
        from pmap.io.crs import normalise_crs
        from pmap.io.rasters import read_raster

        actual, info, _ = read_raster(path_or_array)
        where = str(path_or_array)
        if crs is not None and info.crs != normalise_crs(crs):
            raise AssertionError(f"{where}: CRS {info.crs[:60]} != expected {normalise_crs(crs)[:60]}")
        if transform is not None:
            tol = 1e-9 * max(abs(transform.a), 1.0)
            if not info.transform.almost_equals(transform, precision=tol):
                raise AssertionError(f"{where}: transform {tuple(info.transform)[:6]} != expected "
                                     f"{tuple(transform)[:6]}")
        if nodata is not None and not (info.nodata == nodata
                                       or (np.isnan(nodata) and info.nodata is not None
                                           and np.isnan(info.nodata))):
            raise AssertionError(f"{where}: nodata {info.nodata} != expected {nodata}")
    else:
        if crs is not None or transform is not None or nodata is not None:
            raise TypeError("crs, transform and nodata can only be checked on a raster file")
        actual = np.asarray(path_or_array)
        where = "array"
    if actual.shape != expected.shape:
        raise AssertionError(f"{where}: shape {actual.shape} != expected {expected.shape}")
    if actual.dtype.kind == "f" or expected.dtype.kind == "f":
        a, e = actual.astype(np.float64), expected.astype(np.float64)
        nan_a, nan_e = np.isnan(a), np.isnan(e)
        if not np.array_equal(nan_a, nan_e):
            n = int((nan_a != nan_e).sum())
            raise AssertionError(f"{where}: nodata/NaN pattern differs in {n} cells")
        np.testing.assert_allclose(a[~nan_a], e[~nan_e], rtol=rtol, atol=atol,
                                   err_msg=f"{where}: values differ")
    elif not np.array_equal(actual, expected):
        n = int((actual != expected).sum())
        raise AssertionError(f"{where}: {n} cells differ")
