r"""Ordinary kriging with measurement error, in a local (KD-tree) neighbourhood.

:class:`OrdinaryKriging` puts the measurement-error variance of each datum on
the diagonal of the kriging system and solves it for every target with its
``k`` nearest data, so it scales to millions of points and cells;
:meth:`OrdinaryKriging.cross_validate` gives leave-one-out residuals and their
standardised statistics. :func:`choose_variogram` fits the variogram models
and keeps the one whose kriging cross-validates best.

Kriging with measurement error
------------------------------
The data are :math:`Z_i = Y(\mathbf s_i) + \varepsilon_i` with a second-order
stationary signal :math:`Y` of semivariogram :math:`\gamma` and independent
measurement errors of known variance :math:`e_i`. The nugget of :math:`\gamma`
is micro-scale variation of the signal (honoured at data without error), the
:math:`e_i` are measurement error, the split of [Cressie 1993, s. 3.2.1]
(:math:`c_0 = c_{MS} + c_{ME}`). Ordinary kriging of the signal at
:math:`\mathbf s_0` with weights :math:`\lambda` and Lagrange multiplier
:math:`\mu` solves

.. math::

    \sum_j \lambda_j \left[\gamma(\mathbf s_i - \mathbf s_j)
        - e_i \delta_{ij}\right] + \mu = \gamma(\mathbf s_i - \mathbf s_0),
    \qquad \sum_j \lambda_j = 1,

with :math:`\gamma(0) = 0`, and the kriging variance (mean squared error of
:math:`\hat Y(\mathbf s_0)` for :math:`Y(\mathbf s_0)`) is

.. math::

    \sigma_K^2(\mathbf s_0) = \sum_i \lambda_i\, \gamma(\mathbf s_i - \mathbf s_0) + \mu .

This is the covariance form :math:`(C + \mathrm{diag}(e))\lambda + m\mathbf 1 = \mathbf c_0`
written with :math:`C(h) = c_0 + c - \gamma(h)`. With all :math:`e_i = 0` it is
ordinary kriging ([Journel & Huijbregts 1978], [Cressie 1993, eq. 3.2.12]) and
honours every datum exactly; a datum with :math:`e_i > 0` is smoothed, and the
variance at its location is between 0 and :math:`e_i`.

References
----------
[Cressie 1993] Cressie, N. (1993). Statistics for Spatial Data, revised ed.
    Wiley. s. 3.2 (ordinary kriging, measurement error in s. 3.2.1).
[Journel & Huijbregts 1978] Journel, A. G. & Huijbregts, C. J. (1978). Mining
    Geostatistics. Academic Press. ch. V (kriging).
[Dubrule 1983] Dubrule, O. (1983). Cross validation of kriging in a unique
    neighborhood. Mathematical Geology 15(6), 687-699.
[Gneiting & Raftery 2007] Gneiting, T. & Raftery, A. E. (2007). Strictly proper
    scoring rules, prediction, and estimation. JASA 102(477), 359-378.
"""

from __future__ import annotations

import math
from typing import Any, Callable, Mapping, Optional, Union

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from ..errors import InversionError, NotFittedError, SurfaceError
from ..grid import GridSpec
from ..progress import Progress
from .base import CrossValidation, SurfaceGrid, check_points, check_targets, distance_mask
from .threads import run_chunks
from .variogram import (
    VARIOGRAM_MODELS,
    ZERO_LAG_M,
    ExperimentalVariogram,
    VariogramModel,
    check_model_name,
    experimental_variogram,
    fit_variogram,
)

__all__ = [
    "CHUNK_BYTES",
    "GLOBAL_CHUNK_BYTES",
    "GLOBAL_MAX_DATA",
    "SHARED_BLOCK_CHUNKS",
    "OrdinaryKriging",
    "choose_variogram",
]

#: Largest data count for a global (unique-neighbourhood) kriging system.
GLOBAL_MAX_DATA = 6000

#: Memory budget (bytes) of one chunk of batched local kriging systems. Small
#: chunks (~120 targets for k = 32) keep the (chunk, k+1, k+1) arrays in the CPU
#: cache: assembling them was twice as fast per target as with 700-target chunks.
CHUNK_BYTES = 8 * 2**20

#: Memory budget (bytes) of one chunk of right-hand sides (global kriging).
GLOBAL_CHUNK_BYTES = 64 * 2**20

#: Targets are taken this many chunks at a time when predicting, so that the neighbouring
#: cells of a grid, which mostly have the same k nearest data, share one kriging matrix.
SHARED_BLOCK_CHUNKS = 8


def choose_variogram(
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    error_variance: ArrayLike | None = None,
    model: str = "auto",
    neighbours: Optional[int] = 32,
    max_points: int = 2000,
    experimental: ExperimentalVariogram | None = None,
    starts: Optional[Mapping[str, VariogramModel]] = None,
) -> tuple[VariogramModel, dict[str, Any]]:
    r"""Fit a variogram to data, for kriging with measurement error.

    1. :func:`~.variogram.experimental_variogram` of the data (unless
       ``experimental`` is given);
    2. :func:`~.variogram.fit_variogram` of ``model``, or of each of the three
       models when ``model="auto"``;
    3. the mean error variance :math:`\bar e` is subtracted from each fitted
       nugget, which then holds only micro-scale variation:
       :math:`c_{MS} = \max(c_0 - \bar e, 0)` ([Cressie 1993, s. 3.2.1]; the
       experimental variogram of noisy data is that of the signal plus
       :math:`(e_i + e_j)/2` on average);
    4. with ``model="auto"`` the model with the lowest leave-one-out
       :attr:`~.base.CrossValidation.mean_log_score` of
       :class:`OrdinaryKriging` (on at most ``max_points`` data) is chosen:
       smooth reflectors usually pick the gaussian model, whose parabolic
       start the spherical and exponential models cannot follow (they
       overstate the short-lag variance and so the std).

    Parameters
    ----------
    x, y : array_like (n,)
        Easting and northing of the data (m).
    z : array_like (n,)
        Values (m).
    error_variance : array_like (n,) or float, optional
        Measurement-error variance of each datum (m^2); default 0.
    model : str
        "auto", "spherical", "exponential" or "gaussian".
    neighbours : int or None
        Kriging neighbourhood of the cross-validation (None = global).
    max_points : int
        Largest number of data cross-validated (random, seeded subset).
    experimental : ExperimentalVariogram, optional
        Use this experimental variogram instead of computing one.
    starts : mapping of str to VariogramModel, optional
        Model name -> the same model fitted to nearly the same data (``info["fitted"]``
        of an earlier call), each fitted from there alone (``start`` of
        :func:`~.variogram.fit_variogram`) instead of from the cold starts.

    Returns
    -------
    variogram : VariogramModel
        The chosen model, nugget without the mean error variance.
    info : dict
        ``experimental_variogram``, ``fitted`` (model name -> VariogramModel as
        fitted, before the nugget split), ``scores`` (model name -> mean log
        score, with "auto"; else None) and ``mean_error_variance`` (m^2).

    Raises
    ------
    SurfaceError
        An unknown model name or bad data (see :func:`~.base.check_points`).
    InversionError
        Too few data or lag bins for a fit.
    """
    xa, ya, za, e = check_points(x, y, z, error_variance)
    models = sorted(VARIOGRAM_MODELS) if model == "auto" else [model]
    for m in models:
        check_model_name(m)
    ev = experimental if experimental is not None else experimental_variogram(xa, ya, za)
    mean_e = float(np.mean(e))
    fitted = {}
    used = {}
    for m in models:
        v = fit_variogram(ev.lag_m, ev.semivariance, ev.n_pairs, m, start=(starts or {}).get(m))
        fitted[m] = v
        used[m] = VariogramModel(m, max(v.nugget - mean_e, 0.0), v.sill, v.range_m)
    info: dict[str, Any] = {
        "experimental_variogram": ev,
        "fitted": fitted,
        "scores": None,
        "mean_error_variance": mean_e,
    }
    if len(models) == 1:
        return used[models[0]], info
    scores = {}
    for m in models:
        try:
            cv = (
                OrdinaryKriging(used[m], neighbours=neighbours).fit(xa, ya, za, e).cross_validate(max_points=max_points)
            )
            sc = cv.mean_log_score
        except (InversionError, np.linalg.LinAlgError):
            sc = float("nan")
        scores[m] = sc if math.isfinite(sc) else float("inf")
    info["scores"] = scores
    best = min(models, key=lambda m: scores[m])
    return used[best], info


class OrdinaryKriging:
    """Ordinary kriging with measurement error, local or global neighbourhood.

    See the module docstring for the kriging system; it is solved for every
    target with its ``neighbours`` nearest data (``cKDTree``), in batches: a
    chunk of targets builds a (chunk, k+1, k+1) stack of systems solved at once
    by :func:`numpy.linalg.solve`; the chunk size keeps each batch under
    about 8 MiB (cache-sized), so memory does not grow with the number of data or targets
    (no N x M matrix). Neighbouring targets (the cells of a grid) mostly have
    the same nearest data, and the kriging matrix depends on the data alone:
    where at most half of a block's targets have neighbour sets of their own,
    each distinct set's matrix is built and inverted once for all its targets
    (on the sample grid, about 400 matrices for 4,356 cells). Chunks run on
    ``n_threads`` threads (NumPy releases the GIL in the batched solve) while
    BLAS is held to one thread (see :mod:`~.threads`); each thread's KD-tree
    query is single-threaded, so
    there is no nested thread pool. With ``neighbours=None`` (global, for at
    most ``GLOBAL_MAX_DATA`` data) the (N+1) system is inverted once.

    Systems are assembled with the variogram divided by its total sill
    (:meth:`~.variogram.VariogramModel.normalised`), which does not change the
    weights.

    Parameters
    ----------
    variogram : VariogramModel or "auto"
        The model, or "auto" to fit one in :meth:`fit` with
        :func:`choose_variogram` (the mean error variance is then taken out of
        the fitted nugget).
    neighbours : int or None
        Number of nearest data per target (default 32); None = all data.
    variogram_model : str
        Model fitted when ``variogram="auto"``: "spherical", "exponential",
        "gaussian", or "auto" (default: the best of the three by cross-validation).
    n_threads : int, optional
        Worker threads for the chunks (default: the CPU count, at most 8).

    Attributes
    ----------
    variogram_ : VariogramModel
        The model used.
    experimental_variogram_ : ExperimentalVariogram or None
        The experimental variogram when the model was fitted.
    variogram_info_ : dict or None
        What :func:`choose_variogram` returned beside the model (when fitted).
    x_, y_, z_ : ndarray (n,)
        The data (m).
    error_variance_ : ndarray (n,)
        Their measurement-error variances (m^2).
    n_data_ : int
        Number of data.
    tree_ : scipy.spatial.cKDTree
        KD-tree of the data, coordinates relative to their mean.

    Examples
    --------
    A datum without error is honoured exactly; the kriging std there is zero.

    >>> ok = OrdinaryKriging(VariogramModel("spherical", 0.0, 1.0, 10.0), neighbours=None)
    >>> ok = ok.fit([0.0, 4.0, 0.0, 4.0], [0.0, 0.0, 3.0, 3.0], [1.0, 2.0, 3.0, 4.0])
    >>> est, std = ok.predict([4.0], [0.0])
    >>> round(float(est[0]), 12), round(float(std[0]), 6)
    (2.0, 0.0)
    """

    def __init__(
        self,
        variogram: Union[VariogramModel, str] = "auto",
        neighbours: Optional[int] = 32,
        variogram_model: str = "auto",
        n_threads: Optional[int] = None,
    ) -> None:
        self.variogram = variogram
        self.neighbours = neighbours
        self.variogram_model = variogram_model
        self.n_threads = n_threads

    # -- fitting
    def fit(self, x: ArrayLike, y: ArrayLike, z: ArrayLike, error_variance: ArrayLike | None = None) -> OrdinaryKriging:
        """Store the data (and fit the variogram when "auto").

        Parameters
        ----------
        x, y : array_like (n,)
            Easting and northing of the data (m).
        z : array_like (n,)
            Values (m).
        error_variance : array_like (n,) or float, optional
            Measurement-error variance of each datum (m^2): sigma_m**2 of a
            seismic point, ~0 for a borehole. Default 0 (exact data).

        Returns
        -------
        OrdinaryKriging
            ``self``, fitted.

        Raises
        ------
        SurfaceError
            Bad data, ``neighbours`` or ``variogram``.
        InversionError
            Too many data for a global system, two exact data at one place, or
            a singular global system.
        """
        xa, ya, za, e = check_points(x, y, z, error_variance)
        k = self.neighbours
        if k is not None:
            if int(k) != k or int(k) < 1:
                raise SurfaceError(
                    f"neighbours must be a positive integer or None, got {k!r}; 32 is usual ([processing] neighbours)"
                )
            k = min(int(k), xa.size)
        elif xa.size > GLOBAL_MAX_DATA:
            raise InversionError(
                f"global kriging (neighbours=None) of {xa.size} data would need a "
                f"{xa.size + 1}^2 system; use a local neighbourhood, e.g. neighbours=32 "
                f"(global is limited to {GLOBAL_MAX_DATA} data)"
            )
        self.experimental_variogram_: ExperimentalVariogram | None = None
        self.variogram_info_: dict[str, Any] | None = None
        if isinstance(self.variogram, VariogramModel):
            vario = self.variogram
        elif isinstance(self.variogram, str) and self.variogram == "auto":
            vario, info = choose_variogram(xa, ya, za, e, self.variogram_model, neighbours=k)
            self.experimental_variogram_ = info["experimental_variogram"]
            self.variogram_info_ = info
        else:
            raise SurfaceError(
                f"variogram must be a VariogramModel or 'auto', got {self.variogram!r}; "
                "give a fitted model or 'auto' to fit one"
            )
        # centred coordinates: differences stay exact and the systems well scaled
        self._origin = (float(np.mean(xa)), float(np.mean(ya)))
        self.x_ = xa
        self.y_ = ya
        self.z_ = za
        self.error_variance_ = e
        self.variogram_ = vario
        self.n_data_ = xa.size
        self._k = k
        self._xc = xa - self._origin[0]
        self._yc = ya - self._origin[1]
        self._e_unit = e / vario.total_sill
        self._check_duplicates()
        self.tree_ = cKDTree(np.column_stack([self._xc, self._yc]))
        self._ainv: np.ndarray | None = None
        if k is None:
            # the inverse (not an LU) so that every chunk of targets is one matrix product, and
            # the closed-form cross-validation reuses it
            try:
                self._ainv = np.linalg.inv(self._global_matrix())
            except np.linalg.LinAlgError as exc:
                raise InversionError(
                    f"the global kriging system is singular ({exc}); give the data an error variance "
                    "or the model a small nugget"
                ) from exc
        return self

    def _check_duplicates(self) -> None:
        xy = np.column_stack([self._xc, self._yc])
        pairs = cKDTree(xy).query_pairs(ZERO_LAG_M, output_type="ndarray")
        if len(pairs):
            e = self.error_variance_
            exact = (e[pairs[:, 0]] + e[pairs[:, 1]]) <= 0
            if exact.any():
                i, j = pairs[np.flatnonzero(exact)[0]]
                raise InversionError(
                    f"data {i} and {j} are at the same location ({float(self.x_[i])!r}, "
                    f"{float(self.y_[i])!r}) and both have zero error variance, so the kriging system is "
                    "singular; average them, or give them an error variance"
                )

    def _check_fitted(self) -> None:
        if not hasattr(self, "variogram_"):
            raise NotFittedError("OrdinaryKriging is not fitted yet: call fit(x, y, z) first")

    def _global_matrix(self) -> np.ndarray:
        n = self.n_data_
        d = np.hypot(self._xc[:, None] - self._xc[None, :], self._yc[:, None] - self._yc[None, :])
        a = np.empty((n + 1, n + 1))
        a[:n, :n] = self.variogram_.normalised(d)
        a[np.arange(n), np.arange(n)] = -self._e_unit
        a[n, :n] = 1.0
        a[:n, n] = 1.0
        a[n, n] = 0.0
        return a

    # -- solving
    @staticmethod
    def _chunk_size(k: int) -> int:
        per = 8.0 * 8 * (k + 1) ** 2  # ~8 arrays of (k+1)^2 doubles per target
        return int(max(16, min(8192, CHUNK_BYTES // per)))

    def _systems(self, idx: np.ndarray) -> np.ndarray:
        """The ordinary kriging matrices (c, k + 1, k + 1) of neighbour sets ``idx`` (c, k), unit sill."""
        c, k = idx.shape
        xs = self._xc[idx]
        ys = self._yc[idx]
        a = np.empty((c, k + 1, k + 1))
        h = xs[:, :, None] - xs[:, None, :]
        np.multiply(h, h, out=h)
        dy = ys[:, :, None] - ys[:, None, :]
        np.multiply(dy, dy, out=dy)
        h += dy
        del dy
        np.sqrt(h, out=h)
        a[:, :k, :k] = self.variogram_.normalised_inplace(h)
        del h
        r = np.arange(k)
        a[:, r, r] = -self._e_unit[idx]
        a[:, k, :k] = 1.0
        a[:, :k, k] = 1.0
        a[:, k, k] = 0.0
        return a

    def _singular(self, exc: Exception) -> InversionError:
        return InversionError(
            f"a local kriging system is singular ({exc}); usual causes: data at the same place with "
            f"no error variance, or a {self.variogram_.model} model without nugget on dense data. "
            "Give the data an error variance or the model a small nugget"
        )

    def _weights_applied(self, sol: np.ndarray, b: np.ndarray, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Estimate and kriging variance from solutions ``sol`` (c, k + 1) for right-hand sides ``b``."""
        k = idx.shape[1]
        lam = sol[:, :k]
        est = np.einsum("ij,ij->i", lam, self.z_[idx])
        var = (np.einsum("ij,ij->i", lam, b[:, :k]) + sol[:, k]) * self.variogram_.total_sill
        return est, var

    def _rhs(self, tx: np.ndarray, ty: np.ndarray, idx: np.ndarray) -> np.ndarray:
        """Right-hand sides (c, k + 1) of targets (tx, ty) (centred) with neighbour index (c, k)."""
        c, k = idx.shape
        b = np.empty((c, k + 1))
        b[:, :k] = self.variogram_.normalised_inplace(
            np.hypot(self._xc[idx] - tx[:, None], self._yc[idx] - ty[:, None])
        )
        b[:, k] = 1.0
        return b

    def _solve_local(self, tx: np.ndarray, ty: np.ndarray, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Batched solve for targets (tx, ty) (centred) with neighbour index (c, k)."""
        a = self._systems(idx)
        b = self._rhs(tx, ty, idx)
        try:
            sol = np.linalg.solve(a, b[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError as exc:
            raise self._singular(exc) from exc
        return self._weights_applied(sol, b, idx)

    def _predict_chunk(self, tx: np.ndarray, ty: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Estimate and kriging variance for centred targets (one chunk)."""
        if self._k is None:
            assert self._ainv is not None  # set by fit() for the global case
            n = self.n_data_
            b = np.empty((tx.size, n + 1))
            d = np.hypot(tx[:, None] - self._xc[None, :], ty[:, None] - self._yc[None, :])
            b[:, :n] = self.variogram_.normalised_inplace(d)
            del d
            b[:, n] = 1.0
            sol = b @ self._ainv  # A symmetric: rows are the weights and the Lagrange multiplier
            est = sol[:, :n] @ self.z_
            var = np.einsum("ij,ij->i", sol, b) * self.variogram_.total_sill
            return est, var
        _, idx = self.tree_.query(np.column_stack([tx, ty]), k=self._k, workers=1)
        if self._k == 1:
            idx = idx[:, None]
        sets, which = np.unique(np.sort(idx, axis=1), axis=0, return_inverse=True)
        if 2 * len(sets) <= len(idx):
            return self._solve_shared(tx, ty, sets, which.ravel())
        est = np.empty(tx.size)
        var = np.empty(tx.size)
        step = self._chunk_size(self._k)  # few targets share their data: cache-sized batches of systems
        for i in range(0, tx.size, step):
            sl = slice(i, i + step)
            est[sl], var[sl] = self._solve_local(tx[sl], ty[sl], idx[sl])
        return est, var

    def _solve_shared(
        self, tx: np.ndarray, ty: np.ndarray, sets: np.ndarray, which: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Targets (centred) whose neighbours are the rows of ``sets`` (u, k), target i's row ``which[i]``.

        The kriging matrix depends on the neighbours alone, not on the target:
        each distinct set's is built and inverted once, and the weights of
        every target with that set are its inverse times the target's
        right-hand side (the matrix is symmetric). The same system as
        :meth:`_solve_local`, equal to round-off.
        """
        try:
            ainv = np.linalg.inv(self._systems(sets))
        except np.linalg.LinAlgError as exc:
            raise self._singular(exc) from exc
        idx = sets[which]
        b = self._rhs(tx, ty, idx)
        sol = np.matmul(ainv[which], b[:, :, None])[:, :, 0]
        return self._weights_applied(sol, b, idx)

    def _run_chunks(
        self,
        n: int,
        chunk: int,
        work: Callable[[slice], Any],
        progress: Optional[Progress],
        p0: float = 0.0,
        p1: float = 100.0,
    ) -> None:
        """Apply ``work(slice)`` to chunks of range(n): on threads, BLAS on one, when local."""
        local = self._k is not None  # global: few large solves, let BLAS use its threads
        run_chunks(n, chunk, work, progress, n_threads=self.n_threads if local else 1, limit_blas=local, p0=p0, p1=p1)

    def predict(self, x: ArrayLike, y: ArrayLike, progress: Optional[Progress] = None) -> tuple[np.ndarray, np.ndarray]:
        r"""Kriging estimate and standard deviation at points.

        Parameters
        ----------
        x, y : array_like
            Target easting and northing (m), any equal shapes.
        progress : Progress, optional
            Progress sink (``set_progress``/``is_canceled``), checked between chunks.

        Returns
        -------
        estimate : ndarray
            Kriged value (m), same shape as ``x``.
        std : ndarray
            :math:`\sigma_K` (m), the square root of the kriging variance
            (negative round-off clipped to 0), same shape as ``x``.

        Raises
        ------
        NotFittedError
            :meth:`fit` was not called.
        SurfaceError
            ``x`` and ``y`` differ in shape.
        """
        self._check_fitted()
        xa, ya = check_targets(x, y)
        shape = xa.shape
        tx = xa.ravel() - self._origin[0]
        ty = ya.ravel() - self._origin[1]
        est, var = self._predict_centred(tx, ty, progress)
        return est.reshape(shape), np.sqrt(np.maximum(var, 0.0)).reshape(shape)

    def _predict_centred(
        self,
        tx: np.ndarray,
        ty: np.ndarray,
        progress: Optional[Progress] = None,
        p0: float = 0.0,
        p1: float = 100.0,
    ) -> tuple[np.ndarray, np.ndarray]:
        n = tx.size
        if self._k is None:
            chunk = int(max(16, min(8192, GLOBAL_CHUNK_BYTES // (8 * 4 * (self.n_data_ + 1)))))
        else:
            chunk = self._chunk_size(self._k) * SHARED_BLOCK_CHUNKS
        est = np.empty(n)
        var = np.empty(n)

        def work(sl: slice) -> None:
            e, v = self._predict_chunk(tx[sl], ty[sl])
            est[sl] = e
            var[sl] = v

        self._run_chunks(n, chunk, work, progress, p0, p1)
        return est, var

    def grid(
        self, spec: GridSpec, max_distance_m: float | None = None, progress: Optional[Progress] = None
    ) -> SurfaceGrid:
        """Estimate and std on a grid; cells far from the data are NaN.

        Parameters
        ----------
        spec : GridSpec
            The north-up grid (cell centres are estimated).
        max_distance_m : float, optional
            Cells whose centre is farther than this (m) from every datum are
            masked (NaN), so nothing is extrapolated silently. None = no mask.
        progress : Progress, optional
            Progress sink, checked between chunks.

        Returns
        -------
        SurfaceGrid
            Estimate (m) and kriging std (m), method "kriging".

        Raises
        ------
        NotFittedError
            :meth:`fit` was not called.
        SurfaceError
            ``max_distance_m`` is not positive.
        """
        self._check_fitted()
        mask = distance_mask(self.tree_, spec, max_distance_m, self._origin)
        gx, gy = spec.coords()
        sel = ~mask.ravel()
        z = np.full(spec.size, np.nan)
        s = np.full(spec.size, np.nan)
        if sel.any():
            tx = gx.ravel()[sel] - self._origin[0]
            ty = gy.ravel()[sel] - self._origin[1]
            e, v = self._predict_centred(tx, ty, progress)
            z[sel] = e
            s[sel] = np.sqrt(np.maximum(v, 0.0))
        return SurfaceGrid(
            spec=spec,
            z=z.reshape(spec.shape),
            std=s.reshape(spec.shape),
            mask=mask,
            method="kriging",
            n_data=self.n_data_,
        )

    def cross_validate(
        self, progress: Optional[Progress] = None, max_points: Optional[int] = None, seed: int = 0
    ) -> CrossValidation:
        r"""Leave-one-out cross-validation of the fitted kriging.

        Each datum is estimated from the others with the same variogram. In a
        local neighbourhood the datum's own index is removed from its k+1
        nearest data (so it is never its own neighbour, even beside a
        duplicate). In the global case the closed form of [Dubrule 1983] is
        used: with :math:`B = A^{-1}` of the (N+1) system,
        :math:`z_i - \hat z_{-i} = (B[\mathbf z; 0])_i / B_{ii}` and
        :math:`\sigma_K^2 + e_i = -1/B_{ii}` (variogram form).

        The residual's variance is :math:`\sigma_K^2(\mathbf s_i) + e_i`: the
        error of predicting the signal plus the datum's own measurement error.

        Parameters
        ----------
        progress : Progress, optional
            Progress sink, checked between chunks.
        max_points : int, optional
            Validate only a random subset of this many data (each still
            estimated from *all* the other data); default all.
        seed : int
            Seed of that subset.

        Returns
        -------
        CrossValidation
            Residuals (m), their std (m) and summary statistics.

        Raises
        ------
        NotFittedError
            :meth:`fit` was not called.
        """
        self._check_fitted()
        n = self.n_data_
        sel = np.arange(n)
        if max_points is not None and n > int(max_points):
            sel = np.sort(np.random.default_rng(seed).choice(n, int(max_points), replace=False))
        s = self.variogram_.total_sill
        if self._k is None:
            assert self._ainv is not None  # set by fit() for the global case
            bmat = self._ainv
            bz = bmat[:n, :n] @ self.z_
            bii = np.diag(bmat)[:n]
            resid = (bz / bii)[sel]
            var_tot = (-s / bii)[sel]
            est = self.z_[sel] - resid
            return CrossValidation.from_residuals(est, resid, np.sqrt(np.maximum(var_tot, 0.0)), sel)
        k = min(self._k, n - 1)
        kq = k + 1
        m = sel.size
        est = np.empty(m)
        var = np.empty(m)
        chunk = self._chunk_size(k)

        def work(sl: slice) -> None:
            own_idx = sel[sl]
            tx = self._xc[own_idx]
            ty = self._yc[own_idx]
            _, idx = self.tree_.query(np.column_stack([tx, ty]), k=kq, workers=1)
            own = idx == own_idx[:, None]
            order = np.argsort(own, axis=1, kind="stable")  # own index (if found) last
            idx = np.take_along_axis(idx, order, axis=1)[:, :k]
            e, v = self._solve_local(tx, ty, idx)
            est[sl] = e
            var[sl] = v

        self._run_chunks(m, chunk, work, progress)
        resid = self.z_[sel] - est
        std = np.sqrt(np.maximum(var, 0.0) + self.error_variance_[sel])
        return CrossValidation.from_residuals(est, resid, std, sel)
