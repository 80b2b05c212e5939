r"""Common-midpoint gathers: sorting picks into midpoint bins and fitting the NMO hyperbola.

:func:`cmp_bins` sorts source-receiver pairs into midpoint bins along a line;
:func:`fit_cmp_gathers` fits :math:`t^2 = t_0^2 + x^2/V_{nmo}^2` per bin
[Levin 1971] with the shared procedure of :mod:`.gather_fit` (robust loss,
mispick rejection, covariance, status). The iteration works on
:math:`\ln t_0` and :math:`\ln V_{nmo}`, which keeps both positive.

References
----------
[Levin 1971] Levin, F. K. (1971). Apparent velocity from dipping interface
    reflections. Geophysics 36(3), 510-516.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Optional

import numpy as np

from ..errors import InversionError
from ..survey.model import Settings
from .batch import pad, pad_layout, safe_solve, unpad
from .gather_fit import check_pick_times, exclude_mask, fit_padded_gathers
from .lm import Rows

__all__ = ["CmpFits", "cmp_bins", "fit_cmp_gathers", "midpoint_spacing"]

_DEFAULT_SETTINGS = Settings()  # frozen, safe to share as a default


@dataclass(frozen=True)
class CmpFits:
    """Fits of common-midpoint gathers: :math:`t^2 = t_0^2 + x^2/V_{nmo}^2`.

    Per gather: ``t0_s``, ``nmo_velocity_m_s``, ``se_t0_s``,
    ``se_nmo_velocity_m_s``, ``covariance`` (g, 2, 2) of (t0, Vnmo),
    ``rms_residual_s``, ``picks_used``, ``picks_rejected``, ``picks_excluded``,
    ``variance_factor``, ``condition_number``, ``status``, ``reason``,
    ``iterations``. Per pick: ``residual_s``, ``rejected``, ``excluded``,
    ``weight``.
    """

    t0_s: np.ndarray
    nmo_velocity_m_s: np.ndarray
    se_t0_s: np.ndarray
    se_nmo_velocity_m_s: np.ndarray
    covariance: np.ndarray
    rms_residual_s: np.ndarray
    picks_used: np.ndarray
    picks_rejected: np.ndarray
    picks_excluded: np.ndarray
    variance_factor: np.ndarray
    condition_number: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    iterations: np.ndarray
    residual_s: np.ndarray
    rejected: np.ndarray
    excluded: np.ndarray
    weight: np.ndarray

    def __len__(self) -> int:
        """Return the number of gathers."""
        return len(self.t0_s)

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of the gathers with status ``ok``."""
        return self.status == "ok"


class _CmpModel:
    """NMO hyperbola :math:`t^2 = t_0^2 + x^2/V_{nmo}^2` [Levin 1971]."""

    n_params: int = 2
    names: tuple[str, ...] = ("t0", "NMO velocity")

    def __init__(self, x: np.ndarray):
        self.x = x
        self.x2 = x * x
        self.offset_key = np.abs(x)
        self.offset_resolution = 0.01

    def take(self, rows: Rows) -> _CmpModel:
        """Return the model restricted to some gathers (index, boolean mask or slice)."""
        if isinstance(rows, slice) and rows == slice(None):
            return self
        return _CmpModel(self.x[rows])

    def natural(self, theta: np.ndarray) -> np.ndarray:
        """Return (t0, Vnmo) from (ln t0, ln Vnmo)."""
        return np.exp(theta)

    def natural_jacobian(self, J: np.ndarray, theta: np.ndarray) -> np.ndarray:
        """Return the Jacobian in (t0, Vnmo) from the one in (ln t0, ln Vnmo)."""
        return J / np.exp(theta)[:, :, None]

    def internal(self, params: np.ndarray) -> np.ndarray:
        """Return (ln t0, ln Vnmo) of (t0, Vnmo)."""
        return np.log(params)

    def evaluate(
        self, theta: np.ndarray, natural: bool = False, jacobian: bool = True
    ) -> tuple[np.ndarray, Optional[np.ndarray]]:
        """Return predicted times (k, n) and Jacobian (k, 2, n) (None with ``jacobian=False``)."""
        x2 = self.x2
        if natural:
            t0, vn = theta[:, 0, None], theta[:, 1, None]
        else:
            t0, vn = np.exp(theta[:, 0, None]), np.exp(theta[:, 1, None])
        t = np.sqrt(t0 * t0 + x2 / (vn * vn))
        if not jacobian:
            return t, None
        J = np.empty((t.shape[0], 2, t.shape[1]))
        if natural:
            J[:, 0] = t0 / t
            J[:, 1] = -x2 / (vn**3 * t)
        else:
            J[:, 0] = t0 * t0 / t
            J[:, 1] = -x2 / (vn * vn * t)
        return t, J

    def start(
        self, t: np.ndarray, sigma: np.ndarray, usable: np.ndarray, settings: Settings
    ) -> tuple[np.ndarray, np.ndarray]:
        r"""Return internal start parameters and a flag for a physical start.

        Weighted linear least squares of :math:`t^2 = c_0 + a x^2` with
        :math:`\sigma(t^2) = 2t\sigma_t`.
        """
        w = np.where(usable, 1.0 / (2.0 * t * sigma) ** 2, 0.0)
        x2 = self.x**2
        y = t * t
        A = np.empty((len(t), 2, 2))
        A[:, 0, 0] = np.sum(w, axis=1)
        A[:, 0, 1] = A[:, 1, 0] = np.sum(w * x2, axis=1)
        A[:, 1, 1] = np.sum(w * x2 * x2, axis=1)
        b = np.column_stack([np.sum(w * y, axis=1), np.sum(w * x2 * y, axis=1)])
        c0, a = safe_solve(A, b).T
        tmin = np.min(np.where(usable, t, np.inf), axis=1)
        tmin = np.where(np.isfinite(tmin), tmin, 1.0)
        good = (a > 0) & (c0 > 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            t0 = np.where(good, np.sqrt(np.abs(c0)), 0.9 * tmin)
            vn = np.where(a > 0, np.abs(a) ** -0.5, settings.velocity_max_m_s)
        t0 = np.where(np.isfinite(t0) & (t0 > 0), t0, 0.9 * tmin)
        vn = np.where(np.isfinite(vn) & (vn > 0), vn, settings.velocity_max_m_s)
        return np.log(np.column_stack([t0, vn])), good

    def reference(self, params: np.ndarray, settings: Settings) -> np.ndarray:
        """Return the nearest plausible parameters (for the conditioning check)."""
        t0, vn = params.T
        vr = np.clip(
            np.nan_to_num(vn, nan=settings.velocity_max_m_s),
            settings.velocity_min_m_s,
            settings.velocity_max_m_s,
        )
        return np.column_stack([np.maximum(np.nan_to_num(t0, nan=1e-3), 1e-5), vr])

    def physical(self, params: np.ndarray, settings: Settings) -> tuple[np.ndarray, dict[int, str]]:
        """Return a flag for non-physical parameters and a reason for each flagged gather."""
        t0, vn = params.T
        lo, hi = settings.velocity_min_m_s, settings.velocity_max_m_s
        bad_v = ~((vn >= lo) & (vn <= hi))
        bad_t = ~(t0 > 1e-5)
        bad = bad_v | bad_t
        reasons: dict[int, str] = {}
        for k in np.flatnonzero(bad):
            if bad_v[k]:
                reasons[int(k)] = (
                    f"fitted NMO velocity {vn[k]:.0f} m/s is outside the plausible range "
                    f"{lo:.0f}-{hi:.0f} m/s; check the picks or the velocity limits"
                )
            else:
                reasons[int(k)] = f"fitted zero-offset time {t0[k] * 1e3:.3g} ms is not positive; check the picks"
        return bad, reasons


def fit_cmp_gathers(
    gather_id: np.ndarray,
    offset_m: np.ndarray,
    time_s: np.ndarray,
    sigma_s: np.ndarray,
    settings: Settings = _DEFAULT_SETTINGS,
    exclude: Optional[np.ndarray] = None,
    progress: Any = None,
) -> CmpFits:
    r"""Fit the NMO hyperbola per common-midpoint gather [Levin 1971].

    .. math::

        t^2 = t_0^2 + \frac{x^2}{V_{nmo}^2}, \qquad
        V_{nmo} = \frac{V}{\sqrt{1 - \sin^2\delta\cos^2\beta}}

    Linear start from weighted least squares of :math:`t^2 = c_0 + a x^2`
    (:math:`\sigma(t^2) = 2t\sigma_t`), then the same robust engine,
    rejection, covariance and status rules as the shot fits (:mod:`.gather_fit`;
    two parameters: at least three distinct |offsets|). The plausible range of
    ``settings`` is applied to :math:`V_{nmo}`.

    Parameters
    ----------
    gather_id : (n,) int array_like, >= 0
        Gather of each pick; gathers are ``0 .. max(gather_id)`` (empty ones
        are reported as ``too_few_picks``).
    offset_m : (n,) array_like
        Source-receiver offset (m; sign ignored).
    time_s : (n,) array_like
        Two-way times (s).
    sigma_s : (n,) array_like
        Pick errors (s).
    settings : Settings
        Uses ``min_picks``, ``velocity_min_m_s``, ``velocity_max_m_s`` (applied
        to the NMO velocity), ``robust_loss``, ``robust_scale``, ``reject_sigma``.
    exclude : None or (n,) bool array_like
        Picks the user excluded; reported as ``excluded``, not fitted.
    progress : object with ``set_progress``/``is_canceled``, optional
        Told the share done; cancelling raises :class:`~core.errors.CancelledError`.

    Returns
    -------
    CmpFits
        Per gather and per pick (see the class).

    Raises
    ------
    InversionError
        Gather numbers that are not non-negative integers, arrays of different
        lengths, a non-positive time or pick error, or bad robust-fit settings.

    Examples
    --------
    >>> x = np.arange(5.0, 100.0, 5.0)
    >>> t = np.sqrt(0.04**2 + x**2 / 2000.0**2)
    >>> f = fit_cmp_gathers(np.zeros(len(x), int), x, t, np.full(len(x), 5e-4))
    >>> f.status[0], round(float(f.nmo_velocity_m_s[0]), 6), round(float(f.t0_s[0]), 9)
    ('ok', 2000.0, 0.04)
    """
    gid = np.asarray(gather_id)
    if gid.size and (not np.issubdtype(gid.dtype, np.integer) or gid.min() < 0):
        raise InversionError("gather_id must be non-negative integers (use cmp_bins to number the bins)")
    gid = gid.astype(np.intp)
    time_s, sigma_s = check_pick_times(time_s, sigma_s)
    x = np.abs(np.asarray(offset_m, dtype=float))
    n = len(time_s)
    if not (len(gid) == len(x) == n == len(sigma_s)):
        raise InversionError(
            "gather_id, offset_m, time_s and sigma_s have lengths "
            f"{len(gid)}, {len(x)}, {n}, {len(sigma_s)}; "
            "expected one value per pick in each"
        )
    g = int(gid.max()) + 1 if n else 0
    ex = exclude_mask(exclude, n)
    row, col, nmax = pad_layout(gid, g)
    shape = (g, nmax)
    model = _CmpModel(pad(x, row, col, shape))
    valid = pad(True, row, col, shape, fill=False, dtype=bool)
    out = fit_padded_gathers(
        model,
        pad(time_s, row, col, shape, fill=1.0),
        pad(sigma_s, row, col, shape, fill=1.0),
        valid,
        pad(ex, row, col, shape, fill=False, dtype=bool),
        settings,
        progress,
    )
    cov = out.covariance
    with np.errstate(invalid="ignore"):
        se = np.sqrt(np.einsum("kii->ki", cov))
    return CmpFits(
        t0_s=out.params[:, 0],
        nmo_velocity_m_s=out.params[:, 1],
        se_t0_s=se[:, 0],
        se_nmo_velocity_m_s=se[:, 1],
        covariance=cov,
        rms_residual_s=out.rms_residual_s,
        picks_used=out.picks_used,
        picks_rejected=out.picks_rejected,
        picks_excluded=out.picks_excluded,
        variance_factor=out.variance_factor,
        condition_number=out.condition_number,
        status=out.status,
        reason=out.reason,
        iterations=out.iterations,
        residual_s=unpad(out.residual_s, row, col),
        rejected=unpad(out.rejected, row, col),
        excluded=ex.copy(),
        weight=unpad(out.weight, row, col),
    )


def midpoint_spacing(
    source_xy: np.ndarray, receiver_xy: np.ndarray, gather_id: np.ndarray, line_unit: np.ndarray
) -> np.ndarray:
    r"""Spacing of the midpoints of each gather along its line (m).

    The midpoints :math:`M = (S + R)/2` of one shot gather are projected on
    the line direction u; the spacing is the median of the positive gaps
    between consecutive projections (gaps under 1 mm count as one midpoint).
    With receivers every :math:`\Delta` it is :math:`\Delta/2`, the natural
    common-midpoint spacing (common practice).

    Parameters
    ----------
    source_xy, receiver_xy : (n, 2) or (n, 3) array_like
        Source and receiver positions of each pick (m; a third column is ignored).
    gather_id : (n,) int array_like
        Gather of each pick, 0 .. g-1.
    line_unit : (g, 2) array_like
        Unit vector along the line of each gather.

    Returns
    -------
    (g,) ndarray
        Midpoint spacing of each gather (m); NaN for a gather with fewer than
        two distinct midpoints.

    Examples
    --------
    >>> s = np.zeros((4, 2)); r = np.column_stack([[2.0, 4.0, 6.0, 8.0], np.zeros(4)])
    >>> midpoint_spacing(s, r, np.zeros(4, int), np.array([[1.0, 0.0]])).tolist()
    [1.0]
    """
    S = np.asarray(source_xy, dtype=float)[:, :2]
    R = np.asarray(receiver_xy, dtype=float)[:, :2]
    gid = np.asarray(gather_id, dtype=np.intp)
    U = np.asarray(line_unit, dtype=float).reshape(-1, 2)
    g = len(U)
    out = np.full(g, np.nan)
    if len(gid) == 0:
        return out
    p = np.sum(0.5 * (S + R) * U[gid], axis=1)
    order = np.lexsort((p, gid))
    gs, ps = gid[order], p[order]
    gap = np.diff(ps)
    same = gs[1:] == gs[:-1]
    keep = same & (gap > 1e-3)
    for k in np.unique(gs[1:][keep]):  # one median per gather; gathers are few (tens to hundreds)
        out[k] = float(np.median(gap[keep & (gs[1:] == k)]))
    return out


def cmp_bins(
    source_xy: np.ndarray,
    receiver_xy: np.ndarray,
    bin_size_m: Any,
    line_unit: Optional[np.ndarray] = None,
    group: Optional[np.ndarray] = None,
    centred: bool = False,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Sort source-receiver pairs into common-midpoint bins along a line.

    Midpoints :math:`M = (S + R)/2` are projected on the line direction u
    (``line_unit``, (2,) or (n, 2); the principal axis of the midpoints of
    each group when None). Bin k of a group covers projections
    :math:`[p_{min} + k\,b,\ p_{min} + (k+1)\,b)`; with ``centred`` it
    covers :math:`[p_{min} + (k - \tfrac12)\,b,\ p_{min} + (k + \tfrac12)\,b)`,
    so that midpoints on a lattice of spacing b starting at the first one
    each fall in the middle of their own bin (a few centimetres of survey
    scatter then never split or merge them). Picks of different ``group``
    labels (e.g. line and reflector) never share a bin.

    Parameters
    ----------
    source_xy, receiver_xy : (n, 2) or (n, 3) array_like
        Source and receiver positions (m; a third column is ignored).
    bin_size_m : float or (n,) array_like
        Bin length along the line (m, > 0); per pick, it must be the same
        within a group.
    line_unit : (2,) or (n, 2) array_like, optional
        Line direction (need not be a unit vector).
    group : (n,) array_like, optional
        Labels of picks that may share bins.
    centred : bool
        Centre the bins on the lattice of the first midpoint (see above).

    Returns
    -------
    gather_id : (n,) int ndarray
        Bin number of each pick, 0 .. m-1 over the non-empty bins.
    centre_xy : (m, 2) ndarray
        Mean midpoint of each bin (m).
    offset_m : (n,) ndarray
        Horizontal source-receiver distance (m).

    Raises
    ------
    InversionError
        Positions of different or wrong shapes, a bin size that is not a
        positive distance, or ``line_unit`` / ``group`` not matching the picks.

    Examples
    --------
    >>> s = np.array([[0.0, 0.0], [0.0, 0.0], [10.0, 0.0]])
    >>> r = np.array([[10.0, 0.0], [30.0, 0.0], [20.0, 0.0]])
    >>> gid, centres, off = cmp_bins(s, r, 2.0)
    >>> gid.tolist(), centres[:, 0].tolist(), off.tolist()
    ([0, 1, 1], [5.0, 15.0], [10.0, 30.0, 10.0])
    """
    S = np.asarray(source_xy, dtype=float)
    R = np.asarray(receiver_xy, dtype=float)
    if S.ndim != 2 or R.ndim != 2 or S.shape[1] < 2 or S.shape[:1] != R.shape[:1] or R.shape[1] < 2:
        raise InversionError(f"source_xy {S.shape} and receiver_xy {R.shape} must have the same shape (n, 2)")
    S, R = S[:, :2], R[:, :2]
    n = len(S)
    if isinstance(bin_size_m, np.ndarray) and bin_size_m.ndim == 1:
        b = bin_size_m.astype(float)
        if b.shape != (n,) or not np.all(np.isfinite(b) & (b > 0)):
            raise InversionError(
                f"bin_size_m has shape {b.shape} or values that are not positive distances; expected one "
                f"positive bin length (m) per pick, shape ({n},), or one number"
            )
    elif (
        isinstance(bin_size_m, bool)
        or not isinstance(bin_size_m, (int, float, np.number))
        or not (np.isfinite(bin_size_m) and bin_size_m > 0)
    ):
        raise InversionError(f"bin_size_m = {bin_size_m!r} must be a positive distance in metres")
    else:
        b = np.full(n, float(bin_size_m))
    if group is not None and np.shape(group) != (n,):
        raise InversionError(f"group has shape {np.shape(group)}; expected one label per pick, shape ({n},)")
    if line_unit is not None and np.shape(line_unit) not in ((2,), (n, 2)):
        raise InversionError(f"line_unit has shape {np.shape(line_unit)}; expected (2,) or ({n}, 2)")
    M = 0.5 * (S + R)
    off = np.hypot(*(R - S).T)
    labels = np.zeros(n, dtype=np.intp) if group is None else np.unique(np.asarray(group), return_inverse=True)[1]
    labels = labels.ravel()
    ng = int(labels.max()) + 1 if n else 0
    if line_unit is None:
        cnt = np.bincount(labels, minlength=ng).astype(float)
        mean = np.column_stack([np.bincount(labels, M[:, i], ng) for i in range(2)]) / np.maximum(cnt, 1)[:, None]
        dM = M - mean[labels]
        cxx = np.bincount(labels, dM[:, 0] ** 2, ng)
        cyy = np.bincount(labels, dM[:, 1] ** 2, ng)
        cxy = np.bincount(labels, dM[:, 0] * dM[:, 1], ng)
        ang = 0.5 * np.arctan2(2.0 * cxy, cxx - cyy)  # principal axis of a 2x2 covariance
        U = np.column_stack([np.cos(ang), np.sin(ang)])[labels]
    else:
        U = np.broadcast_to(np.asarray(line_unit, dtype=float), (n, 2))
        U = U / np.linalg.norm(U, axis=1, keepdims=True)
    proj = np.sum(M * U, axis=1)
    pmin = np.full(ng, np.inf)
    np.minimum.at(pmin, labels, proj)
    k = np.floor((proj - pmin[labels]) / b + (0.5 if centred else 1e-9)).astype(np.int64)
    key = labels.astype(np.int64) * (int(k.max()) + 1 if n else 1) + k
    _, gather_id = np.unique(key, return_inverse=True)
    gather_id = gather_id.ravel()
    m = int(gather_id.max()) + 1 if n else 0
    cnt = np.bincount(gather_id, minlength=m)
    centres = np.column_stack([np.bincount(gather_id, M[:, i], m) for i in range(2)]) / cnt[:, None]
    return gather_id, centres, off
