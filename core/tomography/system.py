"""The joint estimate's equations: all picks and boreholes, all interfaces, all layer velocities.

Unknowns (:class:`Layout`): for each interface s its plane trend
:math:`\\beta_s` (3 coefficients) and its relief :math:`u_s` at the nodes, so
that the node elevations are :math:`z_s = T\\beta_s + u_s`
(:math:`T = [1, (x - x_c)/100, (y - y_c)/100]`, slopes in m per 100 m; the
Catmull-Rom surfaces reproduce planes, so the trend is exact between nodes
too), and the free velocity parameters :math:`\\theta` of the layers.

Objective (Gauss-Newton on the negative log posterior, [Tarantola 2005, ch. 3]):

.. math::

    \\Phi = \\sum_i w_i \\frac{r_i^2}{\\sigma_i^2}
          + \\sum_s u_s^T Q_s u_s
          + \\sum_s \\|(\\beta_s - \\beta_{s,0}) / \\sigma_{\\beta,s}\\|^2
          + \\|(\\theta - \\theta_0)/\\sigma_\\theta\\|^2
          + \\sum_b \\frac{(z_{s(b)}(x_b, y_b) - e_b)^2}{\\sigma_b^2},

with pick residuals :math:`r_i` = observed - modelled two-way time
(:mod:`.raypath`), Huber IRLS weights :math:`w_i` [Huber 1964; Holland &
Welsch 1977] (picks beyond ``reject_sigma`` robust standard deviations get
weight 0 and are flagged), the Matern GMRF precision :math:`Q_s` of each
interface (:mod:`.prior`), priors on the trends from a robust plane fit of
the start points and weak ones on the velocities, and boreholes :math:`e_b` (elevations of an interface, with
their errors) as data. Each step solves the normal equations by a banded Cholesky
factor of the node block and the Schur complement of the others
(:mod:`.factor`); the step is halved until :math:`\\Phi` falls and a
Levenberg-Marquardt damping of the step grows after a halving and shrinks
after full steps [Marquardt 1963] (the gradient is undamped, so the solution
is that of Gauss-Newton).

Posterior (Laplace approximation at the optimum, [Tarantola 2005, s. 3.2.2]):
:math:`C = A^{-1}`, :math:`A = J^T W J + \\text{priors}`. With the node block
first and the few trend and velocity parameters last,
:math:`A = [[A_{uu}, A_{us}], [A_{su}, A_{ss}]]`, the variance of a linear
functional :math:`a = (a_u, a_s)` (a cell's elevation) is

.. math::

    a^T C a = a_u^T A_{uu}^{-1} a_u + d^T S^{-1} d, \\qquad
    d = U^T a_u - a_s,\\ U = A_{uu}^{-1} A_{us},\\ S = A_{ss} - A_{us}^T U,

exactly (block inverse); :math:`A_{uu}^{-1}` entries among the 16 nodes of
a cell come from the banded Takahashi recurrence (:mod:`.covariance`), so
the standard deviation includes the trends' and the velocities' uncertainty.

References
----------
[Tarantola 2005] Tarantola, A. (2005). Inverse Problem Theory and Methods for
    Model Parameter Estimation. SIAM, Philadelphia.
[Huber 1964] Huber, P. J. (1964). Robust estimation of a location parameter.
    Annals of Mathematical Statistics 35(1), 73-101.
[Holland & Welsch 1977] Holland, P. W. & Welsch, R. E. (1977). Robust
    regression using iteratively reweighted least-squares. Communications in
    Statistics - Theory and Methods 6(9), 813-827.
[Marquardt 1963] Marquardt, D. W. (1963). An algorithm for least-squares
    estimation of nonlinear parameters. Journal of the Society for Industrial
    and Applied Mathematics 11(2), 431-441.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional

import numpy as np
import scipy.sparse as sp

from ..errors import InversionError
from ..grid import GridSpec
from ..progress import check_cancel
from .covariance import BandedCholesky
from .factor import NormalFactor, node_band_order
from .nodes import node_weights
from .raypath import LayeredModel, LayeredPaths, trace_reflections

__all__ = [
    "JointData",
    "JointState",
    "Layout",
    "Posterior",
    "borehole_matrix",
    "gauss_newton",
    "jacobian",
    "jacobian_blocks",
    "normal_blocks",
    "normal_matrix",
    "parameters",
    "posterior",
    "prior_mean",
    "reduced_chi2",
    "small_prior_precision",
    "trend_basis",
]

TREND_SCALE_M = 100.0  # trend slopes are per 100 m


def trend_basis(x_m, y_m, centre_xy):
    """Rows [1, (x - xc)/100, (y - yc)/100] of the plane trend (m per 100 m slopes)."""
    x = np.asarray(x_m, float).ravel()
    y = np.asarray(y_m, float).ravel()
    return np.column_stack([np.ones_like(x), (x - centre_xy[0]) / TREND_SCALE_M, (y - centre_xy[1]) / TREND_SCALE_M])


@dataclass(frozen=True)
class Layout:
    """Where each unknown lives in the parameter vector.

    ``[u_0 (nn) ... u_{K-1} (nn) | beta_0 (3) ... beta_{K-1} (3) | theta[free]]``
    """

    spec: GridSpec  # node grid
    n_interfaces: int
    free: np.ndarray  # (K, 4) bool: free velocity parameters
    centre_xy: np.ndarray  # trend centre (2,)
    velocity_centre_m: np.ndarray  # (K, 3) reference points of the layer velocities

    @property
    def nn(self) -> int:
        """Nodes per interface."""
        return self.spec.nx * self.spec.ny

    @property
    def n_nodes(self) -> int:
        """Node unknowns of all interfaces."""
        return self.n_interfaces * self.nn

    @property
    def n_small(self) -> int:
        """Trend and free velocity unknowns."""
        return 3 * self.n_interfaces + int(self.free.sum())

    @property
    def n_params(self) -> int:
        """All unknowns."""
        return self.n_nodes + self.n_small

    def band_order(self) -> np.ndarray:
        """Node ordering that keeps the node block banded: interfaces interleaved, short side fastest."""
        return node_band_order(self.spec, self.n_interfaces)


@dataclass(frozen=True)
class JointData:
    """Picks, boreholes and priors of the joint estimate."""

    source_xyz: np.ndarray
    receiver_xyz: np.ndarray
    time_s: np.ndarray
    sigma_s: np.ndarray
    interface: np.ndarray  # (n,) index of the reflecting interface
    Q: tuple  # per interface sparse precision (nn, nn)
    beta0: np.ndarray  # (K, 3)
    sigma_beta: np.ndarray  # (K, 3) or (3,)
    theta0: np.ndarray  # (K, 4)
    sigma_theta: np.ndarray  # (K, 4)
    bh_xy: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    bh_elevation_m: np.ndarray = field(default_factory=lambda: np.zeros(0))
    bh_sigma_m: np.ndarray = field(default_factory=lambda: np.zeros(0))
    bh_interface: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))


@dataclass
class JointState:
    """Current model and its forward solution."""

    u: np.ndarray  # (K, nn)
    beta: np.ndarray  # (K, 3)
    theta: np.ndarray  # (K, 4)
    paths: Optional[LayeredPaths] = None
    residual_s: Optional[np.ndarray] = None
    weight: Optional[np.ndarray] = None
    rejected: Optional[np.ndarray] = None

    def copy(self):
        """A copy whose arrays can be changed without touching this state."""
        return JointState(
            self.u.copy(), self.beta.copy(), self.theta.copy(), self.paths, self.residual_s, self.weight, self.rejected
        )


def node_elevations(layout: Layout, u, beta):
    """Node elevations (K, ny, nx): trend plus relief."""
    X, Y = layout.spec.coords()
    T = trend_basis(X, Y, layout.centre_xy)
    return (beta @ T.T + u).reshape((layout.n_interfaces, *layout.spec.shape))


def model_of(layout: Layout, state: JointState) -> LayeredModel:
    return LayeredModel(
        layout.spec, node_elevations(layout, state.u, state.beta), state.theta, layout.velocity_centre_m
    )


def forward(layout, data, state, start=None):
    """Trace all picks through the state's model; fills paths and residuals (NaN where not modelled)."""
    paths = trace_reflections(
        model_of(layout, state), data.source_xyz, data.receiver_xyz, data.interface, start_xy=start
    )
    state.paths = paths
    state.residual_s = np.where(paths.valid, data.time_s - paths.time_s, np.nan)
    return state


def robust_weights(u, robust_scale, reject_sigma):
    """Huber weights of normalised residuals with a MAD scale (>= 1); rejects beyond ``reject_sigma``."""
    mad = 1.4826 * np.median(np.abs(u)) if u.size else 1.0
    s = max(1.0, float(mad))
    a = np.abs(u) / s
    w = np.where(a <= robust_scale, 1.0, robust_scale / np.maximum(a, 1e-300))
    rejected = a > reject_sigma
    w[rejected] = 0.0
    return w, rejected


def reweight(data, state, robust_scale, reject_sigma, sigma_scale=1.0):
    r = state.residual_s
    ok = np.isfinite(r)
    w = np.zeros(r.size)
    rej = np.zeros(r.size, bool)
    if ok.any():
        w[ok], rej[ok] = robust_weights(r[ok] / (data.sigma_s[ok] * sigma_scale), robust_scale, reject_sigma)
    state.weight, state.rejected = w, rej
    return state


def borehole_matrix(layout, data):
    """Sparse rows (elevation of its interface at each borehole) over the parameters."""
    nb = data.bh_elevation_m.size
    if nb == 0:
        return None
    idx, w = node_weights(layout.spec, data.bh_xy[:, 0], data.bh_xy[:, 1])
    s = data.bh_interface
    T = trend_basis(data.bh_xy[:, 0], data.bh_xy[:, 1], layout.centre_xy)
    rows = np.concatenate([np.repeat(np.arange(nb), 16), np.repeat(np.arange(nb), 3)])
    cols = np.concatenate(
        [(s[:, None] * layout.nn + idx).ravel(), (layout.n_nodes + 3 * s[:, None] + np.arange(3)[None, :]).ravel()]
    )
    vals = np.concatenate([w.ravel(), T.ravel()])
    return sp.csr_matrix((vals, (rows, cols)), shape=(nb, layout.n_params))


def jacobian_blocks(layout, data, state, sigma_scale=1.0):
    """Weighted Jacobian rows sqrt(w)/sigma dt/dm of the picks with positive weight, by blocks of columns.

    Returns
    -------
    Jn : sparse CSR (m, n_nodes)
        Node columns: each path point's 16 Catmull-Rom weights times its
        dt/dz, summed where a node serves two points of a path or repeats at
        the grid's edges.
    Js : array (m, n_small)
        Trend and free velocity columns (few, and in most rows).
    use : int array (m,)
        The picks of the rows.
    sw : array (m,)
        Their weights sqrt(w)/sigma (1/s).
    """
    p = state.paths
    use = np.flatnonzero(state.weight > 0)
    m = use.size
    sw = np.sqrt(state.weight[use]) / (data.sigma_s[use] * sigma_scale)
    surf = p.surface[use]
    row, j = np.nonzero(surf >= 0)  # row by row, so the node entries come in CSR order
    pick = use[row]
    s = surf[row, j]
    xy = p.point_xyz[pick, j, :2]
    dz = p.dt_dz_s_m[pick, j] * sw[row]
    idx, w = node_weights(layout.spec, xy[:, 0], xy[:, 1])
    indptr = np.zeros(m + 1, np.int64)
    np.cumsum(16 * np.bincount(row, minlength=m), out=indptr[1:])
    Jn = sp.csr_matrix(
        ((w * dz[:, None]).ravel(), (s[:, None] * layout.nn + idx).ravel(), indptr), shape=(m, layout.n_nodes)
    )
    Jn.sum_duplicates()  # a node once per row: fewer products in J^T J
    ns = layout.n_small
    T = trend_basis(xy[:, 0], xy[:, 1], layout.centre_xy) * dz[:, None]
    flat = (row * ns + 3 * s)[:, None] + np.arange(3)[None, :]
    Js = np.bincount(flat.ravel(), T.ravel(), minlength=m * ns).reshape(m, ns)
    fl, fj = np.nonzero(layout.free)
    Js[:, 3 * layout.n_interfaces :] = p.dt_dtheta[use][:, fl, fj] * sw[:, None]
    return Jn, Js, use, sw


def jacobian(layout, data, state, sigma_scale=1.0):
    """Weighted Jacobian rows sqrt(w)/sigma dt/dm of the picks with positive weight, and their indices."""
    Jn, Js, use, sw = jacobian_blocks(layout, data, state, sigma_scale)
    J = sp.hstack([Jn, sp.csr_matrix(Js)], format="csr")
    J.sum_duplicates()
    return J, use, sw


def normal_blocks(Jn, Js):
    """:math:`J^T J` (CSR) from the blocks of :func:`jacobian_blocks`.

    The node block is a sparse product, the node-other block a sparse-dense
    product and the other block a dense one; the dense columns apart, a
    sparse product does not pair each of them with every other entry of
    every row.
    """
    ns = sp.csr_matrix(Jn.T @ Js)
    return sp.bmat([[Jn.T @ Jn, ns], [ns.T, sp.csr_matrix(Js.T @ Js)]], format="csr")


def normal_matrix(J, n_nodes: int):
    """:math:`J^T J` (CSR) with the few dense trend and velocity columns (those from ``n_nodes`` on) apart.

    Every pick's row has up to 48 node weights and a dozen trend and velocity
    derivatives; a sparse product would pair each of those columns with every
    other one of every row. The node block is a sparse product, the node-small
    block a sparse-dense product and the small block a dense one: the same
    matrix to rounding, in about 70 % of the time at 100,000 picks.
    """
    J = sp.csr_matrix(J)
    return normal_blocks(J[:, :n_nodes], J[:, n_nodes:].toarray())


def small_prior_precision(layout, data):
    """Diagonal prior precision of the trends and the free velocity parameters."""
    K = layout.n_interfaces
    beta_prec = (1.0 / np.broadcast_to(data.sigma_beta, (K, 3)) ** 2).ravel()
    theta_prec = (1.0 / data.sigma_theta**2)[layout.free]
    return sp.diags(np.concatenate([beta_prec, theta_prec]))


def _prior_blocks(layout, data):
    return sp.block_diag([*data.Q, small_prior_precision(layout, data)], format="csr")


def parameters(layout, state):
    """The state as one parameter vector (see :class:`Layout`)."""
    return np.concatenate([state.u.ravel(), state.beta.ravel(), state.theta[layout.free]])


def prior_mean(layout, data):
    """Prior mean of the parameter vector."""
    return np.concatenate([np.zeros(layout.n_nodes), data.beta0.ravel(), data.theta0[layout.free]])


def _unpack(layout, m, state):
    K = layout.n_interfaces
    new = state.copy()
    new.u = m[: layout.n_nodes].reshape(K, layout.nn)
    new.beta = m[layout.n_nodes : layout.n_nodes + 3 * K].reshape(K, 3)
    th = state.theta.copy()
    th[layout.free] = m[layout.n_nodes + 3 * K :]
    new.theta = th
    return new


def objective(layout, data, state, P, B, sigma_scale=1.0, residual=None):
    r = state.residual_s if residual is None else residual
    m = np.isfinite(r) & (state.weight > 0)
    out = float(np.sum(state.weight[m] * (r[m] / (data.sigma_s[m] * sigma_scale)) ** 2))
    dm = parameters(layout, state) - prior_mean(layout, data)
    out += float(dm @ (P @ dm))
    if B is not None:
        out += float(np.sum(((B @ parameters(layout, state) - data.bh_elevation_m) / data.bh_sigma_m) ** 2))
    return out


@dataclass
class Iterations:
    """What the Gauss-Newton iterations did."""

    count: int = 0
    converged: bool = False
    misfit_history: list = field(default_factory=list)  # rms residual / sigma of the accepted picks
    objective_history: list = field(default_factory=list)
    change_history: list = field(default_factory=list)  # largest change of a constrained node (m)


def rms_misfit(data, state, sigma_scale=1.0):
    r = state.residual_s
    m = np.isfinite(r) & ~state.rejected
    return float(np.sqrt(np.mean((r[m] / (data.sigma_s[m] * sigma_scale)) ** 2))) if m.any() else float("nan")


def gauss_newton(
    layout,
    data,
    state,
    robust_scale=1.5,
    reject_sigma=4.0,
    max_iterations=12,
    tolerance_m=0.02,
    sigma_scale=1.0,
    progress=None,
    label="joint estimate",
):
    """Iterate Gauss-Newton / Levenberg-Marquardt from ``state`` (forward already done); returns (state, Iterations)."""
    P = _prior_blocks(layout, data)
    B = borehole_matrix(layout, data)
    BtB = None if B is None else (B.T @ sp.diags(1.0 / data.bh_sigma_m**2) @ B).tocsr()
    mean0 = prior_mean(layout, data)
    # the normal matrix by blocks (nodes, node-other, other), its constant parts split once
    n_nodes = layout.n_nodes
    Cuu, Cus, Css = P[:n_nodes, :n_nodes], np.zeros((n_nodes, layout.n_small)), P[n_nodes:, n_nodes:].toarray()
    if BtB is not None:
        Cuu = Cuu + BtB[:n_nodes, :n_nodes]
        Cus = Cus + BtB[:n_nodes, n_nodes:].toarray()
        Css = Css + BtB[n_nodes:, n_nodes:].toarray()
    reweight(data, state, robust_scale, reject_sigma, sigma_scale)
    hist = Iterations()
    hist.misfit_history.append(rms_misfit(data, state, sigma_scale))
    hist.objective_history.append(objective(layout, data, state, P, B, sigma_scale))
    mu = 0.0
    nn_all = layout.n_nodes
    K = layout.n_interfaces
    vfree = layout.free.copy()
    v0_cols = np.flatnonzero(np.nonzero(vfree)[1] == 0)  # positions of the v0 parameters among the free ones
    for it in range(1, max_iterations + 1):
        check_cancel(progress)
        Jn, Js, use, sw = jacobian_blocks(layout, data, state, sigma_scale)
        m_cur = parameters(layout, state)
        r = state.residual_s[use] * sw
        rhs = np.concatenate([Jn.T @ r, Js.T @ r]) - P @ (m_cur - mean0)
        if B is not None:
            rhs = rhs + B.T @ ((data.bh_elevation_m - B @ m_cur) / data.bh_sigma_m**2)
        try:
            fac = NormalFactor.of_blocks(Jn.T @ Jn + Cuu, Jn.T @ Js + Cus, Js.T @ Js + Css, layout, damping=mu)
            delta = fac.solve(rhs)
        except np.linalg.LinAlgError as err:
            raise InversionError(
                f"the joint normal equations are singular ({err}); the picks and priors do not determine the model"
            ) from err
        # keep each velocity step within a factor 1.5 (a guard against wild first steps)
        th_base = nn_all + 3 * K
        v0_now = m_cur[th_base + v0_cols]
        dv = delta[th_base + v0_cols]
        lim = np.max(np.abs(dv) / (0.5 * v0_now)) if dv.size else 0.0
        if lim > 1.0:
            delta = delta / lim
        obj_old = objective(layout, data, state, P, B, sigma_scale)
        alpha = 1.0
        start = state.paths.point_xyz[..., :2]
        for _ in range(6):
            trial = _unpack(layout, m_cur + alpha * delta, state)
            trial = forward(layout, data, trial, start=start)
            trial.weight, trial.rejected = state.weight, state.rejected
            r_cmp = np.where(np.isfinite(trial.residual_s), trial.residual_s, state.residual_s)
            obj_new = objective(layout, data, trial, P, B, sigma_scale, residual=r_cmp)
            if obj_new <= obj_old * (1 + 1e-12):
                break
            alpha *= 0.5
        mu = max(10.0 * mu, 0.1) if alpha < 1.0 else (mu / 3.0 if mu > 0.01 else 0.0)
        touched = np.zeros(layout.n_params, bool)
        touched[Jn.indices] = True
        if B is not None:
            touched[np.unique(B.indices)] = True
        gx, gy = layout.spec.coords()
        dzn = (
            delta[:nn_all].reshape(K, layout.nn)
            + delta[nn_all : nn_all + 3 * K].reshape(K, 3) @ trend_basis(gx, gy, layout.centre_xy).T
        )
        dz_max = float(np.max(np.abs(dzn.ravel()[touched[:nn_all]]))) if touched[:nn_all].any() else 0.0
        rel_v = float(np.max(np.abs(dv) / v0_now)) if dv.size else 0.0
        state = reweight(data, trial, robust_scale, reject_sigma, sigma_scale)
        hist.count = it
        hist.misfit_history.append(rms_misfit(data, state, sigma_scale))
        hist.objective_history.append(objective(layout, data, state, P, B, sigma_scale))
        hist.change_history.append(alpha * dz_max)
        if progress is not None:
            progress.info(
                f"{label}, iteration {it}: rms misfit {hist.misfit_history[-1]:.3f} sigma, largest node "
                f"change {alpha * dz_max:.3f} m, velocity change {100 * alpha * rel_v:.2f} % "
                f"(step {alpha:g})"
            )
        if (alpha * dz_max < tolerance_m and alpha * rel_v < 1e-3) or obj_old - obj_new < 1e-6 * obj_old:
            hist.converged = True
            break
    return state, hist


@dataclass
class Posterior:
    """Laplace approximation at the optimum (see the module notes)."""

    layout: Layout
    factor: Optional[BandedCholesky]  # None when only the trend and velocity covariance was asked for
    U: np.ndarray  # A_uu^-1 A_us (n_nodes, n_small)
    S_inv: np.ndarray  # (n_small, n_small) covariance of (beta, theta_free)
    chi2_reduced: float
    n_used: int
    _table: Optional[np.ndarray] = None

    def small_covariance(self) -> np.ndarray:
        """Posterior covariance of the trends and free velocity parameters."""
        return self.S_inv

    def theta_covariance(self) -> np.ndarray:
        """Posterior covariance of the free velocity parameters."""
        k = 3 * self.layout.n_interfaces
        return self.S_inv[k:, k:]

    def beta_covariance(self, s: int) -> np.ndarray:
        """Posterior covariance of interface ``s``'s trend coefficients."""
        return self.S_inv[3 * s : 3 * s + 3, 3 * s : 3 * s + 3]

    def node_covariance_table(self) -> np.ndarray:
        """Posterior covariances of the relief between each node and its neighbours up to 3 rows/columns away.

        Shape (K, ny, nx, 7, 7): entry [s, r, c, 3 + dr, 3 + dc] is
        :math:`(A_{uu}^{-1})` between node (r, c) and node (r + dr, c + dc) of
        interface s (NaN beyond the grid); one Takahashi pass gives them all.
        """
        if self._table is not None:
            return self._table
        if self.factor is None:
            raise InversionError("internal error: the node covariances need the posterior computed with cell_sigma")
        lay = self.layout
        ny, nx = lay.spec.shape
        K = lay.n_interfaces
        r, c = np.meshgrid(np.arange(ny), np.arange(nx), indexing="ij")
        d = np.arange(-3, 4)
        R2 = r[:, :, None, None] + d[None, None, :, None]
        C2 = c[:, :, None, None] + d[None, None, None, :]
        ok = (R2 >= 0) & (R2 < ny) & (C2 >= 0) & (C2 < nx)
        ok = np.broadcast_to(ok, (ny, nx, 7, 7))
        a = np.broadcast_to((r * nx + c)[:, :, None, None], ok.shape)[ok]
        b = (R2 * nx + C2)[np.broadcast_to(ok, ok.shape)]
        table = np.full((K, ny, nx, 7, 7), np.nan)
        ii = np.concatenate([s * lay.nn + a for s in range(K)])
        jj = np.concatenate([s * lay.nn + b for s in range(K)])
        vals = self.factor.inverse_entries(ii, jj)
        for s in range(K):
            table[s][ok] = vals[s * a.size : (s + 1) * a.size]
        self._table = table
        return table

    def elevation_sigma(self, s: int, x_m, y_m, chunk: int = 20000) -> np.ndarray:
        """Posterior standard deviation (m) of interface ``s`` at points."""
        lay = self.layout
        x = np.asarray(x_m, float).ravel()
        y = np.asarray(y_m, float).ravel()
        table = self.node_covariance_table()[s]
        out = np.empty(x.size)
        for a0 in range(0, x.size, chunk):
            xs, ys = x[a0 : a0 + chunk], y[a0 : a0 + chunk]
            idx, w = node_weights(lay.spec, xs, ys)
            r, c = np.divmod(idx, lay.spec.nx)
            dr = r[:, None, :] - r[:, :, None] + 3
            dc = c[:, None, :] - c[:, :, None] + 3
            Z = table[r[:, :, None], c[:, :, None], dr, dc]
            var = np.einsum("ma,mab,mb->m", w, Z, w)
            T = trend_basis(xs, ys, lay.centre_xy)
            a_s = np.zeros((xs.size, lay.n_small))
            a_s[:, 3 * s : 3 * s + 3] = T
            d = np.einsum("ma,mak->mk", w, self.U[s * lay.nn + idx]) - a_s
            var += np.einsum("mk,kl,ml->m", d, self.S_inv, d)
            out[a0 : a0 + chunk] = np.sqrt(np.maximum(var, 0.0))
        return out


def posterior(layout, data, state, sigma_scale=1.0, cell_sigma=True) -> Posterior:
    """Posterior covariance pieces at ``state`` (weights as they are).

    With ``cell_sigma`` False only the trend and velocity covariance is
    computed (the factor of :mod:`.factor`, without the selected inverse): enough for tests on
    the velocity parameters, not for the map's standard deviations.
    """
    P = _prior_blocks(layout, data)
    B = borehole_matrix(layout, data)
    Jn, Js, _, _ = jacobian_blocks(layout, data, state, sigma_scale)
    A = (normal_blocks(Jn, Js) + P).tocsr()
    if B is not None:
        A = A + (B.T @ sp.diags(1.0 / data.bh_sigma_m**2) @ B).tocsr()
    n = layout.n_nodes
    Auu = A[:n, :n]
    Aus = A[:n, n:].toarray()
    Ass = A[n:, n:].toarray()
    if cell_sigma:
        ny, nx = layout.spec.shape
        reach = layout.n_interfaces * (3 * min(nx, ny) + 3)  # a cell's 4 x 4 nodes, interfaces interleaved
        fac = BandedCholesky(Auu, layout.band_order(), min_bandwidth=reach)
        U = fac.solve(Aus)
    else:
        fac = None
        try:
            U = NormalFactor.of_blocks(Auu, Aus, Ass, layout).others_solved()
        except np.linalg.LinAlgError as err:
            raise InversionError(
                f"the joint normal equations are singular ({err}); the picks and priors do not determine the model"
            ) from err
    S = Ass - Aus.T @ U
    S_inv = np.linalg.inv(0.5 * (S + S.T))
    chi2, n_used = reduced_chi2(data, state, sigma_scale)
    return Posterior(layout, fac, U, S_inv, chi2, n_used)


def reduced_chi2(data, state, sigma_scale=1.0) -> tuple:
    """(weighted sum of squared normalised residuals / picks used, picks used) of the picks with weight."""
    r = state.residual_s
    m = np.isfinite(r) & (state.weight > 0)
    chi2 = float(np.sum(state.weight[m] * (r[m] / (data.sigma_s[m] * sigma_scale)) ** 2)) / max(int(m.sum()), 1)
    return chi2, int(m.sum())
