"""Line misties: reflector elevation differences where two seismic lines cross.

Two lines that cross see the same reflector at the crossing; the difference
of the elevations they give (the mistie) measures what neither line's own
errors show: static shifts, velocity differences, picks of different events.
Works in the survey's projected working CRS (metres, z up).
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations
from typing import Any, Mapping, Optional

import numpy as np

from .geometry import LineFrame, ReflectorPoints, unique_in_order

__all__ = ["Crossings", "Misties", "line_crossings", "line_misties"]


@dataclass(frozen=True)
class Misties:
    """Reflector elevation differences where two lines cross.

    ``mistie_m = elevation_a_m - elevation_b_m``; ``sigma_m`` combines the two
    sides' standard errors in quadrature. Rows where one line has no
    zero-offset coverage at the crossing have NaN values and a ``status``
    saying which.
    """

    x_m: np.ndarray
    y_m: np.ndarray
    line_a: np.ndarray
    line_b: np.ndarray
    reflector: np.ndarray
    chainage_a_m: np.ndarray
    chainage_b_m: np.ndarray
    elevation_a_m: np.ndarray
    elevation_b_m: np.ndarray
    mistie_m: np.ndarray
    sigma_m: np.ndarray
    status: np.ndarray

    def __len__(self) -> int:
        """Return the number of crossings (rows)."""
        return len(self.x_m)


def _intersection_points(geom: Any) -> list[tuple[float, float]]:
    """Point parts of a shapely intersection (shapely 1.8 and 2.x)."""
    if geom.is_empty:
        return []
    kind = geom.geom_type
    if kind == "Point":
        return [(geom.x, geom.y)]
    if kind in ("MultiPoint", "GeometryCollection"):
        out: list[tuple[float, float]] = []
        for part in geom.geoms:
            out.extend(_intersection_points(part))
        return out
    return []  # overlapping (collinear) stretches have no single crossing point


@dataclass(frozen=True)
class Crossings:
    """Places where two survey lines meet, one row each.

    ``x_m``, ``y_m``: the crossing (m, working CRS); ``line_a``, ``line_b``:
    the two lines; ``angle_deg``: the angle between their directions (axial,
    0 to 90 degrees); ``gap_m``: 0 where the polylines intersect, else the
    closest distance between them (lines that end short of one another).
    """

    x_m: np.ndarray
    y_m: np.ndarray
    line_a: np.ndarray
    line_b: np.ndarray
    angle_deg: np.ndarray
    gap_m: np.ndarray

    def __len__(self) -> int:
        """Return the number of crossings."""
        return len(self.x_m)


def line_crossings(frames: Mapping[str, LineFrame], max_gap_m: float = 0.0) -> Crossings:
    """Every crossing of two line polylines, and near misses up to ``max_gap_m``.

    Crossings are the point intersections of the polylines (shapely). Two
    lines that do not intersect but come within ``max_gap_m`` of each other
    (a line ending just short of another) meet at the midpoint of their
    closest points.

    Parameters
    ----------
    frames : dict
        ``line -> LineFrame`` (:func:`~.geometry.line_frames`).
    max_gap_m : float
        Largest distance between two lines that still counts as a meeting (m).

    Returns
    -------
    Crossings
        In the order of the line pairs, then along the first line.

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> from .geometry import line_frames
    >>> st = NS(line=np.array(["A"] * 3 + ["B"] * 3, dtype=object),
    ...         station=np.array(["1", "2", "3"] * 2, dtype=object),
    ...         x_m=np.array([0.0, 10, 20, 10, 10, 10]), y_m=np.array([0.0, 0, 0, -10, 0, 10]),
    ...         z_m=np.zeros(6), file_line=np.arange(2, 8))
    >>> c = line_crossings(line_frames(st))
    >>> c.x_m.tolist(), c.y_m.tolist(), c.angle_deg.round(6).tolist()
    ([10.0], [0.0], [90.0])
    """
    from shapely.ops import nearest_points

    rows = []
    for a, b in combinations(list(frames), 2):
        fa, fb = frames[a], frames[b]
        cos = abs(float(np.dot(fa.unit, fb.unit)))
        angle = float(np.degrees(np.arccos(min(1.0, cos))))
        points = _intersection_points(fa.polyline.intersection(fb.polyline))
        if points:
            rows += [(x, y, a, b, angle, 0.0) for x, y in points]
            continue
        gap = float(fa.polyline.distance(fb.polyline))
        if gap <= max_gap_m:
            pa, pb = nearest_points(fa.polyline, fb.polyline)
            rows.append((0.5 * (pa.x + pb.x), 0.5 * (pa.y + pb.y), a, b, angle, gap))
    cols: list[Any] = list(zip(*rows)) if rows else [[] for _ in range(6)]
    return Crossings(
        x_m=np.asarray(cols[0], float),
        y_m=np.asarray(cols[1], float),
        line_a=np.asarray(cols[2], dtype=object),
        line_b=np.asarray(cols[3], dtype=object),
        angle_deg=np.asarray(cols[4], float),
        gap_m=np.asarray(cols[5], float),
    )


def _line_profile(
    frame: LineFrame, points: ReflectorPoints, mask: np.ndarray
) -> Optional[tuple[np.ndarray, np.ndarray]]:
    """Zero-offset points of one line/reflector sorted by chainage."""
    idx = np.flatnonzero(mask)
    if len(idx) == 0:
        return None
    ch, _ = frame.locate(points.x_m[idx], points.y_m[idx])
    order = np.argsort(ch, kind="stable")
    return ch[order], idx[order]


def _value_at(
    profile: Optional[tuple[np.ndarray, np.ndarray]],
    points: ReflectorPoints,
    chain: float,
    x: float,
    y: float,
    max_gap: float,
) -> tuple[float, float, str]:
    """Elevation and sigma seen by one line at (x, y), chainage ``chain``."""
    if profile is None:
        return np.nan, np.nan, "no points"
    ch, idx = profile
    if len(ch) == 0 or chain < ch[0] or chain > ch[-1]:
        return np.nan, np.nan, "beyond coverage"
    hi = int(np.searchsorted(ch, chain, side="left"))
    if ch[hi] == chain:
        lo = hi
    else:
        lo = hi - 1
    gap = ch[hi] - ch[lo]
    if gap > max_gap:
        return np.nan, np.nan, f"gap of {gap:.1f} m"

    def carried(k: int) -> float:
        # elevation of gather k's own plane at (x, y): n.(X - P) = 0
        j = idx[k]
        nx, ny, nz = points.normal[j]
        return points.elevation_m[j] - (nx * (x - points.x_m[j]) + ny * (y - points.y_m[j])) / nz

    if lo == hi:
        return carried(hi), points.sigma_m[idx[hi]], "ok"
    t = (chain - ch[lo]) / gap
    z = (1 - t) * carried(lo) + t * carried(hi)
    sig = (1 - t) * points.sigma_m[idx[lo]] + t * points.sigma_m[idx[hi]]
    return z, sig, "ok"


def line_misties(
    frames: Mapping[str, LineFrame], points: ReflectorPoints, max_gap_m: Optional[float] = None
) -> Misties:
    r"""Misties of the reflector elevation at every crossing of two lines.

    Crossings are the point intersections of the line polylines (shapely).
    The elevation seen by a line at a crossing X is interpolated linearly in
    chainage between the two zero-offset points of that line (and reflector)
    that bracket X along the line, each first carried to X along its own
    gather's fitted plane, :math:`z_k(X) = z_k - (n_x \Delta x + n_y \Delta
    y)/n_z` (so on a planar reflector with the true normals the mistie is
    zero even though the points lie off the line). The sigma of each side is
    interpolated the same way (neighbouring gathers treated as fully
    correlated, the cautious choice); the two sides combine in quadrature.

    Parameters
    ----------
    frames : dict
        ``line -> LineFrame`` (:func:`line_frames`).
    points : ReflectorPoints
        Only finite ``"zero_offset"`` rows are used.
    max_gap_m : float, optional
        Largest chainage gap between the bracketing points; default three
        times the median spacing of that line's points. No value is given
        beyond a line's first or last point, or across a larger gap.

    Returns
    -------
    Misties
        One row per (crossing, reflector seen on either line).
    """
    zo = (np.asarray(points.kind) == "zero_offset") & points.finite
    p_line = np.asarray(points.line).astype(str)
    p_refl = np.asarray(points.reflector).astype(str)
    reflectors = unique_in_order(p_refl[zo]) if zo.any() else []
    profiles = {}
    gaps = {}
    for name, frame in frames.items():
        for refl in reflectors:
            prof = _line_profile(frame, points, zo & (p_line == name) & (p_refl == refl))
            profiles[name, refl] = prof
            if max_gap_m is not None:
                gaps[name, refl] = float(max_gap_m)
            elif prof is not None and len(prof[0]) > 1:
                step = np.diff(prof[0])
                step = step[step > 0]
                gaps[name, refl] = 3.0 * float(np.median(step)) if len(step) else 0.0
            else:
                gaps[name, refl] = 0.0
    rows = []
    for a, b in combinations(list(frames), 2):
        fa, fb = frames[a], frames[b]
        crossing = fa.polyline.intersection(fb.polyline)
        for x, y in _intersection_points(crossing):
            ca = float(fa.locate(x, y)[0])
            cb = float(fb.locate(x, y)[0])
            for refl in reflectors:
                prof_a, prof_b = profiles[a, refl], profiles[b, refl]
                if prof_a is None and prof_b is None:
                    continue
                za, sa, why_a = _value_at(prof_a, points, ca, x, y, gaps[a, refl])
                zb, sb, why_b = _value_at(prof_b, points, cb, x, y, gaps[b, refl])
                reasons = [f"line {n}: {why}" for n, why in ((a, why_a), (b, why_b)) if why != "ok"]
                rows.append(
                    (
                        x,
                        y,
                        a,
                        b,
                        refl,
                        ca,
                        cb,
                        za,
                        zb,
                        za - zb,
                        np.hypot(sa, sb),
                        "ok" if not reasons else "no value: " + "; ".join(reasons),
                    )
                )
    cols: list[Any] = list(zip(*rows)) if rows else [[] for _ in range(12)]
    f = lambda i: np.asarray(cols[i], dtype=float)  # noqa: E731
    o = lambda i: np.asarray(cols[i], dtype=object)  # noqa: E731
    return Misties(
        x_m=f(0),
        y_m=f(1),
        line_a=o(2),
        line_b=o(3),
        reflector=o(4),
        chainage_a_m=f(5),
        chainage_b_m=f(6),
        elevation_a_m=f(7),
        elevation_b_m=f(8),
        mistie_m=f(9),
        sigma_m=f(10),
        status=o(11),
    )
