"""Sections along an alignment: the mapped surfaces, the ground and what lies near it, by chainage.

An alignment is a polyline (vertices in order, working CRS). Along it the
section samples, at a regular chainage step plus every vertex, the ground and
each mapped interface (elevation and standard deviation, bilinear from the
grid: exactly the raster value at a cell centre). Boreholes, shots and
reflector points within the corridor (``corridor_m`` wide, centred on the
alignment) are projected onto it: their chainage is that of the nearest point
of the polyline, their offset the distance to it, positive to the right of the
alignment looking toward increasing chainage (common practice in road and
rail design).

Depth = ground - reflector elevation (positive down); sigma is the surface's
standard deviation, the ground taken as exact (``depth_sigma.tif`` adds the
ground's standard deviation beyond the stations).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional, Sequence

import numpy as np

from ..grid import bilinear

__all__ = [
    "MAX_SAMPLES",
    "Interface",
    "Projected",
    "Section",
    "build_section",
    "locate_on_polyline",
    "polyline_chainage",
    "sample_polyline",
]

#: Most samples along one section (the step grows beyond it).
MAX_SAMPLES = 4000


@dataclass(frozen=True)
class Interface:
    """A gridded interface to draw: elevation and standard deviation grids (m) on ``spec``."""

    name: str
    elevation_m: np.ndarray
    sigma_m: np.ndarray
    kind: str = "reflector"  # "reflector" or "water_table"


@dataclass(frozen=True)
class Projected:
    """Points projected onto an alignment (one row each)."""

    label: np.ndarray  # str
    x_m: np.ndarray
    y_m: np.ndarray
    chainage_m: np.ndarray
    offset_m: np.ndarray  # positive to the right of the alignment
    top_m: np.ndarray  # collar or ground elevation (boreholes, shots); NaN when not known
    elevation_m: np.ndarray  # reflector elevation (boreholes, reflector points); NaN for shots
    sigma_m: np.ndarray  # standard error of elevation_m

    def __len__(self) -> int:
        return len(self.chainage_m)

    @classmethod
    def empty(cls) -> Projected:
        """No projected items."""
        z = np.zeros(0)
        return cls(np.zeros(0, dtype=object), z, z, z, z, z, z, z)


@dataclass(frozen=True)
class Section:
    """One section: samples along the alignment and the projected points.

    ``elevation_m``, ``sigma_m`` and ``depth_m`` are those of the first
    (mapped) interface; ``interfaces`` holds every interface's samples as
    (name, kind, elevation_m, sigma_m).
    """

    name: str
    title: str
    vertices_xy: np.ndarray
    chainage_m: np.ndarray
    x_m: np.ndarray
    y_m: np.ndarray
    ground_m: np.ndarray
    elevation_m: np.ndarray
    sigma_m: np.ndarray
    interfaces: tuple
    boreholes: Projected
    shots: Projected
    points: Projected
    corridor_m: float
    notes: tuple = field(default_factory=tuple)

    @property
    def depth_m(self) -> np.ndarray:
        """Depth of the mapped interface below ground (m, positive down)."""
        return self.ground_m - self.elevation_m

    @property
    def length_m(self) -> float:
        """Length of the alignment (m)."""
        return float(polyline_chainage(self.vertices_xy[:, 0], self.vertices_xy[:, 1])[-1])

    def table(self) -> dict:
        """The section's CSV columns: chainage_m, x_m, y_m, ground_m, elevation_m, depth_m, sigma_m."""
        return {
            "chainage_m": self.chainage_m,
            "x_m": self.x_m,
            "y_m": self.y_m,
            "ground_m": self.ground_m,
            "elevation_m": self.elevation_m,
            "depth_m": self.depth_m,
            "sigma_m": self.sigma_m,
        }


def polyline_chainage(vx, vy) -> np.ndarray:
    """Chainage (m) of each vertex of a polyline: cumulative length from the first.

    >>> polyline_chainage([0, 3, 3], [0, 4, 10]).tolist()
    [0.0, 5.0, 11.0]
    """
    vx, vy = np.asarray(vx, float), np.asarray(vy, float)
    return np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(vx), np.diff(vy)))])


def sample_polyline(vx, vy, step_m: float):
    """Points every ``step_m`` along a polyline, plus every vertex (chainage, x, y).

    >>> ch, x, y = sample_polyline([0, 10], [0, 0], 4.0)
    >>> ch.tolist(), x.tolist()
    ([0.0, 4.0, 8.0, 10.0], [0.0, 4.0, 8.0, 10.0])
    """
    vx, vy = np.asarray(vx, float), np.asarray(vy, float)
    cv = polyline_chainage(vx, vy)
    regular = np.arange(0.0, cv[-1], float(step_m))
    ch = np.unique(np.concatenate([regular, cv]))
    return ch, np.interp(ch, cv, vx), np.interp(ch, cv, vy)


def locate_on_polyline(vx, vy, px, py):
    """Chainage, signed offset and distance of points from their nearest point on a polyline.

    The offset is positive to the right of the polyline looking toward
    increasing chainage. Points beyond an end are measured to the end vertex
    (chainage 0 or the length; the offset is then that distance, on the side
    the point lies, right when it lies straight ahead).

    >>> ch, off, dist = locate_on_polyline([0, 10], [0, 0], [4.0, 12.0], [-3.0, 0.0])
    >>> ch.tolist(), off.tolist(), dist.tolist()
    ([4.0, 10.0], [3.0, 2.0], [3.0, 2.0])
    """
    vx, vy = np.asarray(vx, float), np.asarray(vy, float)
    px, py = np.atleast_1d(np.asarray(px, float)), np.atleast_1d(np.asarray(py, float))
    cv = polyline_chainage(vx, vy)
    ax, ay = vx[:-1], vy[:-1]
    dx, dy = np.diff(vx), np.diff(vy)
    seg2 = np.maximum(dx * dx + dy * dy, 1e-300)
    # parameter of the foot on each segment, clipped to the segment: (points, segments)
    t = ((px[:, None] - ax) * dx + (py[:, None] - ay) * dy) / seg2
    t = np.clip(t, 0.0, 1.0)
    fx, fy = ax + t * dx, ay + t * dy
    d = np.hypot(px[:, None] - fx, py[:, None] - fy)
    k = np.argmin(d, axis=1)
    rows = np.arange(len(px))
    chain = cv[k] + t[rows, k] * np.sqrt(seg2[k])
    # right of the direction (dx, dy) is where the cross product (d x (p - a)) is negative
    cross = dx[k] * (py - ay[k]) - dy[k] * (px - ax[k])
    seg_len = np.sqrt(seg2[k])
    perp = -cross / seg_len
    dist = d[rows, k]
    side = np.where(perp < 0, -1.0, 1.0)
    offset = np.where(np.abs(np.abs(perp) - dist) <= 1e-9 * (1 + dist), perp, side * dist) + 0.0
    return chain, offset, dist


def _project(vx, vy, half_width, label, x, y, top, elev, sigma) -> Projected:
    x = np.asarray(x, float)
    if not len(x):
        return Projected.empty()
    y = np.asarray(y, float)
    # only points within the corridor of the alignment's bounding box can lie within it of the alignment:
    # the others are never measured (a section of one line in a survey of many)
    vxa, vya = np.asarray(vx, float), np.asarray(vy, float)
    near = np.flatnonzero(
        (x >= vxa.min() - half_width)
        & (x <= vxa.max() + half_width)
        & (y >= vya.min() - half_width)
        & (y <= vya.max() + half_width)
    )
    ch, off, dist = locate_on_polyline(vx, vy, x[near], y[near])
    inside = np.flatnonzero(dist <= half_width)
    order = inside[np.argsort(ch[inside], kind="stable")]
    sel = near[order]
    ch, off = ch[order], off[order]

    def pick(a):
        return np.asarray(a)[sel]

    return Projected(
        pick(np.asarray(label).astype(str).astype(object)),
        pick(x),
        pick(y),
        ch,
        off,
        pick(top).astype(float),
        pick(elev).astype(float),
        pick(sigma).astype(float),
    )


def build_section(
    name: str,
    vertices_xy,
    spec,
    interfaces: Sequence[Interface],
    ground=None,
    *,
    corridor_m: float = 25.0,
    boreholes=None,
    shots=None,
    points=None,
    step_m: Optional[float] = None,
    title: str = "",
) -> Section:
    """Sample the interfaces and the ground along an alignment and project what lies near it.

    Parameters
    ----------
    name : str
        Short name (file names).
    vertices_xy : array_like (n, 2)
        Alignment vertices in order (m, working CRS), n >= 2.
    spec : GridSpec
        Grid of the interfaces.
    interfaces : sequence of Interface
        The first is the mapped reflector (the CSV's columns).
    ground : callable, optional
        ``ground(x_m, y_m)`` -> ground elevation (m), NaN where unknown.
    corridor_m : float
        Full width (m) of the strip, centred on the alignment, whose boreholes,
        shots and reflector points are projected.
    boreholes : tuple, optional
        (name, x_m, y_m, collar_m, reflector_elevation_m, sigma_m).
    shots : tuple, optional
        (label, x_m, y_m, z_m).
    points : tuple, optional
        Reflector points (label, x_m, y_m, elevation_m, sigma_m).
    step_m : float, optional
        Sampling step (default half a cell, at most :data:`MAX_SAMPLES` samples).
    title : str

    Returns
    -------
    Section
    """
    v = np.asarray(vertices_xy, float)
    if v.ndim != 2 or v.shape[1] != 2 or len(v) < 2:
        raise ValueError(f"an alignment needs (n >= 2, 2) vertices, got shape {v.shape}")
    if not corridor_m > 0:
        raise ValueError(f"corridor_m must be > 0, got {corridor_m!r}")
    vx, vy = v[:, 0], v[:, 1]
    length = float(polyline_chainage(vx, vy)[-1])
    if not length > 0:
        raise ValueError("the alignment has no length")
    step = spec.cell_size_m / 2 if step_m is None else float(step_m)
    step = max(step, length / MAX_SAMPLES)
    ch, x, y = sample_polyline(vx, vy, step)
    g = np.asarray(ground(x, y), float) if ground is not None else np.full(len(ch), np.nan)
    samples = []
    for itf in interfaces:
        samples.append((itf.name, itf.kind, bilinear(spec, itf.elevation_m, x, y), bilinear(spec, itf.sigma_m, x, y)))
    if samples:
        elev, sig = samples[0][2], samples[0][3]
    else:
        elev = sig = np.full(len(ch), np.nan)
    half = corridor_m / 2.0
    bh = Projected.empty() if boreholes is None else _project(vx, vy, half, *boreholes)
    sh = Projected.empty()
    if shots is not None:
        lab, sx, sy, sz = shots
        n = len(np.asarray(sx))
        sh = _project(vx, vy, half, lab, sx, sy, sz, np.full(n, np.nan), np.full(n, np.nan))
    pts = Projected.empty()
    if points is not None:
        lab, px, py, pz, ps = points
        pts = _project(vx, vy, half, lab, px, py, np.full(len(np.asarray(px)), np.nan), pz, ps)
    notes = []
    if np.all(~np.isfinite(elev)):
        notes.append("the alignment does not cross the mapped area")
    return Section(
        name, title or name, v, ch, x, y, g, elev, sig, tuple(samples), bh, sh, pts, float(corridor_m), tuple(notes)
    )
