r"""Interval velocities and thicknesses from the rms velocities of several reflectors [Dix 1955].

At one location, each reflector's gather fit gives a zero-offset time
:math:`t_0` and, for near-horizontal layers, an rms velocity. The Dix relation
turns successive pairs into the interval velocity and thickness of the layer
between them. It is a cross-check of a layered model, not a substitute for
one: V_rms from a moveout fit is not the average velocity.

References
----------
[Dix 1955] Dix, C. H. (1955). Seismic velocities from surface measurements.
    Geophysics 20(1), 68-86.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Union

import numpy as np

from ..errors import InversionError

__all__ = ["DixIntervals", "dix_intervals"]


@dataclass(frozen=True)
class DixIntervals:
    """Interval properties between successive reflectors at one location.

    Row k describes the layer between reflector k-1 (the surface for k = 0)
    and reflector k, reflectors sorted by t0: ``t0_top_s``, ``t0_base_s``,
    ``interval_velocity_m_s``, ``thickness_m``, ``depth_base_m`` (sum of the
    thicknesses), their standard errors ``se_*``, ``status`` (``ok`` or
    ``nonphysical``) and ``reason``. Non-physical rows carry NaN values and a
    reason; the rows below them are still computed (the Dix relation only
    uses the two bounding reflectors).
    """

    t0_top_s: np.ndarray
    t0_base_s: np.ndarray
    interval_velocity_m_s: np.ndarray
    thickness_m: np.ndarray
    depth_base_m: np.ndarray
    se_interval_velocity_m_s: np.ndarray
    se_thickness_m: np.ndarray
    se_depth_base_m: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    order: np.ndarray  # index into the inputs of each row (sorted by t0)


def dix_intervals(
    t0_s: np.ndarray,
    vrms_m_s: np.ndarray,
    se_t0_s: Union[float, np.ndarray, None] = None,
    se_vrms_m_s: Union[float, np.ndarray, None] = None,
) -> DixIntervals:
    r"""Interval velocities and thicknesses from rms velocities at one location [Dix 1955].

    Reflectors are sorted by t0. With :math:`t_0 = 0` and :math:`V_0 = 0` for
    the surface,

    .. math::

        v_k^2 = \frac{V_k^2 t_k - V_{k-1}^2 t_{k-1}}{t_k - t_{k-1}}, \qquad
        z_k = \tfrac12 v_k (t_k - t_{k-1})

    Standard errors by the delta method from independent errors of each
    :math:`t_k` and :math:`V_k` (zero when not given). A layer whose
    numerator or time difference is not positive is flagged ``nonphysical``
    (NaN values, with a reason), never hidden; the depth below it is NaN too.

    Parameters
    ----------
    t0_s : (m,) array_like
        Zero-offset two-way time of each reflector (s).
    vrms_m_s : (m,) array_like
        Rms velocity down to each reflector (m/s).
    se_t0_s : float or (m,) array_like, optional
        Standard errors of the times (s; 0 when None).
    se_vrms_m_s : float or (m,) array_like, optional
        Standard errors of the rms velocities (m/s; 0 when None).

    Returns
    -------
    DixIntervals
        One row per layer, sorted by t0.

    Raises
    ------
    InversionError
        When the arrays do not hold one value per reflector.

    Examples
    --------
    >>> r = dix_intervals([0.02, 0.05], [1000.0, np.sqrt((1000.0**2 * 0.02 + 2000.0**2 * 0.03) / 0.05)])
    >>> [round(float(v), 6) for v in r.interval_velocity_m_s], [round(float(z), 6) for z in r.thickness_m]
    ([1000.0, 2000.0], [10.0, 30.0])
    """
    t = np.asarray(t0_s, dtype=float).ravel()
    v = np.asarray(vrms_m_s, dtype=float).ravel()
    if t.shape != v.shape:
        raise InversionError(f"t0_s has {t.size} values and vrms_m_s {v.size}; expected one of each per reflector")
    st = _per_reflector(se_t0_s, t.shape, "se_t0_s")
    sv = _per_reflector(se_vrms_m_s, v.shape, "se_vrms_m_s")
    order = np.argsort(t, kind="stable")
    t, v, st, sv = t[order], v[order], st[order], sv[order]
    tp = np.concatenate([[0.0], t[:-1]])
    vp = np.concatenate([[0.0], v[:-1]])
    stp = np.concatenate([[0.0], st[:-1]])
    svp = np.concatenate([[0.0], sv[:-1]])
    dt = t - tp
    num = v * v * t - vp * vp * tp
    ok = (dt > 0) & (num > 0) & np.isfinite(num) & np.isfinite(dt)
    with np.errstate(invalid="ignore", divide="ignore"):
        vi2 = np.where(ok, num / dt, np.nan)
        vi = np.sqrt(vi2)
        z = 0.5 * vi * dt
        # partial derivatives of vi^2 = num / dt
        d_t = (v * v - vi2) / dt
        d_tp = (vi2 - vp * vp) / dt
        d_v = 2.0 * v * t / dt
        d_vp = -2.0 * vp * tp / dt
        var_vi2 = (d_t * st) ** 2 + (d_tp * stp) ** 2 + (d_v * sv) ** 2 + (d_vp * svp) ** 2
        se_vi = np.sqrt(var_vi2) / (2.0 * vi)
        # z = 0.5 sqrt(num * dt): dz/dx = 0.25 / sqrt(num dt) * d(num dt)/dx
        k = 0.25 / np.sqrt(num * dt)
        dz_t = k * (v * v * dt + num)
        dz_tp = k * (-vp * vp * dt - num)
        dz_v = k * 2.0 * v * t * dt
        dz_vp = k * (-2.0 * vp * tp * dt)
        se_z = np.sqrt((dz_t * st) ** 2 + (dz_tp * stp) ** 2 + (dz_v * sv) ** 2 + (dz_vp * svp) ** 2)
    depth = np.cumsum(z)  # NaN propagates below a non-physical layer
    # depth_k = sum_{j<=k} z_j; z_j depends on (t_j, V_j) and (t_{j-1}, V_{j-1}), so the
    # Jacobian of depth with respect to all t and V is the running sum of those of z
    m = len(t)
    Jt = np.zeros((m, m))
    Jv = np.zeros((m, m))
    ii = np.arange(m)
    Jt[ii, ii] = dz_t
    Jv[ii, ii] = dz_v
    Jt[ii[1:], ii[1:] - 1] = dz_tp[1:]
    Jv[ii[1:], ii[1:] - 1] = dz_vp[1:]
    Dt = np.cumsum(Jt, axis=0)
    Dv = np.cumsum(Jv, axis=0)
    with np.errstate(invalid="ignore"):
        se_depth = np.sqrt(np.sum((Dt * st) ** 2 + (Dv * sv) ** 2, axis=1))
    se_depth = np.where(np.isfinite(depth), se_depth, np.nan)
    status = np.where(ok, "ok", "nonphysical").astype(object)
    reason = np.full(len(t), "interval velocity from the Dix relation", dtype=object)
    for k_ in np.flatnonzero(~ok):
        if not dt[k_] > 0:
            reason[k_] = f"reflector at t0 = {t[k_] * 1e3:.2f} ms is not below the one above it ({tp[k_] * 1e3:.2f} ms)"
        else:
            reason[k_] = (
                f"V_rms^2 t0 decreases from {vp[k_] ** 2 * tp[k_]:.4g} to {v[k_] ** 2 * t[k_]:.4g} m^2/s: "
                "negative interval velocity squared; the rms velocities are inconsistent"
            )
    return DixIntervals(
        t0_top_s=tp,
        t0_base_s=t,
        interval_velocity_m_s=vi,
        thickness_m=z,
        depth_base_m=depth,
        se_interval_velocity_m_s=se_vi,
        se_thickness_m=se_z,
        se_depth_base_m=se_depth,
        status=status,
        reason=reason,
        order=order,
    )


def _per_reflector(value: Union[float, np.ndarray, None], shape: tuple[int, ...], name: str) -> np.ndarray:
    """Broadcast standard errors to one per reflector (zeros for None)."""
    if value is None:
        return np.zeros(shape)
    a = np.asarray(value, dtype=float)
    if a.ndim > 1 or (a.ndim == 1 and a.size not in (1, shape[0])):
        raise InversionError(f"{name} has shape {a.shape}; expected one value or one per reflector, shape {shape}")
    return np.broadcast_to(a.ravel() if a.ndim else a, shape)
