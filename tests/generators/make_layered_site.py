"""Independent synthetic layered survey of the invented "Holloway Weir" site.

This script forward-models a shallow reflection survey through a layered,
laterally varying overburden and writes an input folder for the project
(``tests/data/layered_site``). It deliberately imports nothing from the
project's package: its only job is to make data whose truth is known, so the
project's inversion can be tested against it.

Model (all invented)
--------------------
* ground: a plane sloping about 4 % towards the south-south-west, elevations
  about 100-110 m;
* layer 1, dry sand: ``v = V1_TOP + V1_GRAD * (depth below ground)``
  (560 m/s at the ground, +22 m/s per m);
* water table (reflector ``"wt"``): 4.4-5.6 m below ground, a smooth wave;
* layer 2, saturated sediment: about 1600 m/s with a linear lateral change
  (1560-1640 m/s across the site), no vertical change;
* bedrock (reflector ``"rock"``): a plane dipping 6 degrees plus a Gaussian
  knoll 3.5 m high, 25-40 m below ground.

The exact formulas are the public functions below (``ground_elevation``,
``water_table_elevation``, ``rock_elevation``, ``velocity``); they take
projected coordinates (EPSG:32633, metres) and are what tests import.

Forward modelling
-----------------
Fermat's principle for a reflection: the two-way time of the pair (S, R) off
reflector Z is ``min over P on Z of T_S(P) + T_R(P)``, where ``T_S`` and
``T_R`` are first-arrival time fields from S and R computed in the model above
Z. One field is computed per station (a station is both a shot point and a
receiver position) and the fields are combined per pair.

* Fields are computed in 3-D by the fast marching method (scikit-fmm,
  ``skfmm.travel_time`` with ``order=2``) on a box per station: a horizontal
  rectangle turned to follow the station's reflection points (its own line,
  also across a bend) with a small margin, from just above the source down to
  just below the reflector. There is no 2.5-D assumption: ray paths may leave
  the line's vertical plane (they do, because of the dip and the knoll).
* Below the reflector the layer law above it is simply continued, so the field
  is smooth across the reflector and can be interpolated there; above the
  ground the top layer's linear law is continued (its velocity decreases
  upwards, so a first arrival to a point below the ground never gains by
  going above it: the ground plane is an iso-velocity plane of that law and
  mirroring any part of a path above it to below makes it faster).
* Near the source the top layer is an exact linear velocity law, whose
  point-source times are known in closed form (circular rays):
  ``t = arccosh(1 + g^2 r^2 / (2 v_s v_p)) / g``. The march starts from an
  isochron of that solution (radius about 2.5 m) instead of from a point,
  which removes the point-source error of the method. scikit-fmm gives its
  frozen start points ``distance / speed``, with the distance estimated from
  ``phi`` along the grid axes; the speed of those points is set so that this
  equals the closed-form time exactly, and that is checked after each march.
* Where a layer boundary crosses a grid cell, the cell's slowness is the
  average of the two layers' slownesses weighted by the cell's vertical
  fractions in each.
* Each station's field is sampled on the reflector (cubic spline
  interpolation) on a common horizontal grid with the field's spacing. For
  each pair the discrete minimum of the sum is refined by a least-squares
  quadratic fitted to its 5 x 5 neighbourhood.
* Everything runs twice: a coarse pass (1 m grid, minimum smoothed over 3 m)
  finds approximate reflection points, which size the boxes of the fine pass
  (0.25 m grid).
* In layer 1 velocity increases with depth, so the rays bend upwards: beyond a
  limiting offset no down-going ray reaches the water table and the
  water-table reflection does not exist (it would be a diving wave grazing the
  interface). A pick is kept only where both the incident and the reflected
  ray meet the reflector at less than ``MAX_INCIDENCE_DEG`` from its normal:
  this ends the water-table picks at about 24 m offset and drops no rock pick.

Accuracy (checked by ``tests/core/test_layered_generator.py`` and by
``--validate`` at the full grid spacing against closed-form answers) is a few
hundredths of a millisecond; noise and mispicks are added afterwards.

Run time: the full site takes about 16 CPU-minutes (920 s user time, 440 MB
per process), i.e. about 8-9 minutes with the default two processes on an
otherwise idle 2-core machine (measured: 48 minutes of wall time on a heavily
shared one). ``--quick`` (line A only, 0.5 m grid) takes about a minute of CPU
and writes to a temporary folder unless ``--out`` is given.

Usage::

    python tests/generators/make_layered_site.py            # writes tests/data/layered_site
    python tests/generators/make_layered_site.py --quick --out /tmp/layered_quick
    python tests/generators/make_layered_site.py --validate  # closed-form check at full resolution

The output is deterministic (fixed seed, fixed geometry).
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import multiprocessing
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import ndimage

HERE = Path(__file__).resolve().parent
DEFAULT_OUT = HERE.parent / "data" / "layered_site"

# --------------------------------------------------------------------------- site (invented)

SITE_NAME = "Holloway Weir (invented demo site)"
CRS = "EPSG:32633"  # WGS 84 / UTM zone 33N, metres
EAST0_M, NORTH0_M = 512_000.0, 5_430_000.0  # site origin; local coordinates u = x - EAST0_M, v = y - NORTH0_M
SEED = 20240611

# ground: z = GROUND_Z0 + GROUND_SLOPE_E * u + GROUND_SLOPE_N * v
GROUND_Z0_M = 105.0
GROUND_SLOPE_E = 0.0137
GROUND_SLOPE_N = 0.0376

# water table depth below ground:
# d = WT_DEPTH0 + WT_AMP * sin(u / WT_LEN_E + WT_PHASE) * cos(v / WT_LEN_N) + WT_TILT_E * u
WT_DEPTH0_M = 5.0
WT_AMP_M = 0.45
WT_LEN_E_M = 55.0
WT_LEN_N_M = 70.0
WT_PHASE_RAD = 0.4
WT_TILT_E = 0.001

# bedrock: a plane through (ROCK_PLANE_U, ROCK_PLANE_V, ROCK_Z0) dipping ROCK_DIP_DEG towards azimuth
# ROCK_DIP_AZIMUTH_DEG (clockwise from north), plus KNOLL_HEIGHT * exp(-(r / KNOLL_RADIUS)^2)
ROCK_Z0_M = 73.0  # plane elevation at the site origin
ROCK_DIP_DEG = 6.0
ROCK_DIP_AZIMUTH_DEG = 200.0
KNOLL_HEIGHT_M = 3.5
KNOLL_RADIUS_M = 40.0
KNOLL_CENTRE_UV = (35.0, -25.0)

# layer 1 (dry sand): v = V1_TOP + V1_GRAD * (ground elevation - z)
V1_TOP_M_S = 560.0
V1_GRAD_PER_S = 22.0
# layer 2 (saturated): v = V2_0 + V2_GRAD_E * u + V2_GRAD_N * v   (no vertical change)
V2_0_M_S = 1600.0
V2_GRAD_E_PER_S = 0.26
V2_GRAD_N_PER_S = -0.12

# picking
SIGMA_MS = {"wt": 0.3, "rock": 0.5}
MISPICK_FRACTION = 0.02
MISPICK_MS = (3.0, 8.0)  # size range of a mispick, either sign
MAX_INCIDENCE_DEG = 80.0  # picks whose rays meet the reflector beyond this angle are dropped (see the docstring)

# layout
STATION_SPACING_M = 4.0
SHOT_EVERY = 4  # stations (16 m); the last station of a line is a shot point too
MIN_OFFSET_M = 3.9  # no trace at the shot point itself
MAX_OFFSET_M = {"split": 72.0, "end_on": 76.0}
# line: (start (u, v), [(azimuth deg, length m), ...], spread)
LINES = {
    "A": ((-116.0, -30.0), [(90.0, 232.0)], "split"),
    "B": ((-15.0, -112.0), [(0.0, 224.0)], "split"),
    "C": ((-96.0, -86.0), [(45.0, 236.0)], "end_on"),
    "D": ((-108.0, 70.0), [(110.0, 104.0), (150.0, 112.0)], "split"),  # crooked: follows a field boundary
}
BOREHOLES = {"BH-1": (-40.0, -31.5), "BH-2": (33.0, -26.0), "BH-3": (-13.5, 64.0)}

FINE_H_M = 0.25
COARSE_H_M = 1.0
TRUTH_CELL_M = 2.0
TRUTH_MARGIN_M = 30.0


# --------------------------------------------------------------------------- the model (local coordinates)


def _ground_local(u, v):
    return GROUND_Z0_M + GROUND_SLOPE_E * np.asarray(u, float) + GROUND_SLOPE_N * np.asarray(v, float)


def _wt_depth_local(u, v):
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    return WT_DEPTH0_M + WT_AMP_M * np.sin(u / WT_LEN_E_M + WT_PHASE_RAD) * np.cos(v / WT_LEN_N_M) + WT_TILT_E * u


def _wt_local(u, v):
    return _ground_local(u, v) - _wt_depth_local(u, v)


def _rock_local(u, v):
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    az = math.radians(ROCK_DIP_AZIMUTH_DEG)
    along_dip = u * math.sin(az) + v * math.cos(az)
    plane = ROCK_Z0_M - math.tan(math.radians(ROCK_DIP_DEG)) * along_dip
    r2 = (u - KNOLL_CENTRE_UV[0]) ** 2 + (v - KNOLL_CENTRE_UV[1]) ** 2
    return plane + KNOLL_HEIGHT_M * np.exp(-r2 / KNOLL_RADIUS_M**2)


def _v2_local(u, v, z=None):
    """Layer 2 velocity; z is accepted and ignored (no vertical change)."""
    out = V2_0_M_S + V2_GRAD_E_PER_S * np.asarray(u, float) + V2_GRAD_N_PER_S * np.asarray(v, float)
    if z is not None:
        out = out + np.zeros_like(np.asarray(z, float))
    return out


def _local(x, y):
    return np.asarray(x, float) - EAST0_M, np.asarray(y, float) - NORTH0_M


# --------------------------------------------------------------------------- the model (projected coordinates)


def ground_elevation(x, y):
    """Ground elevation (m) at projected (x, y)."""
    return _ground_local(*_local(x, y))


def water_table_elevation(x, y):
    """Water-table elevation (m) at projected (x, y)."""
    return _wt_local(*_local(x, y))


def rock_elevation(x, y):
    """Bedrock (rockhead) elevation (m) at projected (x, y)."""
    return _rock_local(*_local(x, y))


def velocity(x, y, z):
    """Velocity (m/s) at projected (x, y) and elevation z; NaN above the ground and below the rock."""
    u, v = _local(x, y)
    z = np.asarray(z, float)
    zg = _ground_local(u, v)
    v1 = V1_TOP_M_S + V1_GRAD_PER_S * (zg - z)
    out = np.where(z >= _wt_local(u, v), v1, _v2_local(u, v, z))
    return np.where((z > zg) | (z < _rock_local(u, v)), np.nan, out)


def vertical_average_velocity(x, y, reflector):
    """True vertical-average velocity (m/s) from the ground down to ``"wt"`` or ``"rock"`` at (x, y).

    ``depth / one-way vertical time``; layer 1 integrates in closed form,
    ``t1 = ln(1 + g d / v_top) / g``.
    """
    u, v = _local(x, y)
    zg = _ground_local(u, v)
    d_wt = zg - _wt_local(u, v)
    t1 = np.log1p(V1_GRAD_PER_S * d_wt / V1_TOP_M_S) / V1_GRAD_PER_S
    if reflector == "wt":
        return d_wt / t1
    if reflector == "rock":
        d_rock = zg - _rock_local(u, v)
        return d_rock / (t1 + (d_rock - d_wt) / _v2_local(u, v))
    raise ValueError(f"unknown reflector {reflector!r}")


# --------------------------------------------------------------------------- generic layered model


class LinearVelocity:
    """``v(p) = v0 + grad . (p - ref)``: constant when ``grad`` is zero. Used for the top layer."""

    def __init__(self, v0, grad=(0.0, 0.0, 0.0), ref=(0.0, 0.0, 0.0)):
        self.v0 = float(v0)
        self.grad = np.asarray(grad, float)
        self.ref = np.asarray(ref, float)

    def __call__(self, x, y, z):
        g, r = self.grad, self.ref
        return self.v0 + g[0] * (np.asarray(x) - r[0]) + g[1] * (np.asarray(y) - r[1]) + g[2] * (np.asarray(z) - r[2])

    def time_from(self, src, x, y, z):
        """Exact first-arrival time from point ``src`` in this (unbounded) medium.

        Rays in a linear velocity law are circular arcs and the time between
        two points is ``arccosh(1 + g^2 r^2 / (2 v_a v_b)) / g``; written with
        ``log1p`` so that it tends to ``r / v`` as g goes to 0.
        """
        dx, dy, dz = np.asarray(x) - src[0], np.asarray(y) - src[1], np.asarray(z) - src[2]
        r2 = dx * dx + dy * dy + dz * dz
        vs = float(self(*src))
        vp = self(x, y, z)
        g = float(np.linalg.norm(self.grad))
        if g == 0.0:
            return np.sqrt(r2) / vs
        q = g * g * r2 / (2.0 * vs * vp)
        return np.log1p(q + np.sqrt(q * (q + 2.0))) / g


class PlaneSurface:
    """``z = z0 + sx (x - x0) + sy (y - y0)``."""

    def __init__(self, z0, sx=0.0, sy=0.0, x0=0.0, y0=0.0):
        self.z0, self.sx, self.sy, self.x0, self.y0 = float(z0), float(sx), float(sy), float(x0), float(y0)

    @classmethod
    def dipping(cls, z0, dip_deg, dip_azimuth_deg, x0=0.0, y0=0.0):
        """Plane through (x0, y0, z0) dipping ``dip_deg`` towards azimuth ``dip_azimuth_deg`` (from north)."""
        t = math.tan(math.radians(dip_deg))
        az = math.radians(dip_azimuth_deg)
        return cls(z0, -t * math.sin(az), -t * math.cos(az), x0, y0)

    def __call__(self, x, y):
        return self.z0 + self.sx * (np.asarray(x, float) - self.x0) + self.sy * (np.asarray(y, float) - self.y0)


class ConstantVelocity:
    def __init__(self, v):
        self.v = float(v)

    def __call__(self, x, y, z):
        return np.full(np.broadcast(np.asarray(x), np.asarray(y), np.asarray(z)).shape, self.v)


@dataclass
class LayeredModel:
    """Layers separated by interfaces ``z = f(x, y)``, listed from the top down.

    ``top`` is layer 0 (a :class:`LinearVelocity`: sources must be in it);
    ``lower[k]`` is the velocity law ``v(x, y, z)`` of layer ``k + 1``, which
    lies below ``interfaces[k]``. Reflector ``k`` is ``interfaces[k]``; the
    model above it is layers ``0..k`` and layer ``k``'s law is continued below
    it. Interfaces must not cross. Each law must be positive wherever it is
    evaluated (the whole box of a station).
    """

    top: LinearVelocity
    interfaces: list
    lower: list

    def layer_law(self, k):
        return self.top if k == 0 else self.lower[k - 1]


def site_model() -> LayeredModel:
    """The site as a layered model in local coordinates (u, v, z)."""
    top = LinearVelocity(
        V1_TOP_M_S + V1_GRAD_PER_S * GROUND_Z0_M,
        grad=(V1_GRAD_PER_S * GROUND_SLOPE_E, V1_GRAD_PER_S * GROUND_SLOPE_N, -V1_GRAD_PER_S),
    )
    return LayeredModel(top=top, interfaces=[_wt_local, _rock_local], lower=[_v2_local])


# --------------------------------------------------------------------------- fast marching on a box


@dataclass
class Box:
    """A grid box: horizontal axes a, b turned by ``angle`` (radians, anticlockwise from east), z downwards.

    Node (i, j, k) is at a = a0 + i h, b = b0 + j h, z = ztop - k h, and
    x = a cos - b sin, y = a sin + b cos.
    """

    angle: float
    a0: float
    b0: float
    na: int
    nb: int
    ztop: float
    nz: int
    h: float

    def to_ab(self, x, y):
        c, s = math.cos(self.angle), math.sin(self.angle)
        return x * c + y * s, -x * s + y * c

    def to_xy(self, a, b):
        c, s = math.cos(self.angle), math.sin(self.angle)
        return a * c - b * s, a * s + b * c

    @property
    def cells(self):
        return self.na * self.nb * self.nz


def _frontier_distance(phi, h):
    """Nodes next to the zero level of ``phi`` and their distance estimate as scikit-fmm makes it.

    Along each axis the crossing is placed by linear interpolation of phi (the
    nearer crossing if both neighbours differ in sign) and the per-axis
    distances d_i are combined as ``1 / sqrt(sum 1 / d_i^2)``.
    """
    inv = np.zeros(phi.shape)
    border = np.zeros(phi.shape, dtype=bool)
    for ax in range(phi.ndim):
        dmin = np.full(phi.shape, np.inf)
        for step in (1, -1):
            nb = np.roll(phi, -step, axis=ax)
            edge = [slice(None)] * phi.ndim
            edge[ax] = slice(-1, None) if step == 1 else slice(0, 1)
            cross = phi * nb < 0
            cross[tuple(edge)] = False
            with np.errstate(divide="ignore", invalid="ignore"):
                d = h * phi / (phi - nb)
            dmin = np.where(cross & (d < dmin), d, dmin)
        found = np.isfinite(dmin)
        border |= found
        inv += np.where(found & (dmin > 0), 1.0 / np.where(found & (dmin > 0), dmin, 1.0) ** 2, 0.0)
    dist = np.where(inv > 0, 1.0 / np.sqrt(np.where(inv > 0, inv, 1.0)), 0.0)
    return border & (phi != 0), dist


def source_radius(model, src, h):
    """Radius (m) of the closed-form region around a source: up to 2.5 m, clear of the first interface."""
    depth = float(src[2] - model.interfaces[0](src[0], src[1]))
    r0 = min(2.5, depth - 2.0 * h - 0.5)
    if r0 < 1.5 * h:
        raise ValueError(f"source at {src} is {depth:.2f} m above the first interface: too close for h = {h} m")
    return r0


def march(model, reflector, src, box):
    """First-arrival time field (s) from ``src`` on ``box`` in the model above ``reflector``."""
    import skfmm  # scikit-fmm; imported here so the analytic model above needs only numpy

    h = box.h
    a = box.a0 + h * np.arange(box.na)
    b = box.b0 + h * np.arange(box.nb)
    z = box.ztop - h * np.arange(box.nz)
    A, B = np.meshgrid(a, b, indexing="ij")
    X, Y = box.to_xy(A, B)
    X3, Y3, Z3 = X[:, :, None], Y[:, :, None], z[None, None, :]
    # slowness: vertical fraction of each node's cell [z - h/2, z + h/2] in each layer
    slowness = np.zeros((box.na, box.nb, box.nz))
    upper = np.full((box.na, box.nb, 1), np.inf)
    for k in range(reflector + 1):
        lower = model.interfaces[k](X, Y)[:, :, None] if k < reflector else np.full((box.na, box.nb, 1), -np.inf)
        frac = np.clip(np.minimum(Z3 + h / 2, upper) - np.maximum(Z3 - h / 2, lower), 0.0, h) / h
        law = np.broadcast_to(model.layer_law(k)(X3, Y3, Z3), slowness.shape)
        if np.any(law[frac > 0] <= 0):
            raise ValueError(f"layer {k} velocity is not positive in the box")
        slowness += frac / law
        upper = lower
    speed = 1.0 / slowness

    r0 = source_radius(model, src, h)
    t_exact = model.top.time_from(src, X3, Y3, Z3)
    t0 = r0 / float(model.top(*src))
    phi = t_exact - t0
    inside = phi <= 0
    if inside[0].any() or inside[-1].any() or inside[:, 0].any() or inside[:, -1].any() or inside[:, :, 0].any():
        raise ValueError("the source region touches the box edge")
    if inside[:, :, -1].any():
        raise ValueError("the source region touches the box bottom")
    z_if0 = np.broadcast_to(model.interfaces[0](X, Y)[:, :, None], phi.shape)
    if np.any((Z3 - h < z_if0)[inside]):
        raise ValueError("the source region reaches the first interface")
    border, dist = _frontier_distance(phi, h)
    # frozen start values are dist / speed: choose the speed so that they equal |phi| exactly
    speed[border] = dist[border] / np.abs(phi[border])
    t = skfmm.travel_time(phi, speed, dx=h, order=2)
    if np.ma.isMaskedArray(t):
        if t.mask.any():
            raise RuntimeError("fast marching left unreached nodes")
        t = t.data
    t = np.asarray(t)
    out_border = border & ~inside
    if np.max(np.abs(t[out_border] - phi[out_border])) > 1e-12:
        raise RuntimeError("scikit-fmm did not start from the expected values (its initialisation changed?)")
    return np.where(inside, t_exact, t + t0)


# --------------------------------------------------------------------------- fields on the reflector


@dataclass
class SurfaceSample:
    """A station's time field sampled on the reflector at global grid nodes (i0 + i, j0 + j) * step."""

    i0: int
    j0: int
    time: np.ndarray  # s, NaN outside the box
    cos_inc: np.ndarray  # cosine of the angle between the ray and the reflector's downward normal


def _surface_gradient(f, x, y, eps=1e-3):
    return (f(x + eps, y) - f(x - eps, y)) / (2 * eps), (f(x, y + eps) - f(x, y - eps)) / (2 * eps)


def sample_on_reflector(model, reflector, field, box, step):
    """Sample ``field`` (on ``box``) on the reflector at the global grid nodes (i step, j step) inside it."""
    h = box.h
    surf = model.interfaces[reflector]
    corners = np.array([[0, 0], [box.na - 1, 0], [0, box.nb - 1], [box.na - 1, box.nb - 1]], float)
    cx, cy = box.to_xy(box.a0 + h * corners[:, 0], box.b0 + h * corners[:, 1])
    i0, i1 = math.floor(cx.min() / step), math.ceil(cx.max() / step)
    j0, j1 = math.floor(cy.min() / step), math.ceil(cy.max() / step)
    I, J = np.meshgrid(np.arange(i0, i1 + 1), np.arange(j0, j1 + 1), indexing="ij")
    x, y = I * step, J * step
    zr = surf(x, y)
    a, b = box.to_ab(x, y)
    fa, fb, fz = (a - box.a0) / h, (b - box.b0) / h, (box.ztop - zr) / h
    pad = 2.5  # nodes kept clear of the box faces (cubic stencil and the gradient's half step)
    ok = (fa >= pad) & (fa <= box.na - 1 - pad) & (fb >= pad) & (fb <= box.nb - 1 - pad)
    ok &= (fz >= pad) & (fz <= box.nz - 1 - pad)
    coef = ndimage.spline_filter(field, order=3)

    def at(da=0.0, db=0.0, dz=0.0):
        pts = np.vstack([fa[ok] + da, fb[ok] + db, fz[ok] + dz])
        return ndimage.map_coordinates(coef, pts, order=3, prefilter=False)

    t = np.full(x.shape, np.nan)
    t[ok] = at()
    # ray direction = gradient of the field (x, y, z up), by central differences of half a node
    ga = (at(da=0.5) - at(da=-0.5)) / h
    gb = (at(db=0.5) - at(db=-0.5)) / h
    gz = -(at(dz=0.5) - at(dz=-0.5)) / h
    c, s = math.cos(box.angle), math.sin(box.angle)
    gx, gy = ga * c - gb * s, ga * s + gb * c
    sx, sy = _surface_gradient(surf, x[ok], y[ok])
    n = np.vstack([sx, sy, -np.ones_like(sx)]) / np.sqrt(1 + sx * sx + sy * sy)
    g = np.vstack([gx, gy, gz])
    cos_inc = np.full(x.shape, np.nan)
    cos_inc[ok] = np.sum(g * n, axis=0) / np.linalg.norm(g, axis=0)
    return SurfaceSample(i0, j0, t, cos_inc.astype(np.float32))


FIT_HALF = 2  # the quadratic is fitted to the (2 FIT_HALF + 1)^2 nodes around the discrete minimum


def _quadratic_min(f):
    """Minimum of the least-squares quadratic through a square block centred on the discrete minimum.

    Returns (offset i, offset j, value, refined). Where the fit has no
    minimum inside the block (a very flat or noisy sum) the discrete minimum
    is returned with ``refined`` False.
    """
    k = (f.shape[0] - 1) // 2
    ii, jj = np.meshgrid(np.arange(-k, k + 1.0), np.arange(-k, k + 1.0), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    design = np.column_stack([np.ones_like(ii), ii, jj, ii * ii, ii * jj, jj * jj])
    c = np.linalg.lstsq(design, f.ravel(), rcond=None)[0]
    grad = np.array([c[1], c[2]])
    hess = np.array([[2 * c[3], c[4]], [c[4], 2 * c[5]]])
    if np.linalg.det(hess) > 0 and hess[0, 0] > 0:
        d = -np.linalg.solve(hess, grad)
        if np.max(np.abs(d)) <= k:
            return d[0], d[1], c[0] + grad @ d + 0.5 * d @ hess @ d, True
    return 0.0, 0.0, float(f[k, k]), False


def _rough_min(f, i, j, radius):
    """Smoothed minimum for the coarse pass: a quadratic fitted to the finite nodes within ``radius``.

    The coarse sum is too noisy for its discrete minimum to be trusted along a
    flat valley; the estimate only places the fine boxes. Returns (i, j).
    """
    I, J = np.nonzero(np.isfinite(f))
    near = (I - i) ** 2 + (J - j) ** 2 <= radius**2
    di, dj = (I[near] - i).astype(float), (J[near] - j).astype(float)
    if len(di) >= 12:
        design = np.column_stack([np.ones_like(di), di, dj, di * di, di * dj, dj * dj])
        c = np.linalg.lstsq(design, f[I[near], J[near]], rcond=None)[0]
        hess = np.array([[2 * c[3], c[4]], [c[4], 2 * c[5]]])
        if np.linalg.det(hess) > 0 and hess[0, 0] > 0:
            d = -np.linalg.solve(hess, c[1:3])
            ii, jj = round(i + d[0]), round(j + d[1])
            if 0 <= ii < f.shape[0] and 0 <= jj < f.shape[1] and np.isfinite(f[ii, jj]):
                return i + d[0], j + d[1]
    return float(i), float(j)


def pair_minimum(ss, sr, step, surf, rough=False, allow_missing=False):
    """Reflection time (s), point (x, y, z), the two cosines of incidence and whether the fit refined it.

    ``rough`` (coarse pass): a smoothed estimate, never an error at the edge
    of the sampled region. Otherwise a minimum at the edge of the sampled
    region is an error, or with ``allow_missing`` gives NaN (no reflection:
    the sum has no interior minimum, as past the end of the water-table
    reflection).
    """
    i0, j0 = max(ss.i0, sr.i0), max(ss.j0, sr.j0)
    i1 = min(ss.i0 + ss.time.shape[0], sr.i0 + sr.time.shape[0])
    j1 = min(ss.j0 + ss.time.shape[1], sr.j0 + sr.time.shape[1])
    if i1 - i0 < 3 or j1 - j0 < 3:
        raise RuntimeError("the two stations' boxes do not overlap on the reflector")
    ts = ss.time[i0 - ss.i0 : i1 - ss.i0, j0 - ss.j0 : j1 - ss.j0]
    tr = sr.time[i0 - sr.i0 : i1 - sr.i0, j0 - sr.j0 : j1 - sr.j0]
    f = ts + tr
    if not np.isfinite(f).any():
        raise RuntimeError("the two stations' boxes do not overlap on the reflector")
    i, j = np.unravel_index(np.nanargmin(f), f.shape)
    if rough:
        fi, fj = _rough_min(f, i, j, radius=max(3.0, 3.0 / step))
        x, y = (i0 + fi) * step, (j0 + fj) * step
        ni, nj = round(fi), round(fj)
        cs = float(ss.cos_inc[i0 - ss.i0 + ni, j0 - ss.j0 + nj])
        cr = float(sr.cos_inc[i0 - sr.i0 + ni, j0 - sr.j0 + nj])
        return float(f[ni, nj]), np.array([x, y, float(surf(x, y))]), cs, cr, False
    k = FIT_HALF
    block = f[i - k : i + k + 1, j - k : j + k + 1]
    if i < k or j < k or block.shape != (2 * k + 1, 2 * k + 1) or not np.isfinite(block).all():
        if allow_missing:
            return np.nan, np.full(3, np.nan), np.nan, np.nan, False
        raise RuntimeError("the reflection point is at the edge of the sampled region: enlarge the boxes")
    di, dj, tmin, refined = _quadratic_min(block)
    x, y = (i0 + i + di) * step, (j0 + j + dj) * step
    cs = float(ss.cos_inc[i0 - ss.i0 + i, j0 - ss.j0 + j])
    cr = float(sr.cos_inc[i0 - sr.i0 + i, j0 - sr.j0 + j])
    return tmin, np.array([x, y, float(surf(x, y))]), cs, cr, refined


# --------------------------------------------------------------------------- boxes and the two passes


def _box_around(model, reflector, src, points_xy, margin, h):
    """Box for ``src`` covering ``points_xy`` (reflection points) with ``margin``, turned along their spread."""
    pts = np.vstack([np.asarray(points_xy, float).reshape(-1, 2), np.asarray(src[:2], float)[None, :]])
    centred = pts - pts.mean(axis=0)
    if len(pts) > 1 and np.ptp(centred, axis=0).max() > 0:
        w, vecs = np.linalg.eigh(centred.T @ centred)
        axis = vecs[:, np.argmax(w)]
        angle = math.atan2(axis[1], axis[0])
    else:
        angle = 0.0
    c, s = math.cos(angle), math.sin(angle)
    a, b = pts[:, 0] * c + pts[:, 1] * s, -pts[:, 0] * s + pts[:, 1] * c
    a0, b0 = a.min() - margin, b.min() - margin
    na = math.ceil((a.max() + margin - a0) / h) + 1
    nb = math.ceil((b.max() + margin - b0) / h) + 1
    r0 = source_radius(model, src, h)
    ztop = float(src[2]) + r0 + 4 * h
    box = Box(angle, a0, b0, na, nb, ztop, 1, h)
    A, B = np.meshgrid(box.a0 + h * np.arange(na), box.b0 + h * np.arange(nb), indexing="ij")
    zmin = float(np.min(model.interfaces[reflector](*box.to_xy(A, B))))
    box.nz = math.ceil((ztop - (zmin - margin_below(h))) / h) + 1
    return box


def margin_below(h):
    return 1.0 + 4 * h


def _station_job(args):
    model, reflector, src, box, step = args
    field = march(model, reflector, src, box)
    return sample_on_reflector(model, reflector, field, box, step)


def _run_stations(jobs_args, jobs):
    if jobs > 1 and len(jobs_args) > 1:
        ctx = multiprocessing.get_context("fork")
        with ctx.Pool(jobs) as pool:
            return pool.map(_station_job, jobs_args, chunksize=1)
    return [_station_job(a) for a in jobs_args]


def reflection_times(
    model,
    reflector,
    stations,
    pairs,
    h=FINE_H_M,
    coarse_h=COARSE_H_M,
    coarse_margin=None,
    fine_margin=None,
    jobs=1,
    allow_missing=False,
    log=None,
):
    """Two-way reflection times off ``model.interfaces[reflector]`` for station pairs.

    Parameters
    ----------
    model : LayeredModel
    reflector : int
    stations : (n, 3) array of station positions (x, y, z) in the model's coordinates
    pairs : (m, 2) int array of (shot index, receiver index) into ``stations``
    h, coarse_h : grid spacings (m) of the fine and the coarse pass
    coarse_margin : margin (m) of the coarse boxes around the pairs' midpoints; default
        ``max(6, 0.35 * largest reflector depth below a station)``
    fine_margin : margin (m) of the fine boxes around the coarse reflection points; default
        ``coarse_h + 1 + (FIT_HALF + 3) h`` (the fit's block and the interpolation stencil stay inside)
    allow_missing : a pair whose time sum has no minimum inside the sampled region gets NaN
        instead of raising an error

    Returns a dict with ``time_s`` (m,), ``point`` (m, 3) reflection points,
    ``cos_shot``, ``cos_receiver`` (cosines of incidence at the reflector),
    ``cells`` (fine grid nodes over all stations) and ``seconds``.
    """
    t_start = time.time()
    stations = np.asarray(stations, float)
    pairs = np.asarray(pairs, int).reshape(-1, 2)
    surf = model.interfaces[reflector]
    used = np.unique(pairs)
    if coarse_margin is None:
        depth = stations[used, 2] - surf(stations[used, 0], stations[used, 1])
        coarse_margin = max(6.0, 0.35 * float(depth.max()))
    if fine_margin is None:
        fine_margin = coarse_h + 1.0 + (FIT_HALF + 3) * h
    mids = 0.5 * (stations[pairs[:, 0], :2] + stations[pairs[:, 1], :2])

    def boxes_from(points, margin, hh):
        out = {}
        for s in used:
            mine = (pairs[:, 0] == s) | (pairs[:, 1] == s)
            out[s] = _box_around(model, reflector, stations[s], points[mine], margin, hh)
        return out

    def solve(boxes, hh, rough):
        args = [(model, reflector, stations[s], boxes[s], hh) for s in used]
        samples = dict(zip(used, _run_stations(args, jobs)))
        return [
            pair_minimum(samples[s], samples[r], hh, surf, rough=rough, allow_missing=allow_missing) for s, r in pairs
        ]

    coarse_boxes = boxes_from(mids, coarse_margin, coarse_h)
    coarse = solve(coarse_boxes, coarse_h, True)
    if log:
        log(f"  coarse pass ({coarse_h} m): {len(used)} stations, {time.time() - t_start:.0f} s")
    coarse_points = np.array([r[1][:2] for r in coarse])
    fine_boxes = boxes_from(coarse_points, fine_margin, h)
    fine = solve(fine_boxes, h, False)
    if log:
        log(
            f"  fine pass ({h} m): {sum(b.cells for b in fine_boxes.values()) / 1e6:.0f} M nodes, "
            f"{time.time() - t_start:.0f} s"
        )
    return {
        "time_s": np.array([r[0] for r in fine]),
        "point": np.array([r[1] for r in fine]),
        "cos_shot": np.array([r[2] for r in fine]),
        "cos_receiver": np.array([r[3] for r in fine]),
        "refined": np.array([r[4] for r in fine]),
        "coarse_time_s": np.array([r[0] for r in coarse]),
        "cells": sum(b.cells for b in fine_boxes.values()),
        "seconds": time.time() - t_start,
    }


# --------------------------------------------------------------------------- closed-form checks


def snell_two_way_time(offset, thicknesses, velocities):
    """Two-way time of the reflection off the base of flat constant-velocity layers (Snell's law).

    x(p) = sum 2 h_i p v_i / sqrt(1 - p^2 v_i^2), t(p) = sum 2 h_i / (v_i sqrt(1 - p^2 v_i^2));
    the ray parameter p is found by a 1-D root solve.
    """
    from scipy.optimize import brentq

    h = np.asarray(thicknesses, float)
    v = np.asarray(velocities, float)
    if offset == 0:
        return float(np.sum(2 * h / v))
    p_max = 1.0 / v.max()

    def x_of(p):
        return float(np.sum(2 * h * p * v / np.sqrt(1 - (p * v) ** 2))) - offset

    p = brentq(x_of, 0.0, p_max * (1 - 1e-15), xtol=1e-18, rtol=1e-15, maxiter=500)
    return float(np.sum(2 * h / (v * np.sqrt(1 - (p * v) ** 2))))


def image_source_time(src, rec, plane, v):
    """Reflection time off a plane under constant velocity: |R - S'| / v, S' the mirror image of S."""
    n = np.array([-plane.sx, -plane.sy, 1.0])
    n /= np.linalg.norm(n)
    p0 = np.array([plane.x0, plane.y0, plane.z0])
    src = np.asarray(src, float)
    image = src - 2 * np.dot(src - p0, n) * n
    return float(np.linalg.norm(np.asarray(rec, float) - image) / v)


def _line_stations(n, spacing, azimuth_deg, start=(0.0, 0.0), z=0.0):
    az = math.radians(azimuth_deg)
    k = np.arange(n) * spacing
    return np.column_stack([start[0] + k * math.sin(az), start[1] + k * math.cos(az), np.full(n, z)])


def validate(h=FINE_H_M, coarse_h=COARSE_H_M, jobs=1, log=None):
    """Compare the generator with closed-form times at site-like sizes; returns max |error| (ms) per case.

    * ``two_layer``: 5 m at 620 m/s over 27 m at 1600 m/s, flat, offsets 4-76 m (Snell's law);
    * ``gradient``: 560 m/s + 22 m/s per m over a flat reflector 5 m down, offsets 4-24 m (the
      reflection point is the midpoint by symmetry; time = 2 x the closed-form time to it);
    * ``dipping``: 1600 m/s over a plane 32 m down dipping 8 degrees obliquely to the line, offsets
      4-76 m (image source).
    The lines run at an azimuth of 67 degrees so the rays cross the grid obliquely.
    """
    out = {}
    st = _line_stations(21, 4.0, 67.0)
    pairs = [(0, i) for i in range(1, 20)] + [(10, i) for i in range(21) if i != 10]
    offsets = [4.0 * abs(r - s) for s, r in pairs]

    model = LayeredModel(LinearVelocity(620.0), [PlaneSurface(-5.0), PlaneSurface(-32.0)], [ConstantVelocity(1600.0)])
    res = reflection_times(model, 1, st, pairs, h=h, coarse_h=coarse_h, jobs=jobs)
    exact = np.array([snell_two_way_time(x, [5.0, 27.0], [620.0, 1600.0]) for x in offsets])
    out["two_layer"] = float(np.max(np.abs(res["time_s"] - exact)) * 1e3)
    if log:
        log(f"  two-layer (Snell) max |error| {out['two_layer']:.4f} ms, {res['seconds']:.0f} s")

    top = LinearVelocity(560.0, grad=(0.0, 0.0, -22.0))
    model = LayeredModel(top, [PlaneSurface(-5.0)], [])
    gp = [(0, i) for i in range(1, 7)] + [(10, i) for i in range(4, 17) if i != 10]
    res = reflection_times(model, 0, st, gp, h=h, coarse_h=coarse_h, jobs=jobs)
    exact = []
    for s, r in gp:
        mid = 0.5 * (st[s] + st[r])
        exact.append(2 * float(top.time_from(st[s], mid[0], mid[1], -5.0)))
    out["gradient"] = float(np.max(np.abs(res["time_s"] - np.array(exact))) * 1e3)
    if log:
        log(f"  gradient layer (closed form) max |error| {out['gradient']:.4f} ms, {res['seconds']:.0f} s")

    plane = PlaneSurface.dipping(-32.0, 8.0, 20.0, x0=20.0, y0=10.0)
    model = LayeredModel(LinearVelocity(1600.0), [plane], [])
    res = reflection_times(model, 0, st, pairs, h=h, coarse_h=coarse_h, jobs=jobs)
    exact = np.array([image_source_time(st[s], st[r], plane, 1600.0) for s, r in pairs])
    out["dipping"] = float(np.max(np.abs(res["time_s"] - exact)) * 1e3)
    if log:
        log(f"  dipping plane (image source) max |error| {out['dipping']:.4f} ms, {res['seconds']:.0f} s")
    return out


# --------------------------------------------------------------------------- survey layout


def line_stations(start, legs, spacing=STATION_SPACING_M):
    """Stations every ``spacing`` along straight legs [(azimuth deg, length m), ...] from ``start`` (u, v)."""
    pts = [np.asarray(start, float)]
    for az, length in legs:
        d = np.array([math.sin(math.radians(az)), math.cos(math.radians(az))])
        for _ in range(round(length / spacing)):
            pts.append(pts[-1] + spacing * d)
    return np.array(pts)


def spread(i_shot, xy, kind):
    """Receiver indices of a shot: split spread (both sides) or end-on (ahead; behind near the line end)."""
    n = len(xy)
    off = np.hypot(*(xy - xy[i_shot]).T)
    live = (off >= MIN_OFFSET_M) & (off <= MAX_OFFSET_M[kind])
    if kind == "split":
        return np.nonzero(live)[0]
    ahead = np.arange(n) > i_shot
    if np.count_nonzero(live & ahead) >= 10:
        return np.nonzero(live & ahead)[0]
    return np.nonzero(live & ~ahead)[0]


def layout():
    """Stations (projected, rounded as written) and the shot/receiver pairs of every line."""
    lines = {}
    for k, (name, (start, legs, kind)) in enumerate(LINES.items()):
        uv = line_stations(start, legs)
        x = np.round(uv[:, 0] + EAST0_M, 3)
        y = np.round(uv[:, 1] + NORTH0_M, 3)
        z = np.round(ground_elevation(x, y), 3)
        labels = [str(1000 * (k + 1) + 1 + i) for i in range(len(x))]
        shots = list(range(0, len(x), SHOT_EVERY))
        if shots[-1] != len(x) - 1:
            shots.append(len(x) - 1)
        pairs = [(s, r) for s in shots for r in spread(s, uv, kind)]
        lines[name] = {"labels": labels, "xyz": np.column_stack([x, y, z]), "pairs": pairs, "kind": kind}
    return lines


# --------------------------------------------------------------------------- the survey


def semi_analytic_wt_time(src_local, rec_local, start_xy):
    """Water-table two-way time from the closed-form layer-1 times, minimised over the reflection point."""
    from scipy.optimize import minimize

    top = site_model().top

    def f(p):
        z = float(_wt_local(p[0], p[1]))
        return float(top.time_from(src_local, p[0], p[1], z) + top.time_from(rec_local, p[0], p[1], z))

    res = minimize(
        f, np.asarray(start_xy, float), method="Nelder-Mead", options={"xatol": 1e-5, "fatol": 1e-13, "maxiter": 4000}
    )
    return float(res.fun)


def forward(lines, h=FINE_H_M, coarse_h=COARSE_H_M, jobs=1, log=None):
    """Noise-free times of both reflectors for every line: {line: {"wt": ..., "rock": ...}}."""
    model = site_model()
    out = {}
    for name, ln in lines.items():
        xyz = ln["xyz"].copy()
        xyz[:, 0] -= EAST0_M
        xyz[:, 1] -= NORTH0_M
        pairs = np.array(ln["pairs"])
        off = np.hypot(*(xyz[pairs[:, 0], :2] - xyz[pairs[:, 1], :2]).T)
        near = off <= 40.0  # the water-table reflection ends well inside this (see MAX_INCIDENCE_DEG)
        if log:
            log(f"line {name}: {len(xyz)} stations, {len(pairs)} traces")
        wt = reflection_times(
            model, 0, xyz, pairs[near], h=h, coarse_h=coarse_h, jobs=jobs, allow_missing=True, log=log
        )
        rock = reflection_times(model, 1, xyz, pairs, h=h, coarse_h=coarse_h, jobs=jobs, log=log)
        out[name] = {"xyz_local": xyz, "pairs": pairs, "wt_pairs": pairs[near], "wt": wt, "rock": rock}
    return out


def make_picks(lines, fw, rng):
    """Pick rows (with noise and mispicks), the matching noise-free rows (file order) and statistics.

    A trace gets no pick of a reflector where that reflection does not exist:
    the time sum has no minimum, or a ray meets the reflector beyond
    ``MAX_INCIDENCE_DEG``.
    """
    cos_max = math.cos(math.radians(MAX_INCIDENCE_DEG))
    rows, truth_rows = [], []
    dropped = {"wt": 0, "rock": 0}
    worst_cos = {"wt": 1.0, "rock": 1.0}
    for name, ln in lines.items():
        labels = ln["labels"]
        res = fw[name]
        recs = []
        for refl in ("wt", "rock"):
            pairs = res["wt_pairs"] if refl == "wt" else res["pairs"]
            r = res[refl]
            for k, (s, q) in enumerate(pairs):
                if not np.isfinite(r["time_s"][k]) or min(r["cos_shot"][k], r["cos_receiver"][k]) < cos_max:
                    dropped[refl] += 1
                    continue
                worst_cos[refl] = min(worst_cos[refl], r["cos_shot"][k], r["cos_receiver"][k])
                recs.append((s, 0 if refl == "wt" else 1, q, refl, r["time_s"][k], r["point"][k]))
        recs.sort(key=lambda t: t[:3])
        for s, _, q, refl, t_s, p in recs:
            t_ms = t_s * 1e3
            noisy = t_ms + rng.normal(0.0, SIGMA_MS[refl])
            mispick = bool(rng.random() < MISPICK_FRACTION)
            if mispick:
                noisy += rng.choice([-1.0, 1.0]) * rng.uniform(*MISPICK_MS)
            rows.append((name, labels[s], labels[q], f"{noisy:.3f}", f"{SIGMA_MS[refl]:g}", refl))
            truth_rows.append(
                (
                    name,
                    labels[s],
                    labels[q],
                    refl,
                    f"{t_ms:.4f}",
                    int(mispick),
                    f"{p[0] + EAST0_M:.2f}",
                    f"{p[1] + NORTH0_M:.2f}",
                    f"{p[2]:.2f}",
                )
            )
    max_incidence = {k: round(math.degrees(math.acos(min(1.0, float(c)))), 1) for k, c in worst_cos.items()}
    return rows, truth_rows, dropped, max_incidence


def truth_grid(lines):
    """North-up grids (cell centres) of ground, water table and rock covering the lines + TRUTH_MARGIN_M."""
    xyz = np.vstack([ln["xyz"] for ln in lines.values()])
    c = TRUTH_CELL_M
    west = math.floor((xyz[:, 0].min() - TRUTH_MARGIN_M) / c) * c
    east = math.ceil((xyz[:, 0].max() + TRUTH_MARGIN_M) / c) * c
    south = math.floor((xyz[:, 1].min() - TRUTH_MARGIN_M) / c) * c
    north = math.ceil((xyz[:, 1].max() + TRUTH_MARGIN_M) / c) * c
    ncols, nrows = round((east - west) / c), round((north - south) / c)
    x = west + (np.arange(ncols) + 0.5) * c
    y = north - (np.arange(nrows) + 0.5) * c
    X, Y = np.meshgrid(x, y)  # row 0 = north
    grids = {
        "ground_mm": np.round(ground_elevation(X, Y) * 1000).astype(np.int32),
        "water_table_mm": np.round(water_table_elevation(X, Y) * 1000).astype(np.int32),
        "rock_mm": np.round(rock_elevation(X, Y) * 1000).astype(np.int32),
    }
    spec = {
        "file": "truth_grids.npz",
        "arrays": {k: "int32, elevation in millimetres (divide by 1000 for metres)" for k in grids},
        "x_west_m": west,
        "y_north_m": north,
        "cell_m": c,
        "nrows": nrows,
        "ncols": ncols,
        "registration": "value of cell (row, col) is at its centre: x = x_west_m + (col + 0.5) * cell_m, "
        "y = y_north_m - (row + 0.5) * cell_m; row 0 is the northern row",
        "covers": f"the lines' extent plus {TRUTH_MARGIN_M:g} m",
    }
    return grids, spec


def borehole_rows():
    rows, info = [], []
    for name, (u, v) in BOREHOLES.items():
        x, y = u + EAST0_M, v + NORTH0_M
        zg = float(ground_elevation(x, y))
        d_rock = zg - float(rock_elevation(x, y))
        d_wt = zg - float(water_table_elevation(x, y))
        rows.append((name, f"{x:.2f}", f"{y:.2f}", f"{zg:.2f}", f"{d_rock:.2f}", f"{d_wt:.2f}"))
        va_wt = float(vertical_average_velocity(x, y, "wt"))
        va_rock = float(vertical_average_velocity(x, y, "rock"))
        info.append(
            {
                "borehole": name,
                "x": x,
                "y": y,
                "z_m": round(zg, 4),
                "depth_rock_m": round(d_rock, 4),
                "depth_wt_m": round(d_wt, 4),
                "vertical_average_velocity_to_rock_m_s": round(va_rock, 2),
                "vertical_average_velocity_to_wt_m_s": round(va_wt, 2),
                "vertical_two_way_time_to_rock_ms": round(2000 * d_rock / va_rock, 3),
                "vertical_two_way_time_to_wt_ms": round(2000 * d_wt / va_wt, 3),
            }
        )
    return rows, info


def _write_csv(path, header, rows):
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        w.writerows(rows)


def model_description():
    return {
        "coordinates": "projected x (east), y (north) in metres; u = x - x0, v = y - y0 with (x0, y0) = origin_xy_m; "
        "z = elevation in metres",
        "ground": {
            "formula": "z = z0 + se * u + sn * v",
            "z0_m": GROUND_Z0_M,
            "se": GROUND_SLOPE_E,
            "sn": GROUND_SLOPE_N,
        },
        "water_table": {
            "formula": "z = ground(u, v) - (d0 + a * sin(u / le + phase) * cos(v / ln) + te * u)",
            "d0_m": WT_DEPTH0_M,
            "a_m": WT_AMP_M,
            "le_m": WT_LEN_E_M,
            "ln_m": WT_LEN_N_M,
            "phase_rad": WT_PHASE_RAD,
            "te": WT_TILT_E,
        },
        "rock": {
            "formula": "z = z0 - tan(dip) * (u * sin(az) + v * cos(az)) + H * exp(-((u - uk)^2 + (v - vk)^2) / R^2)",
            "z0_m": ROCK_Z0_M,
            "dip_deg": ROCK_DIP_DEG,
            "dip_azimuth_deg": ROCK_DIP_AZIMUTH_DEG,
            "knoll_height_m": KNOLL_HEIGHT_M,
            "knoll_radius_m": KNOLL_RADIUS_M,
            "knoll_centre_uv_m": list(KNOLL_CENTRE_UV),
        },
        "velocity": {
            "layer1": {
                "between": "ground and water table",
                "formula": "v = v_top + g * (ground(u, v) - z)",
                "v_top_m_s": V1_TOP_M_S,
                "g_per_s": V1_GRAD_PER_S,
            },
            "layer2": {
                "between": "water table and rock",
                "formula": "v = v0 + ge * u + gn * v",
                "v0_m_s": V2_0_M_S,
                "ge_per_s": V2_GRAD_E_PER_S,
                "gn_per_s": V2_GRAD_N_PER_S,
            },
            "vertical_average": "depth / one-way vertical time; layer 1 time = ln(1 + g d_wt / v_top) / g",
        },
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0], formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--out", type=Path, help=f"output folder (default {DEFAULT_OUT}; with --quick a temporary folder)")
    ap.add_argument("--quick", action="store_true", help="line A only on a 0.5 m grid (about a minute)")
    ap.add_argument("--jobs", type=int, default=min(2, multiprocessing.cpu_count()), help="processes (default 2)")
    ap.add_argument("--validate", action="store_true", help="only compare with closed-form answers and stop")
    args = ap.parse_args(argv)
    log = print
    t_start = time.time()
    h = 0.5 if args.quick else FINE_H_M
    coarse_h = COARSE_H_M
    if args.out is None:
        if args.quick:
            import tempfile

            args.out = Path(tempfile.gettempdir()) / "layered_site_quick"
        else:
            args.out = DEFAULT_OUT

    log(f"closed-form checks on the {h} m grid:")
    accuracy = validate(h=h, coarse_h=coarse_h, jobs=args.jobs, log=log)
    if args.validate:
        log(json.dumps(accuracy))
        return 0

    lines = layout()
    if args.quick:
        lines = {"A": lines["A"]}
    fw = forward(lines, h=h, coarse_h=coarse_h, jobs=args.jobs, log=log)
    rng = np.random.default_rng(SEED)
    rows, truth_rows, dropped, max_incidence = make_picks(lines, fw, rng)

    # independent check of the water-table times: closed-form layer-1 times minimised over the reflection point
    cos_max = math.cos(math.radians(MAX_INCIDENCE_DEG))
    wt_dev = []
    for ln in fw.values():
        r = ln["wt"]
        for k, (s, q) in enumerate(ln["wt_pairs"]):
            if not np.isfinite(r["time_s"][k]) or min(r["cos_shot"][k], r["cos_receiver"][k]) < cos_max:
                continue
            exact = semi_analytic_wt_time(ln["xyz_local"][s], ln["xyz_local"][q], r["point"][k][:2])
            wt_dev.append(r["time_s"][k] - exact)
    wt_dev = np.abs(np.array(wt_dev)) * 1e3
    log(f"water-table picks against the closed-form layer-1 times: max |error| {wt_dev.max():.4f} ms")

    out = args.out
    out.mkdir(parents=True, exist_ok=True)
    stations = [
        (name, lab, f"{x:.3f}", f"{y:.3f}", f"{z:.3f}")
        for name, ln in lines.items()
        for lab, (x, y, z) in zip(ln["labels"], ln["xyz"])
    ]
    _write_csv(out / "stations.csv", ["line", "station", "x", "y", "z"], stations)
    _write_csv(out / "picks.csv", ["line", "shot", "receiver", "time_ms", "sigma_ms", "reflector"], rows)
    _write_csv(
        out / "picks_truth.csv",
        ["line", "shot", "receiver", "reflector", "time_ms", "mispick", "x_reflection", "y_reflection", "z_reflection"],
        truth_rows,
    )
    bh_rows, bh_info = borehole_rows()
    _write_csv(out / "boreholes.csv", ["borehole", "x", "y", "z", "depth_m", "depth_wt_m"], bh_rows)
    (out / "survey.toml").write_text(
        "# Synthetic survey of an invented site, made by tests/generators/make_layered_site.py\n"
        "[survey]\n"
        'name = "Holloway Weir (synthetic layered site)"\n'
        f'crs = "{CRS}"\n\n'
        "[files]\n"
        'stations = "stations.csv"\n'
        'picks = "picks.csv"\n'
        'boreholes = "boreholes.csv"\n\n'
        "[processing]\n"
        'reflector = "rock"\n',
        encoding="utf-8",
    )
    grids, grid_spec = truth_grid(lines)
    np.savez_compressed(out / "truth_grids.npz", **grids)

    import scipy
    import skfmm

    counts = {refl: sum(1 for r in rows if r[5] == refl) for refl in ("wt", "rock")}
    per_line = {
        name: {refl: sum(1 for r in rows if r[0] == name and r[5] == refl) for refl in ("wt", "rock")} for name in lines
    }
    mispicks = {refl: sum(1 for r in truth_rows if r[3] == refl and r[5]) for refl in ("wt", "rock")}
    rock_pts = np.array([[float(r[6]), float(r[7])] for r in truth_rows if r[3] == "rock"])
    depth_at_pts = ground_elevation(rock_pts[:, 0], rock_pts[:, 1]) - rock_elevation(rock_pts[:, 0], rock_pts[:, 1])
    truth = {
        "site": SITE_NAME,
        "crs": CRS,
        "origin_xy_m": [EAST0_M, NORTH0_M],
        "seed": SEED,
        "quick": bool(args.quick),
        "model": model_description(),
        "reflectors": {"wt": "water table (interface 1)", "rock": "bedrock (interface 2)"},
        "boreholes": bh_info,
        "truth_grid": grid_spec,
        "layout": {
            "station_spacing_m": STATION_SPACING_M,
            "shot_every_stations": SHOT_EVERY,
            "offsets_m": {
                "min": MIN_OFFSET_M,
                "max_split_spread": MAX_OFFSET_M["split"],
                "max_end_on": MAX_OFFSET_M["end_on"],
            },
            "lines": {
                name: {
                    "start_uv_m": list(start),
                    "legs_azimuth_deg_length_m": [list(g) for g in legs],
                    "spread": kind,
                    "stations": len(lines[name]["labels"]) if name in lines else 0,
                }
                for name, (start, legs, kind) in LINES.items()
                if name in lines
            },
        },
        "picks": {
            "counts": counts,
            "counts_per_line": per_line,
            "sigma_ms": SIGMA_MS,
            "noise": "Gaussian, sigma_ms per reflector; mispicks: a fraction of picks shifted by +/- uniform(3, 8) ms",
            "mispick_fraction": MISPICK_FRACTION,
            "mispicks": mispicks,
            "max_incidence_deg": MAX_INCIDENCE_DEG,
            "largest_incidence_kept_deg": max_incidence,
            "traces_without_the_reflection": dropped,
            "why_no_water_table_beyond_about_24_m": "layer 1 velocity increases with depth, so its rays curve "
            "upwards; at wider offsets the rays meet the water table at grazing incidence or not at all (the "
            "reflection ends; the time sum has no minimum). Traces whose rays meet a reflector more than "
            "max_incidence_deg from its normal have no pick of it. Water-table picks are offered only up to 40 m.",
            "noise_free_file": "picks_truth.csv (noise-free two-way times, mispick flags, reflection points)",
            "rock_depth_at_reflection_points_m": [
                round(float(depth_at_pts.min()), 2),
                round(float(depth_at_pts.max()), 2),
            ],
        },
        "forward_model": {
            "method": "Fermat: t(S, R) = min over P on the reflector of T_S(P) + T_R(P); T by 3-D fast marching "
            "(scikit-fmm travel_time, order 2) per station, closed-form start around each source, slowness "
            "averaged across layer boundaries, quadratic refinement of the minimum",
            "grid_m": h,
            "coarse_grid_m": coarse_h,
            "closed_form_max_error_ms": {k: round(v, 4) for k, v in accuracy.items()},
            "water_table_vs_closed_form_max_error_ms": round(float(wt_dev.max()), 4),
            "versions": {
                "scikit-fmm": getattr(skfmm, "__version__", "?"),
                "numpy": np.__version__,
                "scipy": scipy.__version__,
            },
        },
        "counts": {"stations": len(stations), "picks": len(rows), "boreholes": len(bh_rows)},
    }
    (out / "truth.json").write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
    log(f"wrote {out}: {len(stations)} stations, {counts} picks, dropped {dropped}, {time.time() - t_start:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
