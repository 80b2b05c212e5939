r"""Dip and strike algebra: true dip from crossing lines, apparent dips, surface dips.

Conventions (DEVELOPERS.md): azimuths clockwise from grid north in [0, 360);
dip below horizontal in [0, 90); dip direction = azimuth toward which the
reflector deepens; strike by the right-hand rule, dip direction = strike + 90.

Two different "dips along a line" must be kept apart:

* the **apparent dip** of the reflector's trace in a vertical section at angle
  beta to the dip direction, :math:`\tan\alpha = \tan\delta\cos\beta`
  (structural geology; e.g. Ragan 2009, ch. 2; Rowland et al. 2007, ch. 1 --
  cited from memory);
* the **traveltime dip** a straight line's fit returns,
  :math:`\sin\alpha_t = s = -\mathbf u\cdot\mathbf n = \sin\delta\cos\beta`
  [Sheriff & Geldart 1995, ch. 4].

They agree only along dip or for small dips.

References
----------
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4.
[Ragan 2009] Ragan, D. M. (2009). Structural Geology: An Introduction to
    Geometrical Techniques, 4th ed., Cambridge University Press.
[Rowland et al. 2007] Rowland, S. M., Duebendorfer, E. M. & Schiefelbein, I. M.
    (2007). Structural Analysis and Synthesis, 3rd ed., Blackwell.
[Bevington & Robinson 2003] Bevington, P. R. & Robinson, D. K. (2003). Data
    Reduction and Error Analysis for the Physical Sciences, 3rd ed.,
    McGraw-Hill (weighted least squares, covariance, error propagation).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Optional

import numpy as np
from numpy.typing import ArrayLike

from ..errors import InversionError
from ..survey.model import GatherSet
from .geometry import gather_normals, vector_azimuth_deg

__all__ = [
    "DipMeasurements",
    "SurfaceDips",
    "apparent_dip_deg",
    "combine_lines",
    "cross_components",
    "dip_direction_from_strike",
    "resolve_cross_dips",
    "strike_from_dip_direction",
    "surface_dips",
    "traveltime_dip_deg",
    "zero_offset_points_xy",
]

#: Status values of a :class:`DipMeasurements` row.
STATUS_OK = "ok"
STATUS_SINGLE_LINE = "single_direction"
STATUS_PARALLEL = "nearly_parallel"
STATUS_ILL = "ill_conditioned"
STATUS_NONPHYSICAL = "nonphysical"
STATUS_POOR = "poorly_constrained"


# ---------------------------------------------------------------------------
# Angles
# ---------------------------------------------------------------------------


def strike_from_dip_direction(dip_direction_deg: ArrayLike) -> np.ndarray:
    """Right-hand-rule strike: dip direction - 90, in [0, 360).

    Parameters
    ----------
    dip_direction_deg : float or array_like
        Azimuth toward which the plane deepens (degrees clockwise from north).

    Returns
    -------
    ndarray
        Strike azimuth (degrees, [0, 360)), the dip to its right.

    Examples
    --------
    >>> float(strike_from_dip_direction(45.0)), float(strike_from_dip_direction(30.0))
    (315.0, 300.0)
    """
    return (np.asarray(dip_direction_deg, dtype=float) - 90.0) % 360.0


def dip_direction_from_strike(strike_deg: ArrayLike) -> np.ndarray:
    """Dip direction from a right-hand-rule strike: strike + 90, in [0, 360).

    Parameters
    ----------
    strike_deg : float or array_like
        Strike azimuth by the right-hand rule (degrees clockwise from north).

    Returns
    -------
    ndarray
        Dip direction (degrees, [0, 360)).

    Examples
    --------
    >>> float(dip_direction_from_strike(315.0))
    45.0
    """
    return (np.asarray(strike_deg, dtype=float) + 90.0) % 360.0


def apparent_dip_deg(true_dip_deg: ArrayLike, beta_deg: ArrayLike) -> np.ndarray:
    r"""Apparent dip of a plane in a vertical section (structural geology).

    .. math:: \tan\alpha = \tan\delta\,\cos\beta

    with true dip :math:`\delta` and :math:`\beta` the horizontal angle
    between the section and the dip direction [Ragan 2009; Rowland et al.
    2007]. Signed: positive when the section's direction points down-dip
    (:math:`|\beta| < 90`).

    Parameters
    ----------
    true_dip_deg : float or array_like
        True dip :math:`\delta` (degrees).
    beta_deg : float or array_like
        Angle :math:`\beta` between the section and the dip direction (degrees).

    Returns
    -------
    ndarray
        Apparent dip :math:`\alpha` (degrees).

    Examples
    --------
    >>> round(float(apparent_dip_deg(30.0, 60.0)), 2)
    16.1
    """
    dip = np.radians(np.asarray(true_dip_deg, dtype=float))
    beta = np.radians(np.asarray(beta_deg, dtype=float))
    return np.degrees(np.arctan(np.tan(dip) * np.cos(beta)))


def traveltime_dip_deg(true_dip_deg: ArrayLike, beta_deg: ArrayLike) -> np.ndarray:
    r"""Dip a straight line's traveltime fit sees: asin(sin(dip) cos(beta)).

    .. math:: \sin\alpha_t = s = \sin\delta\,\cos\beta

    [Sheriff & Geldart 1995, ch. 4]. Not the apparent dip of
    :func:`apparent_dip_deg`.

    Parameters
    ----------
    true_dip_deg : float or array_like
        True dip :math:`\delta` (degrees).
    beta_deg : float or array_like
        Angle :math:`\beta` between the line and the dip direction (degrees).

    Returns
    -------
    ndarray
        Traveltime dip :math:`\alpha_t` (degrees).

    Examples
    --------
    >>> round(float(traveltime_dip_deg(30.0, 60.0)), 2)
    14.48
    """
    dip = np.radians(np.asarray(true_dip_deg, dtype=float))
    beta = np.radians(np.asarray(beta_deg, dtype=float))
    return np.degrees(np.arcsin(np.sin(dip) * np.cos(beta)))


def _max_axial_angle_deg(u):
    """Largest angle between any two axial directions (u and -u alike), degrees."""
    doubled = 2.0 * np.arctan2(u[:, 1], u[:, 0])
    d = np.abs(doubled[:, None] - doubled[None, :]) % (2 * np.pi)
    d = np.minimum(d, 2 * np.pi - d)
    return float(np.degrees(d.max()) / 2.0) if len(u) else 0.0


# ---------------------------------------------------------------------------
# Combining lines
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class DipMeasurements:
    """True dip measurements from clusters of gathers with several line directions.

    Per measurement (length m): ``x_m``, ``y_m`` (weighted centre of the
    zero-offset points), ``reflector``, ``dip_deg``, ``dip_direction_deg``,
    ``strike_deg`` (right-hand rule), ``sigma_dip_deg``,
    ``sigma_dip_direction_deg``, ``lines`` (comma-joined line names),
    ``n_lines``, ``n_gathers``, ``max_angle_deg`` (largest angle between the
    members' line directions), ``condition_number`` (of the weighted design
    matrix), ``variance_factor`` (chi2 / (n - 2), NaN when n = 2),
    ``normal_h`` (m, 2) horizontal part of the downward normal,
    ``covariance`` (m, 2, 2) of ``normal_h``, ``status`` and ``reason``.
    Flagged rows have NaN dip values.

    Per gather (length g): ``gather_measurement``, the row of the measurement
    the gather belongs to (-1: in none, e.g. a failed fit).

    ``radius_m``: the search radius used (m).
    """

    x_m: np.ndarray
    y_m: np.ndarray
    reflector: np.ndarray
    dip_deg: np.ndarray
    dip_direction_deg: np.ndarray
    strike_deg: np.ndarray
    sigma_dip_deg: np.ndarray
    sigma_dip_direction_deg: np.ndarray
    lines: np.ndarray
    n_lines: np.ndarray
    n_gathers: np.ndarray
    max_angle_deg: np.ndarray
    condition_number: np.ndarray
    variance_factor: np.ndarray
    normal_h: np.ndarray
    covariance: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    gather_measurement: np.ndarray
    radius_m: float = float("nan")

    def __len__(self) -> int:
        """Return the number of measurements."""
        return len(self.x_m)

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of the measurements with status ``ok``."""
        return self.status == STATUS_OK


def _se_s(fits: Any, g: int) -> np.ndarray:
    se = getattr(fits, "se_s_along", None)
    if se is None:
        cov = getattr(fits, "covariance", None)
        if cov is None:
            return np.full(g, np.nan)
        se = np.sqrt(np.asarray(cov, dtype=float).reshape(g, 3, 3)[:, 2, 2])
    return np.asarray(se, dtype=float)


def zero_offset_points_xy(gathers: GatherSet, fits: Any) -> np.ndarray:
    r"""Horizontal position of each gather's zero-offset point :math:`\mathbf S + h\mathbf n`.

    Parameters
    ----------
    gathers : GatherSet
        The gathers (``source_xyz_g``, line frames).
    fits : ShotFits or alike
        ``normal_distance_m``, ``s_along`` and optionally ``cross_component``.

    Returns
    -------
    (g, 2) ndarray
        Easting and northing (m); NaN for a gather without a fit.
    """
    n = gather_normals(gathers, fits)
    h = np.asarray(fits.normal_distance_m, dtype=float)
    return np.asarray(gathers.source_xyz_g, float)[:, :2] + h[:, None] * n[:, :2]


def combine_lines(
    gathers: GatherSet,
    fits: Any,
    radius_m: Optional[float] = None,
    min_angle_deg: float = 30.0,
    max_condition: Optional[float] = None,
    crossings: Any = None,
) -> DipMeasurements:
    r"""Find the true dip and dip direction where gathers of different line directions meet.

    Each gather k with line unit :math:`\mathbf u_k` fitted
    :math:`s_k = -\mathbf u_k\cdot\mathbf n`; only the horizontal part
    :math:`\mathbf n_h` of the downward normal enters, so a cluster of
    gathers with at least two line directions gives it by weighted least
    squares [Bevington & Robinson 2003]:

    .. math::

        \min_{\mathbf n_h}\sum_k \frac{(s_k + \mathbf u_k\cdot\mathbf n_h)^2}{\sigma_{s,k}^2},
        \qquad \sin\delta = |\mathbf n_h|,\qquad
        \phi = \operatorname{az}(-\mathbf n_h)

    The covariance of :math:`\mathbf n_h` is
    :math:`(A^TWA)^{-1}`, multiplied by :math:`F = \chi^2/(n-2)` when
    :math:`\chi^2` exceeds its 95 % quantile for n - 2 degrees of freedom,
    i.e. when the cluster's scatter is significantly larger than the
    gathers' stated errors (a reflector that is not planar across the
    cluster then widens the errors, while planar data keep nominal
    coverage); ``sigma_dip_deg`` and ``sigma_dip_direction_deg`` follow by
    first-order propagation through :math:`\delta = \arcsin|\mathbf n_h|`
    and the azimuth. Gathers of different fits are treated as independent.

    At line crossings (``crossings`` given, :func:`~.misties.line_crossings`;
    the way a run measures dips): per reflector and crossing, the gathers
    whose zero-offset points lie within ``radius_m`` of the crossing, of any
    line, give one measurement, so that it is the dip there and not an
    average over whole lines (a curved reflector's dip changes along them);
    it is placed, as every measurement, at the weighted centre of its
    gathers (where an average of local dips applies; within ``radius_m`` of
    the crossing). A gather within reach of several crossings counts in
    each (``gather_measurement`` names the nearest). A line of a reflector
    that meets no other line gets one flagged row (``single_direction``) at
    the centre of its gathers, which belong to it.

    Clustering without ``crossings`` (per reflector): around every gather's zero-offset point the
    gathers within ``radius_m`` (KD-tree) form a candidate; candidates are
    taken greedily in order of the smallest eigenvalue of their weighted
    normal matrix (best-constrained first: the crossings), each claiming its
    still unclaimed gathers, until every gather belongs to one cluster. A
    cluster whose line directions (axial: u and -u alike) span less than
    ``min_angle_deg``, or whose weighted design is worse conditioned than
    ``max_condition``, is flagged and gets no dip (NaN) instead of an
    invented one. So is a cluster whose fitted :math:`|\mathbf n_h|` is 1 or
    more (``nonphysical``) or within two standard errors of 1
    (``poorly_constrained``: the first-order errors no longer hold).

    Parameters
    ----------
    gathers : GatherSet
        The gathers (line units, zero-offset points, reflector labels).
    fits : ShotFits or alike
        Uses ``s_along``, ``se_s_along`` (or ``covariance``),
        ``normal_distance_m``, ``cross_component`` and ``status`` (only
        ``"ok"`` gathers are combined when a status is present).
    radius_m : float, optional
        Cluster radius (m); default half the median spread length.
    min_angle_deg : float
        Least angle between two line directions of one cluster (degrees).
    max_condition : float, optional
        Largest condition number :math:`\sqrt{\lambda_{max}/\lambda_{min}}`
        of the weighted design matrix; default
        :math:`2\cot(\theta_{min}/2)`, twice that of two equally weighted
        lines at the least angle (7.46 for 30 degrees).
    crossings : Crossings, optional
        Where lines meet (``x_m``, ``y_m``, ``line_a``, ``line_b``); see above.

    Returns
    -------
    DipMeasurements
        One row per cluster (dips in degrees, azimuths clockwise from north).

    Raises
    ------
    InversionError
        ``min_angle_deg`` outside (0, 90] or ``radius_m`` not a distance.
    """
    from scipy.spatial import cKDTree
    from scipy.special import gammaincinv

    g = gathers.n_gathers
    if not 0.0 < min_angle_deg <= 90.0:
        raise InversionError(
            f"min_angle_deg = {min_angle_deg!r} is outside (0, 90]; line directions are axial, "
            "so no two differ by more than 90 degrees: use e.g. 30"
        )
    if max_condition is None:
        max_condition = 2.0 / np.tan(np.radians(min_angle_deg) / 2.0)
    u = np.asarray(gathers.line_unit, dtype=float).reshape(g, 2)
    s = np.asarray(fits.s_along, dtype=float)
    se = _se_s(fits, g)
    status = getattr(fits, "status", None)
    ok = np.ones(g, bool) if status is None else (np.asarray(status).astype(str) == "ok")
    usable = ok & np.isfinite(s) & np.isfinite(se) & (se > 0)
    xy = zero_offset_points_xy(gathers, fits)
    usable &= np.all(np.isfinite(xy), axis=1)
    weight = np.where(usable, 1.0 / np.where(usable, se, 1.0) ** 2, 0.0)
    if radius_m is None:
        spread = np.asarray(gathers.spread_length_m, float)[usable]
        radius_m = 0.5 * float(np.median(spread)) if len(spread) else 0.0
    if not (np.isfinite(radius_m) and radius_m >= 0):
        raise InversionError(f"radius_m = {radius_m!r} is not a distance; give a positive radius in metres")

    line = np.asarray(gathers.line).astype(str)
    refl = np.asarray(gathers.reflector).astype(str)
    membership = np.full(g, -1, dtype=np.int64)
    clusters: list[tuple[str, np.ndarray]] = []  # (reflector, member indices)
    if crossings is not None:
        clusters, membership = _crossing_clusters(crossings, xy, usable, refl, line, radius_m)
    for name in sorted(set(refl[usable])) if crossings is None else ():
        idx = np.flatnonzero(usable & (refl == name))
        tree = cKDTree(xy[idx])
        nbrs = tree.query_ball_point(xy[idx], r=radius_m)
        # smallest eigenvalue of each candidate's weighted normal matrix sum w u u^T
        counts = np.array([len(nb) for nb in nbrs])
        flat = np.concatenate([np.asarray(nb, dtype=np.int64) for nb in nbrs])
        owner = np.repeat(np.arange(len(idx)), counts)
        wk = weight[idx][flat]
        uk = u[idx][flat]
        nxx = np.bincount(owner, wk * uk[:, 0] ** 2, len(idx))
        nyy = np.bincount(owner, wk * uk[:, 1] ** 2, len(idx))
        nxy = np.bincount(owner, wk * uk[:, 0] * uk[:, 1], len(idx))
        lam_min = 0.5 * (nxx + nyy) - np.sqrt((0.5 * (nxx - nyy)) ** 2 + nxy**2)
        scale = float(np.max(np.abs(lam_min))) or 1.0
        order = np.lexsort((-counts, -np.round(lam_min / scale, 9)))  # ties: larger candidates first
        claimed = np.zeros(len(idx), bool)
        for seed in order:
            if claimed[seed]:
                continue
            nb = np.asarray(nbrs[seed], dtype=np.int64)
            nb = nb[~claimed[nb]]
            claimed[nb] = True
            membership[idx[nb]] = len(clusters)
            clusters.append((name, idx[nb]))

    m = len(clusters)
    out = {
        "x_m": np.full(m, np.nan),
        "y_m": np.full(m, np.nan),
        "dip_deg": np.full(m, np.nan),
        "dip_direction_deg": np.full(m, np.nan),
        "sigma_dip_deg": np.full(m, np.nan),
        "sigma_dip_direction_deg": np.full(m, np.nan),
        "max_angle_deg": np.full(m, np.nan),
        "condition_number": np.full(m, np.nan),
        "variance_factor": np.full(m, np.nan),
        "normal_h": np.full((m, 2), np.nan),
        "covariance": np.full((m, 2, 2), np.nan),
    }
    lines_txt = np.empty(m, dtype=object)
    n_lines = np.zeros(m, dtype=np.int64)
    n_members = np.zeros(m, dtype=np.int64)
    stat = np.empty(m, dtype=object)
    reason = np.empty(m, dtype=object)
    reflector_out = np.empty(m, dtype=object)
    for k, (name, mem) in enumerate(clusters):
        wk = weight[mem]
        uk = u[mem]
        names = sorted(set(line[mem]))
        lines_txt[k] = ",".join(names)
        n_lines[k] = len(names)
        n_members[k] = len(mem)
        reflector_out[k] = name
        out["x_m"][k] = np.sum(wk * xy[mem, 0]) / wk.sum()
        out["y_m"][k] = np.sum(wk * xy[mem, 1]) / wk.sum()
        angle = _max_axial_angle_deg(uk)
        out["max_angle_deg"][k] = angle
        a = -uk
        nmat = a.T @ (wk[:, None] * a)
        ev = np.linalg.eigvalsh(nmat)
        cond = float(np.sqrt(ev[-1] / ev[0])) if ev[0] > 0 else np.inf
        out["condition_number"][k] = cond
        if angle < min_angle_deg:
            if len(names) == 1:
                stat[k] = STATUS_SINGLE_LINE
                reason[k] = (
                    f"only line {names[0]} ({len(mem)} gather(s), directions within {angle:.1f} deg): "
                    "a single line direction cannot resolve the cross-line dip"
                )
            else:
                stat[k] = STATUS_PARALLEL
                reason[k] = (
                    f"lines {lines_txt[k]} differ by at most {angle:.1f} deg "
                    f"< {min_angle_deg:g} deg: too nearly parallel to resolve the dip"
                )
            continue
        if not cond <= max_condition:
            stat[k] = STATUS_ILL
            reason[k] = (
                f"condition number {cond:.3g} > {max_condition:.3g}: the line directions "
                f"({angle:.1f} deg apart) are too unevenly weighted or nearly parallel"
            )
            continue
        nh = np.linalg.solve(nmat, a.T @ (wk * s[mem]))
        resid = s[mem] - a @ nh
        chi2 = float(np.sum(wk * resid**2))
        dof = len(mem) - 2
        factor = chi2 / dof if dof > 0 else np.nan
        # inflate only when the cluster's scatter is significantly larger than its stated
        # errors (chi2 above its 95 % quantile: the reflector is not planar across it)
        # the 95 % point of the chi-square distribution with dof degrees of freedom, 2 P^-1(dof/2, 0.95)
        # with P the regularised lower incomplete gamma function (as scipy.stats.chi2.ppf computes it,
        # without importing scipy.stats: 0.4 s)
        inflate = dof > 0 and chi2 > 2.0 * gammaincinv(dof / 2.0, 0.95)
        cov = (factor if inflate else 1.0) * np.linalg.inv(nmat)
        out["variance_factor"][k] = factor
        out["normal_h"][k] = nh
        out["covariance"][k] = cov
        r = float(np.hypot(nh[0], nh[1]))
        if r >= 1.0:
            stat[k] = STATUS_NONPHYSICAL
            reason[k] = f"|n_h| = {r:.4f} >= 1 (sin of the dip): the gathers' dips are inconsistent"
            continue
        sigma_r = float(np.sqrt(nh @ cov @ nh)) / r if r > 0 else float(np.sqrt(np.trace(cov)))
        if r + 2.0 * sigma_r >= 1.0:
            stat[k] = STATUS_POOR
            reason[k] = (
                f"|n_h| = {r:.3f} +- {sigma_r:.3f}: the 2-sigma range of the dip reaches vertical, "
                "so the dip is not constrained (too few or too noisy gathers)"
            )
            continue
        out["dip_deg"][k] = np.degrees(np.arcsin(r))
        out["dip_direction_deg"][k] = vector_azimuth_deg(-nh[0], -nh[1])
        # first-order propagation: d(dip)/dn_h = n_h / (r sqrt(1 - r^2)); d(az)/dn_h = (n_y, -n_x) / r^2
        if r > 0:
            gd = nh / (r * np.sqrt(1.0 - r * r))
            ga = np.array([nh[1], -nh[0]]) / (r * r)
            out["sigma_dip_deg"][k] = np.degrees(np.sqrt(gd @ cov @ gd))
            out["sigma_dip_direction_deg"][k] = min(180.0, float(np.degrees(np.sqrt(ga @ cov @ ga))))
        else:
            out["sigma_dip_deg"][k] = np.degrees(np.sqrt(np.max(np.linalg.eigvalsh(cov))))
            out["sigma_dip_direction_deg"][k] = 180.0
        stat[k] = STATUS_OK
        reason[k] = f"{len(mem)} gathers on {len(names)} line(s), directions {angle:.1f} deg apart"

    return DipMeasurements(
        x_m=out["x_m"],
        y_m=out["y_m"],
        reflector=reflector_out,
        dip_deg=out["dip_deg"],
        dip_direction_deg=out["dip_direction_deg"],
        strike_deg=strike_from_dip_direction(out["dip_direction_deg"]),
        sigma_dip_deg=out["sigma_dip_deg"],
        sigma_dip_direction_deg=out["sigma_dip_direction_deg"],
        lines=lines_txt,
        n_lines=n_lines,
        n_gathers=n_members,
        max_angle_deg=out["max_angle_deg"],
        condition_number=out["condition_number"],
        variance_factor=out["variance_factor"],
        normal_h=out["normal_h"],
        covariance=out["covariance"],
        status=stat,
        reason=reason,
        gather_measurement=membership,
        radius_m=float(radius_m),
    )


def _crossing_clusters(crossings, xy, usable, refl, line, radius_m):
    """Clusters of :func:`combine_lines` at line crossings (see there) and the gathers' membership."""
    from scipy.spatial import cKDTree

    g = len(refl)
    cx = np.asarray(crossings.x_m, float)
    cy = np.asarray(crossings.y_m, float)
    pairs = {frozenset((str(a), str(b))) for a, b in zip(crossings.line_a, crossings.line_b)}
    meets = {name for pair in pairs for name in pair}
    clusters: list[tuple[str, np.ndarray]] = []
    membership = np.full(g, -1, dtype=np.int64)
    best = np.full(g, np.inf)
    for name in sorted(set(refl[usable])):
        idx = np.flatnonzero(usable & (refl == name))
        if len(cx):
            tree = cKDTree(xy[idx])
            for c, nb in enumerate(tree.query_ball_point(np.column_stack([cx, cy]), r=radius_m)):
                if not nb:
                    continue
                mem = idx[np.sort(np.asarray(nb, dtype=np.int64))]
                d = np.hypot(xy[mem, 0] - cx[c], xy[mem, 1] - cy[c])
                closer = d < best[mem]
                membership[mem[closer]] = len(clusters)
                best[mem[closer]] = d[closer]
                clusters.append((name, mem))
        for ln in sorted(set(line[idx]) - meets):  # lines that meet no other line
            mem = idx[line[idx] == ln]
            membership[mem] = len(clusters)
            clusters.append((name, mem))
    return clusters, membership


def cross_components(gathers: GatherSet, dips: DipMeasurements, max_distance_m: Optional[float] = None) -> np.ndarray:
    r"""Find the resolved cross-line component :math:`q_k = -\mathbf w_k\cdot\mathbf n_h` of each gather.

    Uses the measurement each gather belongs to (``dips.gather_measurement``)
    when its status is ``"ok"``. With ``max_distance_m``, a gather outside
    any good measurement takes the nearest good measurement of its reflector
    whose centre lies within that distance of the gather's source. NaN where
    nothing applies. Feed the result to the shot fits (``cross_component``) to
    refit with the resolved cross-line dip, NaN entries meaning "not
    resolved" (use 0 there).

    Parameters
    ----------
    gathers : GatherSet
        The gathers (cross units, sources, reflector labels).
    dips : DipMeasurements
        From :func:`combine_lines`.
    max_distance_m : float, optional
        Reach of a good measurement to gathers outside it (m).

    Returns
    -------
    (g,) ndarray
        q per gather (dimensionless, |q| < 1), NaN where not resolved.
    """
    from scipy.spatial import cKDTree

    w = np.asarray(gathers.cross_unit, dtype=float)
    k = np.asarray(dips.gather_measurement, dtype=np.int64).copy()
    good_m = np.asarray(dips.status) == STATUS_OK
    has = k >= 0
    has[has] = good_m[k[has]]
    k[~has] = -1
    if max_distance_m is not None and good_m.any():
        refl_g = np.asarray(gathers.reflector).astype(str)
        refl_m = np.asarray(dips.reflector).astype(str)
        src = np.asarray(gathers.source_xyz_g, dtype=float)[:, :2]
        for name in set(refl_m[good_m]):
            rows = np.flatnonzero(good_m & (refl_m == name))
            todo = np.flatnonzero(~has & (refl_g == name))
            if len(todo) == 0:
                continue
            tree = cKDTree(np.column_stack([dips.x_m[rows], dips.y_m[rows]]))
            dist, j = tree.query(src[todo], k=1)
            near = dist <= max_distance_m
            k[todo[near]] = rows[j[near]]
            has[todo[near]] = True
    q = np.full(len(k), np.nan)
    nh = np.asarray(dips.normal_h, dtype=float)
    q[has] = -np.sum(w[has] * nh[k[has]], axis=1)
    return q


def resolve_cross_dips(
    gathers: GatherSet,
    refit: Callable[[np.ndarray], Any],
    fits: Any = None,
    *,
    radius_m: Optional[float] = None,
    min_angle_deg: float = 30.0,
    max_condition: Optional[float] = None,
    max_distance_m: Optional[float] = None,
    max_iter: int = 8,
    tol: float = 1e-9,
    crossings: Any = None,
) -> tuple[Any, DipMeasurements, np.ndarray, int]:
    r"""Alternate :func:`combine_lines` and a refit with the resolved cross-line components.

    A gather fitted with q assumed 0 has a slightly biased s where the
    receivers are not level with the source or not on a straight line (the
    image-source time involves q through the cross-line offsets and
    :math:`c = \sqrt{1-s^2-q^2}`), so the first combination is slightly off;
    refitting with the resolved q and combining again converges in a few
    rounds (a fixed-point iteration). Stops when no q changes by more than
    ``tol`` or after ``max_iter`` rounds.

    Parameters
    ----------
    gathers : GatherSet
        The gathers.
    refit : callable
        ``refit(q) -> fits`` with q per gather (0 where unresolved), e.g.
        ``lambda q: shot_fits.fit_shot_gathers(gathers, settings, cross_component=q)``.
    fits : ShotFits or alike, optional
        Fits with q = 0 to start from (``refit(zeros)`` when omitted).
    radius_m, min_angle_deg, max_condition : float, optional
        Passed to :func:`combine_lines` (m, degrees, dimensionless).
    max_distance_m : float, optional
        Passed to :func:`cross_components` (m).
    max_iter : int
        Most refits.
    tol : float
        Largest change of any q (dimensionless) that counts as converged.
    crossings : Crossings, optional
        Passed to :func:`combine_lines` (measure at line crossings).

    Returns
    -------
    fits, dips, q, rounds
        The last fits (made with ``q``), the last :class:`DipMeasurements`,
        q per gather (NaN unresolved) and the number of refits done.
    """
    g = gathers.n_gathers
    if fits is None:
        fits = refit(np.zeros(g))
    q_used = np.zeros(g)
    rounds = 0
    for rounds in range(1, max_iter + 1):
        dips = combine_lines(
            gathers,
            fits,
            radius_m=radius_m,
            min_angle_deg=min_angle_deg,
            max_condition=max_condition,
            crossings=crossings,
        )
        q = cross_components(gathers, dips, max_distance_m=max_distance_m)
        q_new = np.where(np.isfinite(q), q, 0.0)
        change = float(np.max(np.abs(q_new - q_used))) if g else 0.0
        if change <= tol:
            return fits, dips, q, rounds - 1
        fits = refit(q_new)
        q_used = q_new
    dips = combine_lines(
        gathers,
        fits,
        radius_m=radius_m,
        min_angle_deg=min_angle_deg,
        max_condition=max_condition,
        crossings=crossings,
    )
    return fits, dips, cross_components(gathers, dips, max_distance_m=max_distance_m), rounds


# ---------------------------------------------------------------------------
# Surface dips
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class SurfaceDips:
    """Dip symbols sampled from a gridded reflector surface (one row per symbol).

    Attributes
    ----------
    x_m, y_m : (k,) ndarray
        Symbol position (m, working CRS).
    elevation_m : (k,) ndarray
        Surface elevation there (m).
    dip_deg : (k,) ndarray
        Dip of the surface (degrees).
    dip_direction_deg, strike_deg : (k,) ndarray
        Dip direction and right-hand-rule strike (degrees clockwise from north).
    """

    x_m: np.ndarray
    y_m: np.ndarray
    elevation_m: np.ndarray
    dip_deg: np.ndarray
    dip_direction_deg: np.ndarray
    strike_deg: np.ndarray

    def __len__(self) -> int:
        """Return the number of symbols."""
        return len(self.x_m)


def surface_dips(
    x_m: ArrayLike, y_m: ArrayLike, z_grid: ArrayLike, spacing_m: float, mask: Optional[ArrayLike] = None
) -> SurfaceDips:
    r"""Dip and dip direction of a gridded surface, sampled every ``spacing_m``.

    .. math::

        \delta = \arctan|\nabla z|, \qquad \phi = \operatorname{az}(-\nabla z)

    with the gradient by central differences in metres
    (``numpy.gradient`` with the axis coordinates, so a north-up grid with
    decreasing y is handled). Cells whose gradient involves a NaN cell are
    skipped.

    Parameters
    ----------
    x_m : (nx,) array_like
        Cell-centre eastings (m; equally or unequally spaced, monotonic).
    y_m : (ny,) array_like
        Cell-centre northings (m; increasing or decreasing).
    z_grid : (ny, nx) array_like
        Elevations (m), NaN = no data.
    spacing_m : float
        Distance between symbols (m; rounded to whole cells, at least one).
    mask : (ny, nx) bool array_like, optional
        True where symbols may be placed.

    Returns
    -------
    SurfaceDips
        One row per symbol.

    Raises
    ------
    InversionError
        Grid and axes of different shapes, a grid under 2 x 2, a spacing that
        is not a positive distance, or a mask of another shape.

    Examples
    --------
    >>> x = np.arange(5.0) * 10; y = np.arange(4.0) * 10
    >>> z = -0.5 * x[None, :] + 0 * y[:, None]   # deepens toward the east
    >>> d = surface_dips(x, y, z, 20.0)
    >>> round(float(d.dip_deg[0]), 4), float(d.dip_direction_deg[0]), float(d.strike_deg[0])
    (26.5651, 90.0, 0.0)
    """
    x = np.asarray(x_m, dtype=float)
    y = np.asarray(y_m, dtype=float)
    z = np.asarray(z_grid, dtype=float)
    if z.shape != (len(y), len(x)):
        raise InversionError(
            f"z_grid has shape {z.shape} but the axes give (len(y_m), len(x_m)) = ({len(y)}, {len(x)}); "
            "pass rows along y and columns along x"
        )
    if not (np.isfinite(spacing_m) and spacing_m > 0):
        raise InversionError(f"spacing_m = {spacing_m!r}: give a positive distance between symbols")
    if len(x) < 2 or len(y) < 2:
        raise InversionError(f"a grid of {len(y)} x {len(x)} cells is too small for a gradient (need 2 x 2)")
    dz_dy, dz_dx = np.gradient(z, y, x)
    step_x = max(1, round(float(spacing_m / abs(np.median(np.diff(x))))))
    step_y = max(1, round(float(spacing_m / abs(np.median(np.diff(y))))))
    iy = np.arange(step_y // 2, len(y), step_y)
    ix = np.arange(step_x // 2, len(x), step_x)
    jj_grid, ii_grid = np.meshgrid(iy, ix, indexing="ij")
    jj = jj_grid.ravel()
    ii = ii_grid.ravel()
    gx = dz_dx[jj, ii]
    gy = dz_dy[jj, ii]
    keep = np.isfinite(gx) & np.isfinite(gy) & np.isfinite(z[jj, ii])
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != z.shape:
            raise InversionError(f"mask has shape {mask.shape}, expected the grid's {z.shape}")
        keep &= mask[jj, ii]
    jj, ii, gx, gy = jj[keep], ii[keep], gx[keep], gy[keep]
    dip = np.degrees(np.arctan(np.hypot(gx, gy)))
    dd = vector_azimuth_deg(-gx, -gy)
    return SurfaceDips(
        x_m=x[ii],
        y_m=y[jj],
        elevation_m=z[jj, ii],
        dip_deg=dip,
        dip_direction_deg=dd,
        strike_deg=strike_from_dip_direction(dd),
    )
