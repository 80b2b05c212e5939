"""Reflection traveltime tomography: one surface and one velocity from all picks.

A gather's own fit assumes a plane under its spread. Over a trough (buried
valley) or a ridge the reflected wavefront is focused or defocused and the
fitted velocity and depth are biased, badly so when the radius of curvature of
the reflector nears its depth. This module inverts every pick at once for a
smooth reflector surface below a homogeneous layer and for the layer velocity,
following the reflection traveltime tomography of [Bishop et al. 1985].

Model
-----
The reflector elevation is given at the nodes of a regular grid
(:class:`NodeGrid`; ``x0_m, y0_m`` = the south-west node, ``spacing_m``,
``nx`` columns toward the east, ``ny`` rows toward the north). **Row 0 is the
southernmost row** (``y = y0_m + row * spacing_m``), column 0 the westernmost.
Between the nodes the surface is the tensor product of cubic Catmull-Rom
(cardinal Hermite) segments [Catmull & Rom 1974]: it passes through every
node, is C1 everywhere (C2 inside each cell), and each point depends on the
4 x 4 nearest nodes only, so the Jacobian is sparse. Beyond the outer rows and
columns a ghost node is extrapolated linearly (``z_-1 = 2 z_0 - z_1``).

For a source S and a receiver R (3D, any elevation above the reflector) the
reflection point P = (x, y, z(x, y)) makes the path length stationary
(Fermat's principle) and

.. math::

    t = \\frac{|\\mathbf S - \\mathbf P| + |\\mathbf P - \\mathbf R|}{V}.

P is found by a damped Newton iteration on (x, y) started from the image-source
reflection point of the local tangent plane [Sheriff & Geldart 1995, ch. 4];
each step descends the path length (Hessian shifted to be positive definite,
Armijo backtracking), so where a strongly curved trough gives several
stationary points the iteration keeps the **minimum-time branch continuing
from the planar start** (the first arrival of that branch); later branches of
a focused (bow-tie) arrival are not modelled. Picks whose reflection point
leaves the grid are flagged (``inside`` False) and not used.

Sensitivities follow from stationarity (the reflection point may be held
fixed to first order) [Bishop et al. 1985]:

.. math::

    \\frac{\\partial t}{\\partial z_P} =
    \\frac{1}{V}\\left(\\frac{(P - S)_z}{|P - S|} + \\frac{(P - R)_z}{|P - R|}\\right),
    \\qquad \\frac{\\partial t}{\\partial z_k} = w_k(P)\\,\\frac{\\partial t}{\\partial z_P},
    \\qquad \\frac{\\partial t}{\\partial \\ln V} = -t,

with :math:`w_k(P)` the interpolation weight of node k at P.

Velocity: one site value by default. Optionally (``velocity_grid``) a smooth
lateral field, ln V on a coarse Catmull-Rom grid with its own curvature
penalty; each leg then takes its mean slowness along the straight leg
(Simpson's rule over its ends and midpoint) and the reflection point stays
the path-length stationary point, both first-order accurate for a smooth
field because the time is stationary with respect to the ray path.

Inversion
---------
Gauss-Newton on

.. math::

    \\Phi = \\sum_i w_i\\frac{r_i^2}{\\sigma_i^2}
          + \\lambda^2\\left(\\|D_{xx}z\\|^2 + 2\\|D_{xy}z\\|^2 + \\|D_{yy}z\\|^2\\right)
          + \\sum_b \\frac{(z(B_b) - e_b)^2}{\\sigma_b^2}

with second differences D (metres) of the node elevations (a discrete
thin-plate curvature penalty whose null space is a plane), Huber IRLS weights
:math:`w_i` [Huber 1964; Holland & Welsch 1977] and picks beyond
``reject_sigma`` robust standard deviations rejected (weight 0, flagged).
Boreholes enter as near-exact elevation data :math:`e_b` = collar - depth.
The normal equations are solved by a sparse LU factorisation (SuperLU in
scipy, symmetric mode); the step is halved while it does not lower
:math:`\\Phi`, and a Levenberg-Marquardt damping of the step grows after
such a halving and shrinks after full steps [Marquardt 1963] (the gradient
stays undamped, so the solution is that of Gauss-Newton).

Uncertainty: the linearised posterior covariance
:math:`C = (J^T W J + \\lambda^2 D^T D + B^T W_b B)^{-1}` (scaled by the
reduced chi-square when that exceeds 1). Its diagonal is exact: a banded
Cholesky factor of the node block (the nodes ordered with the shorter grid
side fastest) and the Takahashi recurrence inside the band
[Takahashi et al. 1973; Erisman & Tinney 1975], the velocity parameters
added by a Woodbury (for one velocity, Sherman-Morrison) update (see
:class:`_BandedSPD`). Band storage: about ``8 (3 min(nx, ny) + 4) nx ny``
bytes (190 MB for 200 x 200 nodes).

A north-up :class:`~.surface.GridSpec` (row 0 north) is accepted as the grid
and read as the same nodes counted from the south; arrays passed and
returned here are always row 0 south (flip them with ``[::-1]``).

References
----------
[Bishop et al. 1985] Bishop, T. N., Bube, K. P., Cutler, R. T., Langan, R. T.,
    Love, P. L., Resnick, J. R., Shuey, R. T., Spindler, D. A. & Wyld, H. W.
    (1985). Tomographic determination of velocity and depth in laterally
    varying media. Geophysics 50(6), 903-923.
[Catmull & Rom 1974] Catmull, E. & Rom, R. (1974). A class of local
    interpolating splines. In Computer Aided Geometric Design, Academic Press,
    317-326.
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4.
[Marquardt 1963] Marquardt, D. W. (1963). An algorithm for least-squares
    estimation of nonlinear parameters. Journal of the Society for Industrial
    and Applied Mathematics 11(2), 431-441.
[Huber 1964] Huber, P. J. (1964). Robust estimation of a location parameter.
    Annals of Mathematical Statistics 35(1), 73-101.
[Holland & Welsch 1977] Holland, P. W. & Welsch, R. E. (1977). Robust
    regression using iteratively reweighted least-squares. Communications in
    Statistics - Theory and Methods 6(9), 813-827.
[Takahashi et al. 1973] Takahashi, K., Fagan, J. & Chen, M.-S. (1973). Formation
    of a sparse bus impedance matrix and its application to short circuit study.
    Proc. 8th PICA Conference, Minneapolis, 63-69.
[Erisman & Tinney 1975] Erisman, A. M. & Tinney, W. F. (1975). On computing
    certain elements of the inverse of a sparse matrix. Communications of the
    ACM 18(3), 177-179.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.spatial import cKDTree

from ..errors import InversionError, RockheadWarning
from ..progress import NullProgress, check_cancel
from ..seismic import forward

__all__ = [
    "NodeGrid",
    "ReflectionPaths",
    "TomographyResult",
    "as_node_grid",
    "auto_smoothing",
    "curvature_flags",
    "fermat_traveltime",
    "invert_reflector",
    "robust_site_velocity",
    "surface_values",
    "surface_weights",
]

METHOD_NAME = "reflection traveltime tomography (Bishop et al. 1985), Catmull-Rom surface"


# ----------------------------------------------------------------------------
# grid and surface
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class NodeGrid:
    """Regular node grid of the reflector surface.

    Node (row, col) lies at ``x = x0_m + col * spacing_m`` (east) and
    ``y = y0_m + row * spacing_m`` (north): row 0 is the southernmost row.
    Arrays on this grid have shape ``(ny, nx)``.
    """

    x0_m: float
    y0_m: float
    spacing_m: float
    nx: int
    ny: int

    @property
    def shape(self) -> tuple:
        """(ny, nx) of the node arrays."""
        return (self.ny, self.nx)

    @property
    def x_m(self) -> np.ndarray:
        """Node eastings (nx,)."""
        return self.x0_m + self.spacing_m * np.arange(self.nx)

    @property
    def y_m(self) -> np.ndarray:
        """Node northings (ny,), south to north."""
        return self.y0_m + self.spacing_m * np.arange(self.ny)

    def contains(self, x_m, y_m) -> np.ndarray:
        """True where (x, y) lies inside the node rectangle (edges included)."""
        eps = 1e-9 * self.spacing_m
        x = np.asarray(x_m, float)
        y = np.asarray(y_m, float)
        return (
            (x >= self.x0_m - eps)
            & (x <= self.x0_m + (self.nx - 1) * self.spacing_m + eps)
            & (y >= self.y0_m - eps)
            & (y <= self.y0_m + (self.ny - 1) * self.spacing_m + eps)
        )


def as_node_grid(grid) -> NodeGrid:
    """Build a :class:`NodeGrid` from a tuple ``(x0_m, y0_m, spacing_m, nx, ny)`` or a grid object.

    A tuple (or a :class:`NodeGrid`) gives the **south-west** node and rows
    running north. A north-up :class:`~.surface.GridSpec` (``x0, y0`` = centre
    of the north-west cell, row 0 northernmost) is converted to the same nodes
    (its cell centres), counted from the south: arrays on it must be flipped
    with ``[::-1]`` before and after (this module always puts row 0 south).
    """
    if isinstance(grid, NodeGrid):
        g = grid
    elif isinstance(grid, (tuple, list, np.ndarray)):
        if len(grid) != 5:
            raise InversionError(
                f"grid specification {grid!r} has {len(grid)} items; expected (x0_m, y0_m, spacing_m, nx, ny)"
            )
        g = NodeGrid(float(grid[0]), float(grid[1]), float(grid[2]), int(grid[3]), int(grid[4]))
    elif hasattr(grid, "cell_size_m") and hasattr(grid, "y_centres"):  # north-up GridSpec
        c = float(grid.cell_size_m)
        g = NodeGrid(float(grid.x0), float(grid.y0) - (int(grid.ny) - 1) * c, c, int(grid.nx), int(grid.ny))
    else:
        raise InversionError(
            f"grid specification {grid!r} is not understood; pass (x0_m, y0_m, spacing_m, nx, ny) with "
            "(x0_m, y0_m) the south-west node, a NodeGrid or a surface GridSpec"
        )
    if not (np.isfinite(g.spacing_m) and g.spacing_m > 0):
        raise InversionError(f"grid spacing {g.spacing_m!r} m must be a positive number")
    if g.nx < 3 or g.ny < 3:
        raise InversionError(f"grid of {g.nx} x {g.ny} nodes is too small; the cubic surface needs at least 3 x 3")
    return g


def _cr_basis(t):
    """Catmull-Rom weights of the 4 nodes (i-1, i, i+1, i+2) and their t-derivatives."""
    t2 = t * t
    t3 = t2 * t
    w = np.stack(
        [(-t + 2 * t2 - t3) / 2, (2 - 5 * t2 + 3 * t3) / 2, (t + 4 * t2 - 3 * t3) / 2, (-t2 + t3) / 2],
        axis=-1,
    )
    dw = np.stack(
        [(-1 + 4 * t - 3 * t2) / 2, (-10 * t + 9 * t2) / 2, (1 + 8 * t - 9 * t2) / 2, (-2 * t + 3 * t2) / 2],
        axis=-1,
    )
    d2w = np.stack([(4 - 6 * t) / 2, (-10 + 18 * t) / 2, (8 - 18 * t) / 2, (-2 + 6 * t) / 2], axis=-1)
    return w, dw, d2w


def _axis_weights(coord, origin, spacing, n):
    """Node indices (m, 4) and weights (value, d/dc, d2/dc2) along one axis, ghosts folded in."""
    u = (np.asarray(coord, float) - origin) / spacing
    i = np.clip(np.floor(u).astype(np.int64), 0, n - 2)
    t = u - i
    w, dw, d2w = _cr_basis(t)
    idx = i[:, None] + np.arange(-1, 3)[None, :]
    lo = i == 0  # ghost z_-1 = 2 z_0 - z_1
    hi = i == n - 2  # ghost z_n = 2 z_{n-1} - z_{n-2}
    out = []
    for arr in (w, dw / spacing, d2w / spacing**2):
        a = arr.copy()
        g = a[lo, 0].copy()
        a[lo, 1] += 2 * g
        a[lo, 2] -= g
        a[lo, 0] = 0.0
        g = a[hi, 3].copy()
        a[hi, 2] += 2 * g
        a[hi, 1] -= g
        a[hi, 3] = 0.0
        out.append(a)
    idx = np.clip(idx, 0, n - 1)
    return idx, out


def surface_weights(x_m, y_m, grid):
    """Sparse interpolation weights of the nodes in z(x, y).

    Returns ``(node_index, weight)``, both of shape (m, 16): flat node indices
    (``row * nx + col``) and weights such that
    ``z(x, y) = sum(weight * elevation.ravel()[node_index], axis=1)``.
    Indices may repeat at the grid edges (their weights then add up).
    """
    g = as_node_grid(grid)
    x = np.atleast_1d(np.asarray(x_m, float)).ravel()
    y = np.atleast_1d(np.asarray(y_m, float)).ravel()
    ix, (wx, _, _) = _axis_weights(x, g.x0_m, g.spacing_m, g.nx)
    iy, (wy, _, _) = _axis_weights(y, g.y0_m, g.spacing_m, g.ny)
    node = (iy[:, :, None] * g.nx + ix[:, None, :]).reshape(len(x), 16)
    weight = (wy[:, :, None] * wx[:, None, :]).reshape(len(x), 16)
    return node, weight


def surface_values(elevation_m, x_m, y_m, grid, derivatives: int = 0):
    """Evaluate the Catmull-Rom surface and its derivatives at points.

    Parameters
    ----------
    elevation_m : array (ny, nx)
        Node elevations, row 0 southernmost.
    x_m, y_m : array_like
        Points (broadcast to one shape).
    grid : NodeGrid or tuple
    derivatives : {0, 1, 2}
        0: returns z; 1: ``(z, z_x, z_y)``; 2: ``(z, z_x, z_y, z_xx, z_xy, z_yy)``.

    Examples
    --------
    The surface passes through its nodes and reproduces a plane exactly:

    >>> g = NodeGrid(0.0, 0.0, 10.0, 4, 3)
    >>> X, Y = np.meshgrid(g.x_m, g.y_m)
    >>> z = 100.0 + 0.1 * X - 0.2 * Y
    >>> [round(float(v), 9) for v in surface_values(z, 15.0, 7.0, g, derivatives=1)]
    [100.1, 0.1, -0.2]
    """
    g = as_node_grid(grid)
    z_nodes = np.asarray(elevation_m, float)
    if z_nodes.shape != g.shape:
        raise InversionError(f"elevation grid has shape {z_nodes.shape}; the node grid is {g.shape} (ny, nx)")
    x, y = np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float))
    shape = x.shape
    ix, wxs = _axis_weights(x.ravel(), g.x0_m, g.spacing_m, g.nx)
    iy, wys = _axis_weights(y.ravel(), g.y0_m, g.spacing_m, g.ny)
    patch = z_nodes[iy[:, :, None], ix[:, None, :]]  # (m, 4, 4): [point, row, col]

    def comb(wy, wx):
        return np.einsum("mi,mij,mj->m", wy, patch, wx).reshape(shape)

    if derivatives == 0:
        return comb(wys[0], wxs[0])
    out = [comb(wys[0], wxs[0]), comb(wys[0], wxs[1]), comb(wys[1], wxs[0])]
    if derivatives >= 2:
        out += [comb(wys[0], wxs[2]), comb(wys[1], wxs[1]), comb(wys[2], wxs[0])]
    return tuple(out)


# ----------------------------------------------------------------------------
# forward model (Fermat reflection points)
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class ReflectionPaths:
    """Reflection paths of source-receiver pairs on a curved reflector.

    ``time_s`` two-way time, ``point_xyz`` (n, 3) reflection points,
    ``dt_dz_s_m`` sensitivity of the time to a vertical shift of the surface
    at the reflection point (negative: a higher reflector gives a shorter
    time), ``inside`` reflection point inside the node grid, ``converged``
    Newton converged, ``iterations`` Newton iterations used.
    """

    time_s: np.ndarray
    point_xyz: np.ndarray
    dt_dz_s_m: np.ndarray
    inside: np.ndarray
    converged: np.ndarray
    iterations: int


def _path_length(S, R, x, y, z_nodes, g):
    z = surface_values(z_nodes, x, y, g)
    P = np.column_stack([x, y, z])
    return np.linalg.norm(P - S, axis=1) + np.linalg.norm(P - R, axis=1)


def _tangent_plane_start(S, R, z_nodes, g, x, y, rounds=3):
    """Image-source reflection point of the tangent plane at (x, y), repeated a few rounds."""
    xmax = g.x0_m + (g.nx - 1) * g.spacing_m
    ymax = g.y0_m + (g.ny - 1) * g.spacing_m
    for _ in range(rounds):
        z, zx, zy = surface_values(z_nodes, x, y, g, derivatives=1)
        n = np.column_stack([zx, zy, -np.ones_like(zx)])
        n /= np.linalg.norm(n, axis=1, keepdims=True)  # downward unit normal
        d = np.sum(n * np.column_stack([x, y, z]), axis=1)
        ok = (forward.normal_distance(S, n, d) > 0) & (forward.normal_distance(R, n, d) > 0)
        P = forward.reflection_point(S, R, n, d)
        x = np.where(ok, np.clip(P[:, 0], g.x0_m, xmax), x)
        y = np.where(ok, np.clip(P[:, 1], g.y0_m, ymax), y)
    return x, y


def _hessian_term(e1, e2, uS, uR, lS, lR):
    """e1^T M e2 with M = (I - uS uS^T)/lS + (I - uR uR^T)/lR (Hessian of |P-S| + |P-R| in P)."""
    return (
        np.sum(e1 * e2, axis=1) * (1 / lS + 1 / lR)
        - np.sum(e1 * uS, axis=1) * np.sum(e2 * uS, axis=1) / lS
        - np.sum(e1 * uR, axis=1) * np.sum(e2 * uR, axis=1) / lR
    )


def fermat_traveltime(
    source_xyz,
    receiver_xyz,
    elevation_m,
    grid,
    velocity_m_s,
    start_xy=None,
    tolerance_m: float = 1e-7,
    max_iterations: int = 60,
) -> ReflectionPaths:
    """Two-way reflection times off the Catmull-Rom surface by Fermat's principle.

    .. math::

        t = \\min_{(x, y)\\ \\mathrm{local}}\\
            \\frac{|\\mathbf S - \\mathbf P| + |\\mathbf P - \\mathbf R|}{V},
        \\qquad \\mathbf P = (x, y, z(x, y))

    solved by damped Newton iterations on (x, y), vectorised over all pairs,
    from the image-source point of the local tangent plane (or ``start_xy``).
    On a plane the result is the image-source time
    :func:`~.forward.image_source_traveltime` [Sheriff & Geldart 1995, ch. 4].

    Parameters
    ----------
    source_xyz, receiver_xyz : array (n, 3)
        Source and receiver positions (x east, y north, z up, metres).
    elevation_m : array (ny, nx)
        Node elevations of the reflector (row 0 southernmost).
    grid : NodeGrid or tuple (x0_m, y0_m, spacing_m, nx, ny)
    velocity_m_s : float
        Layer velocity.
    start_xy : array (n, 2), optional
        Starting reflection points (e.g. those of a previous model, to follow
        the same branch); default: tangent-plane image-source points.
    tolerance_m : float
        Newton step below which a path has converged.

    Returns
    -------
    ReflectionPaths
    """
    g = as_node_grid(grid)
    z_nodes = np.asarray(elevation_m, float)
    S = np.atleast_2d(np.asarray(source_xyz, float))
    R = np.atleast_2d(np.asarray(receiver_xyz, float))
    S, R = np.broadcast_arrays(S, R)
    n = len(S)
    if start_xy is None:
        x = np.clip(0.5 * (S[:, 0] + R[:, 0]), g.x0_m, g.x0_m + (g.nx - 1) * g.spacing_m)
        y = np.clip(0.5 * (S[:, 1] + R[:, 1]), g.y0_m, g.y0_m + (g.ny - 1) * g.spacing_m)
        x, y = _tangent_plane_start(S, R, z_nodes, g, x, y)
    else:
        st = np.asarray(start_xy, float)
        x, y = st[:, 0].copy(), st[:, 1].copy()
    converged = np.zeros(n, bool)
    active = np.arange(n)
    max_step = g.spacing_m
    it = 0
    for it in range(1, max_iterations + 1):
        if active.size == 0:
            it -= 1
            break
        xa, ya = x[active], y[active]
        Sa, Ra = S[active], R[active]
        z, zx, zy, zxx, zxy, zyy = surface_values(z_nodes, xa, ya, g, derivatives=2)
        P = np.column_stack([xa, ya, z])
        dS = P - Sa
        dR = P - Ra
        lS = np.linalg.norm(dS, axis=1)
        lR = np.linalg.norm(dR, axis=1)
        uS = dS / lS[:, None]
        uR = dR / lR[:, None]
        a = uS + uR
        gx = a[:, 0] + a[:, 2] * zx
        gy = a[:, 1] + a[:, 2] * zy
        # Hessian of the path length in (x, y): e_i^T M e_j + a_z z_ij,
        # M = (I - uS uS^T)/lS + (I - uR uR^T)/lR, e_x = (1, 0, z_x), e_y = (0, 1, z_y)
        ex = np.column_stack([np.ones_like(zx), np.zeros_like(zx), zx])
        ey = np.column_stack([np.zeros_like(zx), np.ones_like(zx), zy])

        hxx = _hessian_term(ex, ex, uS, uR, lS, lR) + a[:, 2] * zxx
        hxy = _hessian_term(ex, ey, uS, uR, lS, lR) + a[:, 2] * zxy
        hyy = _hessian_term(ey, ey, uS, uR, lS, lR) + a[:, 2] * zyy
        half_tr = 0.5 * (hxx + hyy)
        det = hxx * hyy - hxy * hxy
        lam_min = half_tr - np.sqrt(np.maximum(half_tr**2 - det, 0.0))
        floor = 0.02 * (1 / lS + 1 / lR)  # keep the Newton matrix positive definite (descent)
        shift = np.where(lam_min < floor, floor - lam_min, 0.0)
        hxx = hxx + shift
        hyy = hyy + shift
        det = hxx * hyy - hxy * hxy
        dx = -(hyy * gx - hxy * gy) / det
        dy = -(-hxy * gx + hxx * gy) / det
        step = np.hypot(dx, dy)
        scale = np.minimum(1.0, max_step / np.maximum(step, 1e-300))
        dx *= scale
        dy *= scale
        f0 = lS + lR
        slope = gx * dx + gy * dy  # < 0 for a descent direction
        alpha = np.ones(len(active))
        todo = np.arange(len(active))
        for _ in range(30):  # Armijo backtracking, vectorised
            f1 = _path_length(
                Sa[todo],
                Ra[todo],
                xa[todo] + alpha[todo] * dx[todo],
                ya[todo] + alpha[todo] * dy[todo],
                z_nodes,
                g,
            )
            bad = f1 > f0[todo] + 1e-4 * alpha[todo] * slope[todo] + 1e-12 * f0[todo]
            if not np.any(bad):
                break
            todo = todo[bad]
            alpha[todo] *= 0.5
        x[active] = xa + alpha * dx
        y[active] = ya + alpha * dy
        done = alpha * step * scale < tolerance_m
        converged[active[done]] = True
        active = active[~done]
    z = surface_values(z_nodes, x, y, g)
    P = np.column_stack([x, y, z])
    lS = np.linalg.norm(P - S, axis=1)
    lR = np.linalg.norm(P - R, axis=1)
    time = (lS + lR) / velocity_m_s
    dtdz = ((P[:, 2] - S[:, 2]) / lS + (P[:, 2] - R[:, 2]) / lR) / velocity_m_s
    inside = g.contains(x, y) & (P[:, 2] < S[:, 2]) & (P[:, 2] < R[:, 2])
    return ReflectionPaths(time, P, dtdz, inside, converged, it)


# ----------------------------------------------------------------------------
# inversion
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class TomographyResult:
    """Result of :func:`invert_reflector`.

    Grids have shape (ny, nx), row 0 southernmost (see :class:`NodeGrid`).

    Attributes
    ----------
    grid : NodeGrid
    elevation_m : reflector elevation at the nodes, NaN where not constrained
    elevation_unmasked_m : the same everywhere (penalty-interpolated beyond the data)
    sigma_m : linearised posterior standard deviation of the node elevations, NaN where masked
    mask : True where a reflection point or borehole constrains the node
    velocity_m_s, sigma_velocity_m_s : layer velocity and its standard deviation (with a
        lateral field: its geometric mean over the velocity nodes)
    velocity_depth_correlation : correlation of V with the mean depth of the
        constrained nodes (near +1: velocity and depth trade off)
    residual_s : observed - modelled time per pick (NaN where not modelled)
    rejected : pick rejected as a mispick (|residual| > reject_sigma robust sigmas)
    used : pick modelled (reflection point inside the grid, below source and receiver)
    reflection_xyz_m : (n, 3) reflection points
    iterations : Gauss-Newton iterations done
    misfit_history : rms of residual/sigma over the accepted picks, start model first
    objective_history : penalised objective after each iteration, start model first
    converged : model change fell below the tolerance
    smoothing : curvature weight lambda used (1/m)
    chi2_reduced : weighted misfit per degree of freedom (robust weights)
    velocity_grid, velocity_field_m_s, sigma_velocity_field_m_s : the lateral
        velocity field and its standard deviation (None without ``velocity_grid``)
    method : name of the method
    """

    grid: NodeGrid
    elevation_m: np.ndarray
    elevation_unmasked_m: np.ndarray
    sigma_m: np.ndarray
    mask: np.ndarray
    velocity_m_s: float
    sigma_velocity_m_s: float
    velocity_depth_correlation: float
    residual_s: np.ndarray
    rejected: np.ndarray
    used: np.ndarray
    reflection_xyz_m: np.ndarray
    iterations: int
    misfit_history: np.ndarray
    objective_history: np.ndarray
    converged: bool
    smoothing: float
    chi2_reduced: float
    velocity_grid: NodeGrid | None = None
    velocity_field_m_s: np.ndarray | None = None
    sigma_velocity_field_m_s: np.ndarray | None = None
    method: str = METHOD_NAME


def _second_difference_operator(g: NodeGrid):
    """Stacked D_xx, sqrt(2) D_xy, D_yy on the node grid (metres, no spacing scaling)."""
    idx = np.arange(g.nx * g.ny).reshape(g.ny, g.nx)
    rows, cols, vals = [], [], []
    r0 = 0

    def add(stencil_idx, coef):
        nonlocal r0
        m = stencil_idx[0].size
        r = r0 + np.arange(m)
        for si, c in zip(stencil_idx, coef):
            rows.append(r)
            cols.append(si.ravel())
            vals.append(np.full(m, c))
        r0 += m

    add([idx[:, :-2], idx[:, 1:-1], idx[:, 2:]], [1.0, -2.0, 1.0])
    add([idx[:-2, :], idx[1:-1, :], idx[2:, :]], [1.0, -2.0, 1.0])
    s2 = np.sqrt(2.0)
    add([idx[:-1, :-1], idx[:-1, 1:], idx[1:, :-1], idx[1:, 1:]], [s2, -s2, -s2, s2])
    return sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(r0, g.nx * g.ny))


def _boreholes_arrays(boreholes):
    if boreholes is None:
        return None
    if hasattr(boreholes, "elevation_m") and hasattr(boreholes, "x_m"):
        arr = (boreholes.x_m, boreholes.y_m, boreholes.elevation_m, boreholes.sigma_m)
    elif isinstance(boreholes, dict):
        arr = tuple(boreholes[k] for k in ("x_m", "y_m", "elevation_m", "sigma_m"))
    else:
        arr = tuple(boreholes)
        if len(arr) != 4:
            raise InversionError(f"boreholes must be (x_m, y_m, elevation_m, sigma_m) arrays; got {len(arr)} items")
    bx, by, be, bs = (np.atleast_1d(np.asarray(a, float)) for a in arr)
    bs = np.broadcast_to(bs, bx.shape)
    if not (bx.shape == by.shape == be.shape):
        raise InversionError(f"borehole arrays differ in length: {bx.shape}, {by.shape}, {be.shape}")
    if np.any(~(bs > 0)):
        raise InversionError(f"borehole sigma_m {bs[~(bs > 0)][:3]} must be positive (metres)")
    if bx.size == 0:
        return None
    return bx, by, be, bs


def auto_smoothing(depth_m: float, spacing_m: float) -> float:
    """Default curvature weight lambda (1/m) of :func:`invert_reflector`.

    The penalty rows are second differences of node elevations (metres). A
    surface with radius of curvature :math:`\\rho` has second differences
    :math:`h^2/\\rho` over node spacing h. The default treats curvature radii
    down to the typical depth d as plausible (valleys as tight as those that
    bias single-gather fits most), i.e. a second-difference standard
    deviation :math:`h^2 / d`:

    .. math::

        \\lambda = \\frac{d}{h^2}

    Tighter curvature is still possible where the picks demand it. A weaker
    penalty lets reflection points near a focusing trough axis flip between
    branches from one iteration to the next (slow convergence); a stronger
    one flattens narrow valleys.

    >>> auto_smoothing(30.0, 5.0)
    1.2
    """
    return max(float(depth_m), spacing_m) / spacing_m**2


def _robust_weights(u, robust_scale, reject_sigma):
    """Huber weights of normalised residuals u with a MAD scale (>= 1); rejects beyond reject_sigma."""
    mad = 1.4826 * np.median(np.abs(u)) if u.size else 1.0
    s = max(1.0, float(mad))
    a = np.abs(u) / s
    w = np.where(a <= robust_scale, 1.0, robust_scale / np.maximum(a, 1e-300))
    rejected = a > reject_sigma
    w[rejected] = 0.0
    return w, rejected


def _factorize(A):
    """Sparse LU of a symmetric positive definite matrix, symmetric ordering, no pivoting."""
    try:
        return spla.splu(
            sp.csc_matrix(A),
            permc_spec="MMD_AT_PLUS_A",
            diag_pivot_thresh=0.0,
            options={"SymmetricMode": True},
        )
    except RuntimeError as err:
        raise InversionError(
            f"the tomography normal equations are singular ({err}); add picks or increase the smoothing"
        ) from err


def _banded_order(g: NodeGrid):
    """Node ordering with the smaller grid dimension fastest, and its half bandwidth.

    A point's 16 node weights span 3 rows and 3 columns, so the normal matrix
    has half bandwidth ``3 * min(nx, ny) + 3`` in that ordering.
    """
    idx = np.arange(g.nx * g.ny).reshape(g.shape)
    if g.nx <= g.ny:
        return idx.ravel(), 3 * g.nx + 3
    return idx.T.ravel(), 3 * g.ny + 3


class _BandedSPD:
    """Banded Cholesky factor of an SPD sparse matrix in a given node ordering.

    ``solve(rhs)`` solves in the original ordering; ``inverse_diagonal()``
    returns diag(A^-1) exactly by the Takahashi recurrence on the band
    [Takahashi et al. 1973; Erisman & Tinney 1975]: with
    :math:`A = L\\,\\mathrm{diag}(d)\\,L^T` (unit lower L, half bandwidth b)
    and :math:`Z = A^{-1}`, for j = n-1 down to 0

    .. math::

        Z_{ij} = -\\sum_{k=j+1}^{j+b} L_{kj} Z_{ik}\\ (j < i \\le j + b), \\qquad
        Z_{jj} = \\frac{1}{d_j} - \\sum_{k=j+1}^{j+b} L_{kj} Z_{kj},

    which only needs Z inside the band, kept in a sliding b x b window and
    evaluated by blocks of columns (matrix products). Cost O(n b^2) time,
    O(n b) memory.
    """

    def __init__(self, A, order, bandwidth):
        import scipy.linalg as sla

        self._sla = sla
        self.order = order
        n = len(order)
        b = int(min(bandwidth, n - 1))
        Ap = sp.csr_matrix(A)[order][:, order].tocoo()
        low = Ap.row >= Ap.col
        ab = np.zeros((b + 1, n))
        d = Ap.row[low] - Ap.col[low]
        if d.size and d.max() > b:
            raise InversionError(f"internal error: normal matrix wider than its band ({d.max()} > {b})")
        ab[d, Ap.col[low]] = Ap.data[low]
        try:
            self.cb = sla.cholesky_banded(ab, lower=True)
        except np.linalg.LinAlgError as err:
            raise InversionError(
                f"the posterior covariance matrix is not positive definite ({err}); increase the smoothing"
            ) from err
        self.b = b

    def solve(self, rhs):
        out = np.empty_like(rhs)
        out[self.order] = self._sla.cho_solve_banded((self.cb, True), rhs[self.order])
        return out

    def inverse_diagonal(self, block: int = 64):
        """diag(A^-1) by the blocked Takahashi recurrence (see the class notes).

        Blocks J of ``block`` columns are processed from the last; with
        K = the b indices after J and :math:`M = C_{KJ} C_{JJ}^{-1}` (C the
        Cholesky factor, :math:`A = C C^T`):
        :math:`Z_{KJ} = -Z_{KK} M` and
        :math:`Z_{JJ} = (C_{JJ} C_{JJ}^T)^{-1} - M^T Z_{KJ}`.
        """
        sla = self._sla
        cb = self.cb
        b = self.b
        n = cb.shape[1]
        zdiag = np.empty(n)
        win = np.zeros((0, 0))  # Z on indices [j1, j1 + len(win))
        j1 = n
        while j1 > 0:
            j0 = max(0, j1 - block)
            nbk = j1 - j0
            kk = win.shape[0]
            c = np.arange(nbk)
            # C_JJ (lower) and C_KJ from the band: C[i, k] = cb[i - k, k] for 0 <= i - k <= b
            dJ = c[:, None] - c[None, :]
            okJ = (dJ >= 0) & (dJ <= b)
            CJJ = np.where(okJ, cb[np.clip(dJ, 0, b), j0 + c[None, :]], 0.0)
            Cinv = sla.solve_triangular(CJJ, np.eye(nbk), lower=True)
            ZJJ = Cinv.T @ Cinv
            if kk:
                r = np.arange(kk)
                dK = (j1 + r[:, None]) - (j0 + c[None, :])
                okK = dK <= b
                CKJ = np.where(okK, cb[np.clip(dK, 0, b), j0 + c[None, :]], 0.0)
                M = CKJ @ Cinv  # C_KJ C_JJ^-1
                ZKJ = -(win @ M)
                ZJJ -= M.T @ ZKJ
            zdiag[j0:j1] = np.diag(ZJJ)
            nw = min(b, n - j0)
            new = np.empty((nw, nw))
            if nw <= nbk:
                new[:, :] = ZJJ[:nw, :nw]
            else:
                rest = nw - nbk
                new[:nbk, :nbk] = ZJJ
                new[nbk:, :nbk] = ZKJ[:rest]
                new[:nbk, nbk:] = ZKJ[:rest].T
                new[nbk:, nbk:] = win[:rest, :rest]
            win = new
            j1 = j0
        out = np.empty(n)
        out[self.order] = zdiag
        return out


class _Velocity:
    """Velocity parameters q = ln V: one site value, or a Catmull-Rom field on a coarse grid.

    With a field, each leg of a path (S to P, P to R) takes the mean slowness
    along its horizontal projection by Simpson's rule over its ends and
    midpoint (straight rays: first-order accurate for a smooth field, since
    the time is stationary with respect to the ray path; Fermat's principle).
    """

    def __init__(self, vgrid, start, S, R):
        self.S = S
        self.R = R
        if vgrid is None:
            v0 = np.asarray(start, float)
            if v0.ndim != 0:
                raise InversionError(f"start velocity of shape {v0.shape} needs velocity_grid; give one value in m/s")
            self.grid = None
            self.nv = 1
            self.q0 = np.array([np.log(float(v0))]) if v0 > 0 else np.array([np.nan])
            self.D = None
        else:
            self.grid = as_node_grid(vgrid)
            self.nv = self.grid.nx * self.grid.ny
            v0 = (
                np.broadcast_to(np.asarray(start, float), self.grid.shape)
                if np.ndim(start) == 0
                else np.asarray(start, float)
            )
            if v0.shape != self.grid.shape:
                raise InversionError(
                    f"start velocity grid has shape {v0.shape}; the velocity grid is {self.grid.shape} (ny, nx)"
                )
            with np.errstate(invalid="ignore", divide="ignore"):
                self.q0 = np.log(v0).ravel().copy()
            self.D = _second_difference_operator(self.grid)
            self._wS = self._weights(S[:, 0], S[:, 1])
            self._wR = self._weights(R[:, 0], R[:, 1])

    def _weights(self, x, y):
        g = self.grid
        xc = np.clip(x, g.x0_m, g.x0_m + (g.nx - 1) * g.spacing_m)
        yc = np.clip(y, g.y0_m, g.y0_m + (g.ny - 1) * g.spacing_m)
        return surface_weights(xc, yc, g)

    def evaluate(self, q, P):
        """Times (n,), dt/dz at P (n,) and dt/dq as (cols, vals) arrays (n, k)."""
        S, R = self.S, self.R
        lS = np.linalg.norm(P - S, axis=1)
        lR = np.linalg.norm(P - R, axis=1)
        ezS = (P[:, 2] - S[:, 2]) / lS
        ezR = (P[:, 2] - R[:, 2]) / lR
        if self.grid is None:
            u = np.exp(-q[0])
            t = (lS + lR) * u
            return t, u * (ezS + ezR), np.zeros((len(t), 1), np.int64), -t[:, None]
        pts = [
            (self._wS, lS / 6.0),
            (self._weights(0.5 * (S[:, 0] + P[:, 0]), 0.5 * (S[:, 1] + P[:, 1])), 4.0 * lS / 6.0),
            (self._weights(P[:, 0], P[:, 1]), (lS + lR) / 6.0),
            (self._weights(0.5 * (R[:, 0] + P[:, 0]), 0.5 * (R[:, 1] + P[:, 1])), 4.0 * lR / 6.0),
            (self._wR, lR / 6.0),
        ]
        us = [np.exp(-np.sum(w * q[idx], axis=1)) for (idx, w), _ in pts]
        uS = (us[0] + 4.0 * us[1] + us[2]) / 6.0  # mean slowness of each leg (Simpson)
        uR = (us[2] + 4.0 * us[3] + us[4]) / 6.0
        t = lS * uS + lR * uR
        cols = np.concatenate([idx for (idx, _), _ in pts], axis=1)
        vals = np.concatenate([-(c * u)[:, None] * w for ((_, w), c), u in zip(pts, us)], axis=1)
        return t, uS * ezS + uR * ezR, cols, vals


def invert_reflector(
    source_xyz,
    receiver_xyz,
    time_s,
    sigma_s,
    grid,
    start_elevation,
    start_velocity_m_s: float,
    boreholes=None,
    smoothing: float | None = None,
    max_iterations: int = 20,
    tolerance_m: float = 0.05,
    robust_scale: float = 1.5,
    reject_sigma: float = 4.0,
    fix_velocity: bool = False,
    velocity_grid=None,
    velocity_smoothing: float = 100.0,
    mask_distance_m: float | None = None,
    max_band_bytes: float = 1.0 * 2**30,
    progress=None,
) -> TomographyResult:
    """Invert all reflection picks at once for the reflector surface and the layer velocity.

    Reflection traveltime tomography [Bishop et al. 1985] with the forward
    model of :func:`fermat_traveltime`: Gauss-Newton with a sparse Jacobian,

    .. math::

        \\left(J^T W J + \\lambda^2 D^T D + B^T W_b B\\right)\\delta m =
        J^T W r - \\lambda^2 D^T D z + B^T W_b (e - B z),

    unknowns m = (node elevations z, ln V), curvature penalty D (second
    differences, metres), Huber IRLS weights in W, boreholes as near-exact
    data (B = interpolation weights at the collars). See the module notes.

    Parameters
    ----------
    source_xyz, receiver_xyz : array (n, 3)
        Source and receiver positions (m; topography honoured).
    time_s, sigma_s : array (n,)
        Picked two-way times and their standard errors (s).
    grid : NodeGrid, tuple (x0_m, y0_m, spacing_m, nx, ny) or grid-like object
        Row 0 southernmost; see :func:`as_node_grid`.
    start_elevation : array (ny, nx)
        Starting reflector elevations (e.g. a kriged surface of gather fits).
    start_velocity_m_s : float or array
        Starting velocity (e.g. the robust site velocity); with
        ``velocity_grid`` also an array on that grid.
    boreholes : (x_m, y_m, elevation_m, sigma_m) arrays, dict, or :class:`~.model.Boreholes`
        Reflector elevations at boreholes (collar - depth) with their errors.
    smoothing : float, optional
        Curvature weight lambda (1/m) on the second differences; None:
        :func:`auto_smoothing` of the median depth below the sources and the
        node spacing.
    max_iterations : int
        Gauss-Newton iterations at most.
    tolerance_m : float
        Stop when no node touched by a ray or borehole moves more than this
        and V changes by less than ``tolerance_m`` / median depth (relative),
        or when an iteration lowers the objective by less than 1e-5 of it.
    robust_scale : float
        Huber threshold in robust standard deviations of residual/sigma.
    reject_sigma : float
        Picks beyond this many robust standard deviations get weight 0 and
        are flagged ``rejected``.
    fix_velocity : bool
        Keep V at ``start_velocity_m_s`` (e.g. calibrated on boreholes).
    velocity_grid : NodeGrid or tuple, optional
        Invert for a smooth lateral velocity field, ln V on the nodes of this
        coarse grid (row 0 south; it should cover the survey, points beyond
        take the edge value), instead of one site value. Each leg of a path
        takes its mean slowness along the straight leg (see :class:`_Velocity`).
        Lateral velocity and reflector relief trade off at wavelengths near
        the depth [Bishop et al. 1985]: keep the grid coarse (spacing of a few
        depths) and the field smooth.
    velocity_smoothing : float
        Weight on the second differences of ln V on ``velocity_grid``:
        100 means a standard deviation of 1 % per node.
    mask_distance_m : float, optional
        Nodes farther than this from every used reflection point and borehole
        are masked; default 1.5 node spacings (the reach of the cubic weights).
    max_band_bytes : float
        Memory allowed for the band storage of the covariance factor (about
        ``8 (3 min(nx, ny) + 4) nx ny`` bytes, twice at the peak); beyond it the
        sigma grid is left NaN with a warning.
    progress : progress object, optional
        Receives percentages and messages; cancellation is checked between
        iterations.

    Returns
    -------
    TomographyResult
    """
    progress = progress or NullProgress()
    g = as_node_grid(grid)
    S = np.asarray(source_xyz, float)
    R = np.asarray(receiver_xyz, float)
    t_obs = np.asarray(time_s, float)
    sig = np.broadcast_to(np.asarray(sigma_s, float), t_obs.shape).copy()
    npick = t_obs.size
    if S.shape != (npick, 3) or R.shape != (npick, 3):
        raise InversionError(
            f"source_xyz {S.shape} and receiver_xyz {R.shape} must both be ({npick}, 3), one row per pick"
        )
    if npick == 0:
        raise InversionError("no picks to invert; give at least a few gathers of reflection picks")
    if np.any(~(sig > 0)):
        raise InversionError(f"pick sigma_s {sig[~(sig > 0)][:3]} must be positive seconds")
    z = np.array(start_elevation, float)
    if z.shape != g.shape:
        raise InversionError(f"start_elevation has shape {z.shape}; the node grid is {g.shape} (ny, nx)")
    if not np.all(np.isfinite(z)):
        raise InversionError("start_elevation has NaN or infinite nodes; fill the start surface everywhere")
    vel = _Velocity(velocity_grid, start_velocity_m_s, S, R)
    q = vel.q0.copy()
    if not np.all(np.isfinite(q)):
        raise InversionError(f"start velocity {start_velocity_m_s!r} m/s must be positive")
    bh = _boreholes_arrays(boreholes)
    nn = g.nx * g.ny
    nq = 0 if fix_velocity else vel.nv
    npar = nn + nq
    lam_v = float(velocity_smoothing)
    if vel.D is not None:
        DvtDv = (vel.D.T @ vel.D).tocsr()
    finite = np.isfinite(t_obs) & np.all(np.isfinite(S), axis=1) & np.all(np.isfinite(R), axis=1)

    D = _second_difference_operator(g)
    DtD = (D.T @ D).tocsr()
    if bh is not None:
        bnode, bw = surface_weights(bh[0], bh[1], g)
        B = sp.csr_matrix((bw.ravel(), (np.repeat(np.arange(bh[0].size), 16), bnode.ravel())), shape=(bh[0].size, nn))
        Wb = 1.0 / bh[3] ** 2
        BtWB = (B.T @ sp.diags(Wb) @ B).tocsr()

    def penalty(zz, qq, lam):
        out = lam**2 * float(np.sum((D @ zz.ravel()) ** 2))
        if bh is not None:
            out += float(np.sum(Wb * (B @ zz.ravel() - bh[2]) ** 2))
        if vel.D is not None:
            out += lam_v**2 * float(np.sum((vel.D @ qq) ** 2))
        return out

    def forward_all(zz, qq, start_xy):
        # geometry from Fermat's principle (path length), times from the velocity model
        pth = fermat_traveltime(S, R, zz, g, 1.0, start_xy=start_xy)
        t, dtdz, qcols, qvals = vel.evaluate(qq, pth.point_xyz)
        return pth, t, dtdz, qcols, qvals

    check_cancel(progress)
    state = forward_all(z, q, None)
    paths = state[0]
    used = finite & paths.inside
    if used.sum() < 3:
        raise InversionError(
            f"only {int(used.sum())} of {npick} picks reflect inside the node grid; enlarge the grid "
            "or check the start surface (it must lie below the sources and receivers)"
        )
    if smoothing is None:
        depth = np.median(S[used, 2] - paths.point_xyz[used, 2])
        lam = auto_smoothing(depth, g.spacing_m)
    else:
        lam = float(smoothing)
        if not (np.isfinite(lam) and lam >= 0):
            raise InversionError(f"smoothing {smoothing!r} must be a non-negative number (1/m)")
    depth_scale = max(float(np.median(S[used, 2] - paths.point_xyz[used, 2])), g.spacing_m)

    def data_terms(st):
        return np.where(used & st[0].inside, t_obs - st[1], np.nan)

    r = data_terms(state)
    ok = used & paths.inside
    w, rejected = _robust_weights(r[ok] / sig[ok], robust_scale, reject_sigma)
    weights = np.zeros(npick)
    weights[ok] = w
    rej = np.zeros(npick, bool)
    rej[ok] = rejected

    def objective(rr, wts, zz, qq):
        m = np.isfinite(rr)
        return float(np.sum(wts[m] * (rr[m] / sig[m]) ** 2)) + penalty(zz, qq, lam)

    def rms_misfit(rr, rj):
        m = np.isfinite(rr) & ~rj
        return float(np.sqrt(np.mean((rr[m] / sig[m]) ** 2))) if m.any() else np.nan

    misfit_hist = [rms_misfit(r, rej)]
    obj_hist = [objective(r, weights, z, q)]
    converged = False
    iterations = 0
    eps_damp = 1e-8
    mu = 0.0

    def jacobian(st, wts):
        pth, _, dtdz, qcols, qvals = st
        m = np.isfinite(r_cur) & (wts > 0)
        ii = np.nonzero(m)[0]
        node, wnode = surface_weights(pth.point_xyz[ii, 0], pth.point_xyz[ii, 1], g)
        sw = np.sqrt(wts[ii]) / sig[ii]
        rows = np.repeat(np.arange(ii.size), 16)
        vals = (wnode * (dtdz[ii] * sw)[:, None]).ravel()
        cols = node.ravel()
        if not fix_velocity:  # dt/dlnV = -t for one site value
            k = qcols.shape[1]
            rows = np.concatenate([rows, np.repeat(np.arange(ii.size), k)])
            cols = np.concatenate([cols, nn + qcols[ii].ravel()])
            vals = np.concatenate([vals, (qvals[ii] * sw[:, None]).ravel()])
        J = sp.csr_matrix((vals, (rows, cols)), shape=(ii.size, npar))
        return J, ii, sw

    def normal_matrix(J):
        A = (J.T @ J).tocsr()
        blocks = [lam**2 * DtD + BtWB if bh is not None else lam**2 * DtD]
        if nq:
            blocks.append(lam_v**2 * DvtDv if vel.D is not None else sp.csr_matrix((nq, nq)))
        return (A + sp.block_diag(blocks, format="csr")).tocsr()

    for it in range(1, max_iterations + 1):
        check_cancel(progress)
        progress.set_progress(100.0 * (it - 1) / (max_iterations + 1))
        r_cur = r
        J, ii, sw = jacobian(state, weights)
        A = normal_matrix(J)
        diag = A.diagonal()
        damp = eps_damp * (np.mean(diag[:nn]) if nn else 1.0)
        # Levenberg-Marquardt damping mu diag(A) of the step (the gradient is undamped,
        # so the solution is that of Gauss-Newton); mu grows when a full step fails
        A = A + sp.diags(np.where(np.arange(npar) < nn, damp, 0.0) + mu * diag + np.where(diag > 0, 0.0, 1.0))
        rhs = J.T @ (r[ii] * sw)
        rhs[:nn] -= lam**2 * (DtD @ z.ravel())
        if bh is not None:
            rhs[:nn] += B.T @ (Wb * (bh[2] - B @ z.ravel()))
        if nq and vel.D is not None:
            rhs[nn:] -= lam_v**2 * (DvtDv @ q)
        lu = _factorize(A)
        delta = lu.solve(rhs)
        dz = delta[:nn].reshape(g.shape)
        dq = np.clip(delta[nn:], -0.5, 0.5) if nq else np.zeros_like(q)
        obj_old = objective(r, weights, z, q)
        alpha = 1.0
        for _ in range(6):
            z_try = z + alpha * dz
            q_try = q + alpha * dq
            s_try = forward_all(z_try, q_try, paths.point_xyz[:, :2])
            r_try = data_terms(s_try)
            # picks that left the grid: keep their old residual in the comparison
            obj_new = objective(np.where(np.isfinite(r_try), r_try, r), weights, z_try, q_try)
            if obj_new <= obj_old * (1 + 1e-12):
                break
            alpha *= 0.5
        mu = max(10.0 * mu, 0.1) if alpha < 1.0 else (mu / 3.0 if mu > 0.01 else 0.0)
        z, q, state = z_try, q_try, s_try
        paths = state[0]
        iterations = it
        # convergence is judged on the nodes the data or boreholes touch: far
        # nodes only follow the penalty and may still drift by a lever effect
        touched = np.zeros(npar, bool)
        touched[np.unique(J.indices)] = True
        if bh is not None:
            touched[np.unique(bnode)] = True
        touched = touched[:nn]
        dz_max = float(np.max(np.abs(dz.ravel()[touched]))) if touched.any() else 0.0
        change = alpha * max(dz_max, float(np.max(np.abs(dq))) * depth_scale)
        r = data_terms(state)
        ok = used & paths.inside & np.isfinite(r)
        w, rejected = _robust_weights(r[ok] / sig[ok], robust_scale, reject_sigma)
        weights = np.zeros(npick)
        weights[ok] = w
        rej = np.zeros(npick, bool)
        rej[ok] = rejected
        misfit_hist.append(rms_misfit(r, rej))
        obj_hist.append(objective(r, weights, z, q))
        progress.info(
            f"tomography iteration {it}: V = {np.exp(np.mean(q)):.1f} m/s, "
            f"rms misfit {misfit_hist[-1]:.3f} sigma, "
            f"largest change of a constrained node {alpha * dz_max:.3f} m (step length {alpha:g})"
        )
        # converged: the constrained model stopped moving, or the objective stalls
        # (a decrease below 1e-5 of itself is statistically meaningless)
        if change < tolerance_m or obj_old - obj_new < 1e-5 * obj_old:
            converged = True
            break

    # linearised posterior covariance at the final model
    check_cancel(progress)
    progress.info("tomography: posterior standard deviations")
    r_cur = r
    J, ii, sw = jacobian(state, weights)
    A = normal_matrix(J)
    damp = eps_damp * float(np.mean(A.diagonal()[:nn]))
    A = (A + sp.diags(np.where(np.arange(npar) < nn, damp, 0.0))).tocsr()
    m_fin = np.isfinite(r) & (weights > 0)
    dof = max(int(m_fin.sum()) - nq, 1)
    chi2 = float(np.sum(weights[m_fin] * (r[m_fin] / sig[m_fin]) ** 2)) / dof
    cscale = max(1.0, chi2)

    # mask: nodes near a used reflection point or a borehole
    reach = 1.5 * g.spacing_m if mask_distance_m is None else float(mask_distance_m)
    pts = [paths.point_xyz[m_fin, :2]]
    if bh is not None:
        pts.append(np.column_stack([bh[0], bh[1]]))
    pts = np.concatenate(pts)
    X, Y = np.meshgrid(g.x_m, g.y_m)
    if len(pts):
        dist, _ = cKDTree(pts).query(np.column_stack([X.ravel(), Y.ravel()]), k=1)
        mask = (dist <= reach).reshape(g.shape)
    else:
        mask = np.zeros(g.shape, bool)

    sigma = np.full(g.shape, np.nan)
    sig_v = 0.0 if fix_velocity else np.nan
    sig_q = np.zeros(vel.nv) if fix_velocity else np.full(vel.nv, np.nan)
    corr = np.nan
    order, band = _banded_order(g)
    if (band + 1) * nn * 8 > max_band_bytes:
        warnings.warn(
            f"the node grid ({g.nx} x {g.ny}) is too large for exact posterior standard deviations "
            f"({(band + 1) * nn * 8 / 2**30:.1f} GiB of band storage); sigma is left empty. "
            "Use a coarser grid or a smaller area.",
            RockheadWarning,
            stacklevel=2,
        )
    else:
        # C = A^-1 with A = [[A_zz, A_zq], [A_qz, A_qq]] (velocity last). Woodbury:
        # C_zz = A_zz^-1 + U S^-1 U^T, C_qq = S^-1, C_qz = -S^-1 U^T,
        # U = A_zz^-1 A_zq, S = A_qq - A_qz U (Sherman-Morrison for one velocity).
        Azz = A[:nn, :nn]
        fac = _BandedSPD(Azz, order, band)
        zdiag = fac.inverse_diagonal()
        am = mask.ravel() / max(int(mask.sum()), 1)
        if nq:
            Azq = np.asarray(A[:nn, nn:].todense())
            U = fac.solve(Azq)
            schur = np.asarray(A[nn:, nn:].todense()) - Azq.T @ U
            Sinv = np.linalg.inv(schur)
            zdiag = zdiag + np.einsum("ij,jk,ik->i", U, Sinv, U)
            Cqq = cscale * Sinv
            sig_q = np.sqrt(np.maximum(np.diag(Cqq), 0.0))
            bq = np.full(nq, 1.0 / nq)  # mean ln V
            var_lnv = float(bq @ Cqq @ bq)
            sig_v = np.exp(np.mean(q)) * np.sqrt(max(var_lnv, 0.0))
            if mask.any():
                au = U.T @ am
                var_mean = cscale * (float(am @ fac.solve(am)) + float(au @ Sinv @ au))
                cov = -cscale * float(bq @ Sinv @ au)  # cov(mean ln V, mean elevation)
                # depth = ground - elevation: the correlation with mean depth has the opposite sign
                corr = -cov / np.sqrt(max(var_lnv * var_mean, 1e-300))
        sigma = np.sqrt(np.maximum(zdiag * cscale, 0.0)).reshape(g.shape)
        sigma[~mask] = np.nan
    elev = np.where(mask, z, np.nan)
    progress.set_progress(100.0)
    return TomographyResult(
        grid=g,
        elevation_m=elev,
        elevation_unmasked_m=z,
        sigma_m=sigma,
        mask=mask,
        velocity_m_s=float(np.exp(np.mean(q))),
        sigma_velocity_m_s=float(sig_v),
        velocity_depth_correlation=float(corr),
        residual_s=r,
        rejected=rej,
        used=np.isfinite(r),
        reflection_xyz_m=paths.point_xyz,
        iterations=iterations,
        misfit_history=np.asarray(misfit_hist),
        objective_history=np.asarray(obj_hist),
        converged=converged,
        smoothing=float(lam),
        chi2_reduced=chi2,
        velocity_grid=vel.grid,
        velocity_field_m_s=None if vel.grid is None else np.exp(q).reshape(vel.grid.shape),
        sigma_velocity_field_m_s=None if vel.grid is None else (np.exp(q) * sig_q).reshape(vel.grid.shape),
    )


# ----------------------------------------------------------------------------
# site velocity helpers
# ----------------------------------------------------------------------------


def _usable(status, n):
    if status is None:
        return np.ones(n, bool)
    s = np.asarray(status)
    if s.dtype == bool:
        return s
    good = ("ok", "fitted", "good", "")
    return np.array([str(v).strip().lower() in good for v in s.ravel()]).reshape(s.shape)


def robust_site_velocity(velocity_m_s, se_velocity_m_s, status=None):
    """Robust site value of the overburden velocity from per-gather fits.

    The median of the usable, finite gather velocities and the spread
    1.4826 MAD (the normal-consistent median absolute deviation [Huber 1964]):
    a few gathers over troughs or ridges, biased by focusing or defocusing,
    then barely move it.

    Parameters
    ----------
    velocity_m_s, se_velocity_m_s : array (g,)
        Fitted velocity per gather and its standard error (used only to drop
        gathers without a finite error).
    status : array (g,) of bool or str, optional
        True, or "ok"/"fitted"/"good", marks a usable gather.

    Returns
    -------
    (velocity_m_s, spread_m_s, n) : (float, float, int)
        NaN values and n = 0 when no gather is usable.

    One gather over a trough (2600 m/s) barely moves the estimate: median
    1805, absolute deviations (5, 5, 15, 0, 795) have median 5, times 1.4826:

    >>> v, s, n = robust_site_velocity([1800, 1810, 1790, 1805, 2600], [10] * 5, ["ok"] * 5)
    >>> v, round(s, 3), n
    (1805.0, 7.413, 5)
    """
    v = np.asarray(velocity_m_s, float).ravel()
    se = np.broadcast_to(np.asarray(se_velocity_m_s, float), v.shape).ravel()
    ok = _usable(status, v.size).ravel() & np.isfinite(v) & (v > 0) & np.isfinite(se)
    if not ok.any():
        return float("nan"), float("nan"), 0
    vv = v[ok]
    med = float(np.median(vv))
    spread = 1.4826 * float(np.median(np.abs(vv - med)))
    return med, spread, int(ok.sum())


def curvature_flags(velocity_m_s, se_velocity_m_s, site_velocity_m_s, site_spread_m_s, k: float = 3.0):
    """Flag gathers whose velocity departs from the site value beyond its error.

    A gather is flagged when

    .. math::

        |V_g - V_{site}| > k\\sqrt{\\sigma_g^2 + s_{site}^2}

    with its standard error :math:`\\sigma_g` and the site spread
    :math:`s_{site}` (natural scatter). Over a trough (focusing) the fitted
    velocity comes out too high, over a ridge (defocusing) too low
    [Bishop et al. 1985 model these effects exactly; see the module notes].

    Returns
    -------
    (flag, reason) : bool array, str object array ("" where not flagged)

    >>> f, why = curvature_flags([1800.0, 2500.0], [20.0, 30.0], 1800.0, 25.0)
    >>> f.tolist(), why[1].split(":")[0]
    ([False, True], 'velocity departs from the site value beyond its error')
    """
    v = np.asarray(velocity_m_s, float)
    se = np.broadcast_to(np.asarray(se_velocity_m_s, float), v.shape)
    tol = k * np.sqrt(np.where(np.isfinite(se), se, 0.0) ** 2 + float(site_spread_m_s) ** 2)
    dev = v - float(site_velocity_m_s)
    flag = np.isfinite(dev) & (np.abs(dev) > tol)
    reason = np.full(v.shape, "", dtype=object)
    base = (
        "velocity departs from the site value beyond its error: "
        "reflector curvature (focusing/defocusing) is the likely cause"
    )
    reason[flag & (dev > 0)] = base + " (higher: a trough, focusing)"
    reason[flag & (dev < 0)] = base + " (lower: a ridge, defocusing)"
    return flag, reason
