"""One joint estimate of a layered overburden from all picks of all reflectors and the boreholes.

:func:`estimate_layered` is the entry point. It

1. orders the reflectors top down (given, or by their median pick time);
2. starts each interface from the gather-fit points converted with Dix
   interval velocities and each layer from its median Dix interval velocity
   (:mod:`.start`);
3. gives each interface a Matern GMRF prior about a plane trend, its sill and
   range fitted to the variogram of those points (:mod:`.prior`) to start;
4. estimates everything at once by robust Gauss-Newton (:mod:`.system`), with
   exact reflection paths through the layers (:mod:`.raypath`);
5. chooses each layer's velocity model (:data:`~.velocity.COMPLEXITIES`) by
   the Bayesian information criterion: from the fit with every gradient free,
   the Wald statistic :math:`W = \\theta_Z^T C_{ZZ}^{-1} \\theta_Z` of the
   gradients a candidate sets to zero approximates twice the log-likelihood
   ratio, and :math:`\\mathrm{BIC} = W + k \\ln n` (k free velocity parameters,
   n picks used) is compared over all combinations [Schwarz 1978]. A more
   complex model is taken only on strong evidence: of the models whose BIC is
   within 6 of the lowest [Kass & Raftery 1995], the one with the fewest free
   parameters. (Velocity and depth trade off: a vertical gradient in one layer
   can mimic one in another, and noise alone then favours one of them by a
   few units of BIC.) The chosen model is then refitted;
6. inflates the pick errors by the square root of the reduced chi-square when
   it exceeds 1, chooses each interface's prior hyperparameters (sill, range,
   anisotropy, smoothness) by type-II maximum likelihood (:mod:`.evidence`),
   checks each sill by predicting every line from the others (given the
   picks' lines, :mod:`.crossval`), refits, and takes the posterior (Laplace
   approximation) at the optimum:
   the map is the posterior mean at every output cell, sigma its standard
   deviation including the trend and velocity uncertainty and the velocity
   model's choice (the spread of the probable other models, :mod:`.averaging`);
7. maps the cells whose sigma does not exceed a limit (by default the largest
   sigma inside the lines' subsurface coverage, the convex hull of the
   source-receiver midpoints), and always the cells inside that hull.

Every pick keeps its residual, robust weight and status (not modelled,
rejected as a mispick, used); none is dropped silently.

References
----------
[Schwarz 1978] Schwarz, G. (1978). Estimating the dimension of a model.
    Annals of Statistics 6(2), 461-464.
[Kass & Raftery 1995] Kass, R. E. & Raftery, A. E. (1995). Bayes factors.
    Journal of the American Statistical Association 90(430), 773-795.
[Tarantola 2005] Tarantola, A. (2005). Inverse Problem Theory and Methods for
    Model Parameter Estimation. SIAM, Philadelphia.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, replace

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..errors import InversionError
from ..grid import GridSpec
from ..progress import NullProgress, check_cancel
from ..surface.threads import SingleThreadedBlas
from .averaging import model_choice_variance
from .crossval import check_sills
from .evidence import tune_priors
from .nodes import hull_cells, interface_values, node_weights
from .prior import fit_matern, matern_precision, robust_plane_fit
from .raypath import STATUS_TEXT
from .start import StartModel
from .system import (
    TREND_SCALE_M,
    JointData,
    JointState,
    Layout,
    forward,
    gauss_newton,
    node_elevations,
    posterior,
    reduced_chi2,
    trend_basis,
)
from .velocity import COMPLEXITIES, LayerVelocity, free_parameters

__all__ = [
    "BoreholeTies",
    "LayerEstimate",
    "LayeredEstimate",
    "LayeredSettings",
    "ModelChoice",
    "estimate_layered",
    "reflector_order",
]

RANGE_CAP_NODES = 20  # longest prior range, in node spacings (conditioning of the lattice prior)
BIC_STRONG = 6.0  # "strong" evidence between two models [Kass & Raftery 1995]
METHOD_NAME = "joint estimate of a layered overburden (all picks, all reflectors, boreholes; Bishop et al. 1985)"


@dataclass(frozen=True)
class LayeredSettings:
    """Settings of :func:`estimate_layered`.

    Attributes
    ----------
    node_cells : int or None
        Node spacing of the interfaces in output cells; None: 2, coarser when
        the covariance computation would exceed ``band_flops``.
    complexity : str or tuple of str
        "auto" (chosen by BIC), or one of :data:`~.velocity.COMPLEXITIES` for
        every layer, or one per layer.
    max_sigma_m : float or None
        Cells with a larger posterior sigma are not mapped (those inside the
        convex hull of the source-receiver midpoints, the lines' subsurface
        coverage, always are); None: the largest sigma inside that hull.
    robust_scale, reject_sigma : float
        Huber threshold and rejection limit in robust standard deviations.
    max_iterations : int
        Gauss-Newton iterations at most per stage.
    tolerance_m : float
        Convergence: largest change of a constrained node (m).
    band_flops : float
        Budget of the exact covariance computation (floating-point operations).
    prior : str
        "evidence" (default): each interface's prior starts from the variogram
        of its gather-fit points (:func:`~.prior.fit_matern`) and is then
        tuned to the picks by type-II maximum likelihood
        (:func:`~.evidence.tune_priors`); "variogram": the variogram's, as it is.
    priors : tuple of MaternPrior or None
        Given priors, one per interface (then ``prior`` is not used).
    """

    node_cells: int | None = None
    complexity: object = "auto"
    max_sigma_m: float | None = None
    robust_scale: float = 1.5
    reject_sigma: float = 4.0
    max_iterations: int = 12
    tolerance_m: float = 0.02
    band_flops: float = 4e9
    prior: str = "evidence"
    priors: tuple | None = None

    @classmethod
    def from_settings(cls, settings) -> LayeredSettings:
        """From the survey's ``[processing]`` settings (robust loss, rejection, optional ``max_sigma_m``)."""
        return cls(
            max_sigma_m=getattr(settings, "max_sigma_m", None),
            robust_scale=float(getattr(settings, "robust_scale", 1.5)),
            reject_sigma=float(getattr(settings, "reject_sigma", 4.0)),
        )


@dataclass(frozen=True)
class BoreholeTies:
    """Interface elevations known at boreholes (collar - depth), with their errors.

    Attributes: ``x_m``, ``y_m``, ``elevation_m``, ``sigma_m`` (m), ``reflector``
    (str, which interface).
    """

    x_m: np.ndarray
    y_m: np.ndarray
    elevation_m: np.ndarray
    sigma_m: np.ndarray
    reflector: np.ndarray

    @classmethod
    def from_boreholes(cls, boreholes, reflector: str) -> BoreholeTies:
        """Ties of one reflector from a :class:`~rockhead.core.survey.model.Boreholes` table."""
        n = len(boreholes)
        return cls(
            np.asarray(boreholes.x_m, float),
            np.asarray(boreholes.y_m, float),
            np.asarray(boreholes.elevation_m, float),
            np.asarray(boreholes.sigma_m, float),
            np.full(n, str(reflector), dtype=object),
        )


@dataclass(frozen=True)
class LayerEstimate:
    """One layer of the estimate.

    Attributes
    ----------
    top, base : str
        Bounding reflectors ("ground" for the first layer's top).
    velocity : LayerVelocity
        The estimated linear field (posterior mean).
    sigma_parameters : (4,) standard deviations of (v0, gx, gy, gz); 0 where not free.
    complexity : str
        The velocity model used.
    dix_velocity_m_s : float
        Median Dix interval velocity of the gather fits (the start; a cross-check).
    """

    top: str
    base: str
    velocity: LayerVelocity
    sigma_parameters: np.ndarray
    complexity: str
    dix_velocity_m_s: float


@dataclass(frozen=True)
class ModelChoice:
    """The velocity-model choice by BIC (see the module notes).

    ``candidates`` lists one complexity per layer for every combination;
    ``wald_chi2``, ``n_params`` (free velocity parameters) and ``bic`` belong
    to them; ``chosen`` indexes the best. ``gradients`` and
    ``sigma_gradients`` (K, 3) are the (gx, gy, gz) of the fit with every
    gradient free and their standard deviations; ``n_picks`` the n of BIC.
    """

    candidates: tuple
    wald_chi2: np.ndarray
    n_params: np.ndarray
    bic: np.ndarray
    chosen: int
    n_picks: int
    gradients: np.ndarray
    sigma_gradients: np.ndarray

    def summary(self, names=None) -> str:
        """One line per layer (the chosen model and its full-model gradients), then the BIC evidence."""
        best = self.candidates[self.chosen]
        low = int(np.argmin(self.bic))
        parts = []
        for j, c in enumerate(best):
            g, s = self.gradients[j], self.sigma_gradients[j]
            label = names[j] if names else f"layer {j + 1}"
            parts.append(
                f"{label}: {c} (full-model gradients east {g[0]:+.3f} ± {s[0]:.3f}, north {g[1]:+.3f} ± "
                f"{s[1]:.3f}, with depth {-g[2]:+.2f} ± {s[2]:.2f} (m/s)/m)"
            )
        text = "; ".join(parts) + f". BIC {self.bic[self.chosen]:.1f} (n = {self.n_picks} picks)"
        if low != self.chosen:
            text += (
                f"; the lowest, {self.bic[low]:.1f} for ({', '.join(self.candidates[low])}), is within "
                f"{BIC_STRONG:g} (not strong evidence, Kass & Raftery 1995), so the simpler model is kept"
            )
        else:
            others = np.delete(self.bic, low)
            if others.size:
                text += f"; the next lowest is {others.min():.1f}"
        return text


@dataclass(frozen=True)
class LayeredEstimate:
    """Result of :func:`estimate_layered`.

    Grids are on the output ``spec`` (north-up, row 0 north), one per
    interface (axis 0, top down). ``mask`` is True where a cell is *not*
    mapped (as in :class:`~rockhead.core.surface.base.SurfaceGrid`).

    Attributes
    ----------
    spec, node_spec : GridSpec
        Output grid and the interfaces' node grid.
    names : tuple of str
        Reflectors, top down.
    elevation_m, sigma_m : (K, ny, nx)
        Posterior mean and standard deviation (m), NaN where masked.
    elevation_unmasked_m, sigma_unmasked_m : (K, ny, nx)
        The same everywhere.
    mask : (K, ny, nx) bool
    max_sigma_m : (K,) the sigma limit used for the mask.
    node_elevation_m : (K, nyn, nxn) posterior mean at the nodes.
    trend : (K, 3) plane coefficients (a at the centre, b, c in m per 100 m east and north);
        ``trend_sigma`` their standard deviations; ``trend_centre_m`` (2,).
    layers : tuple of LayerEstimate
    choice : ModelChoice or None (None when the complexity was fixed)
    priors : tuple of MaternPrior
    interface : (n,) interface index of each pick (-1: reflector not in the order)
    residual_s : (n,) observed - modelled time (NaN where not modelled)
    weight : (n,) final robust weight
    rejected : (n,) rejected as a mispick
    status : (n,) 0 modelled, else the reason in ``status_text``
    used : (n,) modelled and not rejected
    reflection_xyz_m : (n, 3)
    average_velocity_m_s : (K, ny, nx) vertical-average velocity from the ground
        to each interface (NaN without a ground model or where masked)
    iterations, converged, misfit_history : Gauss-Newton diagnostics (all stages)
    model_sigma_m : (K, ny, nx) the velocity-model choice's share of sigma (m; included in ``sigma_m``;
        None when the model was given, not chosen)
    chi2_reduced : weighted misfit per used pick at the optimum (with the original sigmas)
    sigma_scale : factor applied to the pick sigmas (>= 1)
    notes : tuple of str
    method : str
    """

    spec: GridSpec
    node_spec: GridSpec
    names: tuple
    elevation_m: np.ndarray
    sigma_m: np.ndarray
    elevation_unmasked_m: np.ndarray
    sigma_unmasked_m: np.ndarray
    mask: np.ndarray
    max_sigma_m: np.ndarray
    node_elevation_m: np.ndarray
    trend: np.ndarray
    trend_sigma: np.ndarray
    trend_centre_m: np.ndarray
    layers: tuple
    choice: object
    priors: tuple
    interface: np.ndarray
    residual_s: np.ndarray
    weight: np.ndarray
    rejected: np.ndarray
    status: np.ndarray
    used: np.ndarray
    reflection_xyz_m: np.ndarray
    average_velocity_m_s: np.ndarray
    iterations: int
    converged: bool
    misfit_history: np.ndarray
    chi2_reduced: float
    sigma_scale: float
    notes: tuple = ()
    method: str = METHOD_NAME
    model_sigma_m: np.ndarray | None = None

    status_text = STATUS_TEXT

    def layer_text(self) -> list:
        """One plain-language line per layer: its velocity model, values and standard deviations."""
        out = []
        for L in self.layers:
            v, sd = L.velocity, L.sigma_parameters
            g = v.gradient_m_s_per_m
            text = f"{L.top} to {L.base}: {v.v0_m_s:.0f} ± {sd[0]:.0f} m/s at its centre ({L.complexity} model"
            if L.complexity in ("lateral", "full"):
                text += f"; east {g[0]:+.3f} ± {sd[1]:.3f}, north {g[1]:+.3f} ± {sd[2]:.3f} (m/s)/m"
            if L.complexity in ("vertical", "full"):
                text += f"; with depth {-g[2]:+.2f} ± {sd[3]:.2f} (m/s)/m"
            text += f"); Dix interval velocity of the gather fits {L.dix_velocity_m_s:.0f} m/s"
            out.append(text)
        return out

    def median_average_velocity_m_s(self, reflector: str) -> float:
        """Median over the mapped cells of the vertical-average velocity from the ground to a reflector (m/s)."""
        a = self.average_velocity_m_s[self.index(reflector)]
        return float(np.nanmedian(a)) if np.any(np.isfinite(a)) else float("nan")

    def index(self, reflector: str) -> int:
        """Interface index of a reflector label."""
        try:
            return self.names.index(str(reflector))
        except ValueError:
            raise InversionError(
                f"reflector {reflector!r} is not in the layered estimate ({', '.join(self.names)})"
            ) from None


# --------------------------------------------------------------------------- helpers


def reflector_order(reflector, time_s, order=None) -> tuple:
    """Reflector labels top down: ``order`` checked against the picks, or by median pick time.

    >>> reflector_order(["rock", "wt", "rock", "wt"], [0.05, 0.015, 0.052, 0.016])
    ('wt', 'rock')
    """
    labels = np.asarray(reflector).astype(str)
    present = sorted(set(labels.tolist()))
    if order is not None:
        order = tuple(str(o) for o in order)
        missing = [o for o in order if o not in present]
        if missing:
            raise InversionError(
                f"the layer order names {', '.join(repr(m) for m in missing)}, which no pick has; the picks name "
                f"{', '.join(present)}"
            )
        if len(set(order)) != len(order):
            raise InversionError(f"the layer order {order!r} names a reflector twice")
        return order
    t = np.asarray(time_s, float)
    med = {n: float(np.nanmedian(t[labels == n])) for n in present}
    return tuple(sorted(present, key=lambda n: (med[n], n)))


def _node_grid(spec: GridSpec, cells: int) -> GridSpec:
    """Node grid of ``cells`` output cells spacing whose nodes cover every output cell centre."""
    nx = math.ceil((spec.nx - 1) / cells) + 1
    ny = math.ceil((spec.ny - 1) / cells) + 1
    return GridSpec(spec.x0, spec.y0, spec.cell_size_m * cells, max(nx, 3), max(ny, 3))


def _choose_node_cells(spec, K, reach_m, budget):
    """Smallest node spacing (>= 2 cells) whose exact covariance costs at most ``budget`` operations."""
    cells = 2
    while True:
        g = _node_grid(spec, cells)
        n = K * g.nx * g.ny
        b = K * min(g.nx, g.ny) * (reach_m / g.cell_size_m + 4)
        if n * b * b <= budget or cells >= 64:
            return cells
        cells += 1


def _condition_on_points(node_spec, Q, x, y, resid, var):
    """GMRF conditional mean of the relief given point values (for the start): (Q + H^T W H)^-1 H^T W d."""
    idx, w = node_weights(node_spec, x, y)
    nn = node_spec.nx * node_spec.ny
    H = sp.csr_matrix((w.ravel(), (np.repeat(np.arange(len(x)), 16), idx.ravel())), shape=(len(x), nn))
    W = sp.diags(1.0 / var)
    A = (Q + H.T @ W @ H).tocsc()
    return spla.spsolve(A, H.T @ (W @ resid))


def _vertical_time(theta, centre, x, y, z_top, z_bot):
    """One-way vertical time (s) through a linear field from z_top down to z_bot: int dz / v."""
    v_top = theta[0] + theta[1] * (x - centre[0]) + theta[2] * (y - centre[1]) + theta[3] * (z_top - centre[2])
    v_bot = v_top + theta[3] * (z_bot - z_top)
    d = z_top - z_bot
    w = v_bot / v_top - 1.0
    small = np.abs(w) < 1e-6
    ratio = np.where(small, 1.0 - w / 2, np.log1p(np.where(small, 0.0, w)) / np.where(small, 1.0, w))
    return d * ratio / v_top


# --------------------------------------------------------------------------- the estimate


@SingleThreadedBlas()
def estimate_layered(
    source_xyz,
    receiver_xyz,
    time_s,
    sigma_s,
    reflector,
    start: StartModel,
    spec: GridSpec,
    order=None,
    boreholes: BoreholeTies | None = None,
    settings: LayeredSettings | None = None,
    ground=None,
    progress=None,
    line=None,
) -> LayeredEstimate:
    """Jointly estimate the interfaces and layer velocities from all picks (see the module notes).

    Parameters
    ----------
    source_xyz, receiver_xyz : array (n, 3)
        Shot and receiver positions of every pick (m; on the ground).
    time_s, sigma_s : array (n,)
        Two-way times and their standard errors (s).
    reflector : array (n,) of str
        Reflector label of each pick.
    start : StartModel
        Starting points and interval velocities (:func:`~.start.start_from_gathers`);
        its ``names`` must follow ``order``.
    spec : GridSpec
        Output grid (north-up). The interfaces' nodes lie every ``node_cells`` of its cells.
    order : sequence of str, optional
        Reflectors top down; default by median pick time (:func:`reflector_order`).
    boreholes : BoreholeTies, optional
        Interface elevations at boreholes (data with their sigma).
    settings : LayeredSettings, optional
    ground : callable, optional
        ``ground(x_m, y_m)`` elevation, for the vertical-average velocities.
    progress : progress object, optional
        Messages and cancellation (checked between iterations).
    line : array (n,), optional
        Survey line of each pick: with three lines or more, the sill of each interface's prior is
        checked by leaving out one line at a time (:mod:`.crossval`).

    Returns
    -------
    LayeredEstimate

    Notes
    -----
    BLAS runs on one thread throughout (:class:`SingleThreadedBlas`): the banded factorisations and small
    dense products here gain nothing from threads and lose much when other
    jobs share the cores (a banded Cholesky of 700 nodes took 0.95 s with
    threads against 0.015 s without, at a load of 8 on 2 cores).
    """
    progress = progress or NullProgress()
    cfg = settings or LayeredSettings()
    S = np.asarray(source_xyz, float)
    R = np.asarray(receiver_xyz, float)
    t = np.asarray(time_s, float)
    n = t.size
    sig = np.broadcast_to(np.asarray(sigma_s, float), t.shape).copy()
    labels = np.asarray(reflector).astype(str)
    lines = np.asarray(labels if line is None else line).astype(str)
    if S.shape != (n, 3) or R.shape != (n, 3) or labels.shape != (n,) or lines.shape != (n,):
        raise InversionError(
            f"source_xyz {S.shape}, receiver_xyz {R.shape}, reflector {labels.shape} and line {lines.shape} must "
            f"be (n, 3), (n, 3), (n,) and (n,) for the {n} picks"
        )
    if n == 0:
        raise InversionError("no picks to invert; give at least a few gathers of reflection picks")
    if np.any(~(sig > 0)):
        raise InversionError(f"pick sigma_s {sig[~(sig > 0)][:3]} must be positive seconds")
    names = reflector_order(labels, t, order)
    if tuple(start.names) != names:
        raise InversionError(f"the start model's reflectors {tuple(start.names)} differ from the order {names}")
    K = len(names)
    iface = np.full(n, -1, np.int64)
    for k, name in enumerate(names):
        iface[labels == name] = k
    finite = np.isfinite(t) & np.all(np.isfinite(S), axis=1) & np.all(np.isfinite(R), axis=1)
    pick = np.flatnonzero(finite & (iface >= 0))
    if pick.size < 3 * K + 4:
        raise InversionError(f"only {pick.size} usable picks for {K} interfaces; too few for a joint estimate")

    # complexity of each layer
    if cfg.complexity == "auto":
        fixed = None
    else:
        given = cfg.complexity
        fixed = (given,) * K if isinstance(given, str) else tuple(given)  # type: ignore[arg-type]
        if len(fixed) != K:
            raise InversionError(f"{len(fixed)} velocity models given for {K} layers")
        for c in fixed:
            free_parameters(c)

    # node grid, trend and velocity reference points
    offsets = np.hypot(*(R[pick, :2] - S[pick, :2]).T)
    cells = cfg.node_cells or _choose_node_cells(spec, K, float(np.max(offsets)) + spec.cell_size_m, cfg.band_flops)
    node_spec = _node_grid(spec, cells)
    stations = np.unique(np.round(np.vstack([S[pick], R[pick]]), 3), axis=0)
    centre_xy = stations[:, :2].mean(axis=0)
    top = float(np.mean(stations[:, 2]))
    mean_z = []
    priors, beta0, sigma_beta = [], np.zeros((K, 3)), np.zeros((K, 3))
    for k in range(K):
        x, y, z, s = start.points[k]
        ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(z) & np.isfinite(s)
        if ok.sum() < 3:
            raise InversionError(
                f"reflector '{names[k]}' has {int(ok.sum())} usable gather-fit points; at least 3 are needed to "
                "start its interface"
            )
        x, y, z, s = x[ok], y[ok], z[ok], s[ok]
        # the regional plane by a robust fit (a valley or knoll must not shift it), re-centred on the
        # trend centre, slopes per 100 m. Its prior is vague (50 m, 0.5 m/m): the start points carry
        # the errors of site-constant velocities (a tilt where the velocity changes laterally), so
        # the picks, not the start, must decide the plane
        coef, c0, _ = robust_plane_fit(x, y, z, s)
        a = coef[0] + coef[1] * (centre_xy[0] - c0[0]) + coef[2] * (centre_xy[1] - c0[1])
        beta0[k] = [a, coef[1] * TREND_SCALE_M, coef[2] * TREND_SCALE_M]
        sigma_beta[k] = 50.0
        prior = fit_matern(x, y, z, s) if cfg.priors is None else cfg.priors[k]
        # relief smaller than the points' own scatter cannot be told from it: the prior allows at
        # least that much (a noisy variogram otherwise makes a stiff, over-confident interface),
        # smooth at the scale of the site (relief hidden under noise has no resolved range)
        if cfg.priors is None and prior.sigma_m**2 < prior.nugget_m2:
            site = float(np.hypot(np.ptp(x), np.ptp(y))) / 3
            prior = replace(
                prior,
                sigma_m=math.sqrt(prior.nugget_m2),
                range_m=max(prior.range_m, site),
                source=prior.source + f"; relief below the points' scatter: sigma raised to the "
                f"nugget's {math.sqrt(prior.nugget_m2):.3g} m, range at least a third of the extent",
            )
        # the node spacing must resolve the prior; a range below two node spacings is raised to it
        if prior.range_m < 2 * node_spec.cell_size_m:
            floor = 2 * node_spec.cell_size_m
            note = f"; range raised to two node spacings ({floor:g} m)"
            prior = replace(prior, range_m=floor, source=prior.source + note)
        # a range of many node spacings makes the lattice precision so ill-conditioned (its
        # eigenvalues span (1 + 8 / (kappa h)^2)^(nu + 1)) that the exact covariances lose their
        # digits; relief longer than 20 node spacings is left to the plane trend
        cap = RANGE_CAP_NODES * node_spec.cell_size_m
        if cfg.priors is None and prior.range_m > cap:
            note = f"; range lowered to {RANGE_CAP_NODES} node spacings ({cap:g} m; longer relief is the trend's)"
            prior = replace(prior, range_m=cap, source=prior.source + note)
        priors.append(prior)
        mean_z.append(float(np.mean(z)))
    tops = [top, *mean_z[:-1]]
    vcentre = np.array([[centre_xy[0], centre_xy[1], 0.5 * (tops[k] + mean_z[k])] for k in range(K)])
    Q = tuple(matern_precision(node_spec, p) for p in priors)
    theta0 = np.column_stack([start.interval_velocity_m_s, np.zeros((K, 3))])
    extent = float(np.hypot(*np.ptp(stations[:, :2], axis=0))) or 1.0
    thick = np.maximum(np.array(tops) - np.array(mean_z), 1.0)
    v0 = start.interval_velocity_m_s
    sigma_theta = np.column_stack([0.5 * v0, v0 / extent, v0 / extent, v0 / thick])

    bh = boreholes
    bh_kw = {}
    if bh is not None and len(bh.x_m):
        bref = np.asarray(bh.reflector).astype(str)
        keep = np.isin(bref, names) & np.isfinite(bh.elevation_m) & np.isfinite(bh.x_m) & np.isfinite(bh.y_m)
        if np.any(~(np.asarray(bh.sigma_m, float)[keep] > 0)):
            raise InversionError("borehole sigma_m must be positive (metres)")
        if keep.any():
            bh_kw = dict(
                bh_xy=np.column_stack([bh.x_m, bh.y_m])[keep].astype(float),
                bh_elevation_m=np.asarray(bh.elevation_m, float)[keep],
                bh_sigma_m=np.asarray(bh.sigma_m, float)[keep],
                bh_interface=np.array([names.index(r) for r in bref[keep]], np.int64),
            )
    data = JointData(
        S[pick], R[pick], t[pick], sig[pick], iface[pick], Q, beta0, sigma_beta, theta0, sigma_theta, **bh_kw
    )

    # start: the GMRF conditional mean of each interface given its points
    u0 = np.zeros((K, node_spec.nx * node_spec.ny))
    for k in range(K):
        x, y, z, s = start.points[k]
        ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(z) & np.isfinite(s)
        trend_pts = trend_basis(x[ok], y[ok], centre_xy) @ beta0[k]
        u0[k] = _condition_on_points(
            node_spec, Q[k], x[ok], y[ok], z[ok] - trend_pts, s[ok] ** 2 + priors[k].nugget_m2 + 1e-6
        )
    state = JointState(u0, beta0.copy(), theta0.copy())

    def layout_for(complexities):
        free = np.array([COMPLEXITIES[c] for c in complexities], bool)
        return Layout(node_spec, K, free, centre_xy, vcentre)

    hist_all = []
    layout = layout_for(("constant",) * K)
    progress.info(
        f"joint estimate: {pick.size} picks, {K} interfaces on {node_spec.nx} x {node_spec.ny} nodes "
        f"of {node_spec.cell_size_m:g} m"
    )
    state = forward(layout, data, state)
    if np.sum(state.paths.valid) < 3 * K + 4:
        raise InversionError(
            f"only {int(np.sum(state.paths.valid))} of {pick.size} picks can be modelled through the start model; "
            "check the picks and the reflector order"
        )
    kw = dict(
        robust_scale=cfg.robust_scale,
        reject_sigma=cfg.reject_sigma,
        max_iterations=cfg.max_iterations,
        tolerance_m=cfg.tolerance_m,
        progress=progress,
    )
    # intermediate stages only need to come close: their result starts the next stage
    kw_rough = dict(kw, tolerance_m=5 * cfg.tolerance_m)
    # continuation: constant layers first (interfaces settle), then the gradients from zero
    state, h = gauss_newton(layout, data, state, label="joint estimate (constant layer velocities)", **kw_rough)
    hist_all.append(h)
    stage = fixed or ("full",) * K
    if stage != ("constant",) * K:
        layout = layout_for(stage)
        # two starts for the free vertical gradients: none, and a velocity rising by a quarter
        # across each layer (the rule in soils, compaction). The data of a layer with a strong
        # gradient also fit, less well, a gradient of the other sign, so a single start may stop
        # in the wrong basin; the start with the lower objective is kept (the second is tried only
        # when the first ends with a velocity falling with depth somewhere)
        thick_now = np.maximum(np.array(tops) - np.array(mean_z), 1.0)
        gz0 = -0.25 * state.theta[:, 0] / thick_now
        tries: list = []
        for g_start in (0.0 * gz0, gz0):
            if tries and not np.any(layout.free[:, 3] & (tries[0][1].theta[:, 3] > 0)):
                break  # the first start already ended with every free gradient rising with depth
            trial = state.copy()
            trial.theta[:, 3] = np.where(layout.free[:, 3], g_start, 0.0)
            if not np.array_equal(trial.theta, state.theta):  # the same model keeps its traced paths
                trial = forward(layout, data, trial, start=state.paths.point_xyz[..., :2])
            trial, h = gauss_newton(
                layout, data, trial, label=f"joint estimate ({', '.join(stage)})", **(kw_rough if fixed is None else kw)
            )
            tries.append((h.objective_history[-1], trial, h))
        _, state, h = min(tries, key=lambda item: item[0])
        hist_all.append(h)
    choice = None
    if fixed is None:
        check_cancel(progress)
        post = posterior(layout, data, state, cell_sigma=False)
        choice = _choose(layout, state, post, data)
        stage = choice.candidates[choice.chosen]
        if stage != ("full",) * K:
            layout = layout_for(stage)
            theta = np.where(layout.free, state.theta, 0.0)
            if not np.array_equal(theta, state.theta):  # the same model keeps its traced paths
                state.theta = theta
                state = forward(layout, data, state, start=state.paths.point_xyz[..., :2])
        state, h = gauss_newton(layout, data, state, label="joint estimate (chosen velocity model)", **kw)
        hist_all.append(h)
    # honest pick errors: inflate by sqrt(reduced chi-square) when above 1, and refit
    check_cancel(progress)
    tune = cfg.prior == "evidence" and cfg.priors is None
    chi2, _ = reduced_chi2(data, state)
    scale = 1.0
    if chi2 > 1.0:
        scale = math.sqrt(chi2)
    if tune:
        # the priors' hyperparameters most probable given the picks, at the fit of the chosen velocity
        # model with the pick errors as inflated (type-II maximum likelihood, :mod:`.evidence`), then refit
        priors, ev0, _ = tune_priors(layout, data, state, priors, sigma_scale=scale, extent_m=extent, progress=progress)
        tune = bool(np.isfinite(ev0))  # False: the variogram's priors kept (noted below)
        data = replace(data, Q=tuple(matern_precision(node_spec, p) for p in priors))
        if tune and line is not None:  # each sill checked by predicting every line from the others
            priors, data, _ = check_sills(layout, data, state, priors, lines[pick], scale, progress=progress)
        label = "joint estimate (most probable priors" + (f", pick errors x {scale:.2f})" if scale > 1.0 else ")")
        state, h = gauss_newton(layout, data, state, sigma_scale=scale, label=label, **kw)
        hist_all.append(h)
    elif chi2 > 1.0:
        state, h = gauss_newton(
            layout, data, state, sigma_scale=scale, label=f"joint estimate (pick errors x {scale:.2f})", **kw
        )
        hist_all.append(h)
    # the posterior (its banded factor and selected inverse) once, at the final state
    post = posterior(layout, data, state, sigma_scale=scale)
    check_cancel(progress)
    progress.info("joint estimate: posterior standard deviations")

    # the map: posterior mean and sigma at every output cell
    cx, cy = spec.coords()
    z_nodes = node_elevations(layout, state.u, state.beta)
    elev = np.stack([interface_values(z_nodes[k], node_spec, cx, cy) for k in range(K)])
    sig_cells = np.stack([post.elevation_sigma(k, cx, cy).reshape(spec.shape) for k in range(K)])
    # the velocity-model choice's share: the spread of the probable other models (BIC weights, .averaging)
    model_var = np.zeros_like(sig_cells)
    models: list = []
    if choice is not None:
        gn = {k: v for k, v in kw_rough.items() if k != "progress"}  # a spread needs no exact optimum
        model_var, models = model_choice_variance(layout_for, data, state, choice, cx, cy, scale, progress, **gn)
        model_var = model_var.reshape(sig_cells.shape)
        sig_cells = np.sqrt(sig_cells**2 + model_var)
    mid = 0.5 * (S[pick, :2] + R[pick, :2])
    hull = hull_cells(spec, mid[state.paths.valid])
    limits = np.empty(K)
    mask = np.empty((K, *spec.shape), bool)
    for k in range(K):
        lim = cfg.max_sigma_m if cfg.max_sigma_m is not None else float(np.nanmax(sig_cells[k][hull]))
        limits[k] = lim
        mask[k] = ~((sig_cells[k] <= lim) | hull)

    # velocities and their uncertainty
    Cth = post.theta_covariance()
    sd = np.zeros((K, 4))
    sd[layout.free] = np.sqrt(np.maximum(np.diag(Cth), 0.0))
    layers = tuple(
        LayerEstimate(
            "ground" if k == 0 else names[k - 1],
            names[k],
            LayerVelocity(
                float(state.theta[k, 0]),
                tuple(float(v) for v in state.theta[k, 1:]),
                tuple(float(v) for v in vcentre[k]),
                stage[k],
            ),
            sd[k],
            stage[k],
            float(start.interval_velocity_m_s[k]),
        )
        for k in range(K)
    )
    tsd = np.stack([np.sqrt(np.maximum(np.diag(post.beta_covariance(k)), 0.0)) for k in range(K)])

    avg = np.full((K, *spec.shape), np.nan)
    if ground is not None:
        zg = np.asarray(ground(cx, cy), float)
        time_down = np.zeros(spec.shape)
        upper = zg
        for k in range(K):
            time_down = time_down + _vertical_time(state.theta[k], vcentre[k], cx, cy, upper, elev[k])
            upper = elev[k]
            with np.errstate(invalid="ignore", divide="ignore"):
                avg[k] = np.where(mask[k], np.nan, (zg - elev[k]) / time_down)

    # per-pick results in the input order
    p = state.paths
    resid = np.full(n, np.nan)
    resid[pick] = state.residual_s
    weight = np.zeros(n)
    weight[pick] = state.weight
    rejected = np.zeros(n, bool)
    rejected[pick] = state.rejected
    status = np.full(n, 0, np.int64)
    status[pick] = p.status
    refl_xyz = np.full((n, 3), np.nan)
    refl_xyz[pick] = p.reflection_xyz
    notes = []
    if cfg.prior == "evidence" and cfg.priors is None and not tune:
        notes.append("priors from the variogram: the evidence of the picks could not be evaluated (singular)")
    if np.any(iface < 0):
        notes.append(f"{int(np.sum(iface < 0))} picks of reflectors outside the layer order were not used")
    n_nm = int(np.sum(p.status != 0))
    if n_nm:
        why = ", ".join(f"{int(np.sum(p.status == c))} {STATUS_TEXT[c]}" for c in sorted(set(p.status.tolist()) - {0}))
        notes.append(f"{n_nm} picks could not be modelled ({why}); they are flagged, not used")
    if scale > 1.0:
        notes.append(f"pick errors multiplied by {scale:.2f} (reduced chi-square {chi2:.2f} with the stated errors)")
    if len(models) > 1:
        share = ", ".join(f"{'/'.join(c)} {w:.2f}" for c, w in models)
        most = ", ".join(f"{names[k]} up to {np.sqrt(np.max(model_var[k])):.2f} m" for k in range(K))
        notes.append(f"sigma includes the velocity-model choice (BIC weights {share}): {most}")
    converged = hist_all[-1].converged  # the stages before only start the next one
    misfit = np.concatenate([np.asarray(h.misfit_history) for h in hist_all])
    progress.set_progress(100.0)
    return LayeredEstimate(
        spec=spec,
        node_spec=node_spec,
        names=names,
        elevation_m=np.where(mask, np.nan, elev),
        sigma_m=np.where(mask, np.nan, sig_cells),
        elevation_unmasked_m=elev,
        sigma_unmasked_m=sig_cells,
        mask=mask,
        max_sigma_m=limits,
        node_elevation_m=z_nodes,
        trend=state.beta.copy(),
        trend_sigma=tsd,
        trend_centre_m=centre_xy,
        layers=layers,
        choice=choice,
        priors=tuple(priors),
        interface=iface,
        residual_s=resid,
        weight=weight,
        rejected=rejected,
        status=status,
        used=np.isfinite(resid) & (weight > 0),
        reflection_xyz_m=refl_xyz,
        average_velocity_m_s=avg,
        iterations=int(sum(h.count for h in hist_all)),
        converged=converged,
        misfit_history=misfit,
        chi2_reduced=float(chi2),
        sigma_scale=float(scale),
        notes=tuple(notes),
        model_sigma_m=np.sqrt(model_var) if choice is not None else None,
    )


def _choose(layout, state, post, data) -> ModelChoice:
    """BIC over every combination of layer complexities, from the fit with all gradients free (Wald)."""
    K = layout.n_interfaces
    chi2 = max(post.chi2_reduced, 1.0)
    C = post.theta_covariance() * chi2  # all parameters are free in this fit
    grads = state.theta[:, 1:].copy()
    free_idx = -np.ones((K, 4), int)
    free_idx[layout.free] = np.arange(int(layout.free.sum()))
    sd = np.sqrt(np.maximum(np.diag(C), 0.0))
    sgrad = np.stack([sd[free_idx[k, 1:]] for k in range(K)])
    n = post.n_used
    names = list(COMPLEXITIES)
    cands: list = []
    wald: list = []
    npar_list: list = []
    bic_list: list = []
    for combo in itertools.product(names, repeat=K):
        zero = [free_idx[k, j] for k in range(K) for j in range(1, 4) if not COMPLEXITIES[combo[k]][j]]
        if zero:
            z = np.array(zero)
            th = np.array([state.theta[np.nonzero(free_idx == i)][0] for i in z])
            w = float(th @ np.linalg.solve(C[np.ix_(z, z)], th))
        else:
            w = 0.0
        k = sum(sum(COMPLEXITIES[c]) for c in combo)
        cands.append(tuple(combo))
        wald.append(w)
        npar_list.append(k)
        bic_list.append(w + k * math.log(max(n, 2)))
    bic = np.array(bic_list)
    npar = np.array(npar_list)
    # Occam's window: a more complex model needs strong evidence, a BIC lower by more than 6
    # [Kass & Raftery 1995]; of the models within 6 of the best, the one with the fewest free
    # parameters (then the lowest BIC) is kept
    window = np.flatnonzero(bic <= bic.min() + BIC_STRONG)
    fewest = window[npar[window] == npar[window].min()]
    best = int(fewest[np.argmin(bic[fewest])])
    return ModelChoice(tuple(cands), np.array(wald), npar, bic, best, n, grads, sgrad)
