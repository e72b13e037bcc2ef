"""Coordinate reference systems at the edge: normalise user input once, choose the working CRS.

Everything inward of :mod:`pmap.io` sees a CRS only as the string this module returns:
``"EPSG:NNNN"`` when the CRS has an EPSG code, otherwise its WKT.

The run's working CRS must keep lengths and areas true over the field: kriging ranges,
cell areas and product totals are all measured in it.  :func:`choose_working_crs` takes the
user's CRS only when its scale factors, measured with :meth:`pyproj.Proj.get_factors` over
the field, stay within a tolerance of 1; otherwise the user's CRS is used to read the
coordinates only and the run works in the field's UTM zone.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from pyproj import CRS
from pyproj.exceptions import CRSError

from pmap.errors import InputError

__all__ = [
    "normalise_crs",
    "to_pyproj",
    "utm_crs_for",
    "is_projected_metres",
    "scale_error",
    "choose_working_crs",
]


def to_pyproj(user_input: Any) -> CRS:
    """Parse any CRS description pyproj understands into a :class:`pyproj.CRS`.

    Parameters
    ----------
    user_input : str, int, pyproj.CRS or rasterio CRS
        ``"EPSG:32616"``, ``"epsg:32616"``, ``32616``, ``"32616"``, WKT, PROJ string or a CRS object.

    Raises
    ------
    pmap.errors.InputError
        When the input cannot be parsed.
    """
    if isinstance(user_input, CRS):
        return user_input
    if user_input is None or (isinstance(user_input, str) and not user_input.strip()):
        raise InputError("no CRS given: pass a CRS such as EPSG:32616")
    if isinstance(user_input, bool):
        raise InputError(f"cannot read a CRS from {user_input!r}: pass e.g. EPSG:32616")
    value: Any = user_input
    if isinstance(value, str):
        value = value.strip()
        if value.isdigit():
            value = int(value)
    elif hasattr(value, "to_wkt") and not isinstance(value, int):
        value = value.to_wkt()  # rasterio.crs.CRS and similar objects
    try:
        return CRS.from_user_input(value)
    except CRSError as exc:
        shown = str(user_input)
        shown = shown if len(shown) <= 60 else shown[:57] + "..."
        raise InputError(
            f"cannot read a CRS from {shown!r}: pass an EPSG code such as EPSG:32616 or a WKT string"
        ) from exc


def normalise_crs(user_input: Any) -> str:
    """The canonical string form of a CRS: ``"EPSG:NNNN"`` if it has an EPSG code, else WKT.

    Parameters
    ----------
    user_input : str, int, pyproj.CRS or rasterio CRS
        Any form accepted by :func:`to_pyproj`.

    Returns
    -------
    str
        ``"EPSG:NNNN"`` or a WKT2 string.

    Raises
    ------
    pmap.errors.InputError
        When the input cannot be parsed.
    """
    crs = to_pyproj(user_input)
    code = crs.to_epsg(min_confidence=90)
    if code is not None:
        return f"EPSG:{code}"
    return crs.to_wkt()


def utm_crs_for(lon: float, lat: float) -> str:
    """The WGS 84 / UTM zone CRS holding a point.

    Zones are 6 degrees wide from 180 degrees W (zone 1); lon = 180 falls in zone 60.
    The Norway and Svalbard zone exceptions are not applied: a field there gets the
    regular 6-degree zone, which is still a valid metric projection for a field.

    Parameters
    ----------
    lon, lat : float
        Longitude and latitude (degrees, WGS 84).

    Returns
    -------
    str
        ``"EPSG:326NN"`` north of the equator (lat >= 0), ``"EPSG:327NN"`` south.
    """
    if not (math.isfinite(lon) and math.isfinite(lat)) or not -180 <= lon <= 180 or not -90 <= lat <= 90:
        raise InputError(f"cannot choose a UTM zone for lon={lon}, lat={lat}: outside the globe")
    zone = int(math.floor((lon + 180.0) / 6.0)) + 1
    zone = min(max(zone, 1), 60)
    return f"EPSG:{32600 + zone if lat >= 0 else 32700 + zone}"


def is_projected_metres(crs: Any) -> bool:
    """Whether ``crs`` is a projected CRS whose axes are in metres."""
    parsed = to_pyproj(crs)
    if not parsed.is_projected:
        return False
    axes = parsed.axis_info
    return bool(axes) and all(abs(ax.unit_conversion_factor - 1.0) < 1e-12 for ax in axes[:2])


def scale_error(crs: Any, lon: Any, lat: Any) -> float:
    """Largest departure from 1 of a projection's linear scale at some points.

    At each point the meridional scale ``h``, the parallel scale ``k`` and the square root
    of the areal scale (the linear scale of a small square) are taken from
    :meth:`pyproj.Proj.get_factors`; the result is the largest ``|s - 1|`` over all of them.
    A UTM zone gives 0.0004 on its central meridian and about 0.001 at its edge; Web
    Mercator gives ``1/cos(lat) - 1``, 0.31 at 40 degrees.

    Parameters
    ----------
    crs : str, int or pyproj.CRS
        A projected CRS (any form :func:`to_pyproj` accepts).
    lon, lat : float or array_like
        Longitudes and latitudes of the points (degrees, on the CRS's own datum).

    Returns
    -------
    float
        Dimensionless (0.01 = lengths 1 % too long or short); ``inf`` where the factors
        cannot be computed (a point outside the projection's domain, a CRS that is not a
        projection).
    """
    from pyproj import Proj

    parsed = to_pyproj(crs)
    if not parsed.is_projected:
        return math.inf
    lon = np.atleast_1d(np.asarray(lon, dtype=float))
    lat = np.atleast_1d(np.asarray(lat, dtype=float))
    try:
        factors = Proj(parsed).get_factors(lon, lat)
    except Exception:  # pyproj raises ProjError or CRSError for CRSs it cannot factor
        return math.inf
    scales = np.concatenate([
        np.atleast_1d(np.asarray(factors.meridional_scale, dtype=float)),
        np.atleast_1d(np.asarray(factors.parallel_scale, dtype=float)),
        np.sqrt(np.abs(np.atleast_1d(np.asarray(factors.areal_scale, dtype=float)))),
    ])
    if scales.size == 0 or not np.isfinite(scales).all():
        return math.inf
    return float(np.max(np.abs(scales - 1.0)))


def choose_working_crs(
    requested: str | None, lon: Any, lat: Any, max_scale_error: float
) -> tuple[str, dict[str, Any]]:
    """The run's working CRS and the record of why it was chosen.

    The requested CRS is used when it is projected in metres and its :func:`scale_error`
    at the given points (the field's centroid and the corners of its extent) is at most
    ``max_scale_error``.  Otherwise, or without a requested CRS, the run works in the UTM
    zone of the first point (the centroid); a requested CRS then only says how to read
    coordinates that carry no CRS of their own.

    Parameters
    ----------
    requested : str or None
        The user's CRS (``grid.crs`` / ``--crs``), normalised, or None.
    lon, lat : array_like
        Longitudes and latitudes (degrees, WGS 84) of the field's centroid (first) and the
        corners of its extent.
    max_scale_error : float
        Largest accepted departure of the linear scale from 1 (dimensionless).

    Returns
    -------
    crs : str
        ``"EPSG:NNNN"`` (or WKT) of the working CRS.
    record : dict
        ``requested`` (str or None), ``used`` (str), ``reason`` (one sentence),
        ``scale_error`` (of the used CRS over the field), ``requested_scale_error`` (of the
        requested CRS, None when there is none or it is not projected in metres) and
        ``max_scale_error``.
    """
    lon = np.atleast_1d(np.asarray(lon, dtype=float))
    lat = np.atleast_1d(np.asarray(lat, dtype=float))
    utm = utm_crs_for(float(lon[0]), float(lat[0]))
    utm_error = scale_error(utm, lon, lat)
    record: dict[str, Any] = {"requested": requested, "used": utm, "reason": "",
                              "scale_error": utm_error, "requested_scale_error": None,
                              "max_scale_error": max_scale_error}
    limit = f"grid.max_scale_error = {max_scale_error:g}"
    fallback = f"the run works in the field's UTM zone {utm}"
    if requested is None:
        record["reason"] = (f"no grid.crs given: {fallback} (lon {lon[0]:.4f}, lat {lat[0]:.4f}), "
                            f"scale error {utm_error:.2g}")
        return utm, record
    shown = requested if len(requested) <= 60 else requested[:57] + "..."
    parsed = to_pyproj(requested)
    if parsed.is_geographic:
        record["reason"] = (f"grid.crs {shown} is geographic (degrees): it is used to read x/y "
                            f"as longitude/latitude only; {fallback}")
        return utm, record
    if not is_projected_metres(parsed):
        record["reason"] = (f"grid.crs {shown} is not a projection in metres: it is used to "
                            f"read the coordinates only; {fallback}")
        return utm, record
    error = scale_error(parsed, lon, lat)
    record["requested_scale_error"] = error
    if error > max_scale_error:
        size = "cannot be measured" if not math.isfinite(error) else f"is {error:.3g}"
        record["reason"] = (
            f"grid.crs {shown} distorts lengths over the field (scale error {size}, above "
            f"{limit}): it is used to read the coordinates only; {fallback}, whose scale "
            f"error is {utm_error:.2g}"
        )
        return utm, record
    record["used"], record["scale_error"] = requested, error
    record["reason"] = (f"grid.crs {shown} is projected in metres with a scale error of "
                        f"{error:.2g} over the field (within {limit})")
    return requested, record
