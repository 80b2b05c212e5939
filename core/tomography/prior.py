"""Geostatistical prior of an interface: a Matern Gaussian Markov random field on the node grid.

An interface is its regional plane plus a stationary random relief. The
relief's covariance is a Matern covariance of smoothness nu = 1 or 2,

.. math::

    C(r) = \\sigma^2\\, \\frac{2^{1-\\nu}}{\\Gamma(\\nu)} (\\kappa r)^\\nu K_\\nu(\\kappa r),
    \\qquad \\rho = \\sqrt{8\\nu} / \\kappa,

(:math:`K_\\nu` the modified Bessel function of the second kind, :math:`\\rho`
the distance at which the correlation has dropped to about 0.14). It is the
stationary solution of the stochastic partial differential equation
:math:`(\\kappa^2 - \\Delta)^{\\alpha/2} u = \\mathcal W / \\tau`, :math:`\\alpha = \\nu + 1`,
in two dimensions, so on a regular lattice of spacing h with the five-point
Laplacian :math:`\\Delta_h` its precision matrix is sparse [Lindgren, Rue &
Lindstrom 2011]:

.. math::

    Q = \\tau^2 h^2 \\left(\\kappa^2 I - \\Delta_h\\right)^{\\alpha},
    \\qquad \\text{e.g. for } \\alpha = 2:\\
    Q = \\tau^2 \\left(\\kappa^4 C + 2\\kappa^2 G + G C^{-1} G\\right),\\ C = h^2 I,\\ G = -h^2 \\Delta_h,

(zero-flux edges). On the lattice :math:`\\tau` is set so that the variance of
the infinite lattice equals :math:`\\sigma^2` exactly (its spectral integral,
:func:`lattice_variance`), so a coarse node spacing does not change the
stated uncertainty. Near the edges the zero-flux condition raises the
variance (up to about twice at an edge): conservative.

The parameters come from the reflector's own data (:func:`fit_matern`): the
experimental variogram of the gather-fit points after a plane is removed,
fitted with the Matern variogram plus a nugget (the points' own scatter,
which is not relief and is left out of the prior). Both smoothnesses are
fitted and the better fit is kept: a smooth reflector (a rounded knoll, a
gentle channel) has a variogram with a parabolic start, which nu = 2 follows
and nu = 1 does not (it would overstate the uncertainty between the lines).

References
----------
[Lindgren, Rue & Lindstrom 2011] Lindgren, F., Rue, H. & Lindstrom, J. (2011).
    An explicit link between Gaussian fields and Gaussian Markov random fields:
    the stochastic partial differential equation approach. Journal of the
    Royal Statistical Society B 73(4), 423-498.
[Cressie 1985] Cressie, N. (1985). Fitting variogram models by weighted least
    squares. Mathematical Geology 17(5), 563-586.
[Huber 1964] Huber, P. J. (1964). Robust estimation of a location parameter.
    Annals of Mathematical Statistics 35(1), 73-101.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.integrate import quad
from scipy.optimize import least_squares
from scipy.special import gamma, i0e, kv

from ..grid import GridSpec
from ..surface.variogram import experimental_variogram

__all__ = [
    "MaternPrior",
    "anisotropic_lattice_variance",
    "fit_matern",
    "lattice_laplacian",
    "lattice_variance",
    "matern_correlation",
    "matern_precision",
    "plane_fit",
    "robust_plane_fit",
]


@dataclass(frozen=True)
class MaternPrior:
    """Matern prior of an interface's relief about its plane.

    Attributes
    ----------
    sigma_m : float
        Marginal standard deviation of the relief (m).
    range_m : float
        :math:`\\rho = \\sqrt{8\\nu}/\\kappa` (m).
    nugget_m2 : float
        Nugget of the variogram fit (m^2): the data points' own scatter, not in the prior.
    source : str
        How the values were found (the fit, or why a fallback was used).
    nu : int
        Smoothness, 1 or 2.
    ratio : float
        Geometric anisotropy: the range along the major axis over the range
        across it (>= 1; 1 is isotropic). ``range_m`` is their geometric mean,
        so the major range is ``range_m * sqrt(ratio)``.
    azimuth_deg : float
        Azimuth of the major axis (degrees clockwise from grid north, [0, 180)).
    """

    sigma_m: float
    range_m: float
    nugget_m2: float = 0.0
    source: str = ""
    nu: int = 1
    ratio: float = 1.0
    azimuth_deg: float = 0.0

    def __post_init__(self):
        if self.nu not in (1, 2):
            raise ValueError(f"Matern smoothness nu = {self.nu!r} is not supported; use 1 or 2")
        if not self.ratio >= 1.0:
            raise ValueError(f"Matern anisotropy ratio = {self.ratio!r} must be at least 1 (major over minor range)")

    @property
    def isotropic(self) -> bool:
        """True when the correlation is the same in every direction."""
        return self.ratio == 1.0

    def tensor(self) -> np.ndarray:
        """Anisotropy tensor H (2 x 2, east and north) of :math:`\\nabla \\cdot H \\nabla` (determinant 1).

        The field is isotropic in coordinates stretched by ``1/sqrt(ratio)``
        along the major axis and by ``sqrt(ratio)`` across it, so
        :math:`H = r\\,a a^T + r^{-1} b b^T` with the unit vectors a (major axis)
        and b (across it) [Lindgren, Rue & Lindstrom 2011, s. 3.4].

        >>> MaternPrior(1.0, 10.0, ratio=4.0, azimuth_deg=90.0).tensor().round(6).tolist()
        [[4.0, 0.0], [0.0, 0.25]]
        """
        t = math.radians(self.azimuth_deg)
        a = np.array([math.sin(t), math.cos(t)])
        b = np.array([a[1], -a[0]])
        return self.ratio * np.outer(a, a) + np.outer(b, b) / self.ratio

    @property
    def kappa_per_m(self) -> float:
        """The Matern scale parameter kappa = sqrt(8 nu) / range (1/m)."""
        return math.sqrt(8.0 * self.nu) / self.range_m


def matern_correlation(r_m, range_m, nu: int = 1):
    """Matern correlation :math:`\\frac{2^{1-\\nu}}{\\Gamma(\\nu)}(\\kappa r)^\\nu K_\\nu(\\kappa r)`.

    :math:`\\kappa = \\sqrt{8\\nu}/\\rho` with the range :math:`\\rho`.

    At the range the correlation is 0.14 (0.1397 for nu = 1, 0.1392 for nu = 2):

    >>> round(float(matern_correlation(10.0, 10.0)), 4), round(float(matern_correlation(10.0, 10.0, 2)), 4)
    (0.1397, 0.1392)
    """
    kr = math.sqrt(8.0 * nu) / float(range_m) * np.asarray(r_m, float)
    with np.errstate(invalid="ignore", over="ignore"):
        safe = np.maximum(kr, 1e-300)
        out = np.where(kr > 1e-12, 2.0 ** (1 - nu) / gamma(nu) * safe**nu * kv(nu, safe), 1.0)
    return out


def lattice_variance(kappa_per_m: float, spacing_m: float, alpha: int = 2) -> float:
    """Marginal variance of :math:`Q = h^2 (\\kappa^2 - \\Delta_h)^\\alpha` (tau = 1) on the infinite lattice.

    In the wavenumber domain

    .. math::

        \\sigma^2 = \\frac{1}{(2\\pi)^2}\\int_{[-\\pi,\\pi]^2}
        \\frac{d\\omega}{h^2 (\\kappa^2 + \\lambda(\\omega))^\\alpha},\\qquad
        \\lambda(\\omega) = \\frac{4}{h^2}\\left(\\sin^2\\frac{\\omega_1}{2} + \\sin^2\\frac{\\omega_2}{2}\\right);

    with :math:`a^{-\\alpha} = \\Gamma(\\alpha)^{-1}\\int_0^\\infty t^{\\alpha-1} e^{-a t} dt` the two
    wavenumbers separate and :math:`\\frac{1}{2\\pi}\\int e^{-4 u \\sin^2(\\omega/2)} d\\omega = e^{-2u} I_0(2u)`, so

    .. math::

        \\sigma^2 = \\frac{h^{2\\alpha - 2}}{\\Gamma(\\alpha)}
        \\int_0^\\infty u^{\\alpha-1} e^{-\\kappa^2 h^2 u} \\left(e^{-2u} I_0(2u)\\right)^2 du,

    a one-dimensional integral evaluated by adaptive quadrature. For
    :math:`\\kappa h \\to 0` it tends to the continuum value
    :math:`1/(4\\pi(\\alpha - 1)\\kappa^{2\\alpha-2})` [Lindgren, Rue & Lindstrom 2011]:

    >>> k = 0.001
    >>> v2, v3 = lattice_variance(k, 1.0), lattice_variance(k, 1.0, 3)
    >>> round(v2 * 4 * math.pi * k**2, 4), round(v3 * 8 * math.pi * k**4, 4)
    (1.0, 1.0)
    """
    h = float(spacing_m)
    e = (float(kappa_per_m) * h) ** 2
    a1 = int(alpha) - 1

    def f(u):
        return u**a1 * math.exp(-e * u) * i0e(2.0 * u) ** 2

    scale = 1.0 / e  # the integrand decays on this scale
    total = 0.0
    edges = [0.0, 1.0, 10.0] + [scale * 10.0**k for k in range(-2, 3)]
    edges = sorted({x for x in edges if x < 60.0 * scale} | {60.0 * scale})
    for lo, hi in zip(edges[:-1], edges[1:]):
        total += quad(f, lo, hi, limit=200, epsabs=0.0, epsrel=1e-10)[0]
    total += quad(f, edges[-1], np.inf, limit=200)[0]
    return h ** (2 * alpha - 2) * total / math.gamma(alpha)


def _differences(spec: GridSpec):
    """Differences of the node grid, dimensionless (times h): ``(Dx, Dy, Cx, Cy)``.

    ``Dx`` and ``Dy`` are the forward differences between neighbouring nodes
    east and north (one row per pair); ``Cx`` and ``Cy`` the node-centred
    differences, each node's mean of its (one or two) neighbouring forward
    differences, so that :math:`\\|C u\\| \\le \\|D u\\|`. ``Dx^T Dx + Dy^T Dy`` is the
    five-point Laplacian :math:`-h^2\\Delta_h` with zero-flux edges.
    """
    ny, nx = spec.shape
    idx = np.arange(nx * ny).reshape(ny, nx)

    def forward(a, b):  # rows: node b minus node a
        m = a.size
        r = np.repeat(np.arange(m), 2)
        c = np.column_stack([b.ravel(), a.ravel()]).ravel()
        v = np.tile([1.0, -1.0], m)
        return sp.csr_matrix((v, (r, c)), shape=(m, nx * ny))

    Dx = forward(idx[:, :-1], idx[:, 1:])  # east minus west
    Dy = forward(idx[1:, :], idx[:-1, :])  # north minus south (row 0 is north)

    def centred(pairs_shape, axis):
        # node (r, c) takes half of each forward difference it is an end of, along ``axis``
        p = np.arange(int(np.prod(pairs_shape))).reshape(pairs_shape)
        rows, cols = [], []
        if axis == 1:
            rows += [idx[:, :-1].ravel(), idx[:, 1:].ravel()]
        else:  # pairs (r + 1, r) along the rows, r + 1 south of r
            rows += [idx[1:, :].ravel(), idx[:-1, :].ravel()]
        cols += [p.ravel(), p.ravel()]
        r = np.concatenate(rows)
        c = np.concatenate(cols)
        return sp.csr_matrix((np.full(r.size, 0.5), (r, c)), shape=(nx * ny, p.size))

    Cx = (centred((ny, nx - 1), 1) @ Dx).tocsr()
    Cy = (centred((ny - 1, nx), 0) @ Dy).tocsr()
    return Dx, Dy, Cx, Cy


def lattice_laplacian(spec: GridSpec, tensor=None):
    """:math:`-h^2 \\nabla\\cdot H \\nabla` on the node grid (zero-flux edges), dimensionless.

    Without ``tensor`` (H = I) the five-point graph Laplacian. With an
    anisotropy tensor H (2 x 2, east and north, positive definite)
    :math:`H_{xx} D_x^T D_x + H_{yy} D_y^T D_y + H_{xy} (C_x^T C_y + C_y^T C_x)`, positive
    semidefinite because :math:`|2 H_{xy} (C_x u)^T C_y u| \\le 2 |H_{xy}| \\|D_x u\\| \\|D_y u\\|
    \\le H_{xx} \\|D_x u\\|^2 + H_{yy} \\|D_y u\\|^2`; in the interior its symbol is
    :math:`4 H_{xx} \\sin^2(\\omega_1/2) + 4 H_{yy} \\sin^2(\\omega_2/2) + 2 H_{xy} \\sin\\omega_1 \\sin\\omega_2`.
    """
    ny, nx = spec.shape
    if tensor is None:
        idx = np.arange(nx * ny).reshape(ny, nx)
        rows = np.concatenate([idx[:, :-1].ravel(), idx[:-1, :].ravel()])
        cols = np.concatenate([idx[:, 1:].ravel(), idx[1:, :].ravel()])
        adj = sp.coo_matrix((np.ones(rows.size), (rows, cols)), shape=(nx * ny, nx * ny))
        adj = (adj + adj.T).tocsr()
        deg = np.asarray(adj.sum(axis=1)).ravel()
        return (sp.diags(deg) - adj).tocsr()
    H = np.asarray(tensor, float)
    Lxx, Lyy, Lxy = _laplacian_parts(spec)
    return (H[0, 0] * Lxx + H[1, 1] * Lyy + H[0, 1] * Lxy).tocsr()


@functools.lru_cache(maxsize=8)
def _laplacian_parts(spec: GridSpec):
    """``(Dx^T Dx, Dy^T Dy, Cx^T Cy + Cy^T Cx)`` of :func:`_differences` (kept: the prior search reuses them)."""
    Dx, Dy, Cx, Cy = _differences(spec)
    return (Dx.T @ Dx).tocsr(), (Dy.T @ Dy).tocsr(), (Cx.T @ Cy + Cy.T @ Cx).tocsr()


def _panel_rule(width: float, points: int = 12):
    """Gauss-Legendre nodes and weights on [-pi, pi], panels graded geometrically towards 0 from ``width``."""
    edges = [0.0]
    e = min(max(width, 1e-6), math.pi) / 2
    while e < math.pi:
        edges.append(e)
        e *= 3.0
    edges.append(math.pi)
    x, w = np.polynomial.legendre.leggauss(points)
    nodes, weights = [], []
    for a, b in zip(edges[:-1], edges[1:]):
        nodes.append(0.5 * (b - a) * x + 0.5 * (a + b))
        weights.append(0.5 * (b - a) * w)
    n, wt = np.concatenate(nodes), np.concatenate(weights)
    return np.r_[-n[::-1], n], np.r_[wt[::-1], wt]


def anisotropic_lattice_variance(kappa_per_m: float, spacing_m: float, tensor, alpha: int = 2) -> float:
    """Marginal variance of :math:`Q = h^2 (\\kappa^2 - \\nabla\\cdot H \\nabla)^\\alpha_h` (tau = 1), infinite lattice.

    The spectral integral of :func:`lattice_variance` with the symbol of the
    anisotropic operator (:func:`lattice_laplacian`), which does not separate; it is
    evaluated by a tensor product of Gauss-Legendre panels graded towards the
    peak at zero wavenumber (its width is :math:`\\kappa h` along the minor
    axis of H). For H = I it equals :func:`lattice_variance`:

    >>> a = anisotropic_lattice_variance(0.05, 2.0, np.eye(2), 3)
    >>> b = lattice_variance(0.05, 2.0, 3)
    >>> bool(abs(a / b - 1) < 1e-6)
    True
    """
    h = float(spacing_m)
    H = np.asarray(tensor, float)
    e = (float(kappa_per_m) * h) ** 2
    top = float(np.max(np.linalg.eigvalsh(H)))
    w1, c1 = _panel_rule(float(kappa_per_m) * h / math.sqrt(top))
    s1 = np.sin(w1 / 2) ** 2
    sn = np.sin(w1)
    lam = 4.0 * H[0, 0] * s1[:, None] + 4.0 * H[1, 1] * s1[None, :] + 2.0 * H[0, 1] * sn[:, None] * sn[None, :]
    total = float(c1 @ (e + lam) ** (-float(alpha)) @ c1)
    return h ** (2 * alpha - 2) * total / (2 * math.pi) ** 2


def matern_precision(spec: GridSpec, prior: MaternPrior):
    """Sparse precision matrix Q of the prior on the node grid (node order ``row * nx + col``), in 1/m^2.

    :math:`Q = \\tau^2 h^2 (\\kappa^2 I - \\nabla\\cdot H\\nabla_h)^{\\nu + 1}` (see the module notes; H = I
    when isotropic), scaled so that an interior node of an unbounded grid has variance
    ``prior.sigma_m ** 2``.
    """
    h = spec.cell_size_m
    kappa = prior.kappa_per_m
    alpha = prior.nu + 1
    if prior.isotropic:
        G = lattice_laplacian(spec) / h**2  # -Delta_h (1/m^2)
        var = lattice_variance(kappa, h, alpha)
    else:
        H = prior.tensor()
        G = lattice_laplacian(spec, H) / h**2
        var = anisotropic_lattice_variance(kappa, h, H, alpha)
    K = (kappa**2 * sp.identity(G.shape[0]) + G).tocsr()
    tau2 = var / prior.sigma_m**2
    Q = K
    for _ in range(alpha - 1):
        Q = Q @ K
    return (tau2 * h**2 * Q).tocsr()


def plane_fit(x_m, y_m, z_m, weight=None):
    """Weighted least-squares plane :math:`z = a + b (x - \\bar x) + c (y - \\bar y)`.

    Returns ``(coef (3,), centre (2,), residual)``; the centre is the mean of x and y.

    >>> coef, centre, res = plane_fit([0.0, 10.0, 0.0, 10.0], [0.0, 0.0, 10.0, 10.0], [1.0, 2.0, 3.0, 4.0])
    >>> [round(float(c), 6) for c in coef], [float(c) for c in centre]
    ([2.5, 0.1, 0.2], [5.0, 5.0])
    """
    x = np.asarray(x_m, float)
    y = np.asarray(y_m, float)
    z = np.asarray(z_m, float)
    w = np.ones_like(z) if weight is None else np.asarray(weight, float)
    centre = np.array([x.mean(), y.mean()])
    T = np.column_stack([np.ones_like(x), x - centre[0], y - centre[1]])
    sw = np.sqrt(w)
    coef = np.linalg.lstsq(T * sw[:, None], z * sw, rcond=None)[0]
    return coef, centre, z - T @ coef


def robust_plane_fit(x_m, y_m, z_m, sigma_m, k: float = 1.5, iterations: int = 30):
    """Plane fitted with Huber weights [Huber 1964], and the standard errors of its coefficients.

    A local feature (a buried valley, a knoll) is a minority of the points and
    departs from the regional plane; Huber's iteratively reweighted least
    squares (threshold ``k`` robust standard deviations, scale 1.4826 MAD of
    the weighted residuals) keeps it from tilting or shifting the plane.

    Returns ``(coef (3,), centre (2,), standard_error (3,))`` with the plane
    :math:`z = a + b (x - \\bar x) + c (y - \\bar y)`.

    >>> x = np.array([0.0, 10, 20, 0, 10, 20, 0, 10, 20]); y = np.repeat([0.0, 10, 20], 3)
    >>> z = 5 + 0.1 * x - 0.2 * y; z[4] -= 8.0  # one point in a valley
    >>> coef, c, se = robust_plane_fit(x, y, z, np.full(9, 0.1))
    >>> [round(float(v), 3) for v in coef]
    [4.0, 0.1, -0.2]
    """
    x = np.asarray(x_m, float)
    y = np.asarray(y_m, float)
    z = np.asarray(z_m, float)
    s = np.maximum(np.broadcast_to(np.asarray(sigma_m, float), z.shape), 1e-3)
    centre = np.array([x.mean(), y.mean()])
    T = np.column_stack([np.ones_like(x), x - centre[0], y - centre[1]])
    w = np.ones_like(z)
    coef = np.zeros(3)
    scale = 1.0
    for _ in range(iterations):
        sw = np.sqrt(w) / s
        coef_new = np.linalg.lstsq(T * sw[:, None], z * sw, rcond=None)[0]
        u = (z - T @ coef_new) / s
        scale = max(1.4826 * float(np.median(np.abs(u))), 1e-12)
        a = np.abs(u) / scale
        w = np.where(a <= k, 1.0, k / np.maximum(a, 1e-300))
        done = np.allclose(coef_new, coef, rtol=0, atol=1e-9)
        coef = coef_new
        if done:
            break
    sw = np.sqrt(w) / s
    cov = np.linalg.pinv((T * sw[:, None]).T @ (T * sw[:, None])) * scale**2
    return coef, centre, np.sqrt(np.maximum(np.diag(cov), 0.0))


def fit_matern(x_m, y_m, z_m, sigma_m=None, min_points: int = 8, nu=None) -> MaternPrior:
    """Matern prior of a surface from scattered elevation points.

    A plane is removed (weighted by 1/sigma^2), the experimental variogram of
    the residuals is computed (:func:`~rockhead.core.surface.variogram.experimental_variogram`)
    and :math:`\\gamma(h) = c_0 + \\sigma^2 (1 - \\mathrm{corr}_\\nu(h))` is fitted by
    weighted least squares with Cressie's weights :math:`N(h)/\\gamma(h)^2`
    [Cressie 1985], for nu = 1 and nu = 2 (or the given ``nu``); the smaller
    weighted misfit wins. With too few points or no usable fit, the residuals'
    variance and a third of the data extent are used instead (``source`` says so).

    Returns
    -------
    MaternPrior
    """
    x = np.asarray(x_m, float)
    y = np.asarray(y_m, float)
    z = np.asarray(z_m, float)
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(z)
    x, y, z = x[ok], y[ok], z[ok]
    s = None if sigma_m is None else np.broadcast_to(np.asarray(sigma_m, float), ok.shape)[ok]
    extent = float(np.hypot(np.ptp(x), np.ptp(y))) if x.size else 0.0
    if x.size < 3 or extent <= 0:
        return MaternPrior(
            5.0, max(extent, 50.0) / 3, 0.0, "fallback: fewer than 3 points (5 m, a third of the extent)"
        )
    w = None if s is None else 1.0 / np.maximum(s, 1e-3) ** 2
    _, _, res = plane_fit(x, y, z, w)
    var = float(np.var(res)) if res.size > 1 else 1.0
    mean_err = float(np.mean(s**2)) if s is not None else 0.0
    fallback_sigma = math.sqrt(max(var - mean_err, 0.01 * var, 1e-4))
    fallback = MaternPrior(
        fallback_sigma,
        extent / 3,
        mean_err,
        "fallback: too few points for a variogram (the residuals' variance, a third of the extent)",
    )
    if x.size < min_points:
        return fallback
    ev = experimental_variogram(x, y, res)
    m = (ev.n_pairs > 0) & np.isfinite(ev.semivariance)
    if m.sum() < 4:
        return fallback
    h, g, npair = ev.lag_m[m], ev.semivariance[m], ev.n_pairs[m]
    lag_min = max(float(h.min()), 1e-3)
    lag_max = float(ev.bin_edges_m[-1])
    g_top = max(float(np.max(g)), 1e-6)
    lo = np.log([1e-8, 1e-8, lag_min])
    hi = np.log([10 * g_top, 100 * g_top, 5 * lag_max])
    fits: dict = {}
    for smooth in (1, 2) if nu is None else (int(nu),):

        def resid(p, smooth=smooth):
            c0, s2, rng = np.exp(p)
            gm = c0 + s2 * (1.0 - matern_correlation(h, rng, smooth))
            return np.sqrt(npair) * (g / gm - 1.0)  # Cressie (1985): sqrt(N) (gamma_hat - gamma) / gamma

        for r0 in (lag_max / 4, lag_max / 2, lag_max):
            p0 = np.clip(np.log([max(g[0] * 0.5, 1e-6), g_top, r0]), lo + 1e-9, hi - 1e-9)
            try:
                r = least_squares(resid, p0, bounds=(lo, hi))
            except (ValueError, np.linalg.LinAlgError):
                continue
            if np.all(np.isfinite(r.x)) and (smooth not in fits or r.cost < fits[smooth].cost):
                fits[smooth] = r
    if not fits:
        return fallback
    best = min(fits, key=lambda k: fits[k].cost)
    c0, s2, rng = np.exp(fits[best].x)
    costs = ", ".join(f"nu = {k}: {2 * fits[k].cost:.3g}" for k in sorted(fits))
    return MaternPrior(
        math.sqrt(s2),
        float(rng),
        float(c0),
        f"Matern (nu = {best}) fit to the variogram of {x.size} points after removing a plane "
        f"(sill {s2:.3g} m2, range {rng:.1f} m, nugget {c0:.3g} m2; weighted misfit {costs})",
        best,
    )
