"""Contour lines of gridded surfaces (reflector elevation and depth below ground).

Contours are traced with ``contourpy`` (the library matplotlib uses; Debian
and QGIS installs with matplotlib have it) by linear interpolation along the
edges of the grid's cells (marching squares, with masked corners cut off), so
a contour of a planar surface lies exactly on its analytic line and cells
with an empty (NaN) corner carry no contour: the lines stop at the edge of
the data instead of running across a gap.

Intervals follow the 1-2-5 sequence of map practice, with every fifth line an
index contour (drawn heavier and labelled), counted from zero so that index
contours fall on round values (common practice of topographic maps, from
memory).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any, List, Optional, Tuple

import numpy as np
from numpy.typing import ArrayLike

from ..errors import MissingDependencyError, OutputError
from ..grid import next_nice_step, nice_step

if TYPE_CHECKING:
    from ..formats.layer import Layer

__all__ = ["contour_levels", "contour_lines", "contours_layer", "nice_interval"]


def nice_interval(zmin: float, zmax: float, target_count: int = 10) -> float:
    """Round contour interval (1, 2 or 5 times a power of ten) giving about ``target_count`` lines.

    The interval is the smallest value of the 1-2-5 sequence not below
    ``(zmax - zmin) / target_count`` (the steps of
    :func:`~rockhead.core.grid.nice_step`), so there are at most
    ``target_count`` (+1) lines and at least about ``target_count / 2.5``.

    Parameters
    ----------
    zmin, zmax : float
        Range of the gridded values (m), ``zmax > zmin``.
    target_count : int
        Most contour lines wanted, >= 1.

    Returns
    -------
    float
        Contour interval (m), the decimal value of its step (``5e-06``, not
        the binary product ``5 * 10.0**-6``).

    Raises
    ------
    OutputError
        An empty or non-finite range, or ``target_count`` < 1.

    >>> nice_interval(203.7, 241.2), nice_interval(0.0, 100.0), nice_interval(4.0, 4.7, 10)
    (5.0, 10.0, 0.1)
    """
    span = float(zmax) - float(zmin)
    if not (math.isfinite(span) and span > 0):
        raise OutputError(f"cannot choose a contour interval for the range {zmin!r} .. {zmax!r}; it must be > 0")
    if target_count < 1:
        raise OutputError(f"target_count={target_count!r}; expected at least 1")
    raw = span / target_count
    # 12 significant digits give a step's decimal value (1e-05, not 9.999999999999999e-06)
    step = float(f"{nice_step(raw):.12g}")  # the largest step not above raw (within 1e-12) ...
    if step < raw * (1 - 1e-12):
        step = float(f"{next_nice_step(step):.12g}")  # ... or the next one up
    return step


def contour_levels(zmin: float, zmax: float, interval: float) -> Tuple[np.ndarray, np.ndarray]:
    """Return the multiples of ``interval`` within [zmin, zmax], and their integer multipliers.

    Parameters
    ----------
    zmin, zmax : float
        Range of the gridded values (m).
    interval : float
        Contour interval (m), > 0.

    Returns
    -------
    levels : ndarray of float
        Contour values (m), each printed to 12 significant digits and read
        back, so 0.3 and not 0.30000000000000004.
    multipliers : ndarray of int
        ``levels / interval``.

    Raises
    ------
    OutputError
        A non-positive interval, or more than 10,000 levels.

    >>> lv, k = contour_levels(203.7, 241.2, 5.0)
    >>> lv.tolist(), k.tolist()
    ([205.0, 210.0, 215.0, 220.0, 225.0, 230.0, 235.0, 240.0], [41, 42, 43, 44, 45, 46, 47, 48])
    """
    if not (interval > 0 and math.isfinite(interval)):
        raise OutputError(f"contour interval {interval!r} must be positive and finite")
    k0 = math.ceil(zmin / interval - 1e-9)
    k1 = math.floor(zmax / interval + 1e-9)
    if k1 - k0 > 10000:
        raise OutputError(
            f"interval {interval!r} gives {k1 - k0 + 1} contour levels over {zmin!r} .. {zmax!r}; "
            "choose a larger interval"
        )
    k = np.arange(k0, k1 + 1, dtype=np.int64)
    # k * interval printed to 12 significant digits removes float noise (0.30000000000000004)
    levels = np.array([float(f"{kk * interval:.12g}") for kk in k.tolist()], dtype=float)
    return levels, k


def _generator(x: np.ndarray, y: np.ndarray, z: np.ndarray) -> Any:
    try:
        import contourpy
    except ImportError as exc:
        raise MissingDependencyError(
            "contourpy",
            "contour lines",
            "install it with 'python3 -m pip install contourpy' (it comes with matplotlib), "
            "or on Debian/Ubuntu 'apt install python3-contourpy'",
        ) from exc
    return contourpy.contour_generator(
        x, y, np.ma.masked_invalid(z), name="serial", line_type="Separate", corner_mask=True
    )


def contour_lines(
    x_centres: ArrayLike, y_centres: ArrayLike, z: ArrayLike, levels: ArrayLike
) -> List[Tuple[float, Any]]:
    """Trace contour lines of a grid.

    Parameters
    ----------
    x_centres : array_like (nx,)
        Easting of the cell centres (grid nodes, m), strictly monotonic.
    y_centres : array_like (ny,)
        Northing of the cell centres (m), strictly monotonic.
    z : array_like (ny, nx)
        Values (m), NaN where the surface is undefined.
    levels : array_like of float
        Contour values (same unit as ``z``).

    Returns
    -------
    list of (float, shapely.geometry.LineString)
        The level and the line, coordinates in the grid's CRS (m).
        One entry per connected line, in level order; a closed loop has its
        first vertex repeated at the end. A level touching the surface in a
        single point gives no line.
    """
    from shapely.geometry import LineString

    x = np.asarray(x_centres, dtype=float)
    y = np.asarray(y_centres, dtype=float)
    z = np.asarray(z, dtype=float)
    if x.ndim != 1 or y.ndim != 1 or z.shape != (len(y), len(x)):
        raise OutputError(
            f"grid shapes do not match: x {x.shape}, y {y.shape}, z {z.shape}; expected z (len(y), len(x))"
        )
    if len(x) < 2 or len(y) < 2:
        return []
    for name, a in (("x", x), ("y", y)):
        d = np.diff(a)
        if not (np.all(d > 0) or np.all(d < 0)):
            raise OutputError(f"{name} cell centres must be strictly increasing or decreasing")
    if not np.any(np.isfinite(z)):
        return []
    gen = _generator(x, y, z)
    out = []
    for level in np.asarray(levels, dtype=float).ravel():
        for seg in gen.lines(float(level)):
            seg = np.asarray(seg, dtype=float)
            # a line through a grid node repeats that vertex: keep one copy
            keep = np.ones(len(seg), dtype=bool)
            keep[1:] = np.any(seg[1:] != seg[:-1], axis=1)
            seg = seg[keep]
            if len(seg) >= 2:
                out.append((float(level), LineString(seg)))
    return out


def contours_layer(
    x_centres: ArrayLike,
    y_centres: ArrayLike,
    elevation_m: Optional[ArrayLike] = None,
    depth_m: Optional[ArrayLike] = None,
    *,
    elevation_interval_m: float | None = None,
    depth_interval_m: float | None = None,
    index_every: int = 5,
    target_count: int = 10,
) -> Layer:
    """Build the ``contours`` layer: elevation and depth contours of gridded surfaces.

    Parameters
    ----------
    x_centres, y_centres : array_like
        Grid node coordinates (m; see :func:`contour_lines`).
    elevation_m, depth_m : array_like (ny, nx), optional
        Reflector elevation and depth below ground (m); either may be omitted.
    elevation_interval_m, depth_interval_m : float, optional
        Contour intervals (m); default :func:`nice_interval` of the grid's range.
    index_every : int
        Every ``index_every``-th level (counted from zero) is an index contour.
    target_count : int
        Target number of levels for the default intervals.

    Returns
    -------
    rockhead.core.formats.layer.Layer
        LINESTRING features with fields ``kind`` (``"elevation"`` or
        ``"depth"``), ``elevation_m`` (NaN on depth contours), ``depth_m``
        (NaN on elevation contours) and ``index`` (bool).
    """
    from ..formats.layer import Layer

    if index_every < 1:
        raise OutputError(f"index_every={index_every!r}; expected a positive integer")
    geoms, kinds, elev, depth, index = [], [], [], [], []
    for kind, grid, interval in (
        ("elevation", elevation_m, elevation_interval_m),
        ("depth", depth_m, depth_interval_m),
    ):
        if grid is None:
            continue
        values = np.asarray(grid, dtype=float)
        finite = values[np.isfinite(values)]
        if finite.size == 0 or finite.min() == finite.max():
            continue
        zmin, zmax = float(finite.min()), float(finite.max())
        step = interval if interval is not None else nice_interval(zmin, zmax, target_count)
        levels, mult = contour_levels(zmin, zmax, step)
        is_index = dict(zip(levels.tolist(), (mult % index_every == 0).tolist()))
        for level, line in contour_lines(x_centres, y_centres, values, levels):
            geoms.append(line)
            kinds.append(kind)
            elev.append(level if kind == "elevation" else np.nan)
            depth.append(level if kind == "depth" else np.nan)
            index.append(is_index[level])
    return Layer(
        geoms,
        {
            "kind": np.array(kinds, dtype=object),
            "elevation_m": np.array(elev, dtype=float),
            "depth_m": np.array(depth, dtype=float),
            "index": np.array(index, dtype=bool),
        },
        geometry_type="LINESTRING",
        description="reflector elevation and depth contours",
    )
