r"""Fits of common-shot gathers: velocity, normal distance and along-line dip per gather.

The exact 3D image-source model of a homogeneous layer over a plane, with
topography and crooked receiver lines honoured [Sheriff & Geldart 1995,
ch. 4]. Unknowns per gather: velocity :math:`V`, normal distance :math:`h`
from the source to the plane and the along-line component
:math:`s = -\mathbf u\cdot\mathbf n = \sin\delta\cos\beta` of the downward
unit normal. The cross-line component :math:`q = -\mathbf w\cdot\mathbf n`
cannot be resolved from one line; it is an input (default 0).

All gathers are fitted at once by the shared procedure of
:mod:`.gather_fit` (robust loss, mispick rejection, covariance, status) and
the batched engine of :mod:`.lm`.

* **Parametrisation.** The iteration works on :math:`\ln V`, :math:`\ln h`
  and :math:`\operatorname{artanh}(s/s_{max})` with
  :math:`s_{max} = \sqrt{1-q^2}`, which keeps :math:`V>0`, :math:`h>0` and
  :math:`s^2+q^2<1`; values and covariances are reported for (V, h, s).
* **Non-physical.** A velocity outside ``[velocity_min_m_s,
  velocity_max_m_s]``, the plane at the source (h below :data:`MIN_NORMAL_DISTANCE_M`),
  or :math:`|s|` reaching :data:`S_LIMIT` times its bound.

References
----------
[Green 1938] Green, C. H. (1938). Velocity determinations by means of reflection
    profiles. Geophysics 3(4), 295-305.
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Optional, Union

import numpy as np

from ..errors import InversionError
from ..survey.model import GatherSet, Settings
from .batch import pad, pad_layout, row_sum, safe_solve, unpad
from .gather_fit import check_pick_times, exclude_mask, fit_padded_gathers
from .geometry import gather_normals
from .lm import Rows, times_and_jacobian

__all__ = ["MIN_NORMAL_DISTANCE_M", "S_LIMIT", "ShotFits", "fit_shot_gathers", "linear_start"]

#: A plane closer than this to the source (m) is non-physical.
MIN_NORMAL_DISTANCE_M = 0.01
#: |s| / s_max beyond this is non-physical (a near-vertical reflector).
S_LIMIT = 0.999
_DEFAULT_SETTINGS = Settings()  # frozen, safe to share as a default


@dataclass(frozen=True)
class ShotFits:
    """Fits of common-shot gathers (per gather length g, per pick length n).

    Per gather: ``velocity_m_s`` (V), ``normal_distance_m`` (h),
    ``s_along`` (s), ``t0_s`` = 2h/V, ``traveltime_dip_deg`` = asin(s) (not the
    apparent dip of the section), their standard errors ``se_*``,
    ``covariance`` (g, 3, 3) of (V, h, s), ``cross_component`` (q used),
    ``rms_residual_s`` (of the used picks), ``picks_used``, ``picks_rejected``,
    ``picks_excluded``, ``variance_factor`` (chi2 / (n - 3)),
    ``condition_number``, ``status``, ``reason``, ``iterations``.
    Per pick (order of the :class:`GatherSet`): ``residual_s`` (observed -
    modelled), ``rejected`` (by the fit), ``excluded`` (by the user),
    ``weight`` (final robust weight, 0 for picks not used).
    """

    velocity_m_s: np.ndarray
    normal_distance_m: np.ndarray
    s_along: np.ndarray
    t0_s: np.ndarray
    traveltime_dip_deg: np.ndarray
    se_velocity_m_s: np.ndarray
    se_normal_distance_m: np.ndarray
    se_s_along: np.ndarray
    se_t0_s: np.ndarray
    se_traveltime_dip_deg: np.ndarray
    covariance: np.ndarray
    cross_component: np.ndarray
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
        return len(self.velocity_m_s)

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of the gathers with status ``ok``."""
        return self.status == "ok"

    def normal(self, gathers: GatherSet) -> np.ndarray:
        """Downward unit normals of the fitted planes.

        Parameters
        ----------
        gathers : GatherSet
            The gathers these fits belong to (their line frames).

        Returns
        -------
        (g, 3) ndarray
            See :func:`.geometry.gather_normals`.
        """
        return gather_normals(gathers, self)


class _ShotModel:
    r"""Image-source traveltime of a common-shot gather (padded arrays).

    .. math::

        t = \frac{1}{V}\sqrt{|\mathbf D|^2 + 4h\,(s\,x_u + q\,y_w + c\,\Delta z) + 4h^2},
        \qquad c = \sqrt{1 - s^2 - q^2}

    with :math:`\mathbf D = \mathbf R - \mathbf S`, :math:`x_u = \mathbf u\cdot\mathbf D_h`,
    :math:`y_w = \mathbf w\cdot\mathbf D_h`, :math:`\Delta z = D_z`; from
    :math:`\mathbf S' = \mathbf S + 2h\mathbf n` and
    :math:`|\mathbf R - \mathbf S'|^2 = |\mathbf D|^2 - 4h\,\mathbf n\cdot\mathbf D + 4h^2`
    [Sheriff & Geldart 1995, ch. 4]. Flat and straight: the dipping-layer
    quadratic :math:`t^2V^2 = x^2 + 4hsx + 4h^2`; s = 0: [Green 1938].
    """

    n_params: int = 3
    names: tuple[str, ...] = ("velocity", "normal distance", "s")

    def __init__(self, x: np.ndarray, y: np.ndarray, dz: np.ndarray, d2: np.ndarray, q: np.ndarray):
        self.x, self.y, self.dz, self.d2 = x, y, dz, d2
        self.q = q
        self.qy = q[:, None] * y  # constant during a fit
        self.has_dz = bool(np.any(dz != 0))
        self.smax = np.sqrt(np.clip(1.0 - q * q, 1e-12, 1.0))
        self.offset_key = x  # signed along-line offset: distinct-offset count
        self.offset_resolution = 0.01

    def take(self, rows: Rows) -> _ShotModel:
        """Return the model restricted to some gathers (index, boolean mask or slice)."""
        if isinstance(rows, slice) and rows == slice(None):
            return self
        return _ShotModel(self.x[rows], self.y[rows], self.dz[rows], self.d2[rows], self.q[rows])

    def natural(self, theta: np.ndarray) -> np.ndarray:
        """Return (V, h, s) from the internal parameters."""
        r = np.tanh(theta[:, 2])
        return np.column_stack([np.exp(theta[:, 0]), np.exp(theta[:, 1]), self.smax * r])

    def natural_jacobian(self, J: np.ndarray, theta: np.ndarray) -> np.ndarray:
        """Return the Jacobian in (V, h, s) from the one in the internal parameters (chain rule)."""
        r = np.tanh(theta[:, 2])
        scale = np.column_stack([np.exp(theta[:, 0]), np.exp(theta[:, 1]), self.smax * (1.0 - r * r)])
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            Jn = J / scale[:, :, None]
        bad = ~np.all(np.isfinite(scale) & (scale > 0), axis=1)
        if np.any(bad):  # s at its bound: evaluate the natural derivatives directly
            Jn[bad] = times_and_jacobian(self.take(bad), self.take(bad).natural(theta[bad]), natural=True)[1]
        return Jn

    def internal(self, params: np.ndarray) -> np.ndarray:
        """Return the internal parameters (ln V, ln h, artanh(s/s_max)) of (V, h, s)."""
        r = np.clip(params[:, 2] / self.smax, -0.999999, 0.999999)
        return np.column_stack([np.log(params[:, 0]), np.log(params[:, 1]), np.arctanh(r)])

    def evaluate(
        self, theta: np.ndarray, natural: bool = False, jacobian: bool = True
    ) -> tuple[np.ndarray, Optional[np.ndarray]]:
        """Return predicted times (k, n) and Jacobian (k, 3, n) in internal (or natural) parameters.

        With ``jacobian=False`` only the times are computed (the Jacobian is None).
        """
        x, dz, d2 = self.x, self.dz, self.d2
        q, smax = self.q[:, None], self.smax[:, None]
        if natural:
            V, h, s = (theta[:, i, None] for i in range(3))
            r = s / smax
        else:
            V = np.exp(theta[:, 0, None])
            h = np.exp(theta[:, 1, None])
            r = np.tanh(theta[:, 2, None])
            s = smax * r
        c = np.sqrt(np.maximum(1.0 - s * s - q * q, 1e-24))
        lin = s * x
        lin += self.qy
        if self.has_dz:
            lin += c * dz
        root = lin + h
        root *= 4.0 * h
        root += d2
        np.maximum(root, 1e-30, out=root)
        np.sqrt(root, out=root)
        t = root * (1.0 / V)
        if not jacobian:
            return t, None
        inv = np.divide(1.0, root, out=root)  # root is not needed any more
        J = np.empty((t.shape[0], 3, t.shape[1]))
        J1, J2 = J[:, 1], J[:, 2]
        np.multiply(lin, 2.0, out=J1)
        J1 += 4.0 * h
        J1 *= inv
        if self.has_dz:
            np.multiply(dz, -(s / c), out=J2)
            J2 += x
        else:
            J2[...] = x
        J2 *= inv
        if natural:
            np.multiply(t, -1.0 / V, out=J[:, 0])
            J1 *= 1.0 / V
            J2 *= 2.0 * h / V
        else:
            np.negative(t, out=J[:, 0])
            J1 *= h / V
            J2 *= 2.0 * h / V * (smax * (1.0 - r * r))
        return t, J

    def start(
        self, t: np.ndarray, sigma: np.ndarray, usable: np.ndarray, settings: Settings
    ) -> tuple[np.ndarray, np.ndarray]:
        """Return internal start parameters and a flag for a start from the full linear fit."""
        params, full = self.start_natural(t, sigma, usable, settings)
        return self.internal(params), full

    def start_natural(
        self, t: np.ndarray, sigma: np.ndarray, usable: np.ndarray, settings: Settings
    ) -> tuple[np.ndarray, np.ndarray]:
        r"""Return start values (V, h, s) from weighted linear least squares in t^2 (see :func:`fit_shot_gathers`).

        First :math:`t^2 = a|\mathbf D|^2 + b\,x_u + c_0`; then once more with the
        regressor :math:`|\mathbf D|^2 + 4h(q\,y_w + c\,\Delta z)` evaluated at the
        first estimate, which takes topography and crooked lines into account
        (the model is linear in a, b, c0 for fixed h and c).
        """
        w = np.where(usable, 1.0 / (2.0 * t * sigma) ** 2, 0.0)  # sigma(t^2) = 2 t sigma_t
        y = t * t
        x = self.x

        def solve(first):  # weighted normal equations of the columns (first, x, 1)
            wf, wx = w * first, w * x
            A = np.empty((len(t), 3, 3))
            A[:, 0, 0] = np.einsum("kn,kn->k", wf, first)
            A[:, 0, 1] = A[:, 1, 0] = np.einsum("kn,kn->k", wf, x)
            A[:, 0, 2] = A[:, 2, 0] = row_sum(wf)
            A[:, 1, 1] = np.einsum("kn,kn->k", wx, x)
            A[:, 1, 2] = A[:, 2, 1] = row_sum(wx)
            A[:, 2, 2] = row_sum(w)
            b = np.column_stack(
                [np.einsum("kn,kn->k", wf, y), np.einsum("kn,kn->k", wx, y), np.einsum("kn,kn->k", w, y)]
            )
            return A, b, safe_solve(A, b).T

        A, b, (a, bb, c0) = solve(self.d2)
        with np.errstate(invalid="ignore", divide="ignore"):
            h = 0.5 * np.sqrt(c0 / a)
            s = bb / (2.0 * np.sqrt(a * c0))
            good = (a > 0) & (c0 > 0) & (np.abs(s) < 0.95 * self.smax)
            if np.any(good) and (np.any(self.y != 0) or np.any(self.dz != 0)):
                sg = np.where(good, s, 0.0)
                c = np.sqrt(np.maximum(1.0 - sg * sg - self.q * self.q, 0.0))
                hg = np.where(good, h, 0.0)[:, None]
                extra = 4.0 * hg * (self.q[:, None] * self.y + c[:, None] * self.dz)
                _, _, (a2, bb2, c02) = solve(self.d2 + extra)
                s2 = bb2 / (2.0 * np.sqrt(a2 * c02))
                better = good & (a2 > 0) & (c02 > 0) & (np.abs(s2) < 0.95 * self.smax)
                a, bb, c0 = (np.where(better, v2, v1) for v1, v2 in ((a, a2), (bb, bb2), (c0, c02)))
            V = a**-0.5
            h = 0.5 * np.sqrt(c0 / a)
            s = bb / (2.0 * np.sqrt(a * c0))
        bad = ~((a > 0) & (c0 > 0) & (np.abs(s) < 0.95 * self.smax) & np.isfinite(s))
        if np.any(bad):  # fallback: horizontal reflector, t^2 = a |D|^2 + c0 [Green 1938]
            A2 = A[:, [0, 2]][:, :, [0, 2]]
            a2, c2 = safe_solve(A2, b[:, [0, 2]]).T
            tmin = np.min(np.where(usable, t, np.inf), axis=1)
            tmin = np.where(np.isfinite(tmin), tmin, 1.0)
            vmid = np.sqrt(settings.velocity_min_m_s * settings.velocity_max_m_s)
            with np.errstate(invalid="ignore", divide="ignore"):
                V2 = np.where((a2 > 0) & (c2 > 0), a2**-0.5, vmid)
            V2 = np.where(np.isfinite(V2), V2, vmid)
            h2 = np.where((a2 > 0) & (c2 > 0), 0.5 * np.sqrt(np.abs(c2 / np.where(a2 > 0, a2, 1.0))), 0.5 * V2 * tmin)
            h2 = np.where(np.isfinite(h2) & (h2 > 0), h2, 0.5 * V2 * tmin)
            V = np.where(bad, V2, V)
            h = np.where(bad, h2, h)
            s = np.where(bad, 0.0, s)
        h = np.maximum(h, MIN_NORMAL_DISTANCE_M)
        return np.column_stack([V, h, s]), ~bad

    def reference(self, params: np.ndarray, settings: Settings) -> np.ndarray:
        """Return the nearest plausible parameters with the same t0 = 2h/V (for the conditioning check)."""
        V, h, s = params.T
        Vr = np.clip(
            np.nan_to_num(V, nan=settings.velocity_max_m_s),
            settings.velocity_min_m_s,
            settings.velocity_max_m_s,
        )
        hr = np.maximum(np.nan_to_num(h * Vr / V, nan=MIN_NORMAL_DISTANCE_M), MIN_NORMAL_DISTANCE_M)
        sr = np.clip(np.nan_to_num(s), -0.95 * self.smax, 0.95 * self.smax)
        return np.column_stack([Vr, hr, sr])

    def physical(self, params: np.ndarray, settings: Settings) -> tuple[np.ndarray, dict[int, str]]:
        """Return a flag for non-physical parameters and a reason for each flagged gather."""
        V, h, s = params.T
        smax = self.smax
        lo, hi = settings.velocity_min_m_s, settings.velocity_max_m_s
        bad_v = ~((V >= lo) & (V <= hi))
        bad_h = ~(h >= MIN_NORMAL_DISTANCE_M)
        bad_s = ~(np.abs(s) < S_LIMIT * smax)
        bad = bad_v | bad_h | bad_s
        reasons: dict[int, str] = {}
        for k in np.flatnonzero(bad):
            if bad_v[k]:
                reasons[int(k)] = (
                    f"fitted velocity {V[k]:.0f} m/s is outside the plausible range "
                    f"{lo:.0f}-{hi:.0f} m/s; check the picks (wrong event?) or the velocity limits"
                )
            elif bad_h[k]:
                reasons[int(k)] = f"the fit puts the reflector at the source (h = {h[k]:.3g} m); check the picks"
            else:
                reasons[int(k)] = (
                    f"the moveout asymmetry needs s = {s[k]:+.4f}, a near-vertical reflector; "
                    "check the picks or the cross-line component"
                )
        return bad, reasons


class _ShotComponents:
    """Padded receiver-minus-source components and line frames, before projection.

    :meth:`take` builds the :class:`_ShotModel` of some gathers; projecting
    block by block keeps the arrays in the processor cache.
    """

    def __init__(self, Dx: np.ndarray, Dy: np.ndarray, Dz: np.ndarray, u: np.ndarray, w: np.ndarray, q: np.ndarray):
        self.Dx, self.Dy, self.Dz, self.u, self.w, self.q = Dx, Dy, Dz, u, w, q

    def take(self, rows: Rows) -> _ShotModel:
        """Return the image-source model of some gathers (index, boolean mask or slice)."""
        Dx, Dy, Dz = self.Dx[rows], self.Dy[rows], self.Dz[rows]
        u, w = self.u[rows], self.w[rows]
        x = Dx * u[:, 0:1]
        x += Dy * u[:, 1:2]
        y = Dx * w[:, 0:1]
        y += Dy * w[:, 1:2]
        d2 = Dx * Dx
        d2 += Dy * Dy
        d2 += Dz * Dz
        return _ShotModel(x, y, Dz, d2, self.q[rows])


def _shot_model(
    gathers: GatherSet, q: np.ndarray
) -> tuple[_ShotComponents, Optional[np.ndarray], Optional[np.ndarray], tuple[int, int]]:
    """Pad a GatherSet's components for the image-source model: (components, row, col, shape)."""
    gid = np.asarray(gathers.gather, dtype=np.intp)
    g = gathers.n_gathers
    row, col, nmax = pad_layout(gid, g)
    shape = (g, nmax)
    R = np.asarray(gathers.receiver_xyz, float)
    S = np.asarray(gathers.source_xyz, float)
    Dx, Dy, Dz = (pad(R[:, i] - S[:, i], row, col, shape, fresh=True) for i in range(3))
    u = np.asarray(gathers.line_unit, float)
    w = np.asarray(gathers.cross_unit, float)
    model = _ShotComponents(Dx, Dy, Dz, u, w, np.asarray(q, dtype=float))
    return model, row, col, shape


def _cross_components(cross_component: Union[float, np.ndarray, None], g: int) -> np.ndarray:
    """Cross-line components q per gather: checked, NaN taken as 0 (see :func:`fit_shot_gathers`)."""
    if cross_component is None:
        return np.zeros(g)
    q = np.asarray(cross_component, dtype=float)
    if q.ndim > 1 or (q.ndim == 1 and len(q) not in (1, g)):
        raise InversionError(f"cross_component has shape {q.shape}; expected one value or one per gather, shape ({g},)")
    q = np.broadcast_to(q, (g,)).copy()
    q = np.where(np.isfinite(q), q, 0.0)  # NaN: cross-line dip not resolved, taken as level
    if np.any(np.abs(q) >= 1.0):
        bad = float(q[np.abs(q) >= 1.0][0])
        raise InversionError(f"cross_component {bad!r} is not a sine of a dip; expected |q| < 1")
    return q


def linear_start(
    gathers: GatherSet,
    cross_component: Union[float, np.ndarray, None] = None,
    settings: Settings = _DEFAULT_SETTINGS,
) -> np.ndarray:
    """Start values of the fit: the weighted linear least squares in t^2 of every gather.

    Step (1) of :func:`fit_shot_gathers`, on all picks (no exclusions).

    Parameters
    ----------
    gathers : GatherSet
        The shot gathers.
    cross_component : None, float or (g,) array_like
        q = -w.n per gather, as in :func:`fit_shot_gathers`.
    settings : Settings
        Uses ``velocity_min_m_s`` and ``velocity_max_m_s`` (for a gather whose
        linear fit has no physical solution).

    Returns
    -------
    (g, 3) ndarray
        Velocity V (m/s), normal distance h (m) and along-line component s of
        every gather.

    Examples
    --------
    The t^2-x^2 line of a horizontal reflector 40 m below a flat split spread,
    V = 3000 m/s, is exact in t^2 [Green 1938]:

    >>> x = np.arange(-47.5, 48.0, 5.0)
    >>> n = len(x)
    >>> src = np.zeros((n, 3)); rec = np.column_stack([x, np.zeros(n), np.zeros(n)])
    >>> t = np.sqrt(x**2 + 4 * 40.0**2) / 3000.0
    >>> gs = GatherSet(np.zeros(n, int), src, rec, t, np.full(n, 5e-4), np.arange(n),
    ...                np.array(["L1"], object), np.array(["1"], object), np.array(["1"], object),
    ...                np.array([[1.0, 0.0]]), np.array([[0.0, -1.0]]), np.zeros((1, 3)), np.array([95.0]))
    >>> V, h, s = linear_start(gs)[0]
    >>> round(float(V), 6), round(float(h), 6), abs(float(s)) < 1e-12
    (3000.0, 40.0, True)
    """
    q = _cross_components(cross_component, gathers.n_gathers)
    time_s, sigma_s = check_pick_times(gathers.time_s, gathers.sigma_s, gathers.pick_index)
    model, row, col, shape = _shot_model(gathers, q)
    valid = pad(True, row, col, shape, fill=False, dtype=bool)
    t = pad(time_s, row, col, shape, fill=1.0)
    sg = pad(sigma_s, row, col, shape, fill=1.0)
    return model.take(slice(0, shape[0])).start_natural(t, sg, valid, settings)[0]


def fit_shot_gathers(
    gathers: GatherSet,
    settings: Settings = _DEFAULT_SETTINGS,
    cross_component: Union[float, np.ndarray, None] = None,
    exclude: Optional[np.ndarray] = None,
    progress: Any = None,
) -> ShotFits:
    r"""Fit velocity, normal distance and along-line dip component per shot gather.

    Model (exact image source, 3D) [Sheriff & Geldart 1995, ch. 4]:

    .. math::

        t = \frac{1}{V}\sqrt{|\mathbf D|^2 + 4h\,(s\,x_u + q\,y_w + c\,\Delta z) + 4h^2},
        \qquad c = \sqrt{1 - s^2 - q^2}

    with :math:`\mathbf D = \mathbf R - \mathbf S`, :math:`x_u`, :math:`y_w`
    its components along ``line_unit`` and ``cross_unit`` and :math:`\Delta z`
    the receiver's height above the source. The downward normal is
    :math:`\mathbf n = -s\mathbf u - q\mathbf w - c\,\mathbf e_z`. On a flat
    straight line this is :math:`t^2V^2 = x^2 + 4hsx + 4h^2`, and for a horizontal
    reflector the :math:`t^2`-:math:`x^2` relation [Green 1938].

    Steps: (1) weighted linear least squares of
    :math:`t^2 = a|\mathbf D|^2 + b\,x_u + c_0` with
    :math:`\sigma(t^2) = 2t\sigma_t` gives the start
    :math:`V = a^{-1/2}`, :math:`h = \sqrt{c_0/a}/2`,
    :math:`s = b/(2\sqrt{a c_0})` (a horizontal-reflector start when that is
    not physical); (2) the robust time-domain fit of the batched engine (:mod:`.lm`);
    (3) mispick rejection and refit; (4) covariance and status (conventions in
    :mod:`.gather_fit`).

    Parameters
    ----------
    gathers : GatherSet
        The shot gathers (positions in m, times and pick errors in s).
    settings : Settings
        Uses ``min_picks``, ``velocity_min_m_s``, ``velocity_max_m_s``,
        ``robust_loss``, ``robust_scale``, ``reject_sigma`` (``inf`` disables
        rejection).
    cross_component : None, float or (g,) array
        q = -w.n per gather (0 when None), e.g. from a surface or crossing lines.
        NaN entries mean "not resolved" and are taken as 0 (level across the
        line); ``ShotFits.cross_component`` reports the value used.
    exclude : None or (n,) bool array_like
        Picks the user excluded; reported as ``excluded``, not fitted.
    progress : object with ``set_progress``/``is_canceled``, optional
        Told the share done; cancelling raises :class:`~core.errors.CancelledError`.

    Returns
    -------
    ShotFits
        Per gather and per pick (see the class).

    Raises
    ------
    InversionError
        A non-positive or non-finite time or pick error (naming the pick), a
        gather index out of range, a bad ``cross_component`` or ``exclude``, or
        bad robust-fit settings.

    Examples
    --------
    A horizontal reflector 40 m below a flat split spread, V = 3000 m/s:

    >>> x = np.arange(-47.5, 48.0, 5.0)
    >>> n = len(x)
    >>> src = np.zeros((n, 3)); rec = np.column_stack([x, np.zeros(n), np.zeros(n)])
    >>> t = np.sqrt(x**2 + 4 * 40.0**2) / 3000.0
    >>> gs = GatherSet(np.zeros(n, int), src, rec, t, np.full(n, 5e-4), np.arange(n),
    ...                np.array(["L1"], object), np.array(["1"], object), np.array(["1"], object),
    ...                np.array([[1.0, 0.0]]), np.array([[0.0, -1.0]]), np.zeros((1, 3)), np.array([95.0]))
    >>> fit = fit_shot_gathers(gs)
    >>> fit.status[0], round(float(fit.velocity_m_s[0]), 6), round(float(fit.t0_s[0]) * 1e3, 3)
    ('ok', 3000.0, 26.667)
    """
    g = gathers.n_gathers
    n = len(gathers.time_s)
    time_s, sigma_s = check_pick_times(gathers.time_s, gathers.sigma_s, gathers.pick_index)
    gid = np.asarray(gathers.gather, dtype=np.intp)
    if n and (gid.min() < 0 or gid.max() >= g):
        raise InversionError(f"gather index {int(gid.max())} out of range for {g} gathers; rebuild the GatherSet")
    q = _cross_components(cross_component, g)
    ex = exclude_mask(exclude, n)
    model, row, col, shape = _shot_model(gathers, q)
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
    V, h, s = out.params.T
    cov = out.covariance
    with np.errstate(invalid="ignore"):
        se = np.sqrt(np.einsum("kii->ki", cov))
    t0 = 2.0 * h / V
    gt0 = np.stack([-2.0 * h / V**2, 2.0 / V, np.zeros(g)], axis=1)  # delta method, t0 = 2h/V
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        se_t0 = np.sqrt(np.einsum("ki,kij,kj->k", gt0, cov, gt0))
        dip = np.degrees(np.arcsin(s))
        se_dip = np.degrees(se[:, 2] / np.sqrt(1.0 - s * s))
    return ShotFits(
        velocity_m_s=V,
        normal_distance_m=h,
        s_along=s,
        t0_s=t0,
        traveltime_dip_deg=dip,
        se_velocity_m_s=se[:, 0],
        se_normal_distance_m=se[:, 1],
        se_s_along=se[:, 2],
        se_t0_s=se_t0,
        se_traveltime_dip_deg=se_dip,
        covariance=cov,
        cross_component=q,
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
