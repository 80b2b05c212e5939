"""Interval velocity of one layer: a linear field, and the traveltime of a ray leg through it.

Model
-----
Each layer between two interfaces has a velocity that is a linear function of
position about a reference point :math:`\\mathbf c` (the site centre at the
layer's mid elevation):

.. math::

    v(\\mathbf x) = v_0 + \\mathbf g \\cdot (\\mathbf x - \\mathbf c),
    \\qquad \\mathbf g = (g_x, g_y, g_z),

with x east, y north, z elevation (up); a velocity rising with depth has
:math:`g_z < 0` (``gradient_depth = -g_z``, (m/s)/m). Four complexities are
nested (:data:`COMPLEXITIES`): ``constant`` (:math:`v_0`), ``vertical``
(:math:`v_0, g_z`), ``lateral`` (:math:`v_0, g_x, g_y`) and ``full`` (all
four). Dry sand whose velocity grows with depth below a sloping ground is a
``full`` field (the slope turns the depth gradient partly into a lateral one).

Ray legs
--------
In a linear velocity field rays are circular arcs and the first-arrival time
between two points A and B is known in closed form [Slotnick 1959;
Cerveny 2001, s. 3.8]:

.. math::

    t = \\frac{1}{G}\\operatorname{arccosh}\\left(1 + \\frac{G^2 L^2}{2 v_A v_B}\\right)
      = \\frac{L}{\\sqrt{v_A v_B}}\\, f(\\varepsilon), \\qquad
    \\varepsilon = \\frac{G^2 L^2}{2 v_A v_B},\\quad
    f(\\varepsilon) = \\frac{\\operatorname{arccosh}(1 + \\varepsilon)}{\\sqrt{2\\varepsilon}},

with :math:`G = |\\mathbf g|`, :math:`L = |B - A|` and :math:`v_A, v_B` the
velocities at the ends. The second form is smooth in g (f is analytic,
:math:`f(0) = 1`, so :math:`t \\to L/v` in a constant layer) and is what the
code evaluates, with the series
:math:`f(\\varepsilon) = \\sum_n (-1)^n \\frac{(2n)!}{8^n (n!)^2 (2n + 1)}\\varepsilon^n`
for small :math:`\\varepsilon`. The legs of a layered path are therefore
exact inside each layer; only where they meet an interface does the path
bend, at points that make the total time stationary (Fermat's principle,
hence Snell's law). The arc is the physical ray only while it does not turn
back inside the layer (:func:`leg_turns` flags that: a diving wave, not a
reflection).

The straight-segment time of the same field,
:math:`t = L \\ln(v_B / v_A)/(v_B - v_A)` (:func:`straight_leg_time`), is the
time along the chord; by Fermat's principle its error is of second order in
the distance between chord and arc. It is kept to measure that error.

References
----------
[Slotnick 1959] Slotnick, M. M. (1959). Lessons in Seismic Computing. Society
    of Exploration Geophysicists, Tulsa (linear velocity functions).
[Cerveny 2001] Cerveny, V. (2001). Seismic Ray Theory. Cambridge University
    Press, s. 3.8 (analytical ray tracing in a constant-gradient medium).
"""

from __future__ import annotations

from dataclasses import dataclass
from math import factorial
from typing import NamedTuple

import numpy as np

from ..errors import InversionError

__all__ = [
    "COMPLEXITIES",
    "LayerVelocity",
    "free_parameters",
    "leg_time",
    "leg_times",
    "leg_turns",
    "straight_leg_time",
]

#: Nested velocity models of a layer, simplest first; the value lists the free
#: parameters among (v0, gx, gy, gz).
COMPLEXITIES = {
    "constant": (True, False, False, False),
    "vertical": (True, False, False, True),
    "lateral": (True, True, True, False),
    "full": (True, True, True, True),
}


def free_parameters(complexity: str) -> np.ndarray:
    """Boolean mask of the free parameters (v0, gx, gy, gz) of a complexity name."""
    try:
        return np.array(COMPLEXITIES[complexity], bool)
    except KeyError:
        raise InversionError(
            f"velocity model {complexity!r} is unknown; choose one of {', '.join(COMPLEXITIES)}"
        ) from None


@dataclass(frozen=True)
class LayerVelocity:
    """The linear velocity field of one layer (see the module notes).

    Attributes
    ----------
    v0_m_s : float
        Velocity at the reference point (m/s).
    gradient_m_s_per_m : tuple of 3 floats
        :math:`(g_x, g_y, g_z)`, (m/s)/m, x east, y north, z up.
    centre_m : tuple of 3 floats
        Reference point (x, y, z) (m).
    complexity : str
        One of :data:`COMPLEXITIES` (which of the parameters were free).

    >>> v = LayerVelocity(600.0, (0.0, 0.0, -20.0), (0.0, 0.0, 100.0), "vertical")
    >>> float(v.at(0.0, 0.0, 95.0)), v.gradient_depth_m_s_per_m
    (700.0, 20.0)
    """

    v0_m_s: float
    gradient_m_s_per_m: tuple
    centre_m: tuple
    complexity: str = "full"

    @property
    def parameters(self) -> np.ndarray:
        """(v0, gx, gy, gz) as an array."""
        return np.array([self.v0_m_s, *self.gradient_m_s_per_m], float)

    @property
    def gradient_depth_m_s_per_m(self) -> float:
        """Increase of velocity with depth, :math:`-g_z` ((m/s)/m)."""
        return -float(self.gradient_m_s_per_m[2])

    def at(self, x_m, y_m, z_m):
        """Velocity (m/s) at points."""
        gx, gy, gz = self.gradient_m_s_per_m
        cx, cy, cz = self.centre_m
        return (
            self.v0_m_s
            + gx * (np.asarray(x_m, float) - cx)
            + gy * (np.asarray(y_m, float) - cy)
            + gz * (np.asarray(z_m, float) - cz)
        )


# ---------------------------------------------------------------------------- f(eps)

_N_SERIES = 12
_SERIES = np.array([(-1) ** n * factorial(2 * n) / (8**n * factorial(n) ** 2 * (2 * n + 1)) for n in range(_N_SERIES)])
_EPS_SERIES = 0.05  # below: series (truncation ~ 1e-17); above: closed form (cancellation ~ 1e-13)


def _arc_factor(eps):
    """f(eps) = arccosh(1 + eps) / sqrt(2 eps) and its first two derivatives."""
    e = np.asarray(eps, float)
    f = np.empty_like(e)
    f1 = np.empty_like(e)
    f2 = np.empty_like(e)
    small = e < _EPS_SERIES
    if np.any(small):
        es = e[small]
        a = np.full_like(es, _SERIES[-1])
        a1 = np.full_like(es, _SERIES[-1] * (_N_SERIES - 1))
        a2 = np.full_like(es, _SERIES[-1] * (_N_SERIES - 1) * (_N_SERIES - 2))
        for n in range(_N_SERIES - 2, -1, -1):  # Horner
            a = a * es + _SERIES[n]
            if n >= 1:
                a1 = a1 * es + _SERIES[n] * n
            if n >= 2:
                a2 = a2 * es + _SERIES[n] * n * (n - 1)
        f[small], f1[small], f2[small] = a, a1, a2
    large = ~small
    if np.any(large):
        el = e[large]
        q = el * (el + 2.0)
        sq = np.sqrt(q)
        a = np.log1p(el + sq)  # arccosh(1 + e)
        a1 = 1.0 / sq
        a2 = -(el + 1.0) / (q * sq)
        r = np.sqrt(2.0 * el)
        f[large] = a / r
        f1[large] = a1 / r - a / r**3
        f2[large] = a2 / r - 2.0 * a1 / r**3 + 3.0 * a / r**5
    return f, f1, f2


# ---------------------------------------------------------------------------- legs


def _velocity(theta, centre, P):
    # component by component: a sum over a last axis of 3 is slow in numpy, and theta and centre are
    # usually one row per layer broadcast over many legs
    return (
        theta[..., 0]
        + theta[..., 1] * (P[..., 0] - centre[..., 0])
        + theta[..., 2] * (P[..., 1] - centre[..., 1])
        + theta[..., 3] * (P[..., 2] - centre[..., 2])
    )


def _sq3(a):
    """Squared length over the last axis of 3 (component by component)."""
    return a[..., 0] * a[..., 0] + a[..., 1] * a[..., 1] + a[..., 2] * a[..., 2]


def leg_time(A, B, theta, centre):
    """One-way time (s) of the circular ray from A to B in the linear field ``theta`` about ``centre``.

    Parameters
    ----------
    A, B : array (..., 3)
        Ends of the leg (m).
    theta : array (..., 4)
        (v0, gx, gy, gz) of the layer (m/s, (m/s)/m).
    centre : array (..., 3)
        Reference point of the field (m).

    Examples
    --------
    In a constant layer the time is L / v; with a vertical gradient it is
    :math:`\\operatorname{arccosh}(1 + G^2 L^2 / (2 v_A v_B)) / G`. From 500 m/s
    to 700 m/s straight down over 10 m (G = 20 (m/s)/m) the ray is straight
    and the time is :math:`\\ln(700/500)/20` = 0.016824 s:

    >>> th = np.array([500.0, 0.0, 0.0, -20.0])
    >>> round(float(leg_time(np.zeros(3), np.array([0.0, 0.0, -10.0]), th, np.zeros(3))), 6)
    0.016824
    """
    A = np.asarray(A, float)
    B = np.asarray(B, float)
    theta = np.asarray(theta, float)
    c = np.asarray(centre, float)
    d = B - A
    s = _sq3(d)
    va = _velocity(theta, c, A)
    vb = _velocity(theta, c, B)
    g2 = _sq3(theta[..., 1:])
    q = s / (va * vb)
    f, _, _ = _arc_factor(0.5 * g2 * q)
    return np.sqrt(q) * f


class _Leg(NamedTuple):
    """The terms of legs' times and first derivatives shared by :func:`leg_times` and :func:`leg_times_on_surfaces`."""

    A: np.ndarray
    B: np.ndarray
    c: np.ndarray
    g: np.ndarray
    d: np.ndarray
    va: np.ndarray
    vb: np.ndarray
    g2: np.ndarray
    q: np.ndarray
    f: np.ndarray
    f1: np.ndarray
    f2: np.ndarray
    rq: np.ndarray
    t: np.ndarray
    h1: np.ndarray
    q_s: np.ndarray
    q_a: np.ndarray
    q_b: np.ndarray
    F_s: np.ndarray
    F_a: np.ndarray
    F_b: np.ndarray
    grad_a: np.ndarray
    grad_b: np.ndarray
    ab: np.ndarray


def _leg(A, B, theta, centre) -> _Leg:
    """Time t = sqrt(q) f(g^2 q / 2) of legs A -> B, q = |B - A|^2 / (v_A v_B), and its gradients.

    F_s, F_a, F_b are dt/ds, dt/dv_A, dt/dv_B (s = |B - A|^2); grad_a, grad_b
    the gradients with respect to the ends.
    """
    A = np.asarray(A, float)
    B = np.asarray(B, float)
    theta = np.asarray(theta, float)
    c = np.asarray(centre, float)
    g = theta[..., 1:]
    d = B - A
    s = _sq3(d)
    va = _velocity(theta, c, A)
    vb = _velocity(theta, c, B)
    g2 = _sq3(g)
    ab = va * vb
    q = s / ab
    f, f1, f2 = _arc_factor(0.5 * g2 * q)
    rq = np.sqrt(q)
    t = rq * f
    h1 = f / (2 * rq) + rq * f1 * g2 / 2
    q_s = 1.0 / ab
    q_a = -q / va
    q_b = -q / vb
    F_s = h1 * q_s
    F_a = h1 * q_a
    F_b = h1 * q_b
    gA = (-2.0 * F_s)[..., None] * d + F_a[..., None] * g
    gB = (2.0 * F_s)[..., None] * d + F_b[..., None] * g
    return _Leg(A, B, c, g, d, va, vb, g2, q, f, f1, f2, rq, t, h1, q_s, q_a, q_b, F_s, F_a, F_b, gA, gB, ab)


def leg_times(A, B, theta, centre, hessian: bool = True):
    """Leg time and its derivatives with respect to the ends and the field parameters.

    Writing the time as :math:`t = h(q)`, :math:`h(q) = \\sqrt q\\, f(G^2 q/2)`,
    :math:`q = s/(v_A v_B)`, :math:`s = |B - A|^2`, the derivatives follow by
    the chain rule through (s, v_A, v_B) (:math:`\\nabla_A s = -2(B - A)`,
    :math:`\\nabla_A v_A = \\mathbf g`, and so on).

    Returns
    -------
    dict
        ``t`` (...), ``gA``, ``gB`` (..., 3) gradients (s/m), ``dtheta`` (..., 4)
        derivatives with respect to (v0, gx, gy, gz), and with ``hessian``
        ``HAA``, ``HAB``, ``HBB`` (..., 3, 3) (``HAB[i, j]`` =
        d2t / dA_i dB_j), ``va``, ``vb`` the end velocities.
    """
    leg = _leg(A, B, theta, centre)
    A, B, c, g, d, va, vb, g2, q, f, f1, f2, rq, t, h1, q_s, q_a, q_b, F_s, F_a, F_b, gA, gB, ab = leg
    F_g2 = rq * f1 * q / 2
    dtheta = np.concatenate(
        [
            (F_a + F_b)[..., None],
            F_a[..., None] * (A - c) + F_b[..., None] * (B - c) + (2.0 * F_g2)[..., None] * g,
        ],
        axis=-1,
    )
    out = {"t": t, "gA": gA, "gB": gB, "dtheta": dtheta, "va": va, "vb": vb}
    if not hessian:
        return out
    h2 = f1 * g2 / (2 * rq) - f / (4 * q * rq) + rq * f2 * g2 * g2 / 4
    # second derivatives of q(s, a, b) = s / (a b)
    q_sa = -q_s / va
    q_sb = -q_s / vb
    q_aa = 2 * q / va**2
    q_ab = q / ab
    q_bb = 2 * q / vb**2
    F_ss = h2 * q_s * q_s
    F_sa = h2 * q_s * q_a + h1 * q_sa
    F_sb = h2 * q_s * q_b + h1 * q_sb
    F_aa = h2 * q_a * q_a + h1 * q_aa
    F_ab = h2 * q_a * q_b + h1 * q_ab
    F_bb = h2 * q_b * q_b + h1 * q_bb
    eye = np.eye(3)
    dd = d[..., :, None] * d[..., None, :]
    gg = g[..., :, None] * g[..., None, :]
    dg = d[..., :, None] * g[..., None, :]
    gd = np.swapaxes(dg, -1, -2)

    def k(a):
        return a[..., None, None]

    out["HAA"] = k(2 * F_s) * eye + k(4 * F_ss) * dd - k(2 * F_sa) * (dg + gd) + k(F_aa) * gg
    out["HBB"] = k(2 * F_s) * eye + k(4 * F_ss) * dd + k(2 * F_sb) * (dg + gd) + k(F_bb) * gg
    out["HAB"] = -k(2 * F_s) * eye - k(4 * F_ss) * dd - k(2 * F_sb) * dg + k(2 * F_sa) * gd + k(F_ab) * gg
    return out


def leg_times_on_surfaces(A, B, theta, centre, slope_a, slope_b) -> dict:
    """Leg time, gradients and the Hessian with respect to the ends' horizontal positions on their surfaces.

    Each end moves on a surface, :math:`A = (x, y, z(x, y))`, whose slope at
    the end is :math:`\\mathbf s = (z_x, z_y)`: with :math:`J = [[1, 0], [0, 1],
    \\mathbf s]` the (x, y) Hessian blocks are :math:`J_A^T H_{AA} J_A`,
    :math:`J_B^T H_{BB} J_B` and :math:`J_A^T H_{AB} J_B` of the 3-D Hessians of
    :func:`leg_times` (the surfaces' curvature term, :math:`\\partial t/\\partial z`
    times the curvature, is the caller's). They are formed from the projected
    vectors :math:`J^T (B - A)` and :math:`J^T \\mathbf g` directly (2 x 2
    blocks, never the 3 x 3 ones): the same numbers to rounding, at about a
    third of the work.

    Parameters
    ----------
    A, B, theta, centre : as :func:`leg_times`.
    slope_a, slope_b : array (..., 2)
        Surface slopes (m/m) at A and at B (zero for an end that does not move).

    Returns
    -------
    dict
        ``t``, ``gA``, ``gB``, ``va``, ``vb`` as :func:`leg_times`, and
        ``HAA``, ``HBB``, ``HAB`` (..., 2, 2) (s/m^2).
    """
    leg = _leg(A, B, theta, centre)
    d, g, g2, q, f, f1, f2, rq, t, h1 = leg.d, leg.g, leg.g2, leg.q, leg.f, leg.f1, leg.f2, leg.rq, leg.t, leg.h1
    va, vb, q_s, q_a, q_b, F_s, gA, gB = leg.va, leg.vb, leg.q_s, leg.q_a, leg.q_b, leg.F_s, leg.grad_a, leg.grad_b
    h2 = f1 * g2 / (2 * rq) - f / (4 * q * rq) + rq * f2 * g2 * g2 / 4
    F_ss = h2 * q_s * q_s
    sa = np.asarray(slope_a, float)
    sb = np.asarray(slope_b, float)
    # component by component (the 2 x 2 blocks of many legs as separate arrays: far less memory
    # traffic than broadcasting outer products): J^T J, J^T (B - A) and J^T g at each end
    ax, ay, bx, by = sa[..., 0], sa[..., 1], sb[..., 0], sb[..., 1]
    dz = d[..., 2]
    dax, day = d[..., 0] + dz * ax, d[..., 1] + dz * ay
    dbx, dby = d[..., 0] + dz * bx, d[..., 1] + dz * by
    c1 = 2 * F_s
    c2 = 4 * F_ss
    aa = [c1 * (1 + ax * ax) + c2 * dax * dax, c1 * (ax * ay) + c2 * dax * day, c1 * (1 + ay * ay) + c2 * day * day]
    bb = [c1 * (1 + bx * bx) + c2 * dbx * dbx, c1 * (bx * by) + c2 * dbx * dby, c1 * (1 + by * by) + c2 * dby * dby]
    ab = [
        -(c1 * (1 + ax * bx) + c2 * dax * dbx),
        -(c1 * (ax * by) + c2 * dax * dby),
        -(c1 * (ay * bx) + c2 * day * dbx),
        -(c1 * (1 + ay * by) + c2 * day * dby),
    ]
    if np.any(g != 0.0):  # the gradient's terms (none in a constant layer)
        q_sa = -q_s / va
        q_sb = -q_s / vb
        F_sa = h2 * q_s * q_a + h1 * q_sa
        F_sb = h2 * q_s * q_b + h1 * q_sb
        F_aa = h2 * q_a * q_a + h1 * (2 * q / va**2)
        F_ab = h2 * q_a * q_b + h1 * (q / (va * vb))
        F_bb = h2 * q_b * q_b + h1 * (2 * q / vb**2)
        gz = g[..., 2]
        gax, gay = g[..., 0] + gz * ax, g[..., 1] + gz * ay
        gbx, gby = g[..., 0] + gz * bx, g[..., 1] + gz * by
        e, f = -2 * F_sa, F_aa
        aa[0] = aa[0] + 2 * e * dax * gax + f * gax * gax
        aa[1] = aa[1] + e * (dax * gay + gax * day) + f * gax * gay
        aa[2] = aa[2] + 2 * e * day * gay + f * gay * gay
        e, f = 2 * F_sb, F_bb
        bb[0] = bb[0] + 2 * e * dbx * gbx + f * gbx * gbx
        bb[1] = bb[1] + e * (dbx * gby + gbx * dby) + f * gbx * gby
        bb[2] = bb[2] + 2 * e * dby * gby + f * gby * gby
        u, v, w = -2 * F_sb, 2 * F_sa, F_ab
        for n, (pa, ga, pb, gb) in enumerate(
            [(dax, gax, dbx, gbx), (dax, gax, dby, gby), (day, gay, dbx, gbx), (day, gay, dby, gby)]
        ):
            ab[n] = ab[n] + u * pa * gb + v * ga * pb + w * ga * gb
    shape = (*t.shape, 2, 2)
    HAA = np.stack([aa[0], aa[1], aa[1], aa[2]], axis=-1).reshape(shape)
    HBB = np.stack([bb[0], bb[1], bb[1], bb[2]], axis=-1).reshape(shape)
    HAB = np.stack(ab, axis=-1).reshape(shape)
    return {"t": t, "gA": gA, "gB": gB, "va": va, "vb": vb, "HAA": HAA, "HBB": HBB, "HAB": HAB}


def straight_leg_time(A, B, theta, centre):
    """Time (s) along the straight chord A-B in the linear field: :math:`L \\ln(v_B/v_A)/(v_B - v_A)`.

    Tends to L / v when the ends have the same velocity. Kept to measure the
    error of straight segments (second order by Fermat's principle; see the
    module notes), not used by the forward model.

    >>> th = np.array([500.0, 0.0, 0.0, -20.0])
    >>> round(float(straight_leg_time(np.zeros(3), np.array([0.0, 0.0, -10.0]), th, np.zeros(3))), 6)
    0.016824
    """
    A = np.asarray(A, float)
    B = np.asarray(B, float)
    theta = np.asarray(theta, float)
    c = np.asarray(centre, float)
    L = np.linalg.norm(B - A, axis=-1)
    va = _velocity(theta, c, A)
    vb = _velocity(theta, c, B)
    w = vb / va - 1.0
    small = np.abs(w) < 1e-6
    ratio = np.where(small, 1.0 - w / 2 + w * w / 3, np.log1p(np.where(small, 0.0, w)) / np.where(small, 1.0, w))
    return L * ratio / va


def leg_turns(A, B, theta, centre, samples: int = 9, tolerance_m: float = 1e-3):
    """True where the circular ray from A to B leaves the elevation range of its ends.

    A reflection leg runs from one interface of its layer to the other; an arc
    that dips below its lower end (or rises above its upper end) has turned
    inside the layer: a diving wave, which a reflection model must not use.
    The arc is sampled at ``samples`` interior points (its plane holds B - A and
    g; its centre lies on the plane where the velocity would vanish).
    """
    A = np.atleast_2d(np.asarray(A, float))
    B = np.atleast_2d(np.asarray(B, float))
    theta = np.atleast_2d(np.asarray(theta, float))
    c = np.atleast_2d(np.asarray(centre, float))
    n = max(len(A), len(B), len(theta), len(c))
    A, B, theta, c = (np.broadcast_to(a, (n, a.shape[-1])) for a in (A, B, theta, c))
    g = theta[..., 1:]
    G = np.linalg.norm(g, axis=-1)
    turns = np.zeros(A.shape[:-1], bool)
    curved = G > 1e-9
    if not np.any(curved):
        return turns
    # a quick sufficient test first: the arc's centre lies on the plane v = 0, so its radius is at least
    # v / G at either end, and the tangent turns from the chord by at most phi, sin(phi) = L / (2 radius)
    # <= L G / (2 max(vA, vB)); a chord steeper than phi (sin(beta) = |dz| / L) leaves every tangent
    # going the chord's way in z, and z is monotonic: L^2 G < 2 max(vA, vB) |dz| (no turn; the rest below)
    d = B - A
    vmax = np.maximum(_velocity(theta, c, A), _velocity(theta, c, B))
    curved &= ~((vmax > 0) & (_sq3(d) * G < 2.0 * vmax * np.abs(d[..., 2])))
    if not np.any(curved):
        return turns
    e2 = g[curved] / G[curved, None]  # along the gradient
    d = (B - A)[curved]
    e1 = d - np.sum(d * e2, axis=-1, keepdims=True) * e2
    n1 = np.linalg.norm(e1, axis=-1)
    ok = n1 > 1e-9 * np.linalg.norm(d, axis=-1)  # a leg along the gradient is straight
    e1 = e1 / np.where(ok, n1, 1.0)[:, None]
    vA = _velocity(theta[curved], c[curved], A[curved])
    vB = _velocity(theta[curved], c[curved], B[curved])
    wA = vA / G[curved]  # distance from the plane v = 0, along e2
    wB = vB / G[curved]
    rB = np.sum(d * e1, axis=-1)
    rc = (rB**2 + wB**2 - wA**2) / (2 * np.where(ok, rB, 1.0))  # centre abscissa (A at 0)
    ang_a = np.arctan2(wA, 0.0 - rc)
    ang_b = np.arctan2(wB, rB - rc)
    radius = np.hypot(rc, wA)
    # z along the arc is a sinusoid of the angle, dz/dang = radius (e2_z cos - e1_z sin); both ends
    # above the centre (wA, wB > 0) make the arc shorter than half a turn, so where dz/dang has one
    # strict sign at both ends z is monotonic between them and the arc cannot leave their range:
    # only the other arcs are sampled
    e1z, e2z = e1[:, 2], e2[:, 2]
    slope_a = e2z * np.cos(ang_a) - e1z * np.sin(ang_a)
    slope_b = e2z * np.cos(ang_b) - e1z * np.sin(ang_b)
    sample = ok & ~((slope_a * slope_b > 0) & (wA > 0) & (wB > 0))
    bad = np.zeros(ok.size, bool)
    j = np.flatnonzero(sample)
    if j.size:
        frac = np.linspace(0.0, 1.0, samples + 2)[1:-1]
        ang = ang_a[j, None] + (ang_b - ang_a)[j, None] * frac[None, :]
        r = rc[j, None] + radius[j, None] * np.cos(ang)
        w = radius[j, None] * np.sin(ang)
        Az, Bz = A[curved, 2][j], B[curved, 2][j]
        z = Az[:, None] + r * e1z[j, None] + (w - wA[j, None]) * e2z[j, None]
        lo = np.minimum(Az, Bz)[:, None] - tolerance_m
        hi = np.maximum(Az, Bz)[:, None] + tolerance_m
        bad[j] = np.any((z < lo) | (z > hi), axis=1)
    turns[curved] = bad
    return turns
