"""Forward model: reflection times through a layered overburden by Fermat's principle.

The model (:class:`LayeredModel`) is a stack of interfaces, top down, each
given by its node elevations on one north-up :class:`~rockhead.core.grid.GridSpec`
(Catmull-Rom surfaces, :mod:`.nodes`), and one linear velocity field per layer
(:mod:`.velocity`): layer 0 lies between the ground and interface 0, layer j
between interfaces j-1 and j.

A pick of reflector k (interface k, 0-based) travels from the source S down
through interfaces 0..k-1, reflects at interface k and comes back up to the
receiver R: 2k + 1 points on interfaces, 2k + 2 legs. Each leg is the exact
circular ray of its layer's linear field (:func:`~.velocity.leg_times`). The
points' horizontal positions make the total time stationary (Fermat's
principle); at a transmitting interface stationarity *is* Snell's law, at
the reflecting one it is the law of reflection:

.. math::

    T(\\mathbf X) = \\sum_{s=0}^{2k+1} t_s(\\mathbf E_s, \\mathbf E_{s+1}),
    \\qquad \\mathbf E = (S, P_0, \\dots, P_{2k}, R),
    \\qquad P_p = (x_p, y_p, z_{i(p)}(x_p, y_p)),
    \\qquad \\nabla_{\\mathbf X} T = 0.

All paths of all picks are solved at once by damped Newton iterations on
their (x, y): the Hessian of each path is assembled from the legs' exact
second derivatives and the interfaces' curvature, its eigenvalues are kept
above a floor (so each step descends), the step is capped at one node
spacing and Armijo backtracking lowers T. Starts are the flat-layer Snell
paths at the source-receiver midpoint (the ray parameter from a 1-D root
solve, [Sheriff & Geldart 1995, ch. 4]) or the previous model's points.

Sensitivities at the stationary path (the path may be held fixed to first
order, [Bishop et al. 1985]):

* a vertical shift of interface i at a path point P: :math:`\\partial T/\\partial z_P`
  = the z-component of the summed leg gradients at P; for constant layers
  this is :math:`(P - A)_z / (|P - A| v_{above}) - (B - P)_z / (|B - P| v_{below})`
  at a transmission and :math:`((P - S)_z/|P - S| + (P - R)_z/|P - R|)/V` at
  the reflection point (A, B the neighbouring path points);
* the velocity parameters: the legs' own derivatives (:func:`~.velocity.leg_times`),
  summed over the legs in each layer.

References
----------
[Bishop et al. 1985] Bishop, T. N., Bube, K. P., Cutler, R. T., Langan, R. T.,
    Love, P. L., Resnick, J. R., Shuey, R. T., Spindler, D. A. & Wyld, H. W.
    (1985). Tomographic determination of velocity and depth in laterally
    varying media. Geophysics 50(6), 903-923.
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4.
[Golub & Van Loan 2013] Golub, G. H. & Van Loan, C. F. (2013). Matrix
    Computations, 4th ed. Johns Hopkins University Press.
[Kelley 1995] Kelley, C. T. (1995). Iterative Methods for Linear and Nonlinear
    Equations. SIAM, Philadelphia (the chord method).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InversionError
from ..grid import GridSpec
from .nodes import check_node_grid, interface_values, within_nodes
from .velocity import LayerVelocity, leg_time, leg_times, leg_times_on_surfaces, leg_turns

__all__ = ["LayeredModel", "LayeredPaths", "path_layout", "trace_reflections"]

#: Why a pick is not modelled (``LayeredPaths.status``): 0 = modelled.
STATUS_TEXT = {
    0: "",
    1: "a path point leaves the node grid",
    2: "a ray turns back inside its layer (diving wave, no reflection)",
    3: "interfaces out of order or velocity not positive along the path",
    4: "the stationary path did not converge",
}


@dataclass(frozen=True)
class LayeredModel:
    """Interfaces and layer velocities of a layered overburden.

    Attributes
    ----------
    spec : GridSpec
        Node grid of the interfaces (row 0 north).
    elevation_m : array (K, ny, nx)
        Node elevations of the K interfaces, top down (m).
    theta : array (K, 4)
        Velocity parameters (v0, gx, gy, gz) of each layer (m/s, (m/s)/m);
        layer j lies above interface j.
    centre_m : array (K, 3)
        Reference point of each layer's field (m).
    names : tuple of str
        Reflector label of each interface.
    """

    spec: GridSpec
    elevation_m: np.ndarray
    theta: np.ndarray
    centre_m: np.ndarray
    names: tuple = ()

    def __post_init__(self):
        check_node_grid(self.spec)
        z = np.asarray(self.elevation_m, float)
        if z.ndim == 2:
            z = z[None]
        if z.ndim != 3 or z.shape[1:] != self.spec.shape:
            raise InversionError(
                f"interface elevations have shape {np.shape(self.elevation_m)}; expected (K, {self.spec.ny}, "
                f"{self.spec.nx}) on the node grid"
            )
        k = z.shape[0]
        th = np.asarray(self.theta, float).reshape(k, 4)
        c = np.asarray(self.centre_m, float).reshape(k, 3)
        object.__setattr__(self, "elevation_m", z)
        object.__setattr__(self, "theta", th)
        object.__setattr__(self, "centre_m", c)
        names = tuple(str(n) for n in self.names) or tuple(str(i) for i in range(k))
        if len(names) != k:
            raise InversionError(f"{len(names)} reflector names for {k} interfaces")
        object.__setattr__(self, "names", names)

    @property
    def n_interfaces(self) -> int:
        """Number of interfaces (layers below the ground)."""
        return self.elevation_m.shape[0]

    def velocity(self, layer: int, complexity: str = "full") -> LayerVelocity:
        """The :class:`~.velocity.LayerVelocity` of one layer."""
        th = self.theta[layer]
        return LayerVelocity(float(th[0]), tuple(float(v) for v in th[1:]), tuple(self.centre_m[layer]), complexity)


@dataclass(frozen=True)
class LayeredPaths:
    """Stationary reflection paths of source-receiver pairs.

    Points are padded to the longest path (2K - 1 points); ``n_points`` says
    how many each pick uses (2k + 1 for reflector k).

    Attributes
    ----------
    time_s : (n,) two-way time.
    point_xyz : (n, M, 3) path points in order (down, reflection, up); NaN padding.
    surface : (n, M) interface index of each point (-1 padding).
    n_points : (n,) points used.
    dt_dz_s_m : (n, M) sensitivity of the time to a vertical shift of the
        interface at each point.
    dt_dtheta : (n, K, 4) sensitivity to each layer's (v0, gx, gy, gz).
    status : (n,) 0 where modelled, else a key of :data:`STATUS_TEXT`.
    iterations : Newton iterations of the slowest group.
    """

    time_s: np.ndarray
    point_xyz: np.ndarray
    surface: np.ndarray
    n_points: np.ndarray
    dt_dz_s_m: np.ndarray
    dt_dtheta: np.ndarray
    status: np.ndarray
    iterations: int

    @property
    def valid(self) -> np.ndarray:
        """True for the picks that were modelled (status 0)."""
        return self.status == 0

    @property
    def reflection_xyz(self) -> np.ndarray:
        """(n, 3) reflection points (the middle point of each path)."""
        mid = (self.n_points - 1) // 2
        return self.point_xyz[np.arange(len(mid)), mid]


def path_layout(k: int):
    """Interface of each point and layer of each leg of a reflection off interface ``k``.

    >>> path_layout(1)
    (array([0, 1, 0]), array([0, 1, 1, 0]))
    """
    iface = np.r_[np.arange(k + 1), np.arange(k - 1, -1, -1)].astype(np.int64)
    layer = np.r_[np.arange(k + 1), np.arange(k, -1, -1)].astype(np.int64)
    return iface, layer


def _points(model, X, iface, derivatives):
    """Path points (n, m, 3) on their interfaces and, optionally, the slopes and curvatures."""
    vals = interface_values(
        model.elevation_m,
        model.spec,
        X[..., 0],
        X[..., 1],
        derivatives=derivatives,
        surface=np.broadcast_to(iface, X.shape[:-1]),
    )
    z = vals if derivatives == 0 else vals[0]
    P = np.concatenate([X, z[..., None]], axis=-1)
    return P, vals


def _legs(model, S, R, P, layer):
    E = np.concatenate([S[:, None, :], P, R[:, None, :]], axis=1)
    th = model.theta[layer][None]
    c = model.centre_m[layer][None]
    return E[:, :-1], E[:, 1:], th, c


def _total_time(model, S, R, X, iface, layer):
    P, _ = _points(model, X, iface, 0)
    A, B, th, c = _legs(model, S, R, P, layer)
    return np.sum(leg_time(A, B, th, c), axis=1)


def _turning(A, B, th, c):
    """True for paths (rows) with a leg whose arc turns inside its layer."""
    n, nl, _ = A.shape
    turn = leg_turns(
        A.reshape(-1, 3),
        B.reshape(-1, 3),
        np.broadcast_to(th, (n, nl, 4)).reshape(-1, 4),
        np.broadcast_to(c, (n, nl, 3)).reshape(-1, 3),
    )
    return np.any(turn.reshape(n, nl), axis=1)


def _flat_start(model, S, R, k):
    """Flat-layer Snell path at the midpoint: horizontal positions (n, 2k + 1, 2)."""
    n = len(S)
    M = 0.5 * (S[:, :2] + R[:, :2])
    d = R[:, :2] - S[:, :2]
    X = np.linalg.norm(d, axis=1)
    u = np.where(X[:, None] > 1e-9, d / np.maximum(X, 1e-300)[:, None], 0.0)
    top = 0.5 * (S[:, 2] + R[:, 2])
    zi = interface_values(
        model.elevation_m,
        model.spec,
        np.repeat(M[:, 0][:, None], k + 1, 1),
        np.repeat(M[:, 1][:, None], k + 1, 1),
        surface=np.broadcast_to(np.arange(k + 1), (n, k + 1)),
    )
    upper = np.concatenate([top[:, None], zi[:, :-1]], axis=1)
    h = np.maximum(upper - zi, 0.05)  # (n, k + 1) layer thicknesses under the midpoint
    mid_z = 0.5 * (upper + zi)
    th = model.theta[: k + 1]
    c = model.centre_m[: k + 1]
    v = (
        th[None, :, 0]
        + th[None, :, 1] * (M[:, 0, None] - c[None, :, 0])
        + th[None, :, 2] * (M[:, 1, None] - c[None, :, 1])
        + th[None, :, 3] * (mid_z - c[None, :, 2])
    )
    v = np.maximum(v, 1.0)
    # x(p) = 2 sum h p v / sqrt(1 - p^2 v^2) = X: safeguarded Newton on p in [0, 1/max v)
    pmax = 1.0 / v.max(axis=1)
    lo = np.zeros(n)
    hi = pmax.copy()
    p = 0.5 * pmax * X / np.maximum(X + 2 * h.sum(axis=1), 1e-9)
    for _ in range(60):
        q = np.sqrt(np.maximum(1.0 - (p[:, None] * v) ** 2, 1e-12))
        xp = 2 * np.sum(h * p[:, None] * v / q, axis=1)
        dxp = 2 * np.sum(h * v / q**3, axis=1)
        err = xp - X
        lo = np.where(err < 0, p, lo)
        hi = np.where(err > 0, p, hi)
        p_new = p - err / dxp
        p_new = np.where((p_new <= lo) | (p_new >= hi), 0.5 * (lo + hi), p_new)
        if np.all(np.abs(err) < 1e-6):
            break
        p = p_new
    q = np.sqrt(np.maximum(1.0 - (p[:, None] * v) ** 2, 1e-12))
    step = h * p[:, None] * v / q  # horizontal run in each layer, one way
    down = np.cumsum(step, axis=1)  # distance from S of the crossing at the base of each layer
    dist = np.concatenate([down, (X[:, None] - down[:, :-1])[:, ::-1]], axis=1)
    return S[:, None, :2] + dist[..., None] * u[:, None, :]


def _inverse_2x2(a, b, d):
    """Inverse (a', b', d') of symmetric 2 x 2 matrices [[a, b], [b, d]] (entries as arrays), and the determinants."""
    det = a * d - b * b
    return d / det, -b / det, a / det, det


def _block_tridiagonal(Hd, Ho, g, shift):
    """Solve H x = g (H symmetric block-tridiagonal, 2 x 2 blocks); say where H - shift I is positive definite.

    A path's (x, y) Hessian couples each point with its neighbours only. By
    block elimination [Golub & Van Loan 2013, s. 4.5.1] the pivot blocks are
    :math:`D_0 = H_{00}`, :math:`D_p = H_{pp} - H_{p-1,p}^T D_{p-1}^{-1} H_{p-1,p}`, and
    a symmetric matrix is positive definite exactly when every pivot block is
    (Schur complements). Vectorised over the paths, 2 x 2 inverses in closed form.

    Parameters
    ----------
    Hd : array (n, m, 2, 2)
        Diagonal blocks.
    Ho : array (n, m - 1, 2, 2)
        Blocks (p, p + 1) above the diagonal.
    g : array (n, m, 2)
    shift : array (n,)

    Returns
    -------
    pd : bool array (n,)
        H - shift I is positive definite.
    x : array (n, m, 2)
        The solution (meaningful where H is positive definite).
    """
    n, m = Hd.shape[:2]

    def pivots(eps):
        pd = np.ones(n, bool)
        inv: list = []
        for p in range(m):
            a, b, d = Hd[:, p, 0, 0] - eps, Hd[:, p, 0, 1], Hd[:, p, 1, 1] - eps
            if p:
                ia, ib, id_ = inv[-1]
                O = Ho[:, p - 1]
                x00, x01 = ia * O[:, 0, 0] + ib * O[:, 1, 0], ia * O[:, 0, 1] + ib * O[:, 1, 1]
                x10, x11 = ib * O[:, 0, 0] + id_ * O[:, 1, 0], ib * O[:, 0, 1] + id_ * O[:, 1, 1]
                a = a - (O[:, 0, 0] * x00 + O[:, 1, 0] * x10)
                b = b - (O[:, 0, 0] * x01 + O[:, 1, 0] * x11)
                d = d - (O[:, 0, 1] * x01 + O[:, 1, 1] * x11)
            with np.errstate(divide="ignore", invalid="ignore"):
                ia, ib, id_, det = _inverse_2x2(a, b, d)
            pd &= (a > 0) & (det > 0)
            inv.append((ia, ib, id_))
        return pd, inv

    pd, inv = pivots(shift)
    if np.any(np.asarray(shift) != 0.0):
        _, inv = pivots(0.0)
    with np.errstate(invalid="ignore", over="ignore"):
        y = [(g[:, 0, 0], g[:, 0, 1])]
        for p in range(1, m):
            ia, ib, id_ = inv[p - 1]
            u0, u1 = ia * y[-1][0] + ib * y[-1][1], ib * y[-1][0] + id_ * y[-1][1]
            O = Ho[:, p - 1]
            y.append(
                (g[:, p, 0] - (O[:, 0, 0] * u0 + O[:, 1, 0] * u1), g[:, p, 1] - (O[:, 0, 1] * u0 + O[:, 1, 1] * u1))
            )
        x = np.empty((n, m, 2))
        for p in range(m - 1, -1, -1):
            r0, r1 = y[p]
            if p < m - 1:
                O = Ho[:, p]
                r0 = r0 - (O[:, 0, 0] * x[:, p + 1, 0] + O[:, 0, 1] * x[:, p + 1, 1])
                r1 = r1 - (O[:, 1, 0] * x[:, p + 1, 0] + O[:, 1, 1] * x[:, p + 1, 1])
            ia, ib, id_ = inv[p]
            x[:, p, 0] = ia * r0 + ib * r1
            x[:, p, 1] = ib * r0 + id_ * r1
    return pd, x


def _path_gradient(o, slope):
    """Gradient of a path's time at its points: in 3D (n, m, 3), and in their (x, y) on the surfaces (n, m, 2).

    The chain rule through P = (x, y, z(x, y)): with the slope s = (z_x, z_y),
    d/dX = d/dP_xy + s d/dP_z (the products J^T g and J^T H J of J = [[1, 0], [0, 1], s]).
    """
    gP = o["gB"][:, :-1] + o["gA"][:, 1:]
    return gP, gP[..., :2] + gP[..., 2:3] * slope


def _full_step(model, S, R, X, iface, layer):
    """Newton step of paths from their exact Hessian (spectrum lifted to a floor where needed).

    Returns ``(step (n, m, 2), newton (n,), g (n, 2m), t (n,), Hd, Ho)``: ``newton`` is True
    where the Hessian was positive definite (the step is Newton's own); ``g`` the
    gradient, ``t`` the path times, ``Hd`` and ``Ho`` the Hessian's blocks.
    """
    na, m, _ = X.shape
    P, (_, zx, zy, zxx, zxy, zyy) = _points(model, X, iface, 2)
    A, B, th, c = _legs(model, S, R, P, layer)
    slope = np.stack([zx, zy], axis=-1)  # (na, m, 2)
    fixed = np.zeros((na, 1, 2))  # the source and the receiver do not move
    o = leg_times_on_surfaces(
        A, B, th, c, np.concatenate([fixed, slope], axis=1), np.concatenate([slope, fixed], axis=1)
    )
    gP, g2 = _path_gradient(o, slope)
    curv = np.stack([np.stack([zxx, zxy], -1), np.stack([zxy, zyy], -1)], -2)
    Hd = o["HBB"][:, :-1] + o["HAA"][:, 1:] + gP[..., 2, None, None] * curv  # (na, m, 2, 2)
    Ho = o["HAB"][:, 1:-1]  # (na, m - 1, 2, 2): point p with p + 1
    D = B - A
    L = np.sqrt(D[..., 0] * D[..., 0] + D[..., 1] * D[..., 1] + D[..., 2] * D[..., 2])
    floor = 0.02 * np.mean(1.0 / (np.maximum(L, 1e-6) * np.sqrt(np.abs(o["va"] * o["vb"]))), axis=1)
    gflat = g2.reshape(na, 2 * m)
    if m == 1:  # 2 x 2: eigenvalues in closed form, shift the spectrum above the floor
        hxx, hxy, hyy = Hd[:, 0, 0, 0], Hd[:, 0, 0, 1], Hd[:, 0, 1, 1]
        half = 0.5 * (hxx + hyy)
        lam_min = half - np.sqrt(np.maximum(0.25 * (hxx - hyy) ** 2 + hxy * hxy, 0.0))
        shift = np.where(lam_min < 1e-3 * floor, floor - lam_min, 0.0)
        newton = shift == 0.0
        step = _step_2x2(hxx + shift, hxy, hyy + shift, gflat)
    else:
        # positive definite beyond the floor: the Newton step itself (quadratic convergence)
        pd, x = _block_tridiagonal(Hd, Ho, g2, 1e-3 * floor)
        step = -x
        newton = pd
        if (~pd).any():  # the others (far from a minimum): lift their spectrum to the floor
            H = np.zeros((int(np.sum(~pd)), 2 * m, 2 * m))
            for p in range(m):
                H[:, 2 * p : 2 * p + 2, 2 * p : 2 * p + 2] = Hd[~pd, p]
            for p in range(m - 1):
                H[:, 2 * p : 2 * p + 2, 2 * p + 2 : 2 * p + 4] = Ho[~pd, p]
                H[:, 2 * p + 2 : 2 * p + 4, 2 * p : 2 * p + 2] = np.swapaxes(Ho[~pd, p], -1, -2)
            lam, V = np.linalg.eigh(H)
            lam = np.maximum(lam, floor[~pd, None])
            step[~pd] = -np.einsum("nij,nj->ni", V, np.einsum("nji,nj->ni", V, gflat[~pd]) / lam).reshape(-1, m, 2)
    return step, newton, gflat, np.sum(o["t"], axis=1), Hd, Ho


def _step_2x2(hxx, hxy, hyy, g):
    """-H^-1 g of 2 x 2 Hessians [[hxx, hxy], [hxy, hyy]] (entries as arrays), as (n, 1, 2)."""
    det = hxx * hyy - hxy * hxy
    return -np.stack([(hyy * g[:, 0] - hxy * g[:, 1]) / det, (-hxy * g[:, 0] + hxx * g[:, 1]) / det], axis=-1)[
        :, None, :
    ]


def _kept_step(model, S, R, X, iface, layer, Hd, Ho):
    """Newton step of paths from a new gradient and the Hessian of an earlier point (positive definite).

    Near the solution the Hessian changes little from one iteration to the next:
    the step with the kept one is Newton's to first order in the distance moved
    since (a chord method, converging linearly at a rate of about that distance
    over the legs' length, 1e-3 to 1e-2 here, [Kelley 1995, ch. 5]),
    at half the work: slopes without curvatures, leg gradients without
    Hessians. Returns ``(step, g, t)`` as :func:`_full_step`, and the points and
    :func:`~.velocity.leg_times` of the legs (all a path's results where it stops here).
    """
    na, m, _ = X.shape
    P, (_, zx, zy) = _points(model, X, iface, 1)
    A, B, th, c = _legs(model, S, R, P, layer)
    o = leg_times(A, B, th, c, hessian=False)
    _, g2 = _path_gradient(o, np.stack([zx, zy], axis=-1))
    gflat = g2.reshape(na, 2 * m)
    if m == 1:
        step = _step_2x2(Hd[:, 0, 0, 0], Hd[:, 0, 0, 1], Hd[:, 0, 1, 1], gflat)
    else:
        _, x = _block_tridiagonal(Hd, Ho, g2, 0.0)
        step = -x
    return step, gflat, np.sum(o["t"], axis=1), (P, o)


def _newton(model, S, R, X, iface, layer, tolerance_m, max_iterations):
    """Damped Newton iterations on the path points' (x, y); returns (X, converged, iterations, results).

    A path whose last step was a full Newton step shorter than a tenth of the node
    spacing takes its next step with the Hessian kept from its last evaluation
    (:func:`_kept_step`); the others evaluate theirs (:func:`_full_step`). A kept
    Hessian's step below ``tolerance_m`` is not taken: the path stops where it was
    just evaluated (the time, stationary, changes by half the step's square times the
    Hessian over such a step: 1e-11 s at most), and ``results`` = ``(here, P, legs)``
    keeps that evaluation: ``here`` (n,) marks those paths, P (n, m, 3) their points
    and ``legs`` the arrays of :func:`~.velocity.leg_times` (valid where ``here``).
    """
    n, m, _ = X.shape
    spec = model.spec
    max_step = spec.cell_size_m
    converged = np.zeros(n, bool)
    active = np.arange(n)
    Hd_kept = np.zeros((n, m, 2, 2))
    Ho_kept = np.zeros((n, max(m - 1, 0), 2, 2))
    reuse = np.zeros(n, bool)
    last_move = np.full(n, np.inf)
    here = np.zeros(n, bool)
    P_here = np.full((n, m, 3), np.nan)
    legs_here: dict = {}
    it = 0
    for it in range(1, max_iterations + 1):
        if active.size == 0:
            it -= 1
            break
        Sa, Ra, Xa = S[active], R[active], X[active]
        na = len(active)
        step = np.empty((na, m, 2))
        newton = np.ones(na, bool)
        gflat = np.empty((na, 2 * m))
        t0 = np.empty(na)
        again = reuse[active]
        fresh = np.flatnonzero(~again)
        if fresh.size:
            step[fresh], newton[fresh], gflat[fresh], t0[fresh], Hd, Ho = _full_step(
                model, Sa[fresh], Ra[fresh], Xa[fresh], iface, layer
            )
            Hd_kept[active[fresh]] = Hd
            Ho_kept[active[fresh]] = Ho
        kept = np.flatnonzero(again)
        if kept.size:
            ids = active[kept]
            step[kept], gflat[kept], t0[kept], (P_kept, o_kept) = _kept_step(
                model, Sa[kept], Ra[kept], Xa[kept], iface, layer, Hd_kept[ids], Ho_kept[ids]
            )
        move = np.max(np.hypot(step[..., 0], step[..., 1]), axis=1)
        # a kept Hessian's step that does not halve the last one is not taken: the path evaluates its
        # own Hessian where it is, next (the chord method contracts only while the Hessian changes little)
        slow = np.zeros(na, bool)
        slow[kept] = (move[kept] >= tolerance_m) & (move[kept] > 0.5 * last_move[active[kept]])
        step[slow] = 0.0
        scale = np.minimum(1.0, max_step / np.maximum(move, 1e-300))
        step *= scale[:, None, None]
        slope = np.sum(gflat * step.reshape(na, 2 * m), axis=1)
        alpha = np.ones(na)
        # a step below a tenth of the node spacing from a positive-definite Hessian is a plain
        # Newton step near the solution: taken as it is (no line search needed)
        todo = np.flatnonzero(move * scale > 0.1 * max_step)
        for _ in range(30):  # Armijo backtracking, vectorised
            if todo.size == 0:
                break
            t1 = _total_time(model, Sa[todo], Ra[todo], Xa[todo] + alpha[todo, None, None] * step[todo], iface, layer)
            bad = t1 > t0[todo] + 1e-4 * alpha[todo] * slope[todo] + 1e-13 * t0[todo]
            if not np.any(bad):
                break
            todo = todo[bad]
            alpha[todo] *= 0.5
        X[active] = Xa + alpha[:, None, None] * step
        # converged: a step below the tolerance, or a full Newton step (positive-definite Hessian, not
        # scaled, not backtracked) below ten times it: Newton converges quadratically, so the step it
        # would take next is of the order of the square of this one over the length of the path's
        # legs (well below 1e-5 m), and the time, stationary there, is exact to rounding; this saves
        # the iteration that would only confirm it (with a kept Hessian the next step is this one
        # times the chord method's rate, below 1e-5 m too)
        full = newton & (alpha == 1.0) & (scale == 1.0)
        done = (alpha * move * scale < tolerance_m) | (full & (move < 10.0 * tolerance_m))
        reuse[active] = full & (move < 0.1 * max_step) & ~slow
        last_move[active] = move
        done &= ~slow
        if kept.size:  # a kept Hessian's step below the tolerance: stop where the path was evaluated
            stay = move[kept] < tolerance_m
            ids = active[kept[stay]]
            X[ids] = Xa[kept[stay]]
            here[ids] = True
            P_here[ids] = P_kept[stay]
            for key in ("t", "gA", "gB", "dtheta", "va", "vb"):
                if key not in legs_here:
                    legs_here[key] = np.zeros((n, *o_kept[key].shape[1:]))
                legs_here[key][ids] = o_kept[key][stay]
        converged[active[done]] = True
        active = active[~done]
        if it >= 4 and it % 2 == 0 and active.size:
            # a path whose arc turns inside its layer will be flagged anyway: stop iterating it
            P, _ = _points(model, X[active], iface, 0)
            A, B, th, c = _legs(model, S[active], R[active], P, layer)
            active = active[~_turning(A, B, th, c)]
    return X, converged, it, (here, P_here, legs_here)


def trace_reflections(
    model: LayeredModel,
    source_xyz,
    receiver_xyz,
    interface,
    start_xy=None,
    tolerance_m: float = 1e-4,
    max_iterations: int = 40,
) -> LayeredPaths:
    """Two-way reflection times and sensitivities of all picks through the layered model.

    Parameters
    ----------
    model : LayeredModel
    source_xyz, receiver_xyz : array (n, 3)
        Positions (m), above the first interface.
    interface : int array (n,)
        Index of the reflecting interface of each pick (0 = the top one).
    start_xy : array (n, M, 2), optional
        Starting horizontal positions of the path points (e.g.
        ``paths.point_xyz[..., :2]`` of a previous model, to follow the same
        branch); default: flat-layer Snell paths. NaN rows fall back to that.
    tolerance_m : float
        A step below this (m), or a full Newton step below ten times this, ends
        a path's iterations (Newton converges quadratically: the path is then
        within ~1e-6 m of stationary, and the time, stationary itself, within
        round-off).
    max_iterations : int
        Newton iterations at most.

    Returns
    -------
    LayeredPaths
    """
    S = np.atleast_2d(np.asarray(source_xyz, float))
    R = np.atleast_2d(np.asarray(receiver_xyz, float))
    k_of = np.atleast_1d(np.asarray(interface, np.int64))
    n = len(S)
    K = model.n_interfaces
    if S.shape != (n, 3) or R.shape != (n, 3) or k_of.shape != (n,):
        raise InversionError(
            f"source_xyz {S.shape}, receiver_xyz {R.shape} and interface {k_of.shape} must be (n, 3), (n, 3), (n,)"
        )
    if n and (k_of.min() < 0 or k_of.max() >= K):
        raise InversionError(f"interface index {int(k_of.max())} out of range; the model has {K} interfaces")
    M = 2 * K - 1
    time = np.full(n, np.nan)
    pts = np.full((n, M, 3), np.nan)
    surf = np.full((n, M), -1, np.int64)
    npts = 2 * k_of + 1
    dtdz = np.full((n, M), np.nan)
    dth = np.zeros((n, K, 4))
    status = np.zeros(n, np.int64)
    iters = 0
    for k in range(K):
        sel = np.flatnonzero(k_of == k)
        if sel.size == 0:
            continue
        iface, layer = path_layout(k)
        m = 2 * k + 1
        Sg, Rg = S[sel], R[sel]
        X = np.empty((sel.size, m, 2))
        ok = np.zeros(sel.size, bool)
        if start_xy is not None:
            st = np.asarray(start_xy, float)[sel, :m]
            ok = np.all(np.isfinite(st), axis=(1, 2))
            X[ok] = st[ok]
        if not ok.all():
            X[~ok] = _flat_start(model, Sg[~ok], Rg[~ok], k)
        X, conv, it, (here, P, o) = _newton(model, Sg, Rg, X, iface, layer, tolerance_m, max_iterations)
        iters = max(iters, it)
        rest = np.flatnonzero(~here)  # the paths not evaluated where they stopped
        if rest.size:
            P[rest], _ = _points(model, X[rest], iface, 0)
            A, B, th, c = _legs(model, Sg[rest], Rg[rest], P[rest], layer)
            o_rest = leg_times(A, B, th, c, hessian=False)
            for key, arr in o_rest.items():
                if key not in o:
                    o[key] = np.zeros((len(X), *arr.shape[1:]))
                o[key][rest] = arr
        A, B, th, c = _legs(model, Sg, Rg, P, layer)
        time[sel] = np.sum(o["t"], axis=1)
        pts[sel, :m] = P
        surf[sel, :m] = iface
        dtdz[sel, :m] = o["gB"][:, :-1, 2] + o["gA"][:, 1:, 2]
        for lay in range(k + 1):
            dth[sel, lay] = np.sum(o["dtheta"][:, layer == lay], axis=1)
        # legs must go down to the reflection and up after it, with positive velocities
        dz = B[..., 2] - A[..., 2]
        sign = np.where(np.arange(m + 1) <= k, -1.0, 1.0)
        bad_order = np.any(dz * sign[None] <= 0, axis=1) | np.any((o["va"] <= 0) | (o["vb"] <= 0), axis=1)
        st = np.where(~conv, 4, 0)
        st = np.where(bad_order, 3, st)
        st = np.where(_turning(A, B, th, c), 2, st)
        st = np.where(np.all(within_nodes(model.spec, X[..., 0], X[..., 1]), axis=1), st, 1)
        status[sel] = st
    return LayeredPaths(time, pts, surf, npts, dtdz, dth, status, iters)
