"""Starting model of the joint estimate from the per-gather fits (Dix), and site-velocity checks.

A gather's fit gives, for its reflector, t0 and the moveout velocity, which
over a stack of near-flat layers is the rms velocity of the layers above
[Dix 1955]. Under each shot that has fits of several reflectors the Dix
relation gives interval velocities and thicknesses
(:func:`~rockhead.core.seismic.dix.dix_intervals`); the depth of each
reflector point is rescaled from the rms-velocity depth to the Dix depth.
The median interval velocity of each layer starts that layer's (constant)
velocity. Each reflector point's depth is then recomputed as a layer cake
of those site velocities and the shot's own zero-offset times (robust where
a curved reflector biases one gather's moveout velocity, not its t0), which
start and calibrate the interfaces (their plane trend and variogram, :mod:`.prior`). V_rms is not the vertical average
velocity: with 600 m/s over 1,600 m/s the rms-velocity depth of the lower
reflector is about 7 % too deep, which is what the rescaling removes.

References
----------
[Dix 1955] Dix, C. H. (1955). Seismic velocities from surface measurements.
    Geophysics 20(1), 68-86.
[Huber 1964] Huber, P. J. (1964). Robust estimation of a location parameter.
    Annals of Mathematical Statistics 35(1), 73-101.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InversionError
from ..seismic.dix import dix_intervals

__all__ = ["GatherPoints", "StartModel", "curvature_flags", "robust_site_velocity", "start_from_gathers"]


@dataclass(frozen=True)
class GatherPoints:
    """Per-gather fit results the start model needs (one row per gather).

    Attributes
    ----------
    key : str array
        Shot identity (e.g. line and shot label); gathers of one shot share it.
    reflector : str array
    x_m, y_m : float arrays
        Reflector point position (m).
    ground_m : float array
        Ground elevation at the point (m).
    depth_m, sigma_m : float arrays
        Depth of the point from the gather's fit (m) and its standard error.
    t0_s, velocity_m_s : float arrays
        Zero-offset time (s) and fitted (rms) velocity (m/s).
    se_t0_s, se_velocity_m_s : float arrays
        Their standard errors.
    ok : bool array
        Usable fit.
    """

    key: np.ndarray
    reflector: np.ndarray
    x_m: np.ndarray
    y_m: np.ndarray
    ground_m: np.ndarray
    depth_m: np.ndarray
    sigma_m: np.ndarray
    t0_s: np.ndarray
    velocity_m_s: np.ndarray
    se_t0_s: np.ndarray
    se_velocity_m_s: np.ndarray
    ok: np.ndarray

    @classmethod
    def from_fit(cls, gathers, fits, points) -> GatherPoints:
        """From a gather set, its shot fits and their zero-offset reflector points (one per gather)."""
        n = gathers.n_gathers
        idx = np.full(n, -1, np.int64)
        idx[np.asarray(points.gather, np.int64)] = np.arange(len(points))
        have = idx >= 0
        j = np.where(have, idx, 0)

        def col(a):
            return np.where(have, np.asarray(a, float)[j], np.nan)

        key = np.array([f"{a}\x1f{b}" for a, b in zip(gathers.line, gathers.shot)], dtype=object)
        ok = have & (np.asarray(fits.status) == "ok") & np.isfinite(col(points.elevation_m))
        return cls(
            key,
            np.asarray(gathers.reflector).astype(str),
            col(points.x_m),
            col(points.y_m),
            col(points.ground_m),
            col(points.depth_m),
            col(points.sigma_m),
            np.asarray(fits.t0_s, float),
            np.asarray(fits.velocity_m_s, float),
            np.asarray(fits.se_t0_s, float),
            np.asarray(fits.se_velocity_m_s, float),
            ok,
        )


@dataclass(frozen=True)
class StartModel:
    """Starting interfaces (as points) and layer velocities, top down.

    Attributes
    ----------
    names : tuple of str
        Reflectors, top down.
    points : tuple of (x_m, y_m, elevation_m, sigma_m) arrays per interface
        Gather-fit points with Dix depths.
    interval_velocity_m_s : (K,) median Dix interval velocity of each layer.
    interval_spread_m_s : (K,) 1.4826 MAD of those velocities.
    n_shots : (K,) shots that gave each layer's interval velocity.
    depth_scale : (K,) median ratio of the layer-cake depth to the gather's own (rms-velocity) depth.
    """

    names: tuple
    points: tuple
    interval_velocity_m_s: np.ndarray
    interval_spread_m_s: np.ndarray
    n_shots: np.ndarray
    depth_scale: np.ndarray


def _robust(values):
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return np.nan, np.nan, 0
    med = float(np.median(v))
    return med, 1.4826 * float(np.median(np.abs(v - med))), int(v.size)


def start_from_gathers(points: GatherPoints, order) -> StartModel:
    """Interval velocities (Dix) and Dix-depth reflector points, top down.

    Parameters
    ----------
    points : GatherPoints
    order : sequence of str
        Reflector labels top down.

    Returns
    -------
    StartModel

    Examples
    --------
    One shot over 5 m at 600 m/s and 25 m at 1600 m/s (rms velocity of the
    lower reflector 1362 m/s, so its rms-velocity depth is 34.0 m, Dix 30 m):

    >>> t0 = np.array([2 * 5 / 600, 2 * 5 / 600 + 2 * 25 / 1600])
    >>> vrms = np.sqrt([600.0**2, (600**2 * t0[0] + 1600**2 * (t0[1] - t0[0])) / t0[1]])
    >>> g = GatherPoints(np.array(["A1", "A1"]), np.array(["wt", "rock"]), np.zeros(2), np.zeros(2),
    ...                  np.full(2, 100.0), vrms * t0 / 2, np.full(2, 0.1), t0, vrms, np.full(2, 1e-4),
    ...                  np.full(2, 5.0), np.ones(2, bool))
    >>> s = start_from_gathers(g, ["wt", "rock"])
    >>> [round(float(v)) for v in s.interval_velocity_m_s], [round(float(z), 6) for z in s.points[1][2]]
    ([600, 1600], [70.0])
    """
    names = tuple(str(n) for n in order)
    K = len(names)
    refl = np.asarray(points.reflector).astype(str)
    key = np.asarray(points.key).astype(str)
    ok = np.asarray(points.ok, bool) & np.isfinite(points.t0_s) & np.isfinite(points.velocity_m_s)
    ok &= np.isfinite(points.depth_m) & np.isfinite(points.x_m) & np.isfinite(points.y_m)
    rank = {n: i for i, n in enumerate(names)}
    layer_v: list[list[float]] = [[] for _ in range(K)]
    for k in sorted(set(key[ok].tolist())):
        idx = np.flatnonzero(ok & (key == k) & np.isin(refl, names))
        if idx.size == 0:
            continue
        idx = idx[np.argsort([rank[r] for r in refl[idx]], kind="stable")]
        ranks = np.array([rank[r] for r in refl[idx]])
        # Dix needs the layers from the ground down: use the leading run 0, 1, 2, ... of this shot
        run = int(np.argmax(np.r_[ranks != np.arange(ranks.size), True]))
        if run == 0:
            continue
        idx = idx[:run]
        d = dix_intervals(points.t0_s[idx], points.velocity_m_s[idx], points.se_t0_s[idx], points.se_velocity_m_s[idx])
        if np.any(d.order != np.arange(run)):  # t0 out of the stated order: not a Dix stack
            continue
        for j in range(run):
            if d.status[j] == "ok":
                layer_v[j].append(float(d.interval_velocity_m_s[j]))
    vel = np.full(K, np.nan)
    spread = np.full(K, np.nan)
    nshot = np.zeros(K, int)
    for j in range(K):
        vel[j], spread[j], nshot[j] = _robust(layer_v[j])
    if not np.isfinite(vel[0]):
        v_top = ok & (refl == names[0])
        vel[0], spread[0], nshot[0] = _robust(points.velocity_m_s[v_top])
    if not np.isfinite(vel[0]):
        raise InversionError(
            f"no usable gather fit of the top reflector '{names[0]}' to start the layer velocities; "
            "check the picks of that reflector"
        )
    for j in range(1, K):
        if not np.isfinite(vel[j]):
            raise InversionError(
                f"no shot has usable fits of '{names[j - 1]}' and '{names[j]}' together, so the interval "
                f"velocity between them cannot be started (Dix 1955); pick both reflectors on some shots"
            )
    # depths by the layer cake of the site's interval velocities and each shot's own t0
    # (a gather's own moveout velocity is biased where the reflector curves; its t0 is not)
    t0: dict[tuple[str, int], float] = {}
    for i in np.flatnonzero(ok & np.isin(refl, names)):
        t0[(key[i], rank[refl[i]])] = float(points.t0_s[i])
    dt_site = np.zeros(K)
    for j in range(K):
        diffs = [
            t0[(kk, j)] - (t0[(kk, j - 1)] if j else 0.0)
            for (kk, jj) in t0
            if jj == j and (j == 0 or (kk, j - 1) in t0)
        ]
        positive = [v for v in diffs if v > 0]
        dt_site[j] = float(np.median(positive)) if positive else np.nan
    for j in range(K):
        if not np.isfinite(dt_site[j]):
            dt_site[j] = float(np.nanmedian(dt_site)) if np.any(np.isfinite(dt_site)) else 0.0
    pts = []
    med_scale = np.ones(K)
    for j, name in enumerate(names):
        sel = np.flatnonzero(ok & (refl == name))
        new_depth = np.empty(sel.size)
        for n_i, i in enumerate(sel):
            col = [t0.get((key[i], m)) for m in range(j + 1)]
            if all(c is not None for c in col):
                dts = np.diff(np.r_[0.0, col])
            else:  # an upper reflector not picked here: the site's average velocity down to this one
                dts = dt_site[: j + 1] * points.t0_s[i] / max(float(np.sum(dt_site[: j + 1])), 1e-12)
            new_depth[n_i] = float(np.sum(vel[: j + 1] * np.maximum(dts, 0.0))) / 2
        s = new_depth / (points.velocity_m_s[sel] * points.t0_s[sel] / 2)  # this gather's depth ratio
        fin = np.isfinite(s) & (s > 0)
        med_scale[j] = float(np.median(s[fin])) if fin.any() else 1.0
        s = np.where(fin, s, med_scale[j])
        depth = points.depth_m[sel] * s
        pts.append((points.x_m[sel], points.y_m[sel], points.ground_m[sel] - depth, points.sigma_m[sel] * s))
    return StartModel(names, tuple(pts), vel, spread, nshot, med_scale)


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
    if status is None:
        usable = np.ones(v.size, bool)
    else:
        s = np.asarray(status)
        usable = (
            s.ravel()
            if s.dtype == bool
            else np.array([str(x).strip().lower() in ("ok", "fitted", "good", "") for x in s.ravel()])
        )
    ok = usable & np.isfinite(v) & (v > 0) & np.isfinite(se)
    if not ok.any():
        return float("nan"), float("nan"), 0
    med, spread, n = _robust(v[ok])
    return med, spread, n


def curvature_flags(velocity_m_s, se_velocity_m_s, site_velocity_m_s, site_spread_m_s, k: float = 3.0):
    """Flag gathers whose velocity departs from the site value beyond its error.

    A gather is flagged when

    .. math::

        |V_g - V_{site}| > k\\sqrt{\\sigma_g^2 + s_{site}^2}

    with its standard error :math:`\\sigma_g` and the site spread
    :math:`s_{site}` (natural scatter). Over a trough (focusing) the fitted
    velocity comes out too high, over a ridge (defocusing) too low.

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
