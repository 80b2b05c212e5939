"""Coordinate reference systems: parsing, the working CRS, transforms and grid scale.

Rockhead computes in a *projected* CRS whose axes are easting and
northing in metres (x, y) with elevation z up. Input coordinates may be
projected (kept as they are) or geographic (longitude, latitude in degrees),
in which case they are transformed with pyproj to a projected working CRS:
the one the survey asks for, or else the WGS 84 / UTM zone that pyproj's
database suggests for the data's extent.

Axis order
----------
EPSG defines geographic CRSs such as EPSG:4326 with *latitude first*. The CSV
files of a survey always hold ``x`` = easting / longitude and ``y`` = northing /
latitude, whatever the authority's axis order, so every transformer here is
built with ``always_xy=True`` (see :data:`AXIS_ORDER_NOTE`).

Grid and ground distances
-------------------------
A projected grid distance differs from the distance on the ellipsoid by the
point scale factor *k* of the projection (EPSG Guidance Note 7-2; for UTM
*k* = 0.9996 on the central meridian, rising to about 1.0010 at the zone
edge at the equator). Ground distances at an elevation *h* above the ellipsoid
are larger again by the elevation factor (R + h)/R, i.e. about h/R
(1.6e-4 at h = 1000 m, 1.6e-5 at 100 m, with R about 6.37e6 m). Rockhead
ignores the elevation factor: over a 200 m spread at 300 m elevation
it is under 1 cm, well below pick and positioning errors.
"""

from __future__ import annotations

import functools
import re
import warnings

import numpy as np
import pyproj
from pyproj.aoi import AreaOfInterest
from pyproj.database import query_utm_crs_info
from pyproj.exceptions import CRSError, ProjError

from .errors import GeoreferenceError

__all__ = [
    "AXIS_ORDER_NOTE",
    "axis_order_note",
    "crs_label",
    "degrees_outside",
    "geographic_bounds",
    "grid_scale_factor",
    "horizontal_crs",
    "is_geographic",
    "parse_crs",
    "to_lonlat",
    "transform_xy",
    "working_crs",
]

AXIS_ORDER_NOTE = (
    "x is always easting or longitude and y northing or latitude, whatever axis order the "
    "CRS authority declares (EPSG:4326 is latitude first by definition; Rockhead "
    "reads it as x = longitude, y = latitude)"
)

_UTM_NAME = re.compile(r"^WGS 84 / UTM zone (\d{1,2})([NS])$")


def parse_crs(value) -> pyproj.CRS:
    """Turn a user's CRS description into a :class:`pyproj.CRS`.

    Parameters
    ----------
    value : str, int or pyproj.CRS
        ``"EPSG:32633"``, an integer EPSG code (``32633``), WKT, a PROJ string
        (``"+proj=utm +zone=33 +datum=WGS84"``) or a CRS object.

    Returns
    -------
    pyproj.CRS

    Raises
    ------
    GeoreferenceError
        When pyproj does not know the value (quoted in the message).

    Examples
    --------
    >>> parse_crs("EPSG:32633").to_epsg()
    32633
    >>> parse_crs(4326).is_geographic
    True
    """
    if isinstance(value, pyproj.CRS):
        return value
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise GeoreferenceError(
            f"CRS {value!r} is a {type(value).__name__}: expected text such as 'EPSG:32633', "
            "an integer EPSG code, WKT or a PROJ string"
        )
    if isinstance(value, str) and not value.strip():
        raise GeoreferenceError("CRS is empty: expected e.g. 'EPSG:32633'")
    if isinstance(value, int) and not 0 < value < 2**31:
        digits = str(value) if len(str(value)) <= 20 else str(value)[:17] + "..."
        raise GeoreferenceError(f"CRS {digits} is not an EPSG code: expected e.g. 32633")
    try:
        return pyproj.CRS.from_user_input(value.strip() if isinstance(value, str) else value)
    except (CRSError, ProjError, ValueError, TypeError) as exc:
        shown = value if not isinstance(value, str) or len(value) <= 80 else value[:77] + "..."
        reason = _first_line(exc)
        inner = re.search(r"proj_create: ([^)]*)", reason)  # PROJ's own words, without the wrapping
        if inner:
            reason = inner.group(1).strip()
        raise GeoreferenceError(
            f"unknown CRS {shown!r} ({reason}): give an EPSG code such as 'EPSG:32633', WKT or a PROJ string"
        ) from exc


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def crs_label(crs: pyproj.CRS) -> str:
    """Short human label of a CRS: ``'EPSG:32633 (WGS 84 / UTM zone 33N)'`` or its name."""
    code = crs.to_authority(min_confidence=90)
    if code:
        return f"{code[0]}:{code[1]} ({crs.name})"
    return crs.name or "custom CRS"


def horizontal_crs(crs: pyproj.CRS) -> pyproj.CRS:
    """The horizontal part of a compound CRS (the CRS itself otherwise)."""
    if crs.is_compound and crs.sub_crs_list:
        return crs.sub_crs_list[0]
    return crs


def is_geographic(crs: pyproj.CRS) -> bool:
    """True when x/y of ``crs`` are longitude/latitude in degrees."""
    return bool(horizontal_crs(crs).is_geographic)


def axis_order_note(crs: pyproj.CRS) -> str | None:
    """Explain the axis order used for ``crs`` when its authority puts north first.

    Returns None when the CRS's own first axis is already east (nothing to say).

    Examples
    --------
    >>> axis_order_note(parse_crs("EPSG:4326")) is not None
    True
    >>> axis_order_note(parse_crs("EPSG:32633")) is None
    True
    """
    axes = horizontal_crs(crs).axis_info
    if axes and axes[0].direction.lower() in ("north", "south"):
        return AXIS_ORDER_NOTE
    return None


def _check_projected_metres(crs: pyproj.CRS, what: str) -> pyproj.CRS:
    h = horizontal_crs(crs)
    if not h.is_projected:
        raise GeoreferenceError(
            f"{what} {crs_label(crs)} is not a projected CRS: the working CRS must have easting/"
            "northing axes in metres, e.g. a UTM zone such as 'EPSG:32633'"
        )
    units = {(a.unit_name or "").lower() for a in h.axis_info[:2]}
    if not units <= {"metre", "meter", "m"}:
        raise GeoreferenceError(
            f"{what} {crs_label(crs)} has axes in {', '.join(sorted(units))}: Rockhead works "
            "in metres; choose a metre-based projected CRS"
        )
    return h


def working_crs(input_crs, lon_deg=None, lat_deg=None, requested=None) -> pyproj.CRS:
    """Choose the projected CRS (metres) in which the survey is computed.

    Rules, in order:

    1. ``requested`` given: it is used (it must be projected, in metres).
    2. ``input_crs`` projected (metres): kept.
    3. ``input_crs`` geographic: the WGS 84 / UTM zone returned by
       :func:`pyproj.database.query_utm_crs_info` for the bounding box of
       ``lon_deg``/``lat_deg``; when the box touches several zones the one whose
       central meridian is nearest the box centre is taken, in the hemisphere of
       the box centre (ties: lowest EPSG code), so the choice is deterministic.

    Parameters
    ----------
    input_crs : str, int or pyproj.CRS
        CRS of the coordinates in the input files.
    lon_deg, lat_deg : array_like, optional
        Longitudes and latitudes of the data (needed only for rule 3).
    requested : str, int or pyproj.CRS, optional
        A working CRS asked for by the user (``work_crs`` in survey.toml).

    Returns
    -------
    pyproj.CRS
        Projected, metre-based CRS (the horizontal part for a compound input).

    Raises
    ------
    GeoreferenceError
        Unknown or unsuitable CRS, or no UTM zone for the extent (polar data:
        give ``requested``).

    Examples
    --------
    >>> working_crs("EPSG:4326", [15.1, 15.2], [50.0, 50.1]).to_epsg()
    32633
    """
    input_crs = parse_crs(input_crs)
    if requested is not None:
        return _check_projected_metres(parse_crs(requested), "the requested working CRS")
    h = horizontal_crs(input_crs)
    if h.is_projected:
        return _check_projected_metres(h, "the survey CRS")
    if not h.is_geographic:
        raise GeoreferenceError(
            f"the survey CRS {crs_label(input_crs)} is neither projected nor geographic: "
            "give x/y in a projected CRS in metres (e.g. 'EPSG:32633') or in longitude/latitude"
        )
    if lon_deg is None or lat_deg is None:
        raise GeoreferenceError(
            "the survey CRS is geographic: the data's longitudes and latitudes are needed to "
            "choose a UTM zone (or set work_crs)"
        )
    lon = np.asarray(lon_deg, dtype=float).ravel()
    lat = np.asarray(lat_deg, dtype=float).ravel()
    ok = np.isfinite(lon) & np.isfinite(lat)
    if not ok.any():
        raise GeoreferenceError("no finite longitude/latitude to choose a UTM zone from")
    lon, lat = lon[ok], lat[ok]
    west, east = float(lon.min()), float(lon.max())
    south, north = float(lat.min()), float(lat.max())
    if west < -180 or east > 180 or south < -90 or north > 90:
        raise GeoreferenceError(
            f"longitudes {west:g}..{east:g} / latitudes {south:g}..{north:g} are out of range ([-180, 180] / [-90, 90])"
        )
    code = _utm_code(west, south, east, north)
    return pyproj.CRS.from_epsg(code)


def _utm_code(west: float, south: float, east: float, north: float) -> int:
    infos = query_utm_crs_info(
        datum_name="WGS 84",
        area_of_interest=AreaOfInterest(
            west_lon_degree=west, south_lat_degree=south, east_lon_degree=east, north_lat_degree=north
        ),
    )
    lon_c = 0.5 * (west + east)
    lat_c = 0.5 * (south + north)
    want = "N" if lat_c >= 0 else "S"
    best = None
    for info in infos:
        m = _UTM_NAME.match(info.name or "")
        if not m or info.auth_name != "EPSG":
            continue
        zone, hemi = int(m.group(1)), m.group(2)
        central = -183.0 + 6.0 * zone
        key = (hemi != want, abs(central - lon_c), int(info.code))
        if best is None or key < best[0]:
            best = (key, int(info.code))
    if best is None:
        raise GeoreferenceError(
            f"no WGS 84 / UTM zone covers longitudes {west:g}..{east:g}, latitudes {south:g}..{north:g} "
            "(UTM ends at 84N and 80S): set work_crs to a projected CRS for the area, e.g. a polar "
            "stereographic one"
        )
    return best[1]


@functools.lru_cache(maxsize=64)
def _transformer(src: pyproj.CRS, dst: pyproj.CRS) -> pyproj.Transformer:
    return pyproj.Transformer.from_crs(src, dst, always_xy=True)


def transform_xy(x, y, src, dst, *, check_finite=True):
    """Transform coordinates between two CRSs, x = easting/longitude first.

    The transformer for each (src, dst) pair is built once and cached; it uses
    ``always_xy=True`` (see :data:`AXIS_ORDER_NOTE`).

    Parameters
    ----------
    x, y : array_like
        Coordinates in ``src`` (longitude, latitude in degrees when geographic).
    src, dst : str, int or pyproj.CRS
    check_finite : bool, default True
        Raise when a point cannot be transformed; with False such points come
        back as inf (pyproj's convention) for the caller to locate.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        x and y in ``dst`` (float arrays of the input's shape).

    Raises
    ------
    GeoreferenceError
        When a point cannot be transformed (pyproj returns inf) or pyproj fails;
        the message quotes the first such point.

    Examples
    --------
    >>> x, y = transform_xy([15.0], [0.0], "EPSG:4326", "EPSG:32633")
    >>> round(float(x[0]), 3), round(float(y[0]), 3)
    (500000.0, 0.0)
    """
    src = parse_crs(src)
    dst = parse_crs(dst)
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.shape != y.shape:
        raise GeoreferenceError(f"x and y have different shapes {x.shape} and {y.shape}")
    if src == dst:
        return x.copy(), y.copy()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            xo, yo = _transformer(src, dst).transform(x, y)
    except (ProjError, CRSError) as exc:
        raise GeoreferenceError(
            f"cannot transform from {crs_label(src)} to {crs_label(dst)}: {_first_line(exc)}"
        ) from exc
    xo = np.asarray(xo, dtype=float).reshape(x.shape)
    yo = np.asarray(yo, dtype=float).reshape(y.shape)
    bad = ~(np.isfinite(xo) & np.isfinite(yo))
    if check_finite and bad.any():
        i = int(np.flatnonzero(bad.ravel())[0])
        raise GeoreferenceError(
            f"{int(bad.sum())} point(s) cannot be transformed from {crs_label(src)} to "
            f"{crs_label(dst)}, the first is x={float(x.ravel()[i]):.10g}, y={float(y.ravel()[i]):.10g}: "
            "check that the coordinates belong to that CRS"
        )
    return xo, yo


def to_lonlat(x, y, crs):
    """Longitude and latitude (degrees) of points given in ``crs``, on its own datum."""
    crs = parse_crs(crs)
    h = horizontal_crs(crs)
    if h.is_geographic:
        return np.asarray(x, dtype=float).copy(), np.asarray(y, dtype=float).copy()
    return transform_xy(x, y, h, h.geodetic_crs)


def geographic_bounds(crs) -> tuple | None:
    """(west, south, east, north) in degrees of the CRS's area of use, or None if unknown."""
    aou = horizontal_crs(parse_crs(crs)).area_of_use
    if aou is None:
        return None
    return (float(aou.west), float(aou.south), float(aou.east), float(aou.north))


def grid_scale_factor(crs, x_m, y_m) -> np.ndarray:
    r"""Point scale factor *k* of a projected CRS at grid points.

    .. math::

        k = \frac{\text{grid distance}}{\text{ellipsoidal distance}}, \qquad
        s_\text{ellipsoid} = s_\text{grid} / k

    for short distances around the point (EPSG Guidance Note 7-2, "point scale
    factor"). For a conformal projection (Transverse Mercator/UTM, Lambert
    conformal conic, stereographic) *k* is the same in every direction; for
    other projections the geometric mean of the meridian and parallel scales,
    :math:`\sqrt{h k}` (square root of the areal scale), is returned.

    Ground distances at height h above the ellipsoid are
    :math:`s_\text{grid}/k \cdot (R + h)/R`; the elevation factor (about h/R,
    1.6e-4 at 1000 m) is ignored here.

    Parameters
    ----------
    crs : str, int or pyproj.CRS
        A projected CRS.
    x_m, y_m : array_like
        Grid coordinates in ``crs``.

    Returns
    -------
    numpy.ndarray
        k at each point (shape of ``x_m``).

    Examples
    --------
    >>> import numpy as np
    >>> x, y = transform_xy([15.0], [45.0], "EPSG:4326", "EPSG:32633")
    >>> float(np.round(grid_scale_factor("EPSG:32633", x, y)[0], 7))  # UTM central meridian (EPSG)
    0.9996
    """
    crs = horizontal_crs(parse_crs(crs))
    if not crs.is_projected:
        raise GeoreferenceError(f"{crs_label(crs)} is not projected: grid scale factor undefined")
    lon, lat = to_lonlat(x_m, y_m, crs)
    try:
        factors = pyproj.Proj(crs).get_factors(lon, lat, errcheck=True)
    except (ProjError, CRSError) as exc:
        raise GeoreferenceError(f"cannot compute scale factors in {crs_label(crs)}: {_first_line(exc)}") from exc
    k = np.sqrt(np.asarray(factors.areal_scale, dtype=float)).reshape(np.shape(lon))
    if not np.all(np.isfinite(k)):
        raise GeoreferenceError(f"scale factor not finite for some points in {crs_label(crs)}")
    return k


def degrees_outside(lon, lat, bounds) -> np.ndarray:
    """How far (degrees) each lon/lat lies outside a (west, south, east, north) box (0 inside).

    Boxes that cross the antimeridian (west > east) are handled.
    """
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    west, south, east, north = bounds
    dlat = np.maximum(south - lat, 0.0) + np.maximum(lat - north, 0.0)
    if west <= east:
        dlon = np.maximum(west - lon, 0.0) + np.maximum(lon - east, 0.0)
    else:  # crosses 180: inside when lon >= west or lon <= east
        inside = (lon >= west) | (lon <= east)
        dlon = np.where(inside, 0.0, np.minimum(west - lon, lon - east))
    return np.hypot(dlon, dlat)
