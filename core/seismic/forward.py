"""Forward traveltime models for a reflector below a homogeneous layer.

All functions broadcast over leading dimensions, work in SI units (metres,
seconds, metres per second) and follow the conventions of DEVELOPERS.md: x east,
y north, z up; azimuths clockwise from north; dip below horizontal.

A planar reflector is described by its *downward* unit normal ``normal`` (the
normal pointing from a point above the plane toward the plane, so
``normal[2] < 0``) and the scalar ``offset_m`` such that the plane is
``{P : normal . P = offset_m}``. A point S above the plane then lies at the
perpendicular (normal) distance ``h = offset_m - normal . S > 0``.

References
----------
[Green 1938] Green, C. H. (1938). Velocity determinations by means of reflection
    profiles. Geophysics 3(4), 295-305.
[Levin 1971] Levin, F. K. (1971). Apparent velocity from dipping interface
    reflections. Geophysics 36(3), 510-516.
[Dix 1955] Dix, C. H. (1955). Seismic velocities from surface measurements.
    Geophysics 20(1), 68-86.
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "cmp_traveltime",
    "dip_from_normal",
    "image_source_traveltime",
    "layered_reflection_traveltime",
    "layered_t0_vrms",
    "line_traveltime",
    "normal_distance",
    "plane_elevation",
    "plane_normal",
    "plane_through_point",
    "reflection_point",
]


def plane_normal(dip_deg: ArrayLike, dip_direction_deg: ArrayLike) -> np.ndarray:
    r"""Downward unit normal of a plane with the given dip and dip direction.

    .. math::

        \mathbf n = (-\sin\delta\,\sin\phi,\; -\sin\delta\,\cos\phi,\; -\cos\delta)

    with dip :math:`\delta` and dip direction (azimuth) :math:`\phi`. The plane
    deepens toward :math:`\phi`, so the horizontal part of the normal points
    up-dip and the dip direction is the azimuth of :math:`-\mathbf n_h`.

    Parameters
    ----------
    dip_deg : float or array_like
        Dip below horizontal (degrees, 0 to 90).
    dip_direction_deg : float or array_like
        Azimuth toward which the plane deepens (degrees clockwise from north).

    Returns
    -------
    (..., 3) ndarray
        Unit normal (east, north, up components), pointing down.

    Examples
    --------
    >>> np.round(plane_normal(0.0, 0.0), 12) + 0.0
    array([ 0.,  0., -1.])
    >>> np.round(plane_normal(90.0, 90.0), 12) + 0.0
    array([-1.,  0.,  0.])
    """
    dip = np.radians(np.asarray(dip_deg, dtype=float))
    az = np.radians(np.asarray(dip_direction_deg, dtype=float))
    return np.stack([-np.sin(dip) * np.sin(az), -np.sin(dip) * np.cos(az), -np.cos(dip)], axis=-1)


def dip_from_normal(normal: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Dip and dip direction of a plane from its normal.

    Either orientation of the normal is accepted. Dip = acos(|n_z|); dip
    direction = azimuth of the horizontal part of the *downward* normal, negated.

    Parameters
    ----------
    normal : (..., 3) array_like
        Normal of the plane (east, north, up; any length, either sense).

    Returns
    -------
    dip_deg : ndarray
        Dip below horizontal (degrees, 0 to 90).
    dip_direction_deg : ndarray
        Azimuth toward which the plane deepens (degrees clockwise from north, [0, 360)).

    Examples
    --------
    >>> [round(float(v), 9) for v in dip_from_normal(plane_normal(30.0, 250.0))]
    [30.0, 250.0]
    """
    n = np.asarray(normal, dtype=float)
    n = n / np.linalg.norm(n, axis=-1, keepdims=True)
    n = np.where(n[..., 2:3] > 0, -n, n)  # downward
    dip_deg = np.degrees(np.arccos(np.clip(-n[..., 2], -1.0, 1.0)))
    dip_dir_deg = np.degrees(np.arctan2(-n[..., 0], -n[..., 1])) % 360.0
    return dip_deg, dip_dir_deg


def plane_through_point(
    point_xyz: ArrayLike, dip_deg: ArrayLike, dip_direction_deg: ArrayLike
) -> tuple[np.ndarray, np.ndarray]:
    r"""Plane through a point with a given dip and dip direction.

    Parameters
    ----------
    point_xyz : (..., 3) array_like
        A point of the plane (m).
    dip_deg, dip_direction_deg : float or array_like
        Dip and dip direction (degrees), as in :func:`plane_normal`.

    Returns
    -------
    normal : (..., 3) ndarray
        Downward unit normal n.
    offset_m : ndarray
        d of the plane :math:`\{P : \mathbf n\cdot P = d\}` (m).

    Examples
    --------
    >>> n, d = plane_through_point([10.0, 20.0, -40.0], 0.0, 0.0)
    >>> float(d)
    40.0
    """
    n = plane_normal(dip_deg, dip_direction_deg)
    d = np.sum(n * np.asarray(point_xyz, dtype=float), axis=-1)
    return n, d


def plane_elevation(x_m: ArrayLike, y_m: ArrayLike, normal: ArrayLike, offset_m: ArrayLike) -> np.ndarray:
    r"""Elevation of a plane at given easting and northing.

    .. math:: z = (d - n_x x - n_y y) / n_z

    Parameters
    ----------
    x_m, y_m : float or array_like
        Easting and northing (m).
    normal : (..., 3) array_like
        Normal n of the plane (not horizontal).
    offset_m : float or array_like
        d of the plane :math:`\{P : \mathbf n\cdot P = d\}` (m).

    Returns
    -------
    ndarray
        Elevation of the plane (m).

    Examples
    --------
    >>> n, d = plane_through_point([0.0, 0.0, -40.0], 45.0, 90.0)
    >>> round(float(plane_elevation(10.0, 0.0, n, d)), 9)
    -50.0
    """
    n = np.asarray(normal, dtype=float)
    d, x, y = (np.asarray(v, dtype=float) for v in (offset_m, x_m, y_m))
    return (d - n[..., 0] * x - n[..., 1] * y) / n[..., 2]


def normal_distance(point_xyz: ArrayLike, normal: ArrayLike, offset_m: ArrayLike) -> np.ndarray:
    r"""Perpendicular distance from a point above a plane to the plane.

    .. math:: h = d - \mathbf n\cdot\mathbf S

    Parameters
    ----------
    point_xyz : (..., 3) array_like
        The point S (m).
    normal : (..., 3) array_like
        Downward unit normal n.
    offset_m : float or array_like
        d of the plane (m).

    Returns
    -------
    ndarray
        h (m): positive above the plane, negative below.

    Examples
    --------
    >>> n, d = plane_through_point([0.0, 0.0, -40.0], 0.0, 0.0)
    >>> float(normal_distance([5.0, 5.0, 2.0], n, d))
    42.0
    """
    return np.asarray(offset_m, float) - np.sum(np.asarray(normal, float) * np.asarray(point_xyz, float), axis=-1)


def image_source_traveltime(
    source_xyz: ArrayLike, receiver_xyz: ArrayLike, normal: ArrayLike, offset_m: ArrayLike, velocity_m_s: ArrayLike
) -> np.ndarray:
    r"""Exact two-way reflection time by the image-source construction.

    .. math::

        h = d - \mathbf n\cdot\mathbf S, \qquad
        \mathbf S' = \mathbf S + 2h\,\mathbf n, \qquad
        t = |\mathbf R - \mathbf S'| / V

    exact in 3D for a homogeneous layer over a plane, sources and receivers at
    any elevation above it [Sheriff & Geldart 1995, ch. 4].

    Parameters
    ----------
    source_xyz, receiver_xyz : (..., 3) array_like
        Source S and receiver R (m), above the plane.
    normal : (..., 3) array_like
        Downward unit normal n of the plane.
    offset_m : float or array_like
        d of the plane :math:`\{P : \mathbf n\cdot P = d\}` (m).
    velocity_m_s : float or array_like
        Velocity V of the layer (m/s).

    Returns
    -------
    ndarray
        Two-way time t (s).

    Examples
    --------
    >>> n, d = plane_through_point([0.0, 0.0, -40.0], 0.0, 0.0)
    >>> round(float(image_source_traveltime([0, 0, 0], [0, 0, 0], n, d, 3000.0)) * 1e3, 2)
    26.67
    """
    s = np.asarray(source_xyz, dtype=float)
    r = np.asarray(receiver_xyz, dtype=float)
    n = np.asarray(normal, dtype=float)
    h = normal_distance(s, n, offset_m)
    image = s + 2.0 * h[..., None] * n
    return np.linalg.norm(r - image, axis=-1) / np.asarray(velocity_m_s, dtype=float)


def reflection_point(
    source_xyz: ArrayLike, receiver_xyz: ArrayLike, normal: ArrayLike, offset_m: ArrayLike
) -> np.ndarray:
    r"""Specular reflection point on the plane for a source-receiver pair.

    The point where the segment from the image source S' to R crosses the
    plane: :math:`P = S' + \frac{h_S}{h_S + h_R}(R - S')` with :math:`h_S, h_R`
    the normal distances of S and R to the plane.

    Parameters
    ----------
    source_xyz, receiver_xyz : (..., 3) array_like
        Source S and receiver R (m), above the plane.
    normal : (..., 3) array_like
        Downward unit normal n of the plane.
    offset_m : float or array_like
        d of the plane (m).

    Returns
    -------
    (..., 3) ndarray
        The reflection point P (m).

    Examples
    --------
    A horizontal plane 40 m down: the point is midway between S and R.

    >>> n, d = plane_through_point([0.0, 0.0, -40.0], 0.0, 0.0)
    >>> reflection_point([0.0, 0.0, 0.0], [20.0, 0.0, 0.0], n, d).tolist()
    [10.0, 0.0, -40.0]
    """
    s = np.asarray(source_xyz, dtype=float)
    r = np.asarray(receiver_xyz, dtype=float)
    n = np.asarray(normal, dtype=float)
    h_s = normal_distance(s, n, offset_m)
    h_r = normal_distance(r, n, offset_m)
    image = s + 2.0 * h_s[..., None] * n
    lam = h_s / (h_s + h_r)
    return image + lam[..., None] * (r - image)


def line_traveltime(
    offset_m: ArrayLike, normal_distance_m: ArrayLike, s: ArrayLike, velocity_m_s: ArrayLike
) -> np.ndarray:
    r"""Two-way time along a straight horizontal line over a dipping plane.

    .. math::

        t^2 = \frac{x^2 + 4 h s x + 4 h^2}{V^2}, \qquad s = \sin\delta\cos\beta

    with signed offset x along the line's unit vector u, h the normal distance
    from the source to the plane and :math:`s = -\mathbf u\cdot\mathbf n`
    [Sheriff & Geldart 1995, ch. 4]. For s = 0 this is the t^2-x^2 relation of
    a horizontal reflector [Green 1938], with :math:`t_0 = 2h/V`.

    Parameters
    ----------
    offset_m : float or array_like
        Signed source-receiver offset x along u (m).
    normal_distance_m : float or array_like
        h (m).
    s : float or array_like
        Along-line component of the downward normal (dimensionless, |s| < 1).
    velocity_m_s : float or array_like
        V (m/s).

    Returns
    -------
    ndarray
        Two-way time t (s).

    Examples
    --------
    >>> round(float(line_traveltime(0.0, 40.0, 0.0, 3000.0)) * 1e3, 4)
    26.6667
    """
    x = np.asarray(offset_m, dtype=float)
    h = np.asarray(normal_distance_m, dtype=float)
    return np.sqrt(x * x + 4.0 * h * np.asarray(s, dtype=float) * x + 4.0 * h**2) / np.asarray(velocity_m_s, float)


def cmp_traveltime(
    offset_m: ArrayLike, t0_s: ArrayLike, velocity_m_s: ArrayLike, dip_deg: ArrayLike = 0.0, beta_deg: ArrayLike = 0.0
) -> np.ndarray:
    r"""Common-midpoint two-way time over a dipping plane [Levin 1971].

    .. math::

        t^2 = t_0^2 + \frac{x^2\,(1 - \sin^2\delta\cos^2\beta)}{V^2}

    with full source-receiver offset x, zero-offset time :math:`t_0` at the
    midpoint, true dip :math:`\delta` and :math:`\beta` the angle between the
    line and the dip direction. Along dip the NMO velocity is
    :math:`V/\cos\delta`.

    Parameters
    ----------
    offset_m : float or array_like
        Source-receiver offset x (m).
    t0_s : float or array_like
        Zero-offset two-way time at the midpoint (s).
    velocity_m_s : float or array_like
        Layer velocity V (m/s).
    dip_deg : float or array_like
        True dip (degrees).
    beta_deg : float or array_like
        Angle between the line and the dip direction (degrees).

    Returns
    -------
    ndarray
        Two-way time t (s).

    Examples
    --------
    >>> round(float(cmp_traveltime(60.0, 0.04, 2000.0)), 9)
    0.05
    """
    x = np.asarray(offset_m, dtype=float)
    sd = np.sin(np.radians(dip_deg))
    cb = np.cos(np.radians(beta_deg))
    t0 = np.asarray(t0_s, dtype=float)
    return np.sqrt(t0**2 + x * x * (1.0 - (sd * cb) ** 2) / np.asarray(velocity_m_s, dtype=float) ** 2)


def layered_t0_vrms(thickness_m: ArrayLike, interval_velocity_m_s: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    r"""Zero-offset times and rms velocities to the base of each flat layer.

    .. math::

        t_{0,n} = \sum_{k\le n} \frac{2 z_k}{v_k}, \qquad
        V_{rms,n}^2 = \frac{\sum_{k\le n} v_k^2\,\Delta t_k}{\sum_{k\le n}\Delta t_k}

    [Dix 1955].

    Parameters
    ----------
    thickness_m : (m,) array_like
        Layer thicknesses z, top down (m).
    interval_velocity_m_s : (m,) array_like
        Layer velocities v (m/s).

    Returns
    -------
    t0_s : (m,) ndarray
        Zero-offset two-way time to the base of each layer (s).
    vrms_m_s : (m,) ndarray
        Rms velocity down to the base of each layer (m/s).

    Examples
    --------
    >>> t0, vrms = layered_t0_vrms([10.0, 30.0], [1000.0, 2000.0])
    >>> [round(float(t), 9) for t in t0], round(float(vrms[1]) ** 2 * 0.05, 3)
    ([0.02, 0.05], 140000.0)
    """
    z = np.asarray(thickness_m, dtype=float)
    v = np.asarray(interval_velocity_m_s, dtype=float)
    dt = 2.0 * z / v
    t0 = np.cumsum(dt)
    vrms = np.sqrt(np.cumsum(v * v * dt) / t0)
    return t0, vrms


def layered_reflection_traveltime(
    offset_m: ArrayLike, thickness_m: ArrayLike, interval_velocity_m_s: ArrayLike, tol_m: float = 1e-9
) -> np.ndarray:
    r"""Exact (ray-traced) two-way time to the base of a stack of flat layers.

    For ray parameter p, offset and time are [Sheriff & Geldart 1995, ch. 4]

    .. math::

        x(p) = \sum_k \frac{2 z_k p v_k}{\sqrt{1 - p^2 v_k^2}}, \qquad
        t(p) = \sum_k \frac{2 z_k}{v_k \sqrt{1 - p^2 v_k^2}}

    solved for p at each offset by a safeguarded Newton iteration.

    Parameters
    ----------
    offset_m : float or array_like
        Source-receiver offset (m; sign ignored).
    thickness_m : (m,) array_like
        Layer thicknesses, top down (m).
    interval_velocity_m_s : (m,) array_like
        Layer velocities (m/s).
    tol_m : float
        Accepted offset misfit of the ray (m).

    Returns
    -------
    ndarray
        Two-way time to the base of the last layer (s).

    Examples
    --------
    One layer: the hyperbola :math:`t = \sqrt{x^2 + 4z^2}/v` [Green 1938].

    >>> round(float(layered_reflection_traveltime(60.0, [40.0], [2000.0])), 9)
    0.05
    """
    x = np.abs(np.asarray(offset_m, dtype=float))
    z = np.asarray(thickness_m, dtype=float)
    v = np.asarray(interval_velocity_m_s, dtype=float)
    pmax = 1.0 / v.max()
    lo = np.zeros_like(x)
    hi = np.full_like(x, pmax)
    # start from the straight-ray guess with the rms-like mean velocity
    p = np.clip(x / np.sqrt(x**2 + (2 * z.sum()) ** 2) / v.max(), 0, pmax * (1 - 1e-12))
    for _ in range(200):
        q = np.sqrt(1.0 - (p[..., None] * v) ** 2)
        xp = np.sum(2 * z * p[..., None] * v / q, axis=-1)
        dxp = np.sum(2 * z * v / q**3, axis=-1)
        err = xp - x
        lo = np.where(err < 0, p, lo)
        hi = np.where(err > 0, p, hi)
        p_new = p - err / dxp
        bad = (p_new <= lo) | (p_new >= hi)
        p_new = np.where(bad, 0.5 * (lo + hi), p_new)
        if np.all(np.abs(err) < tol_m):
            break
        p = p_new
    q = np.sqrt(1.0 - (p[..., None] * v) ** 2)
    return np.sum(2 * z / (v * q), axis=-1)
