r"""Line frames, gathers, georeferenced reflector points and line misties.

Everything here works in the survey's projected working CRS: x east, y north,
z elevation up, metres. A line's unit vector ``u`` points toward increasing
station order; its cross unit ``w = (u_y, -u_x)`` is ``u`` turned 90 degrees
clockwise (seen from above), i.e. ``u x e_z``.

The fitted plane of one gather is described, as in :mod:`.forward`, by its
downward unit normal ``n`` and the normal distance ``h`` from the source S
[Sheriff & Geldart 1995, ch. 4]:

.. math::

    \mathbf n = -s\,\mathbf u - q\,\mathbf w - c\,\mathbf e_z, \qquad
    c = \sqrt{1 - s^2 - q^2}

with ``s = -u.n`` fitted along the line and ``q = -w.n`` the cross-line
component (0 unless resolved by a second line direction, see
:mod:`.structure`).

References
----------
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4 (image source,
    reflection points, zero-offset point as the foot of the perpendicular).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Optional, Union

import numpy as np
from numpy.typing import ArrayLike

from ..errors import InputFileError, SurveyConfigError
from ..survey.ground import GroundModel
from ..survey.model import GatherSet, Stations, Survey
from . import forward

__all__ = [
    "LineFrame",
    "ReflectorPoints",
    "build_gathers",
    "gather_normals",
    "line_frames",
    "project_onto_polyline",
    "reflector_points",
    "station_ground_model",
    "station_order",
    "unique_in_order",
    "vector_azimuth_deg",
    "vertical_depth_below_source",
]


# ---------------------------------------------------------------------------
# Line frames
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class LineFrame:
    """Geometry of one survey line, its stations in station order.

    Attributes
    ----------
    line : str
        Line name.
    station : ndarray of str
        Station labels in station order.
    x_m, y_m, z_m : ndarray
        Station coordinates in that order.
    chainage_m : ndarray
        Distance of each station along the polyline from the first station.
    centre_xy : ndarray, shape (2,)
        Mean station position.
    unit : ndarray, shape (2,)
        Principal (PCA) axis of the stations, toward increasing station order.
    cross_unit : ndarray, shape (2,)
        ``unit`` turned 90 degrees clockwise: ``(u_y, -u_x)``.
    azimuth_deg : float
        Azimuth of ``unit``, clockwise from grid north, in [0, 360).
    polyline : shapely.geometry.LineString
        The stations joined in order (follows a crooked line).
    length_m : float
        Length of the polyline.
    """

    line: str
    station: np.ndarray
    x_m: np.ndarray
    y_m: np.ndarray
    z_m: np.ndarray
    chainage_m: np.ndarray
    centre_xy: np.ndarray
    unit: np.ndarray
    cross_unit: np.ndarray
    azimuth_deg: float
    polyline: Any
    length_m: float

    @property
    def vertices(self) -> np.ndarray:
        """(k, 2) polyline vertices."""
        return np.column_stack([self.x_m, self.y_m])

    def locate(self, x_m: ArrayLike, y_m: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """Chainage along the line's polyline and signed offset from it.

        Parameters
        ----------
        x_m, y_m : float or array_like
            Points in the working CRS (m).

        Returns
        -------
        chainage_m, offset_m : ndarray
            Distance along the polyline from the first station, and offset
            (m, positive toward ``cross_unit``); see :func:`project_onto_polyline`.
        """
        return project_onto_polyline(self.vertices, x_m, y_m)


def _is_number(text: Any) -> bool:
    try:
        return np.isfinite(float(text))
    except (TypeError, ValueError):
        return False


def station_order(stations: Stations) -> np.ndarray:
    """Rank (0, 1, ...) of every station within its line.

    Stations are ordered numerically when every label of the line is a number
    (``"2" < "10"``), otherwise in file order (``file_line``, then row).

    Parameters
    ----------
    stations : Stations
        Or any object with ``line``, ``station`` and ``file_line`` arrays.

    Returns
    -------
    (n,) int ndarray
        Rank of each station within its line.

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> st = NS(line=np.array(["A", "A", "A"], dtype=object),
    ...         station=np.array(["10", "2", "7.5"], dtype=object), file_line=np.array([2, 3, 4]))
    >>> station_order(st).tolist()
    [2, 0, 1]
    """
    line = np.asarray(stations.line).astype(str)
    label = np.asarray(stations.station).astype(str)
    file_line = np.asarray(getattr(stations, "file_line", np.arange(len(line))))
    rank = np.zeros(len(line), dtype=int)
    for name in unique_in_order(line):
        idx = np.flatnonzero(line == name)
        labels = label[idx]
        if all(_is_number(v) for v in labels):
            key = np.array([float(v) for v in labels])
            order = np.lexsort((idx, key))
        else:
            order = np.lexsort((idx, file_line[idx]))
        rank[idx[order]] = np.arange(len(idx))
    return rank


def unique_in_order(values: ArrayLike) -> list:
    """Distinct values in order of first appearance.

    Parameters
    ----------
    values : array_like
        Labels or numbers.

    Returns
    -------
    list
        Each distinct value once, in the order it first appears.

    Examples
    --------
    >>> [str(v) for v in unique_in_order(["L2", "L1", "L2", "L3"])]
    ['L2', 'L1', 'L3']
    """
    values = np.asarray(values)
    _, first = np.unique(values, return_index=True)
    return [values[i] for i in np.sort(first)]


def vector_azimuth_deg(east: ArrayLike, north: ArrayLike) -> np.ndarray:
    """Azimuth of a horizontal vector, clockwise from grid north.

    Parameters
    ----------
    east, north : float or array_like
        Easting and northing components (any common unit).

    Returns
    -------
    ndarray
        Azimuth in degrees, in [0, 360); 0 for the zero vector.

    Examples
    --------
    >>> vector_azimuth_deg([0.0, 1.0, 0.0, -1.0], [1.0, 0.0, -1.0, 0.0]).tolist()
    [0.0, 90.0, 180.0, 270.0]
    """
    return np.degrees(np.arctan2(east, north)) % 360.0


def line_frames(stations: Stations, path: Optional[Union[str, Path]] = None) -> dict[str, LineFrame]:
    """Build a :class:`LineFrame` for every line of ``stations``.

    The line's unit vector is the principal axis of its station positions
    (eigenvector of the largest eigenvalue of their 2x2 covariance, i.e. PCA),
    oriented so that station order increases along it.

    Parameters
    ----------
    stations : Stations
        Station table in the working CRS.
    path : path-like, optional
        The stations file, quoted in error messages.

    Returns
    -------
    dict
        ``line name -> LineFrame``, lines in order of first appearance.

    Raises
    ------
    InputFileError
        A line with fewer than two distinct station positions, or a station
        label given twice on one line.

    >>> from types import SimpleNamespace as NS
    >>> st = NS(line=np.array(["L1"] * 3, dtype=object), station=np.array(["1", "2", "3"], dtype=object),
    ...         x_m=np.array([0.0, 0.0, 0.0]), y_m=np.array([10.0, 5.0, 0.0]),
    ...         z_m=np.zeros(3), file_line=np.array([2, 3, 4]))
    >>> f = line_frames(st)["L1"]
    >>> f.unit.round(9).tolist(), float(f.azimuth_deg), float(f.length_m)
    ([0.0, -1.0], 180.0, 10.0)
    """
    from shapely.geometry import LineString

    line = np.asarray(stations.line).astype(str)
    label = np.asarray(stations.station).astype(str)
    x = np.asarray(stations.x_m, dtype=float)
    y = np.asarray(stations.y_m, dtype=float)
    z = np.asarray(stations.z_m, dtype=float)
    file_line = np.asarray(getattr(stations, "file_line", np.arange(len(x)) + 2))
    rank = station_order(stations)
    frames = {}
    for name in unique_in_order(line):
        idx = np.flatnonzero(line == name)
        idx = idx[np.argsort(rank[idx], kind="stable")]
        labels = label[idx]
        uniq, counts = np.unique(labels, return_counts=True)
        if np.any(counts > 1):
            dup = uniq[counts > 1][0]
            rows = file_line[idx[labels == dup]]
            raise InputFileError(
                path,
                int(rows[1]),
                "station",
                f"station '{dup}' appears more than once on line '{name}' (also at line {int(rows[0])}); "
                "each (line, station) pair must be unique: rename or remove the duplicate",
            )
        xy = np.column_stack([x[idx], y[idx]])
        centre = xy.mean(axis=0)
        d = xy - centre
        cov = d.T @ d / len(idx)
        evals, evecs = np.linalg.eigh(cov)
        if len(idx) < 2 or evals[-1] <= 1e-12:
            raise InputFileError(
                path,
                int(file_line[idx[0]]),
                "x",
                f"line '{name}' has {len(idx)} station(s) at a single position "
                f"({x[idx[0]]:.3f}, {y[idx[0]]:.3f}); a line needs at least two distinct stations "
                "to define its direction: check the coordinates or the line names",
            )
        u = evecs[:, -1]
        proj = d @ u
        trend = np.sum((np.arange(len(idx)) - (len(idx) - 1) / 2.0) * proj)
        if trend < 0:
            u = -u
        u = u + 0.0  # no negative zeros
        w = np.array([u[1], -u[0]]) + 0.0
        seg = np.hypot(np.diff(xy[:, 0]), np.diff(xy[:, 1]))
        chain = np.concatenate([[0.0], np.cumsum(seg)])
        frames[name] = LineFrame(
            line=name,
            station=labels.astype(object),
            x_m=xy[:, 0].copy(),
            y_m=xy[:, 1].copy(),
            z_m=z[idx].copy(),
            chainage_m=chain,
            centre_xy=centre,
            unit=u,
            cross_unit=w,
            azimuth_deg=float(vector_azimuth_deg(u[0], u[1])),
            polyline=LineString([tuple(p) for p in xy]),
            length_m=float(chain[-1]),
        )
    return frames


def project_onto_polyline(
    vertices: ArrayLike, x_m: ArrayLike, y_m: ArrayLike, chunk: int = 4096
) -> tuple[np.ndarray, np.ndarray]:
    """Project points onto a polyline: chainage and signed lateral offset.

    For every point the closest point on any segment is found (vectorised over
    points and segments); the chainage is the distance along the polyline to
    it and the offset is positive to the right of the direction of travel
    (toward ``(d_y, -d_x)`` of the segment).

    Parameters
    ----------
    vertices : array_like, shape (k, 2)
        Polyline vertices in order (m).
    x_m, y_m : array_like
        Points (m; any shape, broadcast together).
    chunk : int
        Points handled at once (bounds the memory of the points x segments arrays).

    Returns
    -------
    chainage_m, offset_m : ndarray
        Same shape as the points (m).

    Examples
    --------
    >>> c, o = project_onto_polyline([[0, 0], [10, 0], [10, 10]], [5.0, 12.0], [-2.0, 4.0])
    >>> c.tolist(), o.tolist()
    ([5.0, 14.0], [2.0, 2.0])
    """
    v = np.asarray(vertices, dtype=float)
    px, py = np.broadcast_arrays(np.asarray(x_m, dtype=float), np.asarray(y_m, dtype=float))
    shape = px.shape
    px = px.ravel()
    py = py.ravel()
    if len(v) == 1:
        return np.zeros(shape), np.hypot(px - v[0, 0], py - v[0, 1]).reshape(shape)
    a = v[:-1]
    d = v[1:] - a
    seg_len = np.hypot(d[:, 0], d[:, 1])
    cum = np.concatenate([[0.0], np.cumsum(seg_len)])[:-1]
    l2 = np.where(seg_len > 0, seg_len**2, 1.0)
    chain = np.empty(len(px))
    off = np.empty(len(px))
    for start in range(0, len(px), chunk):
        sx = px[start : start + chunk, None] - a[None, :, 0]
        sy = py[start : start + chunk, None] - a[None, :, 1]
        t = np.clip((sx * d[:, 0] + sy * d[:, 1]) / l2, 0.0, 1.0)
        t = np.where(seg_len > 0, t, 0.0)
        rx = sx - t * d[:, 0]
        ry = sy - t * d[:, 1]
        dist2 = rx * rx + ry * ry
        k = np.argmin(dist2, axis=1)
        rows = np.arange(len(k))
        chain[start : start + chunk] = cum[k] + t[rows, k] * seg_len[k]
        nx = d[k, 1] / np.where(seg_len[k] > 0, seg_len[k], 1.0)
        ny = -d[k, 0] / np.where(seg_len[k] > 0, seg_len[k], 1.0)
        sign = np.sign(rx[rows, k] * nx + ry[rows, k] * ny)
        off[start : start + chunk] = np.where(sign == 0, 1.0, sign) * np.sqrt(dist2[rows, k])
    return chain.reshape(shape), off.reshape(shape)


# ---------------------------------------------------------------------------
# Gathers
# ---------------------------------------------------------------------------


def build_gathers(
    survey: Survey,
    reflector: Union[str, Sequence[str], None] = None,
    frames: Optional[dict[str, LineFrame]] = None,
) -> GatherSet:
    """Join picks to station coordinates and group them into shot gathers.

    One gather per (line, shot, reflector). Picks are sorted by gather and,
    within a gather, by receiver station order. The per-gather unit vector
    ``u`` is the principal axis of that gather's spread (the source and its
    receivers), oriented toward increasing station order; when the spread is
    degenerate (all points at one position) the line frame's axis is used.
    ``spread_length_m`` is the extent of source and receivers along ``u``.

    Parameters
    ----------
    survey : Survey
        Stations and picks (working CRS), and the input files for messages.
    reflector : str or sequence of str, optional
        Keep only these reflector labels (default: all).
    frames : dict, optional
        Output of :func:`line_frames` (computed when omitted).

    Returns
    -------
    GatherSet
        Picks sorted by gather, with source and receiver positions (m), times
        and pick errors (s), and each gather's line frame.

    Raises
    ------
    InputFileError
        A pick names a shot or receiver that is not a station of its line.
    SurveyConfigError
        No pick is left for the requested reflector(s).
    """
    st = survey.stations
    pk = survey.picks
    files = getattr(survey, "files", {}) or {}
    st_path = files.get("stations")
    pk_path = files.get("picks")
    if frames is None:
        frames = line_frames(st, path=st_path)

    sel = np.ones(len(pk.time_s), dtype=bool)
    if reflector is not None:
        wanted = [reflector] if isinstance(reflector, str) else [str(r) for r in reflector]
        sel = np.isin(np.asarray(pk.reflector).astype(str), wanted)
        if not sel.any():
            present = ", ".join(sorted(set(np.asarray(pk.reflector).astype(str))))
            raise SurveyConfigError(
                getattr(survey, "path", None),
                None,
                "reflector",
                f"no picks for reflector {wanted!r}; the picks file has reflector(s) {present}: choose one of those",
            )
    rows = np.flatnonzero(sel)

    s_line = np.asarray(st.line).astype(str)
    s_label = np.asarray(st.station).astype(str)
    lookup = {(a, b): i for i, (a, b) in enumerate(zip(s_line, s_label))}
    p_line = np.asarray(pk.line).astype(str)[rows]
    p_shot = np.asarray(pk.shot).astype(str)[rows]
    p_rec = np.asarray(pk.receiver).astype(str)[rows]
    p_refl = np.asarray(pk.reflector).astype(str)[rows]
    src = np.fromiter((lookup.get(k, -1) for k in zip(p_line, p_shot)), dtype=np.int64, count=len(rows))
    rec = np.fromiter((lookup.get(k, -1) for k in zip(p_line, p_rec)), dtype=np.int64, count=len(rows))
    p_file_line = np.asarray(getattr(pk, "file_line", rows + 2))[rows]
    for idx, field, labels in ((src, "shot", p_shot), (rec, "receiver", p_rec)):
        bad = np.flatnonzero(idx < 0)
        if len(bad):
            b = bad[0]
            raise InputFileError(
                pk_path,
                int(p_file_line[b]),
                field,
                f"{field} '{labels[b]}' of line '{p_line[b]}' is not a station of that line in the "
                f"stations file ({len(bad)} pick(s) affected); add the station or correct the label",
            )

    # global station order: lines in frame order, then station rank
    rank = station_order(st)
    line_code = {name: i for i, name in enumerate(frames)}
    st_line_code = np.array([line_code.get(v, len(line_code)) for v in s_line], dtype=np.int64)
    st_key = st_line_code * (len(s_line) + 1) + rank
    st_order = np.empty(len(s_line), dtype=np.int64)
    st_order[np.argsort(st_key, kind="stable")] = np.arange(len(s_line))

    refl_names, refl_code = np.unique(p_refl, return_inverse=True)
    key = st_order[src] * len(refl_names) + refl_code
    gkeys, gid = np.unique(key, return_inverse=True)
    order = np.lexsort((st_order[rec], gid))
    gid = gid[order]
    src = src[order]
    rec = rec[order]
    rows = rows[order]
    n_g = len(gkeys)
    first = np.flatnonzero(np.r_[True, gid[1:] != gid[:-1]])

    xyz = np.column_stack([np.asarray(st.x_m, float), np.asarray(st.y_m, float), np.asarray(st.z_m, float)])
    src_xyz = xyz[src]
    rec_xyz = xyz[rec]
    src_g = src_xyz[first]

    # spread principal axis per gather: source once + receivers, relative to the source
    dx = rec_xyz[:, 0] - src_xyz[:, 0]
    dy = rec_xyz[:, 1] - src_xyz[:, 1]
    cnt = np.bincount(gid, minlength=n_g) + 1.0
    mx = np.bincount(gid, dx, n_g) / cnt
    my = np.bincount(gid, dy, n_g) / cnt
    sxx = (np.bincount(gid, dx * dx, n_g)) / cnt - mx * mx
    syy = (np.bincount(gid, dy * dy, n_g)) / cnt - my * my
    sxy = (np.bincount(gid, dx * dy, n_g)) / cnt - mx * my
    theta = 0.5 * np.arctan2(2.0 * sxy, sxx - syy)
    lam1 = 0.5 * (sxx + syy) + np.sqrt((0.5 * (sxx - syy)) ** 2 + sxy**2)
    u = np.column_stack([np.cos(theta), np.sin(theta)])
    g_line = s_line[src[first]]
    frame_u = np.array([frames[name].unit for name in g_line]).reshape(n_g, 2)
    degenerate = ~(lam1 > 1e-10)
    u[degenerate] = frame_u[degenerate]
    # orient toward increasing station order (fall back to the line frame's sense)
    r_rec = rank[rec].astype(float)
    r_src = rank[src[first]].astype(float)
    mean_r = (np.bincount(gid, r_rec, n_g) + r_src) / cnt
    proj = dx * u[gid, 0] + dy * u[gid, 1]
    trend = np.bincount(gid, (r_rec - mean_r[gid]) * proj, n_g)  # the source projects to 0
    sense = np.where(trend != 0, np.sign(trend), np.sign(np.sum(u * frame_u, axis=1)))
    sense = np.where(sense == 0, 1.0, sense)
    u = u * sense[:, None] + 0.0
    w = np.column_stack([u[:, 1], -u[:, 0]]) + 0.0
    proj = dx * u[gid, 0] + dy * u[gid, 1]
    pmax = np.maximum(np.maximum.reduceat(proj, first), 0.0)
    pmin = np.minimum(np.minimum.reduceat(proj, first), 0.0)

    sigma = np.asarray(pk.sigma_s, dtype=float)[rows]
    default_sigma = getattr(getattr(survey, "settings", None), "default_sigma_ms", 0.5) * 1e-3
    sigma = np.where(np.isfinite(sigma) & (sigma > 0), sigma, default_sigma)

    return GatherSet(
        gather=gid.astype(np.int64),
        source_xyz=src_xyz,
        receiver_xyz=rec_xyz,
        time_s=np.asarray(pk.time_s, dtype=float)[rows],
        sigma_s=sigma,
        pick_index=rows.astype(np.int64),
        line=g_line.astype(object),
        shot=s_label[src[first]].astype(object),
        reflector=refl_names[gkeys % len(refl_names)].astype(object),
        line_unit=u,
        cross_unit=w,
        source_xyz_g=src_g,
        spread_length_m=pmax - pmin,
    )


# ---------------------------------------------------------------------------
# Normals and reflector points
# ---------------------------------------------------------------------------


def _fit_array(fits: Any, name: str, g: int, default: float = np.nan) -> np.ndarray:
    value = getattr(fits, name, None)
    if value is None:
        return np.full(g, default, dtype=float)
    return np.broadcast_to(np.asarray(value, dtype=float), (g,)).copy()


def gather_normals(gathers: GatherSet, fits: Any, cross_component: Optional[ArrayLike] = None) -> np.ndarray:
    r"""Downward unit normal of each gather's fitted plane.

    .. math::

        \mathbf n = -s\,\mathbf u - q\,\mathbf w - \sqrt{1-s^2-q^2}\,\mathbf e_z

    with the line's unit vector u and cross unit w (see the module notes).

    Parameters
    ----------
    gathers : GatherSet
        The gathers (``line_unit``, ``cross_unit``).
    fits : ShotFits or object with ``s_along`` (and optionally ``cross_component``)
        Along-line component s of each gather (NaN for a gather without a fit).
    cross_component : float or (g,) array_like, optional
        Cross-line component q; else ``fits.cross_component`` when the fits
        carry one, else 0. NaN entries mean 0 (cross-line dip not resolved,
        the plane taken as level across the line).

    Returns
    -------
    (g, 3) ndarray
        Unit normals (east, north, up components); NaN rows where
        :math:`s^2 + q^2 > 1` or the fit failed.

    Examples
    --------
    A line running north (u = (0, 1), w = (1, 0)) over a plane dipping 30
    degrees toward the north, along the line: s = -u.n = sin 30 = 0.5, q = 0.

    >>> from types import SimpleNamespace
    >>> gs = SimpleNamespace(n_gathers=1, line_unit=np.array([[0.0, 1.0]]), cross_unit=np.array([[1.0, 0.0]]))
    >>> n = gather_normals(gs, SimpleNamespace(s_along=np.array([0.5])))
    >>> [round(float(v), 6) + 0.0 for v in n[0]]
    [0.0, -0.5, -0.866025]
    """
    g = gathers.n_gathers
    s = _fit_array(fits, "s_along", g)
    if cross_component is None:
        cross_component = getattr(fits, "cross_component", None)
    q = np.zeros(g) if cross_component is None else np.broadcast_to(np.asarray(cross_component, dtype=float), (g,))
    return _normals_from(np.asarray(gathers.line_unit, float), np.asarray(gathers.cross_unit, float), s, q)


def _normals_from(u: np.ndarray, w: np.ndarray, s: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Downward unit normals (g, 3) of :func:`gather_normals` from u, w (g, 2), s and q (g,)."""
    s = np.asarray(s, float)
    q = np.where(np.isfinite(q), q, 0.0)
    c2 = 1.0 - s * s - q * q
    c = np.sqrt(np.where(c2 >= 0, c2, np.nan))
    return (
        -s[:, None] * np.column_stack([u, np.zeros(len(s))])
        - q[:, None] * np.column_stack([w, np.zeros(len(s))])
        - c[:, None] * np.array([0.0, 0.0, 1.0])
    )


def vertical_depth_below_source(normal_distance_m: ArrayLike, dip_deg: ArrayLike) -> np.ndarray:
    r"""Vertical distance from the source down to the plane.

    .. math:: z_v = h / \cos\delta

    The perpendicular h is the shortest distance; the vertical one is longer
    on a dipping plane.

    Parameters
    ----------
    normal_distance_m : float or array_like
        h (m).
    dip_deg : float or array_like
        True dip of the plane (degrees, below 90).

    Returns
    -------
    ndarray
        Vertical distance (m).

    Examples
    --------
    >>> round(float(vertical_depth_below_source(10.0, 60.0)), 9)
    20.0
    """
    return np.asarray(normal_distance_m, dtype=float) / np.cos(np.radians(dip_deg))


@dataclass(frozen=True)
class ReflectorPoints:
    """Georeferenced reflector points, one row per point.

    Rows of kind ``"zero_offset"`` (one per gather) are the feet of the
    perpendicular from the source, ``P0 = S + h n``; rows of kind
    ``"receiver"`` (one per pick) are specular reflection points by the image
    source. ``gather`` indexes the gather arrays, ``pick_index`` the picks
    table (-1 for zero-offset rows). ``normal`` (n, 3) is the gather's plane
    normal, ``ground_m`` the ground elevation at (x, y), ``depth_m =
    ground_m - elevation_m``. ``sigma_m`` is the standard error of the
    elevation and of the depth (ground taken as exact), ``sigma_xy_m`` the
    radial horizontal standard error, both from the fit covariance.
    """

    x_m: np.ndarray
    y_m: np.ndarray
    elevation_m: np.ndarray
    depth_m: np.ndarray
    ground_m: np.ndarray
    sigma_m: np.ndarray
    sigma_xy_m: np.ndarray
    line: np.ndarray
    shot: np.ndarray
    reflector: np.ndarray
    gather: np.ndarray
    pick_index: np.ndarray
    kind: np.ndarray
    status: np.ndarray
    normal: np.ndarray

    def __len__(self) -> int:
        """Return the number of points."""
        return len(self.x_m)

    @property
    def finite(self) -> np.ndarray:
        """Rows with a finite position and elevation."""
        return np.isfinite(self.x_m) & np.isfinite(self.y_m) & np.isfinite(self.elevation_m)

    @property
    def xyz(self) -> np.ndarray:
        """(n, 3) positions: x, y, elevation (m)."""
        return np.column_stack([self.x_m, self.y_m, self.elevation_m])

    def select(self, mask: ArrayLike) -> ReflectorPoints:
        """Return the rows where ``mask`` is true.

        Parameters
        ----------
        mask : (n,) bool array_like (or index array)
            Rows to keep.

        Returns
        -------
        ReflectorPoints
            A new set with those rows.
        """
        mask = np.asarray(mask)
        return ReflectorPoints(**{k: getattr(self, k)[mask] for k in self.__dataclass_fields__})


def station_ground_model(stations: Union[Stations, ArrayLike]) -> GroundModel:
    """Ground elevation model interpolated from surveyed points.

    Piecewise-linear on the Delaunay triangulation of the points, nearest
    point outside their hull, along the line for collinear points: see
    :meth:`core.survey.ground.GroundModel.from_stations`, which this wraps.

    Parameters
    ----------
    stations : Stations or array_like, shape (n, 3)
        Surveyed points x, y, z (m, working CRS).

    Returns
    -------
    GroundModel
        Callable ``ground(x_m, y_m) -> z_m`` (m) broadcasting over arrays.

    Examples
    --------
    >>> g = station_ground_model([[0, 0, 10], [10, 0, 20], [0, 10, 30], [10, 10, 40]])
    >>> float(g(5.0, 5.0)), float(g(100.0, 0.0))
    (25.0, 20.0)
    """
    pts = np.asarray(stations.xyz if hasattr(stations, "xyz") else stations, dtype=float).reshape(-1, 3)
    return GroundModel.from_stations(pts[:, 0], pts[:, 1], pts[:, 2])


def _points_local(src, rec, u, w, h, s, q, pick_gather):
    """Zero-offset and receiver reflection points relative to the source."""
    n = _normals_from(u, w, s, q)
    p0 = h[:, None] * n
    ng = n[pick_gather]
    rel = rec - src[pick_gather]
    pr = forward.reflection_point(np.zeros_like(rel), rel, ng, h[pick_gather])
    return p0, pr, n


def reflector_points(
    gathers: GatherSet,
    fits: Any,
    ground: Optional[Callable[[np.ndarray, np.ndarray], np.ndarray]] = None,
    cross_component: Optional[ArrayLike] = None,
) -> ReflectorPoints:
    r"""Georeferenced reflector points of every gather and every pick.

    For gather k with source S, normal distance h and downward normal n
    (:func:`gather_normals`), the plane is :math:`\mathbf n\cdot\mathbf P =
    \mathbf n\cdot\mathbf S + h` and

    .. math::

        \mathbf P_0 = \mathbf S + h\,\mathbf n, \qquad
        \mathbf P_R = \mathbf S' + \frac{h_S}{h_S + h_R}(\mathbf R - \mathbf S'),\;
        \mathbf S' = \mathbf S + 2h\,\mathbf n

    (zero-offset point = foot of the perpendicular, displaced up-dip; receiver
    point where the image-source ray crosses the plane [Sheriff & Geldart
    1995, ch. 4]).

    Uncertainty: the points depend on the fitted (V, h, s); with the Jacobian
    J = d(x, y, z)/d(V, h, s) (by central differences; the V column is zero
    because the plane geometry does not involve V once h is fitted) the
    point covariance is :math:`J C J^T` with C the fit covariance.
    ``sigma_m`` is the elevation standard error, ``sigma_xy_m`` the radial
    horizontal one. When the cross-line component q is *assumed* (no second
    line direction, q = 0), the true point may lie off the line's vertical
    plane by up to about :math:`h\,|q|`; that lateral uncertainty from the
    unknown cross-line dip is not in these sigmas. Nor is the uncertainty of
    a q resolved by crossing lines (see ``DipMeasurements.covariance``).

    Parameters
    ----------
    gathers : GatherSet
        The gathers (positions in m).
    fits : ShotFits or object
        Per-gather fit results with ``normal_distance_m``, ``s_along``,
        ``covariance`` (g, 3, 3) over (V, h, s), optionally
        ``cross_component`` and ``status``.
    ground : callable, optional
        ``ground(x_m, y_m) -> z`` (default: :func:`station_ground_model` of
        the gathers' source and receiver positions).
    cross_component : array_like, optional
        q per gather, overriding ``fits.cross_component``.

    Returns
    -------
    ReflectorPoints
        Zero-offset rows first (in gather order), then receiver rows (in pick
        order).
    """
    g = gathers.n_gathers
    gid = np.asarray(gathers.gather, dtype=np.int64)
    u = np.asarray(gathers.line_unit, float)
    w = np.asarray(gathers.cross_unit, float)
    src = np.asarray(gathers.source_xyz_g, float)
    rec = np.asarray(gathers.receiver_xyz, float)
    h = _fit_array(fits, "normal_distance_m", g)
    s = _fit_array(fits, "s_along", g)
    if cross_component is None:
        cross_component = getattr(fits, "cross_component", None)
    q = (
        np.zeros(g)
        if cross_component is None
        else np.broadcast_to(np.asarray(cross_component, dtype=float), (g,)).copy()
    )
    q = np.where(np.isfinite(q), q, 0.0)

    p0, pr, n = _points_local(src, rec, u, w, h, s, q, gid)

    cov = getattr(fits, "covariance", None)
    cov = np.full((g, 3, 3), np.nan) if cov is None else np.asarray(cov, dtype=float).reshape(g, 3, 3)
    # Jacobians over (h, s) by central differences; V does not move the points
    eps_h = 1e-6 * np.maximum(np.abs(np.nan_to_num(h)), 1.0)
    eps_s = 1e-7
    p0_hp, pr_hp, _ = _points_local(src, rec, u, w, h + eps_h, s, q, gid)
    p0_hm, pr_hm, _ = _points_local(src, rec, u, w, h - eps_h, s, q, gid)
    p0_sp, pr_sp, _ = _points_local(src, rec, u, w, h, s + eps_s, q, gid)
    p0_sm, pr_sm, _ = _points_local(src, rec, u, w, h, s - eps_s, q, gid)
    j0_h = (p0_hp - p0_hm) / (2 * eps_h[:, None])
    j0_s = (p0_sp - p0_sm) / (2 * eps_s)
    jr_h = (pr_hp - pr_hm) / (2 * eps_h[gid, None])
    jr_s = (pr_sp - pr_sm) / (2 * eps_s)

    def propagate(jh, js, c):
        # covariance of (x, y, z) from the (h, s) block of C
        chh, css, chs = c[:, 1, 1], c[:, 2, 2], c[:, 1, 2]
        var = jh * jh * chh[:, None] + js * js * css[:, None] + 2 * jh * js * chs[:, None]
        return np.sqrt(np.where(var >= 0, var, np.nan))

    sd0 = propagate(j0_h, j0_s, cov)
    sdr = propagate(jr_h, jr_s, cov[gid])

    xyz = np.concatenate([src + p0, src[gid] + pr])
    sd = np.concatenate([sd0, sdr])
    if ground is None:
        ground = station_ground_model(np.concatenate([src, rec]))
    ground_m = np.full(len(xyz), np.nan)
    where = np.isfinite(xyz[:, 0]) & np.isfinite(xyz[:, 1])  # failed fits give NaN points
    if where.any():
        ground_m[where] = np.asarray(ground(xyz[where, 0], xyz[where, 1]), dtype=float)

    status = getattr(fits, "status", None)
    status = np.full(g, "ok", dtype=object) if status is None else np.asarray(status).astype(object)
    npk = len(gid)
    all_g = np.concatenate([np.arange(g), gid])
    return ReflectorPoints(
        x_m=xyz[:, 0],
        y_m=xyz[:, 1],
        elevation_m=xyz[:, 2],
        depth_m=ground_m - xyz[:, 2],
        ground_m=ground_m,
        sigma_m=sd[:, 2],
        sigma_xy_m=np.hypot(sd[:, 0], sd[:, 1]),
        line=np.asarray(gathers.line, dtype=object)[all_g],
        shot=np.asarray(gathers.shot, dtype=object)[all_g],
        reflector=np.asarray(gathers.reflector, dtype=object)[all_g],
        gather=all_g,
        pick_index=np.concatenate([np.full(g, -1), np.asarray(gathers.pick_index, dtype=np.int64)]),
        kind=np.array(["zero_offset"] * g + ["receiver"] * npk, dtype=object),
        status=status[all_g],
        normal=np.concatenate([n, n[gid]]),
    )
