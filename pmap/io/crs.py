"""Coordinate reference systems at the edge: normalise user input once, pick a UTM zone.

Everything inward of :mod:`pmap.io` sees a CRS only as the string this module returns:
``"EPSG:NNNN"`` when the CRS has an EPSG code, otherwise its WKT.
"""

from __future__ import annotations

import math
from typing import Any

from pyproj import CRS
from pyproj.exceptions import CRSError

from pmap.errors import InputError

__all__ = ["normalise_crs", "to_pyproj", "utm_crs_for", "is_projected_metres"]


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
