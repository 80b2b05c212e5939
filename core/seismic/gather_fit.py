r"""The procedure every gather fit follows: start, robust fit, mispick rejection, covariance, status.

Shot gathers (:mod:`.shot_fits`) and common-midpoint gathers (:mod:`.cmp`)
differ only in their traveltime model (a :class:`GatherModel`); both go
through :func:`fit_padded_gathers`, which runs the batched engine of
:mod:`.lm` on cache-sized blocks of gathers (in parallel threads where
several processors are available) and joins the results.

Conventions of the fit
----------------------
* **Robust loss.** Standardised residual :math:`e_i = (t_i - \hat t_i)/\sigma_i`;
  the objective is :math:`\sum_i C^2\rho(e_i^2/C^2)` with
  ``C = settings.robust_scale`` and :math:`\rho` named by
  ``settings.robust_loss`` (:mod:`.robust`).
* **Mispick rejection.** After convergence a pick is *rejected* when
  :math:`|e_i| > k\,\max(1,\ 1.4826\,\mathrm{MAD}(e))` with
  ``k = settings.reject_sigma`` and the MAD taken over the gather's used picks.
  The floor 1 trusts the stated pick errors; the MAD term stops a gather whose
  pick errors were understated from losing its good picks. The gather is then
  refitted without them, and all picks are re-tested (a rejected pick may come
  back), until the set is stable or after :data:`MAX_REJECTION_ROUNDS` rounds.
  Rejected picks keep their residual and are reported (``rejected``); nothing
  is dropped silently. A gather left with too few picks is flagged
  ``too_few_picks`` (with the number rejected in its reason).
* **User exclusions** (``exclude``, e.g. from the QC panel) are counted apart
  (``excluded``, ``picks_excluded``), never as rejections.
* **Covariance.** :math:`\mathrm{Cov} = \kappa\,F\,(J^T\Sigma^{-1}J)^{-1}`
  over the used picks, with :math:`J` the Jacobian in the reported parameters,
  :math:`\kappa = E[\psi^2]/E[\psi']^2` the asymptotic variance inflation of
  the robust loss for Gaussian errors (1.037 for Huber with C = 1.5,
  :func:`.robust.variance_inflation`) and
  :math:`F = \max(1, \chi^2/(n-p))` the a-posteriori variance factor. F only
  inflates: a gather whose scatter exceeds its stated pick errors gets wider
  errors, while a lucky small scatter does not shrink them below what the
  stated errors imply. With correct pick errors the one-SE coverage is close
  to 68 % (tested).
* **Status.** ``ok``; ``too_few_picks`` (fewer than ``settings.min_picks``
  usable picks or fewer distinct offsets than parameters + 1 -- values NaN,
  the gather is not fitted); ``nonphysical`` (parameters outside their
  plausible range, see the model); ``ill_conditioned`` (condition number of the
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
[Huber 1981] Huber, P. J. (1981). Robust Statistics. Wiley (M-estimators,
    asymptotic variance E[psi^2]/E[psi']^2).
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any, Optional, Protocol

import numpy as np

from ..errors import InversionError
from ..survey.model import Settings
from .batch import distinct_count, inverse_small, row_median
from .lm import LmModel, Rows, batched_least_squares, block_slices, map_blocks, times_and_jacobian
from .robust import check_loss, rho_prime, variance_inflation

__all__ = [
    "CONDITION_LIMIT",
    "MAX_REJECTION_ROUNDS",
    "STATUS_NAMES",
    "GatherBlocks",
    "GatherModel",
    "PaddedFits",
    "check_pick_times",
    "exclude_mask",
    "fit_padded_gathers",
]

#: Largest accepted condition number of the correlation-scaled normal matrix.
#: For a shot gather it grows like (h / x_max)^4 (Frobenius norm): a split
#: spread whose longest offset is under about a twelfth of the normal distance
#: h, or an end-on spread under about a fifth, exceeds it; spreads as long as h
#: stay near 1e3 (split) to 2e4 (end-on). Between those, the standard errors
#: (not the status) say how well V is known.
CONDITION_LIMIT = 1.0e7
#: Refits after rejecting mispicks, at most.
MAX_REJECTION_ROUNDS = 5
#: Status names of a gather fit, indexed by the status codes below.
STATUS_NAMES = np.array(["ok", "too_few_picks", "nonphysical", "ill_conditioned", "not_converged"], dtype=object)
_OK, _FEW, _NONPHYS, _ILL, _NOCONV = range(5)
_MAD_TO_SIGMA = 1.4826  # MAD of a Gaussian times this = its standard deviation


class GatherModel(LmModel, Protocol):
    """A gather traveltime model as :func:`fit_padded_gathers` uses it (padded arrays).

    Attributes
    ----------
    n_params : int
        Number of parameters p.
    names : tuple of str
        Names of the parameters, for messages.
    offset_key : (k, nmax) ndarray
        Offset of each pick (m), for the distinct-offset count.
    offset_resolution : float
        Offsets closer than this (m) count as one.
    """

    n_params: int
    names: tuple[str, ...]
    offset_key: np.ndarray
    offset_resolution: float

    def take(self, rows: Rows) -> GatherModel:
        """Return the model restricted to some gathers.

        Parameters
        ----------
        rows : slice, int ndarray or bool ndarray
            The rows (gathers) to keep.

        Returns
        -------
        GatherModel
        """
        ...

    def natural(self, theta: np.ndarray) -> np.ndarray:
        """Return the reported parameters from the internal ones.

        Parameters
        ----------
        theta : (k, p) ndarray
            Internal parameters.

        Returns
        -------
        (k, p) ndarray
            Reported parameters (in their units, e.g. m/s, m).
        """
        ...

    def natural_jacobian(self, J: np.ndarray, theta: np.ndarray) -> np.ndarray:
        """Return the Jacobian in the reported parameters from the one in the internal ones.

        Parameters
        ----------
        J : (k, p, nmax) ndarray
            Derivatives of the times (s) with respect to the internal parameters.
        theta : (k, p) ndarray
            Internal parameters where J was taken.

        Returns
        -------
        (k, p, nmax) ndarray
            Derivatives with respect to the reported parameters (chain rule).
        """
        ...

    def internal(self, params: np.ndarray) -> np.ndarray:
        """Return the internal parameters from the reported ones.

        Parameters
        ----------
        params : (k, p) ndarray
            Reported parameters.

        Returns
        -------
        (k, p) ndarray
            Internal parameters.
        """
        ...

    def start(
        self, t: np.ndarray, sigma: np.ndarray, usable: np.ndarray, settings: Settings
    ) -> tuple[np.ndarray, np.ndarray]:
        """Return start values from a weighted linear fit in :math:`t^2`.

        Parameters
        ----------
        t, sigma : (k, nmax) ndarray
            Padded two-way times and pick errors (s).
        usable : (k, nmax) bool ndarray
            Picks taking part.
        settings : Settings
            The plausible velocity range.

        Returns
        -------
        theta : (k, p) ndarray
            Internal start parameters.
        full : (k,) bool ndarray
            The start came from the full linear fit (not a fallback).
        """
        ...

    def reference(self, params: np.ndarray, settings: Settings) -> np.ndarray:
        """Return the nearest plausible parameters (for the conditioning check).

        Parameters
        ----------
        params : (k, p) ndarray
            Reported parameters of non-physical fits.
        settings : Settings
            The plausible velocity range.

        Returns
        -------
        (k, p) ndarray
            Plausible parameters with the same zero-offset time.
        """
        ...

    def physical(self, params: np.ndarray, settings: Settings) -> tuple[np.ndarray, dict[int, str]]:
        """Flag non-physical parameters.

        Parameters
        ----------
        params : (k, p) ndarray
            Reported parameters.
        settings : Settings
            The plausible velocity range.

        Returns
        -------
        bad : (k,) bool ndarray
            Non-physical rows.
        reasons : dict
            Row to a sentence saying why.
        """
        ...


class GatherBlocks(Protocol):
    """Gathers that give the :class:`GatherModel` of any block of them (e.g. a :class:`GatherModel`)."""

    def take(self, rows: Rows) -> GatherModel:
        """Return the model of some gathers.

        Parameters
        ----------
        rows : slice, int ndarray or bool ndarray
            The rows (gathers) to keep.

        Returns
        -------
        GatherModel
        """
        ...


@dataclass(frozen=True)
class PaddedFits:
    r"""Result of :func:`fit_padded_gathers`: per gather (g) and padded per pick (g, nmax).

    Attributes
    ----------
    params : (g, p) ndarray
        Reported parameters (NaN for a gather not fitted).
    covariance : (g, p, p) ndarray
        Their covariance.
    status, reason : (g,) object ndarray
        Status name (:data:`STATUS_NAMES`) and a sentence.
    iterations : (g,) int ndarray
        Engine iterations over all rejection rounds.
    rms_residual_s : (g,) ndarray
        Rms residual of the used picks (s).
    picks_used, picks_rejected, picks_excluded : (g,) int ndarray
        Pick counts.
    variance_factor : (g,) ndarray
        :math:`\chi^2/(n - p)` of the used picks.
    condition_number : (g,) ndarray
        Of the correlation-scaled normal matrix.
    residual_s : (g, nmax) ndarray
        Observed minus modelled time (s), NaN where no pick or no fit.
    rejected : (g, nmax) bool ndarray
        Picks rejected as mispicks.
    weight : (g, nmax) ndarray
        Final robust weight (0 for picks not used).
    """

    params: np.ndarray
    covariance: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    iterations: np.ndarray
    rms_residual_s: np.ndarray
    picks_used: np.ndarray
    picks_rejected: np.ndarray
    picks_excluded: np.ndarray
    variance_factor: np.ndarray
    condition_number: np.ndarray
    residual_s: np.ndarray
    rejected: np.ndarray
    weight: np.ndarray

    @classmethod
    def concatenate(cls, parts: list[PaddedFits]) -> PaddedFits:
        """Join the fits of consecutive blocks of gathers.

        Parameters
        ----------
        parts : list of PaddedFits
            Fits of consecutive gather blocks.

        Returns
        -------
        PaddedFits
            One result over all gathers.
        """
        return cls(*(np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(cls)))


def check_pick_times(
    time_s: np.ndarray, sigma_s: np.ndarray, pick_index: Optional[np.ndarray] = None
) -> tuple[np.ndarray, np.ndarray]:
    """Check that two-way times and pick errors are positive and finite.

    Parameters
    ----------
    time_s : (n,) array_like
        Two-way times (s).
    sigma_s : (n,) array_like
        Pick errors (s).
    pick_index : (n,) int array_like, optional
        Row of each pick in the picks table, to name a bad one.

    Returns
    -------
    time_s, sigma_s : (n,) ndarray
        As float arrays.

    Raises
    ------
    InversionError
        Naming the first bad pick and its value.
    """
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


def exclude_mask(exclude: Optional[np.ndarray], n: int) -> np.ndarray:
    """Per-pick flags of the picks the user excluded.

    Parameters
    ----------
    exclude : (n,) bool array_like or None
        Flags; None excludes nothing.
    n : int
        Number of picks.

    Returns
    -------
    (n,) bool ndarray

    Raises
    ------
    InversionError
        When ``exclude`` does not hold one flag per pick.
    """
    if exclude is None:
        return np.zeros(n, dtype=bool)
    ex = np.asarray(exclude, dtype=bool)
    if ex.shape != (n,):
        raise InversionError(f"exclude has shape {ex.shape}; expected one flag per pick, shape ({n},)")
    return ex


def _scaled_normal_matrix(J: np.ndarray, inv_s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Inverse of the correlation-scaled normal matrix, its scale and condition number.

    ``J`` (k, p, n) natural-parameter Jacobian, ``inv_s`` (k, n) 1/sigma (0 for
    unused picks). With :math:`H = J^T\Sigma^{-1}J` and :math:`d = \sqrt{\mathrm{diag}\,H}`,
    :math:`R = D^{-1}HD^{-1}`; returns :math:`R^{-1}`, d and the Frobenius-norm
    condition number :math:`\|R\|_F\,\|R^{-1}\|_F` (inf when singular), which
    lies between the 2-norm condition number and p times it.
    """
    Js = J * inv_s[:, None, :]
    H = np.matmul(Js, Js.transpose(0, 2, 1))
    d = np.sqrt(H.diagonal(axis1=1, axis2=2))
    d = np.where(np.isfinite(d) & (d > 0), d, 1.0)
    R = H / d[:, :, None] / d[:, None, :]
    R = np.where(np.isfinite(R), R, 0.0)
    Rinv, det = inverse_small(R)
    singular = ~(det > 0) | ~np.all(np.isfinite(Rinv), axis=(1, 2))
    with np.errstate(over="ignore", invalid="ignore"):
        cond = np.sqrt(np.sum(R * R, axis=(1, 2)) * np.sum(Rinv * Rinv, axis=(1, 2)))
    cond = np.where(singular, np.inf, cond)
    Rinv = np.where(singular[:, None, None], np.where(np.eye(R.shape[-1], dtype=bool), np.inf, 0.0), Rinv)
    return Rinv, d, cond


def _all_rows_or(idx: np.ndarray, n: int) -> Rows:
    """``slice(None)`` (a view, no copy) when ``idx`` lists all n rows in order, else ``idx``."""
    return slice(None) if len(idx) == n else idx


def fit_padded_gathers(
    model: GatherBlocks,
    time_s: np.ndarray,
    sigma_s: np.ndarray,
    valid: np.ndarray,
    excluded: np.ndarray,
    settings: Settings,
    progress: Any = None,
) -> PaddedFits:
    """Fit every gather: start, robust fit, mispick rejection, covariance and status.

    See the module notes for the conventions. Gathers are independent, so the
    whole procedure runs on cache-sized blocks of gathers (in parallel threads
    where several processors are available) and the results are joined.

    Parameters
    ----------
    model : GatherBlocks
        The traveltime model of the g gathers (or what builds it block by block).
    time_s : (g, nmax) ndarray
        Padded two-way times (s; 1 in padding).
    sigma_s : (g, nmax) ndarray
        Padded pick errors (s; 1 in padding).
    valid : (g, nmax) bool ndarray
        Cells holding a pick.
    excluded : (g, nmax) bool ndarray
        Picks the user excluded.
    settings : Settings
        Uses ``min_picks``, ``velocity_min_m_s``, ``velocity_max_m_s``,
        ``robust_loss``, ``robust_scale`` and ``reject_sigma``.
    progress : object with ``set_progress``/``is_canceled``, optional
        Told the share of blocks done (1 to 100 %); cancelling raises
        :class:`~core.errors.CancelledError`.

    Returns
    -------
    PaddedFits

    Raises
    ------
    InversionError
        For an unknown loss or a non-positive ``robust_scale`` or ``reject_sigma``.
    """
    loss = check_loss(settings.robust_loss)
    C = float(settings.robust_scale)
    if not (np.isfinite(C) and C > 0):
        raise InversionError(f"robust_scale = {C!r} must be a positive number of pick sigmas (e.g. 1.5)")
    k_rej = float(settings.reject_sigma) if settings.reject_sigma is not None else np.inf
    if not k_rej > 0:
        raise InversionError(f"reject_sigma = {k_rej!r} must be positive (e.g. 4); use inf to disable rejection")
    kappa = variance_inflation(loss, C)
    g, nmax = time_s.shape
    slices = block_slices(g, nmax)
    if progress is not None:
        progress.set_progress(1.0)

    def run(sl: slice) -> PaddedFits:
        return _fit_block(
            model.take(sl),
            time_s[sl],
            sigma_s[sl],
            valid[sl],
            excluded[sl],
            settings,
            loss,
            C,
            k_rej,
            kappa,
            progress,
        )

    def done(count: int) -> None:
        if progress is not None:
            progress.set_progress(1.0 + 98.0 * count / len(slices))

    parts = map_blocks(run, slices, done)
    if progress is not None:
        progress.set_progress(100.0)
    if len(parts) == 1:
        return parts[0]
    return PaddedFits.concatenate(parts)


def _fit_block(
    model: GatherModel,
    time: np.ndarray,
    sigma: np.ndarray,
    valid: np.ndarray,
    excluded: np.ndarray,
    settings: Settings,
    loss: str,
    C: float,
    k_rej: float,
    kappa: float,
    progress: Any,
) -> PaddedFits:
    """:func:`fit_padded_gathers` on one block of gathers (the same arguments, padded arrays)."""
    p = model.n_params
    g, nmax = time.shape
    min_picks = max(int(settings.min_picks), p + 1)
    min_distinct = p + 1
    base = valid & ~excluded
    rejected = np.zeros_like(valid)

    def enough(usable):
        n_used = usable.sum(axis=1)
        n_dist = distinct_count(model.offset_key, usable, model.offset_resolution)
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
    for rnd in range(MAX_REJECTION_ROUNDS + 1):
        if todo.size:
            sel = _all_rows_or(todo, g)
            usable = base[sel] & ~rejected[sel]
            start = np.where(np.isfinite(theta[sel]), theta[sel], theta_start[sel])
            sol = batched_least_squares(
                model.take(sel), start, time[sel], sigma[sel], usable, loss, C, progress=progress
            )
            theta[todo] = sol.theta
            iterations[todo] += sol.iterations
            converged[todo] = sol.converged
            pred_all[sel] = sol.time_s
            J_all[sel] = sol.jacobian
        if not np.isfinite(k_rej) or rnd == MAX_REJECTION_ROUNDS:
            break
        # mispick test on all non-excluded picks of the gathers fitted in this round (the others
        # kept their parameters and picks, so their test cannot change)
        fi = todo[fitted[todo]]
        if fi.size == 0:
            break
        e = (time[fi] - pred_all[fi]) / sigma[fi]
        used = base[fi] & ~rejected[fi]
        med = row_median(e, used)
        mad = row_median(np.abs(e - med[:, None]), used)
        scale = np.maximum(1.0, _MAD_TO_SIGMA * np.nan_to_num(mad))
        new_rej = base[fi] & (np.abs(e) > k_rej * scale[:, None])
        changed = np.any(new_rej != rejected[fi], axis=1)
        if not np.any(changed):
            break
        rejected[fi] = new_rej
        ch = fi[changed]
        usable_ch = base[ch] & ~rejected[ch]
        n_u = usable_ch.sum(axis=1)
        n_d = distinct_count(model.offset_key[ch], usable_ch, model.offset_resolution)
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
        fs = _all_rows_or(fi, g)
        sub = model.take(fs)
        params[fs] = sub.natural(theta[fs])
        pred, Jn = pred_all[fs], sub.natural_jacobian(J_all[fs], theta[fs])
        r = time[fs] - pred
        resid[fs] = np.where(valid[fs], r, np.nan)
        u = usable[fs]
        e = np.where(u, r / sigma[fs], 0.0)
        weight[fs] = np.where(u, rho_prime(e * e / (C * C), loss), 0.0)
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
            _, Jr = times_and_jacobian(sub.take(jb), ref, natural=True)
            cond[fi[jb]] = _scaled_normal_matrix(Jr, inv_s[jb])[2]

    status = np.full(g, _OK, dtype=int)
    reasons: dict[int, str] = {}
    # precedence: too few picks > ill-conditioned > nonphysical > not converged
    for kk in np.flatnonzero(~fitted):
        status[kk] = _FEW
        if few_after[kk]:
            nr = int((rejected[kk] & base[kk]).sum())
            nu = int((base[kk] & ~rejected[kk]).sum())
            reasons[int(kk)] = (
                f"only {nu} usable picks remain after rejecting {nr} mispicks; at least "
                f"{min_picks} picks at {min_distinct} distinct offsets are needed"
            )
        else:
            reasons[int(kk)] = (
                f"only {int(n_used0[kk])} usable picks at {int(n_dist0[kk])} distinct offsets; "
                f"at least {min_picks} picks at {min_distinct} distinct offsets are needed"
            )
    if fi.size:
        ill = ~(cond[fi] <= CONDITION_LIMIT)
        for j in np.flatnonzero(ill):
            kk = fi[j]
            status[kk] = _ILL
            reasons[int(kk)] = (
                f"{model.names[0]} and {model.names[1]} trade off (condition number {cond[kk]:.2g} "
                f"> {CONDITION_LIMIT:.0e}): the offsets are too short for the reflector depth; "
                "use longer offsets or fix the velocity from neighbouring gathers"
            )
        for jw, text in why.items():
            if not ill[jw]:
                status[fi[jw]] = _NONPHYS
                reasons[int(fi[jw])] = text
        noconv = ~converged[fi] & ~bad & ~ill
        for j in np.flatnonzero(noconv):
            kk = fi[j]
            status[kk] = _NOCONV
            reasons[int(kk)] = f"the fit did not converge in {int(iterations[kk])} iterations; check the picks"
    reason = np.full(g, "fit accepted", dtype=object)
    for row, text in reasons.items():
        reason[row] = text
    return PaddedFits(
        params=params,
        covariance=cov,
        status=STATUS_NAMES[status],
        reason=reason,
        iterations=iterations,
        rms_residual_s=rms,
        picks_used=n_used,
        picks_rejected=(rejected & base).sum(axis=1),
        picks_excluded=(excluded & valid).sum(axis=1),
        variance_factor=chi2_factor,
        condition_number=cond,
        residual_s=resid,
        rejected=rejected & base,
        weight=weight,
    )
