"""Coordinate reference systems: parsing, checks, and the local metric projection.

Spatial eigenvectors, neighbour graphs and scales are computed with planar (Euclidean)
distances, so every survey is brought into a *working* CRS whose map units are lengths:

* a projected CRS is kept as it is (its map units may be metres, feet, ...);
* geographic coordinates (degrees) are projected to an azimuthal equidistant projection centred
  on the survey, on the survey's own datum. Distances from the centre are exact; for other pairs
  the scale error grows roughly with the square of the distance from the centre (c/sin c − 1 for
  angular distance c: about 0.01 % at 150 km, 1 % at 1,500 km), which is negligible for field
  surveys up to a few hundred kilometres across. Beyond 1 % the reader refuses and asks for a
  projected CRS chosen by the user;
* local planar coordinates (no CRS) are used as given, in the unit the user declares.

Assumption: the working CRS is a faithful planar representation of the survey; a conformal or
equal-area national projection is usually fine, but a global web-mapping projection at high
latitude is not (scale differs by 1/cos(latitude) across the survey).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyproj
from pyproj.crs import ProjectedCRS
from pyproj.crs.coordinate_operation import AzimuthalEquidistantConversion

from spatial_ev.errors import CRSError

__all__ = [
    "parse_crs",
    "crs_label",
    "distance_unit_of",
    "normalise_local_unit",
    "check_geographic_ranges",
    "local_metric_crs",
    "is_local_metric_crs",
    "looks_geographic_name",
    "scale_range",
]

# accepted spellings of local planar units -> canonical name (the name pyproj uses where any)
_LOCAL_UNITS = {
    "metre": "metre", "meter": "metre", "metres": "metre", "meters": "metre", "m": "metre",
    "kilometre": "kilometre", "kilometer": "kilometre", "kilometres": "kilometre",
    "kilometers": "kilometre", "km": "kilometre",
    "centimetre": "centimetre", "centimeter": "centimetre", "cm": "centimetre",
    "foot": "foot", "feet": "foot", "ft": "foot",
    "yard": "yard", "yards": "yard", "yd": "yard",
    "mile": "mile", "miles": "mile", "mi": "mile",
    "grid cell": "grid cell", "cell": "grid cell", "cells": "grid cell",
}

_LOCAL_NAME_START = "Azimuthal equidistant centred on "  # name of the local projection

MAX_SCALE_ERROR = 0.01  # largest tolerated distance distortion of the local projection

_LAT_NAMES = {"lat", "latitude", "lat_dd", "latitude_dd", "decimallatitude", "lat_deg", "y_lat"}
_LON_NAMES = {"lon", "long", "lng", "longitude", "lon_dd", "longitude_dd", "decimallongitude",
              "lon_deg", "x_lon"}


def parse_crs(value: Any, *, argument: str = "crs") -> pyproj.CRS:
    """Turn an EPSG code, ``"EPSG:nnnn"`` string, WKT or PROJ string into a 2-D horizontal CRS.

    Parameters
    ----------
    value : int, str or pyproj.CRS
        The CRS as the user gave it.
    argument : str
        Name of the argument or option, used in error messages.

    Returns
    -------
    pyproj.CRS
        A geographic or projected CRS (a compound CRS is reduced to its horizontal part).

    Examples
    --------
    >>> parse_crs("32630").name
    'WGS 84 / UTM zone 30N'
    """
    if isinstance(value, str) and value.strip().isdigit():
        value = int(value.strip())
    try:
        crs = pyproj.CRS.from_user_input(value)
    except (pyproj.exceptions.CRSError, TypeError, ValueError) as exc:
        raise CRSError(f"`{argument}` {value!r} is not a coordinate reference system pyproj "
                       f"recognises ({_first_line(exc)}); give an EPSG code such as "
                       f"'EPSG:32630' or '4326', or a WKT string") from None
    if crs.is_compound:
        horizontal = [c for c in crs.sub_crs_list if c.is_geographic or c.is_projected]
        if horizontal:
            crs = horizontal[0]
    if not (crs.is_geographic or crs.is_projected):
        raise CRSError(f"`{argument}` {crs_label(crs)} is neither geographic nor projected "
                       f"(type {crs.type_name!r}); give the horizontal CRS of the coordinates")
    return crs


def crs_label(crs: pyproj.CRS | None) -> str:
    """Short human-readable label: ``"EPSG:32630 (WGS 84 / UTM zone 30N)"``.

    Examples
    --------
    >>> crs_label(pyproj.CRS(4326))
    'EPSG:4326 (WGS 84)'
    >>> crs_label(None)
    'none (local planar coordinates)'
    """
    if crs is None:
        return "none (local planar coordinates)"
    code = crs.to_authority(min_confidence=90)
    if code is not None:
        return f"{code[0]}:{code[1]} ({crs.name})"
    return crs.name if crs.name and crs.name != "undefined" else crs.to_proj4() or crs.to_wkt()


def distance_unit_of(crs: pyproj.CRS) -> str:
    """Unit of the map coordinates of a projected CRS, from its axis information.

    Examples
    --------
    >>> distance_unit_of(pyproj.CRS(2263))
    'US survey foot'
    """
    units = {axis.unit_name for axis in crs.axis_info[:2]}
    if len(units) != 1:
        raise CRSError(f"CRS {crs_label(crs)} has axes in different units {sorted(units)}; "
                       f"reproject the sites to a CRS with one length unit")
    return units.pop()


def normalise_local_unit(unit: str) -> str:
    """Canonical name of a declared local planar unit (``"m"`` → ``"metre"``).

    Examples
    --------
    >>> normalise_local_unit("Meters")
    'metre'
    """
    key = " ".join(str(unit).strip().lower().split())
    if key not in _LOCAL_UNITS:
        allowed = sorted(set(_LOCAL_UNITS.values()))
        raise CRSError(f"`local_unit` {unit!r} is not a known length unit; use one of "
                       f"{', '.join(map(repr, allowed))}")
    return _LOCAL_UNITS[key]


def looks_geographic_name(name: str, axis: str) -> bool:
    """Whether a column name looks like latitude (``axis="y"``) or longitude (``"x"``).

    Examples
    --------
    >>> looks_geographic_name("Latitude", "y"), looks_geographic_name("northing", "y")
    (True, False)
    """
    key = str(name).strip().lower().replace(" ", "").replace("-", "_")
    return key in (_LAT_NAMES if axis == "y" else _LON_NAMES)


def check_geographic_ranges(lon: np.ndarray, lat: np.ndarray, *, source: str,
                            site_ids: Any = None) -> None:
    """Raise :class:`CRSError` when degrees fall outside ±180 (x) / ±90 (y).

    A hint is added when the values would fit with longitude and latitude swapped.

    Examples
    --------
    >>> check_geographic_ranges(np.array([10.0]), np.array([60.0]), source="sites.csv")
    """
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    bad_lat = np.abs(lat) > 90
    bad_lon = np.abs(lon) > 180
    if not (bad_lat.any() or bad_lon.any()):
        return
    axis, values, bad = ("latitude (y)", lat, bad_lat) if bad_lat.any() else \
        ("longitude (x)", lon, bad_lon)
    i = int(np.flatnonzero(bad)[0])
    site = f" at site {site_ids[i]!r}" if site_ids is not None else ""
    hint = ""
    if (np.abs(lon) <= 90).all() and (np.abs(lat) <= 180).all():
        hint = ("; the values would fit with x and y swapped: x must be the longitude and y "
                "the latitude (swap the coordinate columns)")
    raise CRSError(f"{source}: {int(bad.sum())} {axis} value(s) outside the valid range "
                   f"(±{90 if bad is bad_lat else 180} degrees), e.g. {float(values[i])!r}{site}, "
                   f"yet "
                   f"the CRS is geographic{hint}; if the coordinates are not degrees, give "
                   f"their projected CRS instead")


def local_metric_crs(lon: np.ndarray, lat: np.ndarray,
                     geodetic_crs: pyproj.CRS | None = None) -> tuple[pyproj.CRS, str]:
    """Azimuthal equidistant projection centred on the survey, in metres.

    The centre is the normalised mean of the sites' unit vectors on the sphere (robust to
    surveys that straddle the ±180° meridian), rounded to 1e-6 degree. The projection keeps the
    survey's datum (``geodetic_crs``; WGS 84 when not given).

    Returns
    -------
    crs : pyproj.CRS
        The projected working CRS.
    note : str
        One sentence recording the choice, for reports.

    Examples
    --------
    >>> crs, note = local_metric_crs(np.array([-20.0, -19.0]), np.array([65.0, 65.5]))
    >>> crs.is_projected, crs.axis_info[0].unit_name
    (True, 'metre')
    """
    lam = np.radians(np.asarray(lon, dtype=float))
    phi = np.radians(np.asarray(lat, dtype=float))
    xyz = np.column_stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)])
    mean = xyz.mean(axis=0)
    norm = float(np.linalg.norm(mean))
    if norm < 1e-6:
        raise CRSError("the sites are spread around the whole globe; no local projection fits "
                       "them; give a projected CRS for the analysis")
    cx, cy, cz = mean / norm
    lat0 = round(float(np.degrees(np.arcsin(np.clip(cz, -1, 1)))), 6)
    lon0 = round(float(np.degrees(np.arctan2(cy, cx))), 6)
    # perpendicular scale of the azimuthal equidistant projection at angular distance c from
    # the centre is c / sin(c) [derived]; the farthest site bounds the distortion
    c = float(np.arccos(np.clip(xyz @ (mean / norm), -1.0, 1.0)).max())
    scale_error = c / np.sin(c) - 1.0 if c > 1e-12 else 0.0
    if scale_error > MAX_SCALE_ERROR:
        raise CRSError(f"the sites extend {np.degrees(c):.1f} degrees from their centre; a "
                       f"local azimuthal equidistant projection would distort distances by up "
                       f"to {100 * scale_error:.1f} %; give the survey in a projected CRS "
                       f"suited to its region")
    base = (geodetic_crs or pyproj.CRS(4326)).geodetic_crs
    name = f"{_LOCAL_NAME_START}{lat0:.6f}, {lon0:.6f} ({base.name})"
    crs = ProjectedCRS(conversion=AzimuthalEquidistantConversion(lat0, lon0),
                       geodetic_crs=base, name=name)
    note = (f"geographic coordinates (degrees, {base.name}) were projected to an azimuthal "
            f"equidistant projection centred on the survey (latitude {lat0:.6f}, longitude "
            f"{lon0:.6f}); distances are in metres, exact from the centre; scale error at "
            f"most {100 * scale_error:.2g} % (farthest site {np.degrees(c) * 111.2:.0f} km "
            f"from the centre)")
    return crs, note


def is_local_metric_crs(crs: Any) -> bool:
    """Whether ``crs`` is the local projection :func:`local_metric_crs` makes for degrees.

    Its coordinates are metres from the survey centre, not the eastings and northings of a
    published projected CRS, and figures say so.

    Examples
    --------
    >>> is_local_metric_crs(local_metric_crs(np.array([10.0, 10.1]), np.array([60.0, 60.1]))[0])
    True
    >>> is_local_metric_crs(pyproj.CRS(32632)), is_local_metric_crs(None)
    (False, False)
    """
    if crs is None:
        return False
    try:
        crs = pyproj.CRS(crs)
    except (pyproj.exceptions.CRSError, TypeError, ValueError):
        return False
    return bool(crs.is_projected and crs.name.startswith(_LOCAL_NAME_START))


def scale_range(crs: pyproj.CRS, x: np.ndarray, y: np.ndarray) -> tuple[float, float, str]:
    """Smallest and largest point scale factor (map distance / ground distance) of a projected
    CRS at the given map coordinates, along meridians and parallels, and a suggested UTM CRS.

    The factors come from PROJ (``pyproj.Proj.get_factors``). Returns NaNs when PROJ cannot
    compute them (the suggestion is then empty).

    Examples
    --------
    >>> lo, hi, utm = scale_range(pyproj.CRS(3857), np.array([1669792.0]), np.array([8399738.0]))
    >>> round(hi, 2), utm
    (2.0, 'EPSG:32633')
    """
    try:
        to_geo = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
        lon, lat = to_geo.transform(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
        factors = pyproj.Proj(crs).get_factors(lon, lat, errcheck=False)
    except (pyproj.exceptions.PROJError, pyproj.exceptions.CRSError, ValueError, TypeError):
        return float("nan"), float("nan"), ""
    scales = np.concatenate([np.atleast_1d(factors.meridional_scale),
                             np.atleast_1d(factors.parallel_scale)])
    scales = scales[np.isfinite(scales) & (scales > 0)]
    if not scales.size:
        return float("nan"), float("nan"), ""
    utm = ""
    try:
        from pyproj.aoi import AreaOfInterest
        from pyproj.database import query_utm_crs_info

        clon, clat = float(np.nanmean(lon)), float(np.nanmean(lat))
        found = query_utm_crs_info(datum_name="WGS 84", area_of_interest=AreaOfInterest(
            clon, clat, clon, clat))
        utm = f"{found[0].auth_name}:{found[0].code}" if found else ""
    except (pyproj.exceptions.PROJError, ValueError, TypeError):  # no suggestion then
        utm = ""
    return float(scales.min()), float(scales.max()), utm


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
