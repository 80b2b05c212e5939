"""Per-gather traveltime inversion, batched over all gathers with numpy.

Two gather types are fitted by one shared engine:

* **common-shot gathers** (:func:`fit_shot_gathers`): the exact 3D image-source
  model of a homogeneous layer over a plane, with topography and crooked
  receiver lines honoured. Unknowns per gather: velocity :math:`V`, normal
  distance :math:`h` from the source to the plane and the along-line component
  :math:`s = -\\mathbf u\\cdot\\mathbf n = \\sin\\delta\\cos\\beta` of the
  downward unit normal. The cross-line component
  :math:`q = -\\mathbf w\\cdot\\mathbf n` cannot be resolved from one line; it is
  an input (default 0).
* **common-midpoint gathers** (:func:`fit_cmp_gathers`): the hyperbola
  :math:`t^2 = t_0^2 + x^2/V_{nmo}^2` [Levin 1971].

:func:`dix_intervals` turns rms velocities of several reflectors at one
location into interval velocities and thicknesses [Dix 1955];
:func:`cmp_bins` sorts shot picks into midpoint bins.

The engine (:func:`_batched_least_squares`) is a Levenberg-Marquardt iteration
run on all gathers at once: per-pick arrays are padded to ``(g, nmax)`` with a
mask (a plain reshape when every gather has the same number of picks; this
layout beat ``np.bincount`` segment sums by a factor of two in
benchmarks/bench_inversion.py), every gather keeps its own damping, and a
robust loss is minimised with reweighted Gauss-Newton steps. Gathers are
processed in cache-sized blocks, in parallel threads where several processors
are available. No Python loop runs per gather on the numerical path.

Conventions of the fit, chosen and documented here
--------------------------------------------------
* **Robust loss.** Standardised residual :math:`e_i = (t_i - \\hat t_i)/\\sigma_i`;
  the objective is :math:`\\sum_i C^2\\rho(e_i^2/C^2)` with
  ``C = settings.robust_scale`` and :math:`\\rho` one of ``linear``
  (:math:`z`), ``huber`` (:math:`z` or :math:`2\\sqrt z - 1`), ``soft_l1``
  (:math:`2(\\sqrt{1+z} - 1)`) or ``cauchy`` (:math:`\\ln(1+z)`), the same
  definitions as ``scipy.optimize.least_squares`` with ``f_scale = C``, so both
  minimise the same function.
* **Parametrisation.** The iteration works on :math:`\\ln V`, :math:`\\ln h`
  and :math:`\\operatorname{artanh}(s/s_{max})` with
  :math:`s_{max} = \\sqrt{1-q^2}`, which keeps :math:`V>0`, :math:`h>0` and
  :math:`s^2+q^2<1`; values and covariances are reported for (V, h, s).
* **Mispick rejection.** After convergence a pick is *rejected* when
  :math:`|e_i| > k\\,\\max(1,\\ 1.4826\\,\\mathrm{MAD}(e))` with
  ``k = settings.reject_sigma`` and the MAD taken over the gather's used picks.
  The floor 1 trusts the stated pick errors; the MAD term stops a gather whose
  pick errors were understated from losing its good picks. The gather is then
  refitted without them, and all picks are re-tested (a rejected pick may come
  back), until the set is stable or after five rounds. Rejected picks keep
  their residual and are reported (``rejected``); nothing is dropped silently.
  A gather left with too few picks is flagged ``too_few_picks`` (with the
  number rejected in its reason).
* **User exclusions** (``exclude``, e.g. from the QC panel) are counted apart
  (``excluded``, ``picks_excluded``), never as rejections.
* **Covariance.** :math:`\\mathrm{Cov} = \\kappa\\,F\\,(J^T\\Sigma^{-1}J)^{-1}`
  over the used picks, with :math:`J` the Jacobian in (V, h, s),
  :math:`\\kappa = E[\\psi^2]/E[\\psi']^2` the asymptotic variance inflation of
  the robust loss for Gaussian errors (1.037 for Huber with C = 1.5) and
  :math:`F = \\max(1, \\chi^2/(n-p))` the a-posteriori variance factor. F only
  inflates: a gather whose scatter exceeds its stated pick errors gets wider
  errors, while a lucky small scatter does not shrink them below what the
  stated errors imply. With correct pick errors the one-SE coverage is close
  to 68 % (tested).
* **Status.** ``ok``; ``too_few_picks`` (fewer than ``settings.min_picks``
  usable picks or fewer distinct offsets than parameters + 1 -- values NaN,
  the gather is not fitted); ``nonphysical`` (velocity outside
  ``[velocity_min_m_s, velocity_max_m_s]``, the plane at the source, or
  :math:`|s|` reaching its bound); ``ill_conditioned`` (condition number of the
  correlation-scaled normal matrix above :data:`CONDITION_LIMIT`, e.g. offsets
  all short compared with the depth so that V and h trade off; for a fit that
  is also non-physical the matrix is taken at the nearest plausible parameters
  with the same t0, so that a hopeless geometry is told apart from bad data);
  ``not_converged``. Precedence: too_few_picks, ill_conditioned, nonphysical,
  not_converged. ``condition_number`` reports the value used. Flagged gathers
  other than ``too_few_picks`` keep their best values so that they can be
  inspected; use ``status == "ok"`` to select.
  Every gather carries a human-readable ``reason``.

References
----------
[Green 1938] Green, C. H. (1938). Velocity determinations by means of reflection
    profiles. Geophysics 3(4), 295-305.
[Levin 1971] Levin, F. K. (1971). Apparent velocity from dipping interface
    reflections. Geophysics 36(3), 510-516.
[Dix 1955] Dix, C. H. (1955). Seismic velocities from surface measurements.
    Geophysics 20(1), 68-86.
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4.
[Huber 1981] Huber, P. J. (1981). Robust Statistics. Wiley (M-estimators,
    asymptotic variance E[psi^2]/E[psi']^2).
[Triggs et al. 2000] Triggs, B., McLauchlan, P., Hartley, R. & Fitzgibbon, A.
    (2000). Bundle adjustment -- a modern synthesis. Vision Algorithms: Theory
    and Practice, LNCS 1883, 298-372 (robust cost functions in Gauss-Newton).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..errors import InversionError
from ..progress import check_cancel
from ..survey.model import GatherSet, Settings

__all__ = [
    "CONDITION_LIMIT",
    "CmpFits",
    "DixIntervals",
    "ShotFits",
    "cmp_bins",
    "dix_intervals",
    "fit_cmp_gathers",
    "fit_shot_gathers",
    "gather_normals",
]

#: Largest accepted condition number of the correlation-scaled normal matrix.
#: It grows like (h / x_max)^4 (Frobenius norm, see :func:`_scaled_normal_matrix`):
#: a split spread whose longest offset is under about a twelfth of the normal
#: distance h, or an end-on spread under about a fifth, exceeds it; spreads as
#: long as h stay near 1e3 (split) to 2e4 (end-on). Between those, the
#: standard errors (not the status) say how well V is known.
CONDITION_LIMIT = 1.0e7

_MAX_ITER = 100  # Levenberg-Marquardt iterations per fit
_XTOL = 1.0e-6  # convergence: largest accepted step of an internal parameter (relative for V, h)
_MAX_STEP = 2.0  # largest step of an internal parameter per iteration
_MAX_REJECTION_ROUNDS = 5
_LAMBDA0 = 1.0e-9  # initial Levenberg-Marquardt damping (relative to diag H): nearly Gauss-Newton
_MAX_THREADS = 4  # engine blocks run in up to this many threads (set 1 to disable)
_BLOCK_ELEMENTS = 49152  # padded picks per block of the engine (cache-sized)
_MAD_TO_SIGMA = 1.4826  # MAD of a Gaussian times this = its standard deviation
_MIN_H_M = 0.01  # plane closer than this to the source: nonphysical
_S_LIMIT = 0.999  # |s| / s_max beyond this: nonphysical (vertical reflector)
_LOSSES = ("linear", "huber", "soft_l1", "cauchy")

_STATUS_NAMES = np.array(["ok", "too_few_picks", "nonphysical", "ill_conditioned", "not_converged"], dtype=object)
_OK, _FEW, _NONPHYS, _ILL, _NOCONV = range(5)
_DEFAULT_SETTINGS = Settings()  # frozen, safe to share as a default


# --------------------------------------------------------------------------- results


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
        return len(self.velocity_m_s)

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of the gathers with status ``ok``."""
        return self.status == "ok"

    def normal(self, gathers: GatherSet) -> np.ndarray:
        """Downward unit normals (g, 3); see :func:`gather_normals`."""
        return gather_normals(gathers, self)


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
        return len(self.t0_s)

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of the gathers with status ``ok``."""
        return self.status == "ok"


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


# --------------------------------------------------------------------------- robust losses


def _check_loss(loss: str) -> str:
    if loss not in _LOSSES:
        raise InversionError(
            f"robust_loss = {loss!r} is not known; expected one of {', '.join(_LOSSES)} "
            "(set it in the [processing] section of survey.toml)"
        )
    return loss


def _row_sum(a):
    """Sum of each row of a 2-D array (a matrix-vector product: faster than ``sum(axis=1)``)."""
    return a @ np.ones(a.shape[1])


def _loss_terms(e, loss, f_scale):
    """Per-gather robust cost and per-pick :math:`\\rho'` and curvature weights of residuals e.

    Returns ``cost`` (k,) = :math:`\\sum C^2\\rho(e^2/C^2)`, ``r1`` = :math:`\\rho'(z)` and
    ``wc`` = :math:`\\max(\\psi'(e), 10^{-3}\\rho'(z))` with :math:`z = e^2/C^2`; one
    pass for the three, as the engine needs them at every trial point.
    """
    C2 = f_scale * f_scale
    z = e * e
    if loss == "linear":
        return _row_sum(z), np.ones_like(z), np.ones_like(z)
    z *= 1.0 / C2
    if loss == "huber":
        a = np.sqrt(z)
        m = np.minimum(a, 1.0)
        rho = 2.0 * a
        rho -= m
        rho *= m  # m (2a - m): z inside, 2 sqrt(z) - 1 outside
        np.maximum(a, 1.0, out=a)
        r1 = np.divide(1.0, a, out=a)  # 1 inside, 1 / sqrt(z) outside
        wc = np.floor(r1)  # 1 inside, 0 outside
        wc *= 0.999
        wc += 1e-3 * r1  # 1 inside, 1e-3 / sqrt(z) outside
    elif loss == "soft_l1":
        a = np.sqrt(1.0 + z)
        rho = 2.0 * (a - 1.0)
        r1 = 1.0 / a
        wc = r1 / (1.0 + z)
    else:  # cauchy
        a = 1.0 + z
        rho = np.log(a)
        r1 = 1.0 / a
        wc = np.maximum((1.0 - z) * r1 * r1, 1e-3 * r1)
    return C2 * _row_sum(rho), r1, wc


def _rho(z, loss):
    """Loss :math:`\\rho(z)` of the squared scaled residual z (scipy's definitions)."""
    if loss == "linear":
        return z
    if loss == "huber":
        return np.where(z <= 1.0, z, 2.0 * np.sqrt(z) - 1.0)
    if loss == "soft_l1":
        return 2.0 * (np.sqrt(1.0 + z) - 1.0)
    return np.log1p(z)  # cauchy


def _rho1(z, loss):
    """Derivative :math:`\\rho'(z)`: the IRLS weight of a residual."""
    if loss == "linear":
        return np.ones_like(z)
    if loss == "huber":
        return np.where(z <= 1.0, 1.0, 1.0 / np.sqrt(np.maximum(z, 1.0)))
    if loss == "soft_l1":
        return 1.0 / np.sqrt(1.0 + z)
    return 1.0 / (1.0 + z)  # cauchy


def _rho12(z, loss):
    """:math:`\\rho'(z) + 2z\\rho''(z)`, i.e. :math:`\\psi'(e)` for :math:`z = e^2/C^2`."""
    if loss == "linear":
        return np.ones_like(z)
    if loss == "huber":
        return np.where(z <= 1.0, 1.0, 0.0)
    if loss == "soft_l1":
        return (1.0 + z) ** -1.5
    return (1.0 - z) / (1.0 + z) ** 2  # cauchy


def _rho2(z, loss):
    if loss == "linear":
        return np.zeros_like(z)
    if loss == "huber":
        return np.where(z <= 1.0, 0.0, -0.5 * np.maximum(z, 1.0) ** -1.5)
    if loss == "soft_l1":
        return -0.5 * (1.0 + z) ** -1.5
    return -1.0 / (1.0 + z) ** 2


@lru_cache(maxsize=32)
def _loss_variance_inflation(loss: str, f_scale: float) -> float:
    """:math:`\\kappa = E[\\psi(e)^2] / E[\\psi'(e)]^2` for unit Gaussian e [Huber 1981].

    :math:`\\psi(e) = \\rho'(e^2/C^2)\\,e` is the influence function of the loss;
    kappa multiplies the least-squares covariance of the M-estimator.
    """
    if loss == "linear":
        return 1.0
    e = np.linspace(-12.0, 12.0, 48001)
    pdf = np.exp(-0.5 * e * e) / np.sqrt(2.0 * np.pi)
    z = (e / f_scale) ** 2
    psi = _rho1(z, loss) * e
    dpsi = _rho1(z, loss) + 2.0 * z * _rho2(z, loss)
    de = e[1] - e[0]
    return float(np.sum(psi**2 * pdf) * de / (np.sum(dpsi * pdf) * de) ** 2)


# --------------------------------------------------------------------------- padding


def _pad_layout(gather: np.ndarray, n_gathers: int):
    """Row/column of each pick in a ``(g, nmax)`` padded layout.

    When the picks are already grouped by gather in increasing order and all
    gathers have the same number of picks (the usual case), ``row`` and
    ``col`` are None and padding is a plain reshape.
    """
    gather = np.asarray(gather, dtype=np.intp)
    n = len(gather)
    counts = np.bincount(gather, minlength=n_gathers)
    nmax = max(int(counts.max()) if len(counts) and n else 1, 1)
    if n and n == n_gathers * nmax and np.all(gather[1:] >= gather[:-1]):
        return None, None, nmax
    order = np.argsort(gather, kind="stable")
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    col = np.empty(n, dtype=np.intp)
    col[order] = np.arange(n) - starts[gather[order]]
    return gather, col, nmax


def _pad(values, row, col, shape, fill=0.0, dtype=float, fresh=False):
    """Flat per-pick values to a padded ``(g, nmax)`` array (``fill`` where no pick).

    ``fresh``: ``values`` is a temporary of the right dtype that may be reshaped
    in place of a copy (regular layout only).
    """
    if row is None:
        if fresh:
            return np.reshape(values, shape)
        out = np.empty(shape, dtype=dtype)
        out[...] = np.reshape(values, shape) if np.ndim(values) else values
        return out
    out = np.full(shape, fill, dtype=dtype)
    out[row, col] = values
    return out


def _unpad(padded, row, col):
    """Padded ``(g, nmax)`` array back to flat per-pick order."""
    if row is None:
        return padded.reshape(-1).copy()
    return padded[row, col]


def _inv_small(A):
    """Inverses and determinants of stacked small matrices (k, p, p).

    Closed-form adjugate for p <= 3 (one vectorised expression instead of a
    LAPACK call per matrix); ``numpy.linalg`` otherwise. Singular matrices get
    a zero determinant and non-finite entries.
    """
    p = A.shape[-1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if p == 1:
            det = A[:, 0, 0].copy()
            return (1.0 / det)[:, None, None], det
        if p == 2:
            a, b, c, d = A[:, 0, 0], A[:, 0, 1], A[:, 1, 0], A[:, 1, 1]
            det = a * d - b * c
            adj = np.stack([np.stack([d, -b], -1), np.stack([-c, a], -1)], -2)
            return adj / det[:, None, None], det
        if p == 3:
            a = A
            c00 = a[:, 1, 1] * a[:, 2, 2] - a[:, 1, 2] * a[:, 2, 1]
            c01 = a[:, 1, 2] * a[:, 2, 0] - a[:, 1, 0] * a[:, 2, 2]
            c02 = a[:, 1, 0] * a[:, 2, 1] - a[:, 1, 1] * a[:, 2, 0]
            c10 = a[:, 0, 2] * a[:, 2, 1] - a[:, 0, 1] * a[:, 2, 2]
            c11 = a[:, 0, 0] * a[:, 2, 2] - a[:, 0, 2] * a[:, 2, 0]
            c12 = a[:, 0, 1] * a[:, 2, 0] - a[:, 0, 0] * a[:, 2, 1]
            c20 = a[:, 0, 1] * a[:, 1, 2] - a[:, 0, 2] * a[:, 1, 1]
            c21 = a[:, 0, 2] * a[:, 1, 0] - a[:, 0, 0] * a[:, 1, 2]
            c22 = a[:, 0, 0] * a[:, 1, 1] - a[:, 0, 1] * a[:, 1, 0]
            det = a[:, 0, 0] * c00 + a[:, 0, 1] * c01 + a[:, 0, 2] * c02
            adj = np.stack(
                [np.stack([c00, c10, c20], -1), np.stack([c01, c11, c21], -1), np.stack([c02, c12, c22], -1)],
                -2,
            )
            return adj / det[:, None, None], det
        det = np.linalg.det(A)
        inv = np.full(A.shape, np.nan)
        ok = np.isfinite(det) & (det != 0)
        if np.any(ok):
            inv[ok] = np.linalg.pinv(A[ok])
        return inv, np.where(ok, det, 0.0)


def _safe_solve(A, b):
    """Solve stacked symmetric systems ``A x = b`` after Jacobi scaling; singular ones give 0.

    p = 2 and 3 by the closed-form adjugate of a symmetric matrix (no LAPACK
    call per system); other sizes through :func:`_inv_small`.
    """
    d = np.sqrt(np.abs(A.diagonal(axis1=1, axis2=2)))
    d = np.where(d > 0, d, 1.0)
    a = A / (d[:, :, None] * d[:, None, :])
    bs = b / d
    p = A.shape[-1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if p == 3:
            a00, a01, a02, a11, a12, a22 = a[:, 0, 0], a[:, 0, 1], a[:, 0, 2], a[:, 1, 1], a[:, 1, 2], a[:, 2, 2]
            c00 = a11 * a22 - a12 * a12
            c01 = a02 * a12 - a01 * a22
            c02 = a01 * a12 - a02 * a11
            c11 = a00 * a22 - a02 * a02
            c12 = a01 * a02 - a00 * a12
            c22 = a00 * a11 - a01 * a01
            det = a00 * c00 + a01 * c01 + a02 * c02
            b0, b1, b2 = bs[:, 0], bs[:, 1], bs[:, 2]
            x = np.empty_like(bs)
            inv_det = 1.0 / det
            x[:, 0] = (c00 * b0 + c01 * b1 + c02 * b2) * inv_det
            x[:, 1] = (c01 * b0 + c11 * b1 + c12 * b2) * inv_det
            x[:, 2] = (c02 * b0 + c12 * b1 + c22 * b2) * inv_det
        elif p == 2:
            a00, a01, a11 = a[:, 0, 0], a[:, 0, 1], a[:, 1, 1]
            det = a00 * a11 - a01 * a01
            x = np.column_stack([a11 * bs[:, 0] - a01 * bs[:, 1], a00 * bs[:, 1] - a01 * bs[:, 0]]) / det[:, None]
        else:
            inv, det = _inv_small(a)
            x = np.matmul(inv, bs[:, :, None])[:, :, 0]
    good = (det > 0) & np.all(np.isfinite(x), axis=1)
    x[~good] = 0.0
    return x / d


def _row_median(values, mask):
    """Median of each row over ``mask`` (NaN for empty rows)."""
    v = np.where(mask, values, np.inf)
    v = np.sort(v, axis=1)
    c = mask.sum(axis=1)
    lo = np.clip((c - 1) // 2, 0, v.shape[1] - 1)
    hi = np.clip(c // 2, 0, v.shape[1] - 1)
    med = 0.5 * (np.take_along_axis(v, lo[:, None], 1)[:, 0] + np.take_along_axis(v, hi[:, None], 1)[:, 0])
    return np.where(c > 0, med, np.nan)


def _distinct_count(key, mask, resolution):
    """Number of distinct values of ``key`` (rounded to ``resolution``) per row."""
    k = np.where(mask, np.round(key / resolution), np.inf)
    k = np.sort(k, axis=1)
    new = np.isfinite(k[:, 1:]) & (k[:, 1:] != k[:, :-1])
    return np.isfinite(k[:, 0]).astype(int) + new.sum(axis=1)


# --------------------------------------------------------------------------- models


class _ShotModel:
    """Image-source traveltime of a common-shot gather (padded arrays).

    .. math::

        t = \\frac{1}{V}\\sqrt{|\\mathbf D|^2 + 4h\\,(s\\,x_u + q\\,y_w + c\\,\\Delta z) + 4h^2},
        \\qquad c = \\sqrt{1 - s^2 - q^2}

    with :math:`\\mathbf D = \\mathbf R - \\mathbf S`, :math:`x_u = \\mathbf u\\cdot\\mathbf D_h`,
    :math:`y_w = \\mathbf w\\cdot\\mathbf D_h`, :math:`\\Delta z = D_z`; from
    :math:`\\mathbf S' = \\mathbf S + 2h\\mathbf n` and
    :math:`|\\mathbf R - \\mathbf S'|^2 = |\\mathbf D|^2 - 4h\\,\\mathbf n\\cdot\\mathbf D + 4h^2`
    [Sheriff & Geldart 1995, ch. 4]. Flat and straight: the dipping-layer
    quadratic :math:`t^2V^2 = x^2 + 4hsx + 4h^2`; s = 0: [Green 1938].
    """

    n_params = 3
    names = ("velocity", "normal distance", "s")

    def __init__(self, x, y, dz, d2, q):
        self.x, self.y, self.dz, self.d2 = x, y, dz, d2
        self.q = q
        self.qy = q[:, None] * y  # constant during a fit
        self.has_dz = bool(np.any(dz != 0))
        self.smax = np.sqrt(np.clip(1.0 - q * q, 1e-12, 1.0))
        self.offset_key = x  # signed along-line offset: distinct-offset count
        self.offset_resolution = 0.01

    def take(self, rows):
        """The model restricted to some gathers (index, boolean mask or slice)."""
        if isinstance(rows, slice) and rows == slice(None):
            return self
        return _ShotModel(self.x[rows], self.y[rows], self.dz[rows], self.d2[rows], self.q[rows])

    def natural(self, theta):
        r = np.tanh(theta[:, 2])
        return np.column_stack([np.exp(theta[:, 0]), np.exp(theta[:, 1]), self.smax * r])

    def natural_jacobian(self, J, theta):
        """Jacobian in (V, h, s) from the one in the internal parameters (chain rule)."""
        r = np.tanh(theta[:, 2])
        scale = np.column_stack([np.exp(theta[:, 0]), np.exp(theta[:, 1]), self.smax * (1.0 - r * r)])
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            Jn = J / scale[:, :, None]
        bad = ~np.all(np.isfinite(scale) & (scale > 0), axis=1)
        if np.any(bad):  # s at its bound: evaluate the natural derivatives directly
            Jn[bad] = self.take(bad).evaluate(self.take(bad).natural(theta[bad]), natural=True)[1]
        return Jn

    def internal(self, params):
        r = np.clip(params[:, 2] / self.smax, -0.999999, 0.999999)
        return np.column_stack([np.log(params[:, 0]), np.log(params[:, 1]), np.arctanh(r)])

    def evaluate(self, theta, natural=False, jacobian=True):
        """Predicted times (k, n) and Jacobian (k, 3, n) in internal (or natural) parameters.

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

    def start(self, t, sigma, usable, settings):
        """Weighted linear least squares in t^2 (see :func:`fit_shot_gathers`).

        First :math:`t^2 = a|\\mathbf D|^2 + b\\,x_u + c_0`; then once more with the
        regressor :math:`|\\mathbf D|^2 + 4h(q\\,y_w + c\\,\\Delta z)` evaluated at the
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
            A[:, 0, 2] = A[:, 2, 0] = _row_sum(wf)
            A[:, 1, 1] = np.einsum("kn,kn->k", wx, x)
            A[:, 1, 2] = A[:, 2, 1] = _row_sum(wx)
            A[:, 2, 2] = _row_sum(w)
            b = np.column_stack(
                [np.einsum("kn,kn->k", wf, y), np.einsum("kn,kn->k", wx, y), np.einsum("kn,kn->k", w, y)]
            )
            return A, b, _safe_solve(A, b).T

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
            a2, c2 = _safe_solve(A2, b[:, [0, 2]]).T
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
        h = np.maximum(h, _MIN_H_M)
        return self.internal(np.column_stack([V, h, s])), ~bad

    def reference(self, params, settings):
        """Nearest plausible parameters with the same t0 = 2h/V (for the conditioning check)."""
        V, h, s = params.T
        Vr = np.clip(
            np.nan_to_num(V, nan=settings.velocity_max_m_s),
            settings.velocity_min_m_s,
            settings.velocity_max_m_s,
        )
        hr = np.maximum(np.nan_to_num(h * Vr / V, nan=_MIN_H_M), _MIN_H_M)
        sr = np.clip(np.nan_to_num(s), -0.95 * self.smax, 0.95 * self.smax)
        return np.column_stack([Vr, hr, sr])

    def physical(self, params, settings):
        """Status code (nonphysical or ok) and a reason for the nonphysical ones."""
        V, h, s = params.T
        smax = self.smax
        lo, hi = settings.velocity_min_m_s, settings.velocity_max_m_s
        bad_v = ~((V >= lo) & (V <= hi))
        bad_h = ~(h >= _MIN_H_M)
        bad_s = ~(np.abs(s) < _S_LIMIT * smax)
        bad = bad_v | bad_h | bad_s
        reasons = {}
        for k in np.flatnonzero(bad):
            if bad_v[k]:
                reasons[k] = (
                    f"fitted velocity {V[k]:.0f} m/s is outside the plausible range "
                    f"{lo:.0f}-{hi:.0f} m/s; check the picks (wrong event?) or the velocity limits"
                )
            elif bad_h[k]:
                reasons[k] = f"the fit puts the reflector at the source (h = {h[k]:.3g} m); check the picks"
            else:
                reasons[k] = (
                    f"the moveout asymmetry needs s = {s[k]:+.4f}, a near-vertical reflector; "
                    "check the picks or the cross-line component"
                )
        return bad, reasons


class _ShotComponents:
    """Padded receiver-minus-source components and line frames, before projection.

    :meth:`take` builds the :class:`_ShotModel` of some gathers; projecting
    block by block keeps the arrays in the processor cache.
    """

    def __init__(self, Dx, Dy, Dz, u, w, q):
        self.Dx, self.Dy, self.Dz, self.u, self.w, self.q = Dx, Dy, Dz, u, w, q

    def take(self, rows):
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


class _CmpModel:
    """NMO hyperbola :math:`t^2 = t_0^2 + x^2/V_{nmo}^2` [Levin 1971]."""

    n_params = 2
    names = ("t0", "NMO velocity")

    def __init__(self, x):
        self.x = x
        self.x2 = x * x
        self.offset_key = np.abs(x)
        self.offset_resolution = 0.01

    def take(self, rows):
        """The model restricted to some gathers (index, boolean mask or slice)."""
        if isinstance(rows, slice) and rows == slice(None):
            return self
        return _CmpModel(self.x[rows])

    def natural(self, theta):
        return np.exp(theta)

    def natural_jacobian(self, J, theta):
        """Jacobian in (t0, Vnmo) from the one in (ln t0, ln Vnmo)."""
        return J / np.exp(theta)[:, :, None]

    def internal(self, params):
        return np.log(params)

    def evaluate(self, theta, natural=False, jacobian=True):
        """Predicted times (k, n) and Jacobian (k, 2, n) (None with ``jacobian=False``)."""
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

    def start(self, t, sigma, usable, settings):
        w = np.where(usable, 1.0 / (2.0 * t * sigma) ** 2, 0.0)
        x2 = self.x**2
        y = t * t
        A = np.empty((len(t), 2, 2))
        A[:, 0, 0] = np.sum(w, axis=1)
        A[:, 0, 1] = A[:, 1, 0] = np.sum(w * x2, axis=1)
        A[:, 1, 1] = np.sum(w * x2 * x2, axis=1)
        b = np.column_stack([np.sum(w * y, axis=1), np.sum(w * x2 * y, axis=1)])
        c0, a = _safe_solve(A, b).T
        tmin = np.min(np.where(usable, t, np.inf), axis=1)
        tmin = np.where(np.isfinite(tmin), tmin, 1.0)
        good = (a > 0) & (c0 > 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            t0 = np.where(good, np.sqrt(np.abs(c0)), 0.9 * tmin)
            vn = np.where(a > 0, np.abs(a) ** -0.5, settings.velocity_max_m_s)
        t0 = np.where(np.isfinite(t0) & (t0 > 0), t0, 0.9 * tmin)
        vn = np.where(np.isfinite(vn) & (vn > 0), vn, settings.velocity_max_m_s)
        return np.log(np.column_stack([t0, vn])), good

    def reference(self, params, settings):
        """Nearest plausible parameters (for the conditioning check)."""
        t0, vn = params.T
        vr = np.clip(
            np.nan_to_num(vn, nan=settings.velocity_max_m_s),
            settings.velocity_min_m_s,
            settings.velocity_max_m_s,
        )
        return np.column_stack([np.maximum(np.nan_to_num(t0, nan=1e-3), 1e-5), vr])

    def physical(self, params, settings):
        t0, vn = params.T
        lo, hi = settings.velocity_min_m_s, settings.velocity_max_m_s
        bad_v = ~((vn >= lo) & (vn <= hi))
        bad_t = ~(t0 > 1e-5)
        bad = bad_v | bad_t
        reasons = {}
        for k in np.flatnonzero(bad):
            if bad_v[k]:
                reasons[k] = (
                    f"fitted NMO velocity {vn[k]:.0f} m/s is outside the plausible range "
                    f"{lo:.0f}-{hi:.0f} m/s; check the picks or the velocity limits"
                )
            else:
                reasons[k] = f"fitted zero-offset time {t0[k] * 1e3:.3g} ms is not positive; check the picks"
        return bad, reasons


# --------------------------------------------------------------------------- engine


def _batched_least_squares(model, theta0, time, sigma, usable, loss, f_scale, xtol=None, max_iter=None, progress=None):
    """Robust Levenberg-Marquardt fit of many small problems at once (see :func:`_lm_block`).

    The gathers are processed in blocks of about ``_BLOCK_ELEMENTS`` padded
    picks so that the working arrays stay in the processor cache; this is
    about twice as fast as one pass over all gathers.
    """
    xtol = _XTOL if xtol is None else xtol
    max_iter = _MAX_ITER if max_iter is None else max_iter
    k = theta0.shape[0]
    if k == 0:
        n, p = time.shape[1], theta0.shape[1]
        return (
            theta0.astype(float).copy(),
            np.zeros(0, dtype=int),
            np.zeros(0, dtype=bool),
            np.zeros((0, n)),
            np.zeros((0, p, n)),
        )
    nmax = time.shape[1]
    block = max(16, _BLOCK_ELEMENTS // max(nmax, 1))
    if k <= block:
        return _lm_block(model, theta0, time, sigma, usable, loss, f_scale, xtol, max_iter, progress)
    slices = [slice(lo, min(lo + block, k)) for lo in range(0, k, block)]

    def run(sl):
        return _lm_block(
            model.take(sl),
            theta0[sl],
            time[sl],
            sigma[sl],
            usable[sl],
            loss,
            f_scale,
            xtol,
            max_iter,
            progress,
        )

    workers = min(_workers(), len(slices))
    if workers > 1:  # numpy releases the GIL inside its loops: blocks run in parallel
        with ThreadPoolExecutor(max_workers=workers) as pool:
            parts = list(pool.map(run, slices))
    else:
        parts = [run(sl) for sl in slices]
    return tuple(np.concatenate(x) for x in zip(*parts))


def _workers() -> int:
    """Threads for the engine's blocks: the usable processors, at most ``_MAX_THREADS``."""
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        n = os.cpu_count() or 1
    return max(1, min(n, _MAX_THREADS))


def _lm_block(model, theta0, time, sigma, usable, loss, f_scale, xtol, max_iter, progress):
    """Robust Levenberg-Marquardt fit of many small problems at once.

    Minimises, separately for every gather (row) k,

    .. math::

        F_k(\\theta) = \\sum_{i \\in k} C^2 \\rho\\!\\left(\\frac{e_i^2}{C^2}\\right), \\qquad
        e_i = \\frac{t_i - \\hat t_i(\\theta)}{\\sigma_i}

    The gradient is :math:`-\\sum_i \\psi(e_i)\\,\\mathbf j_i/\\sigma_i` with
    :math:`\\psi(e) = \\rho'(e^2/C^2)\\,e` and :math:`\\mathbf j_i = \\partial\\hat t_i/\\partial\\theta`;
    the Gauss-Newton curvature uses :math:`\\psi'(e_i)` (floored at
    :math:`10^{-3}\\rho'` so that it stays positive for the redescending
    losses), as in [Triggs et al. 2000]. The step solves
    :math:`(H + \\lambda_k\\,\\mathrm{diag}\\,H)\\,\\delta = -\\nabla F/2`, starting
    from :math:`\\lambda_k = 10^{-9}` (nearly Gauss-Newton, which converges in
    three or four steps from the linear start); a step is kept when F does not
    increase (then :math:`\\lambda_k/10`), else it is refused and
    :math:`\\lambda_k` grows tenfold (from at least :math:`10^{-6}`). Steps are
    capped at ``_MAX_STEP`` per internal parameter. A gather has converged when
    a step below ``xtol`` is kept (or refused while hardly damped: the cost
    then rose at the rounding level only), or when the next undamped step
    would be below ``xtol / 10``: that step is then taken without the usual
    check and only the model times are evaluated there. Near the solution the iteration contracts
    fast, so the error left is well below ``xtol``. The fixed point
    is a stationary point of F, the same function scipy's ``least_squares``
    minimises with this loss and ``f_scale = C``. Converged gathers leave the
    working set, which is compacted so that the tail of slow gathers costs
    little.

    Parameters
    ----------
    model : object with ``evaluate(theta) -> (t (k, n), J (k, p, n))`` and ``take(rows)``
    theta0 : (k, p) internal start parameters, one row per model row
    time, sigma : (k, nmax) padded observations and pick errors (s)
    usable : (k, nmax) bool, picks taking part

    Returns
    -------
    theta (k, p), iterations (k,), converged (k,) bool, and the model's times
    (k, nmax) and internal-parameter Jacobian (k, p, nmax) at the returned theta
    """
    k, p = theta0.shape
    theta_out = theta0.astype(float).copy()
    iters_out = np.zeros(k, dtype=int)
    conv_out = np.zeros(k, dtype=bool)
    pred_out = np.empty(time.shape)
    J_out = np.empty((k, p, time.shape[1]))
    rows = np.arange(k)
    theta = theta_out.copy()
    t_obs = time
    inv_s = np.where(usable, 1.0 / sigma, 0.0)
    pred, J = model.evaluate(theta)
    e = (t_obs - pred) * inv_s
    cost, r1, wc = _loss_terms(e, loss, f_scale)
    lam = np.full(k, _LAMBDA0)
    iters = np.zeros(k, dtype=int)
    eye = np.eye(p)
    for _ in range(max_iter):
        if rows.size == 0:
            break
        check_cancel(progress)
        ws = wc * inv_s
        ws *= inv_s  # curvature weights psi'(e) / sigma^2
        gs = r1 * e
        gs *= inv_s  # psi(e) / sigma
        H = np.matmul(J * ws[:, None, :], J.transpose(0, 2, 1))
        g = np.einsum("kpn,kn->kp", J, gs)
        dg = H.diagonal(axis1=1, axis2=2)
        A = H + (lam[:, None] * np.maximum(dg, 1e-300))[:, :, None] * eye
        delta = _safe_solve(A, g)
        big = np.max(np.abs(delta), axis=1)
        delta *= np.minimum(1.0, _MAX_STEP / np.maximum(big, 1e-300))[:, None]
        # converged without trying the step: where the undamped step is below xtol / 10 it is
        # taken without the usual check (the cost cannot change by more than rounding), with the
        # model times at the new point but the Jacobian of the point before (a difference far
        # below anything that matters for the covariance), saving most of an evaluation
        pre = (big < 0.1 * xtol) & (lam < 1e-2) & ~conv_out[rows]
        if np.any(pre):
            fin = rows[pre]
            th_fin = theta[pre] + delta[pre]
            theta_out[fin] = th_fin
            iters_out[fin] = iters[pre] + 1
            conv_out[fin] = True
            pred_out[fin] = model.take(pre).evaluate(th_fin, jacobian=False)[0]
            J_out[fin] = J[pre]
            finished = conv_out[rows]
            if finished.all():
                rows = rows[:0]
                break
            if finished.sum() * 8 >= rows.size:  # compact the working set
                keep = ~finished
                rows, theta, pred, e, J, cost, lam, iters, delta = (
                    rows[keep],
                    theta[keep],
                    pred[keep],
                    e[keep],
                    J[keep],
                    cost[keep],
                    lam[keep],
                    iters[keep],
                    delta[keep],
                )
                r1, wc = r1[keep], wc[keep]
                t_obs, inv_s = t_obs[keep], inv_s[keep]
                model = model.take(keep)
        th_new = theta + delta
        pred_new, J_new = model.evaluate(th_new)
        e_new = t_obs - pred_new
        e_new *= inv_s
        cost_new, r1_new, wc_new = _loss_terms(e_new, loss, f_scale)
        accept = np.isfinite(cost_new) & (cost_new <= cost)
        iters += 1
        if np.all(accept):
            theta, pred, e, J, cost, r1, wc = th_new, pred_new, e_new, J_new, cost_new, r1_new, wc_new
        else:  # refused rows keep their previous state
            ref = ~accept
            th_new[ref], pred_new[ref], e_new[ref], J_new[ref] = theta[ref], pred[ref], e[ref], J[ref]
            cost_new[ref], r1_new[ref], wc_new[ref] = cost[ref], r1[ref], wc[ref]
            theta, pred, e, J, cost, r1, wc = th_new, pred_new, e_new, J_new, cost_new, r1_new, wc_new
        # converged: a step below xtol that was accepted or, if refused, was hardly damped (the
        # cost then rose at the rounding level only)
        big = np.max(np.abs(delta), axis=1)
        done = (big < xtol) & (accept | (lam < 1e-2)) & ~conv_out[rows]
        lam = np.where(accept, np.maximum(lam / 10.0, 1e-15), np.minimum(np.maximum(lam, 1e-6) * 10.0, 1e16))
        if np.any(done):
            fin = rows[done]
            theta_out[fin] = theta[done]
            iters_out[fin] = iters[done]
            conv_out[fin] = True
            pred_out[fin] = pred[done]
            J_out[fin] = J[done]
            finished = conv_out[rows]
            if finished.sum() * 8 >= rows.size:  # compact the working set
                keep = ~finished
                rows, theta, pred, e, J, cost, lam, iters = (
                    rows[keep],
                    theta[keep],
                    pred[keep],
                    e[keep],
                    J[keep],
                    cost[keep],
                    lam[keep],
                    iters[keep],
                )
                r1, wc = r1[keep], wc[keep]
                t_obs, inv_s = t_obs[keep], inv_s[keep]
                model = model.take(keep)
    # rows still in the working set that did not converge (or converged after the last compaction)
    live = ~conv_out[rows]
    theta_out[rows[live]] = theta[live]
    iters_out[rows[live]] = iters[live]
    pred_out[rows[live]] = pred[live]
    J_out[rows[live]] = J[live]
    return theta_out, iters_out, conv_out, pred_out, J_out


def _scaled_normal_matrix(J, inv_s):
    """Inverse of the correlation-scaled normal matrix, its scale and condition number.

    ``J`` (k, p, n) natural-parameter Jacobian, ``inv_s`` (k, n) 1/sigma (0 for
    unused picks). With :math:`H = J^T\\Sigma^{-1}J` and :math:`d = \\sqrt{\\mathrm{diag}\\,H}`,
    :math:`R = D^{-1}HD^{-1}`; returns :math:`R^{-1}`, d and the Frobenius-norm
    condition number :math:`\\|R\\|_F\\,\\|R^{-1}\\|_F` (inf when singular), which
    lies between the 2-norm condition number and p times it.
    """
    Js = J * inv_s[:, None, :]
    H = np.matmul(Js, Js.transpose(0, 2, 1))
    d = np.sqrt(H.diagonal(axis1=1, axis2=2))
    d = np.where(np.isfinite(d) & (d > 0), d, 1.0)
    R = H / d[:, :, None] / d[:, None, :]
    R = np.where(np.isfinite(R), R, 0.0)
    Rinv, det = _inv_small(R)
    singular = ~(det > 0) | ~np.all(np.isfinite(Rinv), axis=(1, 2))
    with np.errstate(over="ignore", invalid="ignore"):
        cond = np.sqrt(np.sum(R * R, axis=(1, 2)) * np.sum(Rinv * Rinv, axis=(1, 2)))
    cond = np.where(singular, np.inf, cond)
    Rinv = np.where(singular[:, None, None], np.where(np.eye(R.shape[-1], dtype=bool), np.inf, 0.0), Rinv)
    return Rinv, d, cond


def _all_or(idx, n):
    """``slice(None)`` (a view, no copy) when ``idx`` lists all n rows in order, else ``idx``."""
    return slice(None) if len(idx) == n else idx


def _fit_engine(model, time, sigma, valid, excluded, settings, progress=None):
    """Shared driver: start, robust fit, mispick rejection, covariance, status.

    ``time``, ``sigma``, ``valid`` (pick exists), ``excluded`` are padded
    ``(g, nmax)``. Returns a dict of per-gather and padded per-pick arrays.
    Gathers are independent, so the whole procedure runs on cache-sized
    blocks of gathers (in parallel threads where several processors are
    available) and the results are joined.
    """
    loss = _check_loss(settings.robust_loss)
    C = float(settings.robust_scale)
    if not (np.isfinite(C) and C > 0):
        raise InversionError(f"robust_scale = {C!r} must be a positive number of pick sigmas (e.g. 1.5)")
    k_rej = float(settings.reject_sigma) if settings.reject_sigma is not None else np.inf
    if not k_rej > 0:
        raise InversionError(f"reject_sigma = {k_rej!r} must be positive (e.g. 4); use inf to disable rejection")
    kappa = _loss_variance_inflation(loss, C)
    g, nmax = time.shape
    block = max(16, _BLOCK_ELEMENTS // max(nmax, 1))
    slices = [slice(lo, min(lo + block, g)) for lo in range(0, g, block)] or [slice(0, 0)]
    if progress is not None:
        progress.set_progress(1.0)

    def run(sl):
        return _engine_block(
            model.take(sl),
            time[sl],
            sigma[sl],
            valid[sl],
            excluded[sl],
            settings,
            loss,
            C,
            k_rej,
            kappa,
            progress,
        )

    workers = min(_workers(), len(slices))
    parts = []
    if workers > 1:  # numpy releases the GIL inside its loops: blocks run in parallel
        with ThreadPoolExecutor(max_workers=workers) as pool:
            for part in pool.map(run, slices):
                parts.append(part)
                if progress is not None:
                    progress.set_progress(1.0 + 98.0 * len(parts) / len(slices))
    else:
        for sl in slices:
            parts.append(run(sl))
            if progress is not None:
                progress.set_progress(1.0 + 98.0 * len(parts) / len(slices))
    if progress is not None:
        progress.set_progress(100.0)
    if len(parts) == 1:
        return parts[0]
    return {key: np.concatenate([part[key] for part in parts]) for key in parts[0]}


def _engine_block(model, time, sigma, valid, excluded, settings, loss, C, k_rej, kappa, progress):
    """:func:`_fit_engine` on one block of gathers (the same arguments, padded arrays)."""
    p = model.n_params
    g, nmax = time.shape
    min_picks = max(int(settings.min_picks), p + 1)
    min_distinct = p + 1
    base = valid & ~excluded
    rejected = np.zeros_like(valid)

    def enough(usable):
        n_used = usable.sum(axis=1)
        n_dist = _distinct_count(model.offset_key, usable, model.offset_resolution)
        return (n_used >= min_picks) & (n_dist >= min_distinct), n_used, n_dist

    ok_count, n_used0, n_dist0 = enough(base)
    fitted = ok_count.copy()
    theta = np.full((g, p), np.nan)
    iterations = np.zeros(g, dtype=int)
    converged = np.zeros(g, dtype=bool)
    theta_start, _ = model.start(time, sigma, base, settings)  # padding holds t = sigma = 1
    pred_all = np.full((g, nmax), np.nan)  # model times and Jacobian at theta, kept from the fits
    J_all = np.full((g, p, nmax), np.nan)
    todo = np.flatnonzero(fitted)
    few_after = np.zeros(g, dtype=bool)
    for rnd in range(_MAX_REJECTION_ROUNDS + 1):
        if todo.size:
            sel = _all_or(todo, g)
            usable = base[sel] & ~rejected[sel]
            start = np.where(np.isfinite(theta[sel]), theta[sel], theta_start[sel])
            th, it, conv, pr, jac = _batched_least_squares(
                model.take(sel), start, time[sel], sigma[sel], usable, loss, C, progress=progress
            )
            theta[todo] = th
            iterations[todo] += it
            converged[todo] = conv
            pred_all[sel] = pr
            J_all[sel] = jac
        if not np.isfinite(k_rej) or rnd == _MAX_REJECTION_ROUNDS:
            break
        # mispick test on all non-excluded picks of the gathers fitted in this round (the others
        # kept their parameters and picks, so their test cannot change)
        fi = todo[fitted[todo]]
        if fi.size == 0:
            break
        e = (time[fi] - pred_all[fi]) / sigma[fi]
        used = base[fi] & ~rejected[fi]
        med = _row_median(e, used)
        mad = _row_median(np.abs(e - med[:, None]), used)
        scale = np.maximum(1.0, _MAD_TO_SIGMA * np.nan_to_num(mad))
        new_rej = base[fi] & (np.abs(e) > k_rej * scale[:, None])
        changed = np.any(new_rej != rejected[fi], axis=1)
        if not np.any(changed):
            break
        rejected[fi] = new_rej
        ch = fi[changed]
        usable_ch = base[ch] & ~rejected[ch]
        n_u = usable_ch.sum(axis=1)
        n_d = _distinct_count(model.offset_key[ch], usable_ch, model.offset_resolution)
        still = (n_u >= min_picks) & (n_d >= min_distinct)
        few_after[ch[~still]] = True
        fitted[ch[~still]] = False
        theta[ch[~still]] = np.nan
        todo = ch[still]

    # ---- final quantities
    usable = base & ~rejected & fitted[:, None]
    n_used = usable.sum(axis=1)
    params = np.full((g, p), np.nan)
    cov = np.full((g, p, p), np.nan)
    resid = np.full((g, nmax), np.nan)
    weight = np.zeros((g, nmax))
    chi2_factor = np.full(g, np.nan)
    cond = np.full(g, np.nan)
    rms = np.full(g, np.nan)
    fi = np.flatnonzero(fitted)
    if fi.size:
        fs = _all_or(fi, g)
        sub = model.take(fs)
        params[fs] = sub.natural(theta[fs])
        pred, Jn = pred_all[fs], sub.natural_jacobian(J_all[fs], theta[fs])
        r = time[fs] - pred
        resid[fs] = np.where(valid[fs], r, np.nan)
        u = usable[fs]
        e = np.where(u, r / sigma[fs], 0.0)
        weight[fs] = np.where(u, _rho1(e * e / (C * C), loss), 0.0)
        rms[fs] = np.sqrt(np.sum(np.where(u, r * r, 0.0), axis=1) / n_used[fs])
        chi2_factor[fs] = np.sum(e * e, axis=1) / (n_used[fs] - p)
        inv_s = np.where(u, 1.0 / sigma[fs], 0.0)
        Rinv, d, cond[fs] = _scaled_normal_matrix(Jn, inv_s)
        factor = kappa * np.maximum(1.0, chi2_factor[fs])
        with np.errstate(over="ignore", invalid="ignore"):
            cov[fs] = Rinv / d[:, :, None] / d[:, None, :] * factor[:, None, None]
        bad, why = sub.physical(params[fs], settings)
        if np.any(bad):
            # a non-physical fit is judged at the nearest plausible parameters: is the geometry itself
            # unable to separate the parameters (then it is ill-conditioned) or are the data wrong?
            jb = np.flatnonzero(bad)
            ref = sub.take(jb).reference(params[fi[jb]], settings)
            _, Jr = sub.take(jb).evaluate(ref, natural=True)
            cond[fi[jb]] = _scaled_normal_matrix(Jr, inv_s[jb])[2]

    status = np.full(g, _OK, dtype=int)
    reasons = {}
    # precedence: too few picks > ill-conditioned > nonphysical > not converged
    for kk in np.flatnonzero(~fitted):
        status[kk] = _FEW
        if few_after[kk]:
            nr = int((rejected[kk] & base[kk]).sum())
            nu = int((base[kk] & ~rejected[kk]).sum())
            reasons[kk] = (
                f"only {nu} usable picks remain after rejecting {nr} mispicks; at least "
                f"{min_picks} picks at {min_distinct} distinct offsets are needed"
            )
        else:
            reasons[kk] = (
                f"only {int(n_used0[kk])} usable picks at {int(n_dist0[kk])} distinct offsets; "
                f"at least {min_picks} picks at {min_distinct} distinct offsets are needed"
            )
    if fi.size:
        ill = ~(cond[fi] <= CONDITION_LIMIT)
        for j in np.flatnonzero(ill):
            kk = fi[j]
            status[kk] = _ILL
            reasons[kk] = (
                f"{model.names[0]} and {model.names[1]} trade off (condition number {cond[kk]:.2g} "
                f"> {CONDITION_LIMIT:.0e}): the offsets are too short for the reflector depth; "
                "use longer offsets or fix the velocity from neighbouring gathers"
            )
        for j, text in why.items():
            if not ill[j]:
                status[fi[j]] = _NONPHYS
                reasons[fi[j]] = text
        noconv = ~converged[fi] & ~bad & ~ill
        for j in np.flatnonzero(noconv):
            kk = fi[j]
            status[kk] = _NOCONV
            reasons[kk] = f"the fit did not converge in {int(iterations[kk])} iterations; check the picks"
    reason = np.full(g, "fit accepted", dtype=object)
    for kk, text in reasons.items():
        reason[kk] = text
    return dict(
        params=params,
        cov=cov,
        status=_STATUS_NAMES[status],
        reason=reason,
        iterations=iterations,
        rms=rms,
        n_used=n_used,
        n_rejected=(rejected & base).sum(axis=1),
        n_excluded=(excluded & valid).sum(axis=1),
        chi2_factor=chi2_factor,
        cond=cond,
        resid=resid,
        rejected=rejected & base,
        weight=weight,
    )


# --------------------------------------------------------------------------- public API


def _check_picks(time_s, sigma_s, pick_index=None):
    time_s = np.asarray(time_s, dtype=float)
    sigma_s = np.asarray(sigma_s, dtype=float)
    label = "pick" if pick_index is None else "pick (row in the picks table)"
    bad = ~(np.isfinite(time_s) & (time_s > 0))
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        ref = i if pick_index is None else int(np.asarray(pick_index)[i])
        raise InversionError(
            f"{label} {ref} has two-way time {float(time_s[i])!r} s; times must be positive and finite "
            "(remove the row or fix the pick)"
        )
    bad = ~(np.isfinite(sigma_s) & (sigma_s > 0))
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        ref = i if pick_index is None else int(np.asarray(pick_index)[i])
        raise InversionError(
            f"{label} {ref} has pick error {float(sigma_s[i])!r} s; pick errors must be positive "
            "(leave sigma_ms empty to use default_sigma_ms)"
        )
    return time_s, sigma_s


def _exclude_mask(exclude, n):
    if exclude is None:
        return np.zeros(n, dtype=bool)
    ex = np.asarray(exclude, dtype=bool)
    if ex.shape != (n,):
        raise InversionError(f"exclude has shape {ex.shape}; expected one flag per pick, shape ({n},)")
    return ex


def _shot_model(gathers: GatherSet, q):
    """Padded components of a GatherSet for the image-source model: (components, row, col, shape)."""
    gid = np.asarray(gathers.gather, dtype=np.intp)
    g = gathers.n_gathers
    row, col, nmax = _pad_layout(gid, g)
    shape = (g, nmax)
    R = np.asarray(gathers.receiver_xyz, float)
    S = np.asarray(gathers.source_xyz, float)
    Dx, Dy, Dz = (_pad(R[:, i] - S[:, i], row, col, shape, fresh=True) for i in range(3))
    u = np.asarray(gathers.line_unit, float)
    w = np.asarray(gathers.cross_unit, float)
    model = _ShotComponents(Dx, Dy, Dz, u, w, np.asarray(q, dtype=float))
    return model, row, col, shape


def _shot_start(gathers: GatherSet, q, settings: Settings = _DEFAULT_SETTINGS):
    """Internal start parameters (ln V, ln h, artanh(s/s_max)) of the linear fit (benchmark aid)."""
    model, row, col, shape = _shot_model(gathers, q)
    valid = _pad(True, row, col, shape, fill=False, dtype=bool)
    t = _pad(np.asarray(gathers.time_s, float), row, col, shape, fill=1.0)
    sg = _pad(np.asarray(gathers.sigma_s, float), row, col, shape, fill=1.0)
    return model.take(slice(0, shape[0])).start(t, sg, valid, settings)[0]


def fit_shot_gathers(
    gathers: GatherSet,
    settings: Settings = _DEFAULT_SETTINGS,
    cross_component=None,
    exclude=None,
    progress=None,
) -> ShotFits:
    """Fit velocity, normal distance and along-line dip component per shot gather.

    Model (exact image source, 3D) [Sheriff & Geldart 1995, ch. 4]:

    .. math::

        t = \\frac{1}{V}\\sqrt{|\\mathbf D|^2 + 4h\\,(s\\,x_u + q\\,y_w + c\\,\\Delta z) + 4h^2},
        \\qquad c = \\sqrt{1 - s^2 - q^2}

    with :math:`\\mathbf D = \\mathbf R - \\mathbf S`, :math:`x_u`, :math:`y_w`
    its components along ``line_unit`` and ``cross_unit`` and :math:`\\Delta z`
    the receiver's height above the source. The downward normal is
    :math:`\\mathbf n = -s\\mathbf u - q\\mathbf w - c\\,\\mathbf e_z`. On a flat
    straight line this is :math:`t^2V^2 = x^2 + 4hsx + 4h^2`, and for a horizontal
    reflector the :math:`t^2`-:math:`x^2` relation [Green 1938].

    Steps: (1) weighted linear least squares of
    :math:`t^2 = a|\\mathbf D|^2 + b\\,x_u + c_0` with
    :math:`\\sigma(t^2) = 2t\\sigma_t` gives the start
    :math:`V = a^{-1/2}`, :math:`h = \\sqrt{c_0/a}/2`,
    :math:`s = b/(2\\sqrt{a c_0})` (a horizontal-reflector start when that is
    not physical); (2) the robust time-domain fit of the module's engine;
    (3) mispick rejection and refit; (4) covariance and status (see the module
    notes for the conventions).

    Parameters
    ----------
    gathers : GatherSet
    settings : Settings
        Uses ``min_picks``, ``velocity_min_m_s``, ``velocity_max_m_s``,
        ``robust_loss``, ``robust_scale``, ``reject_sigma`` (``inf`` disables
        rejection).
    cross_component : None, float or (g,) array
        q = -w.n per gather (0 when None), e.g. from a surface or crossing lines.
        NaN entries mean "not resolved" and are taken as 0 (level across the
        line); ``ShotFits.cross_component`` reports the value used.
    exclude : None or (n,) bool
        Picks the user excluded; reported as ``excluded``, not fitted.
    progress : object with ``set_progress``/``is_canceled``, optional

    Returns
    -------
    ShotFits

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
    time_s, sigma_s = _check_picks(gathers.time_s, gathers.sigma_s, gathers.pick_index)
    gid = np.asarray(gathers.gather, dtype=np.intp)
    if n and (gid.min() < 0 or gid.max() >= g):
        raise InversionError(f"gather index {int(gid.max())} out of range for {g} gathers; rebuild the GatherSet")
    if cross_component is None:
        q = np.zeros(g)
    else:
        q = np.broadcast_to(np.asarray(cross_component, dtype=float), (g,)).copy()
    q = np.where(np.isfinite(q), q, 0.0)  # NaN: cross-line dip not resolved, taken as level
    if np.any(np.abs(q) >= 1.0):
        bad = float(q[np.abs(q) >= 1.0][0])
        raise InversionError(f"cross_component {bad!r} is not a sine of a dip; expected |q| < 1")
    ex = _exclude_mask(exclude, n)
    model, row, col, shape = _shot_model(gathers, q)
    valid = _pad(True, row, col, shape, fill=False, dtype=bool)
    out = _fit_engine(
        model,
        _pad(time_s, row, col, shape, fill=1.0),
        _pad(sigma_s, row, col, shape, fill=1.0),
        valid,
        _pad(ex, row, col, shape, fill=False, dtype=bool),
        settings,
        progress,
    )
    V, h, s = out["params"].T
    cov = out["cov"]
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
        rms_residual_s=out["rms"],
        picks_used=out["n_used"],
        picks_rejected=out["n_rejected"],
        picks_excluded=out["n_excluded"],
        variance_factor=out["chi2_factor"],
        condition_number=out["cond"],
        status=out["status"],
        reason=out["reason"],
        iterations=out["iterations"],
        residual_s=_unpad(out["resid"], row, col),
        rejected=_unpad(out["rejected"], row, col),
        excluded=ex.copy(),
        weight=_unpad(out["weight"], row, col),
    )


def gather_normals(gathers: GatherSet, fits: ShotFits) -> np.ndarray:
    """Downward unit normals (g, 3): :math:`\\mathbf n = -s\\mathbf u - q\\mathbf w - c\\,\\mathbf e_z`.

    ``c = sqrt(1 - s^2 - q^2)``; NaN rows for gathers without a fit.
    """
    u = np.asarray(gathers.line_unit, float)
    w = np.asarray(gathers.cross_unit, float)
    s = np.asarray(fits.s_along, float)
    q = np.asarray(fits.cross_component, float)
    with np.errstate(invalid="ignore"):
        c = np.sqrt(1.0 - s * s - q * q)
    nh = -s[:, None] * u - q[:, None] * w
    return np.column_stack([nh, -c])


def fit_cmp_gathers(
    gather_id, offset_m, time_s, sigma_s, settings: Settings = _DEFAULT_SETTINGS, exclude=None, progress=None
) -> CmpFits:
    """Fit the NMO hyperbola per common-midpoint gather [Levin 1971].

    .. math::

        t^2 = t_0^2 + \\frac{x^2}{V_{nmo}^2}, \\qquad
        V_{nmo} = \\frac{V}{\\sqrt{1 - \\sin^2\\delta\\cos^2\\beta}}

    Linear start from weighted least squares of :math:`t^2 = c_0 + a x^2`
    (:math:`\\sigma(t^2) = 2t\\sigma_t`), then the same robust engine,
    rejection, covariance and status rules as :func:`fit_shot_gathers`
    (two parameters: at least three distinct |offsets|). The plausible range of
    ``settings`` is applied to :math:`V_{nmo}`.

    Parameters
    ----------
    gather_id : (n,) int >= 0
        Gather of each pick; gathers are ``0 .. max(gather_id)`` (empty ones
        are reported as ``too_few_picks``).
    offset_m : (n,) source-receiver offset (sign ignored)
    time_s, sigma_s : (n,) two-way times and pick errors
    settings, exclude, progress : as in :func:`fit_shot_gathers`

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
    time_s, sigma_s = _check_picks(time_s, sigma_s)
    x = np.abs(np.asarray(offset_m, dtype=float))
    n = len(time_s)
    if not (len(gid) == len(x) == n == len(sigma_s)):
        raise InversionError(
            "gather_id, offset_m, time_s and sigma_s have lengths "
            f"{len(gid)}, {len(x)}, {n}, {len(sigma_s)}; "
            "expected one value per pick in each"
        )
    g = int(gid.max()) + 1 if n else 0
    ex = _exclude_mask(exclude, n)
    row, col, nmax = _pad_layout(gid, g)
    shape = (g, nmax)
    model = _CmpModel(_pad(x, row, col, shape))
    valid = _pad(True, row, col, shape, fill=False, dtype=bool)
    out = _fit_engine(
        model,
        _pad(time_s, row, col, shape, fill=1.0),
        _pad(sigma_s, row, col, shape, fill=1.0),
        valid,
        _pad(ex, row, col, shape, fill=False, dtype=bool),
        settings,
        progress,
    )
    cov = out["cov"]
    with np.errstate(invalid="ignore"):
        se = np.sqrt(np.einsum("kii->ki", cov))
    return CmpFits(
        t0_s=out["params"][:, 0],
        nmo_velocity_m_s=out["params"][:, 1],
        se_t0_s=se[:, 0],
        se_nmo_velocity_m_s=se[:, 1],
        covariance=cov,
        rms_residual_s=out["rms"],
        picks_used=out["n_used"],
        picks_rejected=out["n_rejected"],
        picks_excluded=out["n_excluded"],
        variance_factor=out["chi2_factor"],
        condition_number=out["cond"],
        status=out["status"],
        reason=out["reason"],
        iterations=out["iterations"],
        residual_s=_unpad(out["resid"], row, col),
        rejected=_unpad(out["rejected"], row, col),
        excluded=ex.copy(),
        weight=_unpad(out["weight"], row, col),
    )


def cmp_bins(source_xy, receiver_xy, bin_size_m, line_unit=None, group=None):
    """Sort source-receiver pairs into common-midpoint bins along a line.

    Midpoints :math:`M = (S + R)/2` are projected on the line direction u
    (``line_unit``, (2,) or (n, 2); the principal axis of the midpoints of
    each group when None). Bin k of a group covers projections
    :math:`[p_{min} + k\\,b,\\ p_{min} + (k+1)\\,b)`. Picks of different
    ``group`` labels (e.g. line and reflector) never share a bin.

    Returns
    -------
    gather_id : (n,) int
        Bin number of each pick, 0 .. m-1 over the non-empty bins.
    centre_xy : (m, 2)
        Mean midpoint of each bin.
    offset_m : (n,)
        Horizontal source-receiver distance.

    >>> s = np.array([[0.0, 0.0], [0.0, 0.0], [10.0, 0.0]])
    >>> r = np.array([[10.0, 0.0], [30.0, 0.0], [20.0, 0.0]])
    >>> gid, centres, off = cmp_bins(s, r, 2.0)
    >>> gid.tolist(), centres[:, 0].tolist(), off.tolist()
    ([0, 1, 1], [5.0, 15.0], [10.0, 30.0, 10.0])
    """
    S = np.asarray(source_xy, dtype=float)[:, :2]
    R = np.asarray(receiver_xy, dtype=float)[:, :2]
    if S.shape != R.shape:
        raise InversionError(f"source_xy {S.shape} and receiver_xy {R.shape} must have the same shape (n, 2)")
    if not (np.isfinite(bin_size_m) and bin_size_m > 0):
        raise InversionError(f"bin_size_m = {bin_size_m!r} must be a positive distance in metres")
    n = len(S)
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
    k = np.floor((proj - pmin[labels]) / bin_size_m + 1e-9).astype(np.int64)
    key = labels.astype(np.int64) * (int(k.max()) + 1 if n else 1) + k
    _, gather_id = np.unique(key, return_inverse=True)
    gather_id = gather_id.ravel()
    m = int(gather_id.max()) + 1 if n else 0
    cnt = np.bincount(gather_id, minlength=m)
    centres = np.column_stack([np.bincount(gather_id, M[:, i], m) for i in range(2)]) / cnt[:, None]
    return gather_id, centres, off


def dix_intervals(t0_s, vrms_m_s, se_t0_s=None, se_vrms_m_s=None) -> DixIntervals:
    """Interval velocities and thicknesses from rms velocities at one location [Dix 1955].

    Reflectors are sorted by t0. With :math:`t_0 = 0` and :math:`V_0 = 0` for
    the surface,

    .. math::

        v_k^2 = \\frac{V_k^2 t_k - V_{k-1}^2 t_{k-1}}{t_k - t_{k-1}}, \\qquad
        z_k = \\tfrac12 v_k (t_k - t_{k-1})

    Standard errors by the delta method from independent errors of each
    :math:`t_k` and :math:`V_k` (zero when not given). A layer whose
    numerator or time difference is not positive is flagged ``nonphysical``
    (NaN values, with a reason), never hidden; the depth below it is NaN too.

    >>> r = dix_intervals([0.02, 0.05], [1000.0, np.sqrt((1000.0**2 * 0.02 + 2000.0**2 * 0.03) / 0.05)])
    >>> [round(float(v), 6) for v in r.interval_velocity_m_s], [round(float(z), 6) for z in r.thickness_m]
    ([1000.0, 2000.0], [10.0, 30.0])
    """
    t = np.asarray(t0_s, dtype=float).ravel()
    v = np.asarray(vrms_m_s, dtype=float).ravel()
    if t.shape != v.shape:
        raise InversionError(f"t0_s has {t.size} values and vrms_m_s {v.size}; expected one of each per reflector")
    st = np.zeros_like(t) if se_t0_s is None else np.broadcast_to(np.asarray(se_t0_s, float), t.shape)
    sv = np.zeros_like(v) if se_vrms_m_s is None else np.broadcast_to(np.asarray(se_vrms_m_s, float), v.shape)
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
