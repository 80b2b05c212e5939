"""Interfaces as smooth surfaces through the nodes of a north-up grid.

An interface (water table, rockhead, ...) is given by its elevation at the
nodes of a :class:`~rockhead.core.grid.GridSpec`, the project's one grid
convention: node (row, col) is the centre of that cell,
``x = x0 + col * cell_size_m`` (east) and ``y = y0 - row * cell_size_m``;
**row 0 is the northern row**. Arrays on the grid have shape ``(ny, nx)``
and a node's flat index is ``row * nx + col`` (``array.ravel()`` order).

Between the nodes the surface is the tensor product of cubic Catmull-Rom
(cardinal Hermite) segments [Catmull & Rom 1974]: it passes through every
node, is C1 everywhere (C2 inside each cell), reproduces planes exactly, and
each point depends on its 4 x 4 nearest nodes only, so the derivatives of a
traveltime with respect to the node elevations are sparse. Beyond the outer
rows and columns a ghost node is extrapolated linearly (``z_-1 = 2 z_0 - z_1``).

References
----------
[Catmull & Rom 1974] Catmull, E. & Rom, R. (1974). A class of local
    interpolating splines. In Computer Aided Geometric Design, Academic Press,
    317-326.
"""

from __future__ import annotations

import numpy as np

from ..errors import InversionError
from ..grid import GridSpec

__all__ = ["check_node_grid", "hull_cells", "interface_values", "node_weights", "node_xy", "within_nodes"]


def check_node_grid(spec) -> GridSpec:
    """Return ``spec`` if it can carry a cubic surface (a GridSpec of at least 3 x 3 nodes)."""
    if not isinstance(spec, GridSpec):
        raise InversionError(
            f"node grid {spec!r} is not a GridSpec; give the interfaces on a north-up GridSpec (row 0 north)"
        )
    if spec.nx < 3 or spec.ny < 3:
        raise InversionError(
            f"node grid of {spec.nx} x {spec.ny} nodes is too small; a cubic surface needs at least 3 x 3"
        )
    return spec


def node_xy(spec: GridSpec):
    """Node eastings and northings (m) as two ``(ny, nx)`` arrays (row 0 north)."""
    return spec.coords()


def within_nodes(spec: GridSpec, x_m, y_m) -> np.ndarray:
    """True where (x, y) lies inside the rectangle of the node centres (edges included)."""
    eps = 1e-9 * spec.cell_size_m
    x = np.asarray(x_m, float)
    y = np.asarray(y_m, float)
    return (
        (x >= spec.x0 - eps)
        & (x <= spec.x0 + (spec.nx - 1) * spec.cell_size_m + eps)
        & (y <= spec.y0 + eps)
        & (y >= spec.y0 - (spec.ny - 1) * spec.cell_size_m - eps)
    )


# Catmull-Rom weights of the nodes (i-1, i, i+1, i+2) as polynomials in t: w = [1, t, t^2, t^3] @ _CR
_CR = 0.5 * np.array([[0.0, 2.0, 0.0, 0.0], [-1.0, 0.0, 1.0, 0.0], [2.0, -5.0, 4.0, -1.0], [-1.0, 3.0, -3.0, 1.0]])
_CR_D1 = _CR[1:] * np.array([1.0, 2.0, 3.0])[:, None]  # d/dt: [1, t, t^2] @ _CR_D1
_CR_D2 = _CR[2:] * np.array([2.0, 6.0])[:, None]  # d2/dt2: [1, t] @ _CR_D2


def _cr_basis(t, order: int = 2):
    """Catmull-Rom weights (m, 4) of the 4 nodes (i-1, i, i+1, i+2) and their t-derivatives up to ``order``."""
    powers = np.stack([np.ones_like(t), t, t * t, t * t * t], axis=-1)
    out = [powers @ _CR]
    if order >= 1:
        out.append(powers[:, :3] @ _CR_D1)
    if order >= 2:
        out.append(powers[:, :2] @ _CR_D2)
    return out


def _axis(u, n, scale, order: int = 2):
    """Node indices (m, 4) and weights (value and derivatives up to ``order``) along one axis.

    ``u`` is the fractional node coordinate, ``scale`` = d(u)/d(coordinate) (1/m,
    signed), ghost nodes folded into the edge nodes.
    """
    i = np.clip(np.floor(u).astype(np.int64), 0, n - 2)
    t = u - i
    basis = _cr_basis(t, order)
    lo = np.flatnonzero(i == 0)  # ghost z_-1 = 2 z_0 - z_1
    hi = np.flatnonzero(i == n - 2)  # ghost z_n = 2 z_{n-1} - z_{n-2}
    out = []
    for p, arr in enumerate(basis):
        if p:
            arr *= scale**p
        if lo.size:
            g = arr[lo, 0]
            arr[lo, 1] += 2 * g
            arr[lo, 2] -= g
            arr[lo, 0] = 0.0
        if hi.size:
            g = arr[hi, 3]
            arr[hi, 2] += 2 * g
            arr[hi, 1] -= g
            arr[hi, 3] = 0.0
        out.append(arr)
    idx = i[:, None] + np.arange(-1, 3)[None, :]
    idx[lo, 0] = 0
    idx[hi, 3] = n - 1
    return idx, out


def _axes(spec, x, y, order: int = 2):
    h = spec.cell_size_m
    ic, wc = _axis((x - spec.x0) / h, spec.nx, 1.0 / h, order)
    ir, wr = _axis((spec.y0 - y) / h, spec.ny, -1.0 / h, order)  # rows run south: d(row)/dy = -1/h
    return ic, wc, ir, wr


def node_weights(spec: GridSpec, x_m, y_m, derivatives: int = 0):
    """Sparse weights of the nodes in z(x, y) and, optionally, in its derivatives.

    Parameters
    ----------
    spec : GridSpec
        The node grid (row 0 north).
    x_m, y_m : array_like
        Points (flattened).
    derivatives : {0, 1}
        0: weights of z; 1: also of dz/dx and dz/dy.

    Returns
    -------
    node : int array (m, 16)
        Flat node indices (``row * nx + col``); they may repeat at the grid
        edges (their weights then add up).
    weights : float array (m, 16), or a tuple of three with ``derivatives=1``
        ``z(x, y) = sum(weights * z_nodes.ravel()[node], axis=1)``.
    """
    x = np.atleast_1d(np.asarray(x_m, float)).ravel()
    y = np.atleast_1d(np.asarray(y_m, float)).ravel()
    ic, wc, ir, wr = _axes(spec, x, y, min(derivatives, 1))
    node = (ir[:, :, None] * spec.nx + ic[:, None, :]).reshape(len(x), 16)

    def outer(a, b):
        return (a[:, :, None] * b[:, None, :]).reshape(len(x), 16)

    if derivatives == 0:
        return node, outer(wr[0], wc[0])
    return node, (outer(wr[0], wc[0]), outer(wr[0], wc[1]), outer(wr[1], wc[0]))


def interface_values(z_nodes, spec: GridSpec, x_m, y_m, derivatives: int = 0, surface=None):
    """Evaluate the Catmull-Rom surface through the nodes and its derivatives at points.

    Parameters
    ----------
    z_nodes : array (ny, nx) or (k, ny, nx)
        Node elevations (m), row 0 north; with a leading axis, a stack of k surfaces.
    spec : GridSpec
        The node grid.
    x_m, y_m : array_like
        Points (broadcast to one shape).
    derivatives : {0, 1, 2}
        0: z; 1: ``(z, z_x, z_y)``; 2: ``(z, z_x, z_y, z_xx, z_xy, z_yy)``
        (derivatives in m/m and 1/m, x east, y north).
    surface : int array, optional
        With a stack, the surface of each point (broadcast with the points);
        required then.

    Returns
    -------
    array or tuple of arrays
        Shape of the broadcast points.

    Examples
    --------
    The surface passes through its nodes and reproduces a plane exactly
    (here z = 100 + 0.1 x - 0.2 y):

    >>> from rockhead.core.grid import GridSpec
    >>> g = GridSpec(x0=0.0, y0=20.0, cell_size_m=10.0, nx=4, ny=3)
    >>> X, Y = g.coords()
    >>> z = 100.0 + 0.1 * X - 0.2 * Y
    >>> [round(float(v), 9) for v in interface_values(z, g, 15.0, 7.0, derivatives=1)]
    [100.1, 0.1, -0.2]
    """
    z = np.asarray(z_nodes, float)
    if z.shape[-2:] != spec.shape or z.ndim not in (2, 3):
        raise InversionError(f"node elevations have shape {z.shape}; the node grid is {spec.shape} (ny, nx)")
    if z.ndim == 3 and surface is None:
        raise InversionError("a stack of surfaces needs the surface index of every point")
    x, y = np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float))
    shape = x.shape
    ic, wc, ir, wr = _axes(spec, x.ravel(), y.ravel(), derivatives)
    # the 4 x 4 node patch of every point, gathered by flat index: (m, 4 rows, 4 cols)
    base = ir * spec.nx
    if z.ndim == 3:
        k = np.broadcast_to(np.asarray(surface, np.int64), shape).ravel()
        base += (k * (spec.nx * spec.ny))[:, None]
    patch = np.take(z.ravel(), base[:, :, None] + ic[:, None, :])
    # contract the columns with the value, slope and curvature weights, then the rows
    cols = [np.einsum("mrc,mc->mr", patch, w) for w in wc]

    def row(a, j):
        return np.einsum("mr,mr->m", a, cols[j]).reshape(shape)

    if derivatives == 0:
        return row(wr[0], 0)
    out = [row(wr[0], 0), row(wr[0], 1), row(wr[1], 0)]
    if derivatives >= 2:
        out += [row(wr[0], 2), row(wr[1], 1), row(wr[2], 0)]
    return tuple(out)


def hull_cells(spec: GridSpec, xy) -> np.ndarray:
    """Output cells inside the convex hull of the points (midpoints), or within one cell of a point."""
    from scipy.spatial import ConvexHull, QhullError, cKDTree

    X, Y = spec.coords()
    cells = np.column_stack([X.ravel(), Y.ravel()])
    inside = np.zeros(cells.shape[0], bool)
    pts = np.unique(np.round(xy, 3), axis=0)
    if len(pts) >= 3:
        try:
            eq = ConvexHull(pts).equations  # outward normals and offsets: n . p + d <= 0 inside
            inside = np.all(cells @ eq[:, :2].T + eq[:, 2] <= 1e-9 * spec.cell_size_m, axis=1)
        except QhullError:  # collinear points: a single straight line
            pass
    d, _ = cKDTree(pts).query(cells, k=1)
    inside |= d <= spec.cell_size_m
    return inside.reshape(spec.shape)
