r"""Smoothing thin-plate spline, the gridder without a variance.

:class:`ThinPlateSpline` minimises misfit plus bending energy ([Duchon 1977],
[Wahba 1990]), through :class:`scipy.interpolate.RBFInterpolator`, with the
smoothing chosen by k-fold cross-validation. It is the alternative to
:class:`~.kriging.OrdinaryKriging` where no variogram can be fitted; it gives
no standard deviation.

References
----------
[Duchon 1977] Duchon, J. (1977). Splines minimizing rotation-invariant
    semi-norms in Sobolev spaces. Springer, LNM vol. 571, 85-100.
[Wahba 1990] Wahba, G. (1990). Spline Models for Observational Data. SIAM.
"""

from __future__ import annotations

import math
from typing import Any, Optional, Union

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from ..errors import NotFittedError, SurfaceError
from ..grid import GridSpec
from ..progress import NullProgress, Progress, check_cancel
from .base import CrossValidation, SurfaceGrid, check_points, check_targets, distance_mask

__all__ = ["CHUNK_BYTES", "ThinPlateSpline"]

#: Memory budget (bytes) of one chunk of evaluations.
CHUNK_BYTES = 64 * 2**20


class ThinPlateSpline:
    r"""Smoothing thin-plate spline ([Duchon 1977], [Wahba 1990]).

    Minimises, over functions :math:`f` with a linear polynomial part,

    .. math::

        \sum_i \frac{(z_i - f(\mathbf s_i))^2}{w_i} + \lambda\, J_2(f),

    with :math:`J_2` the bending energy; solved by
    :class:`scipy.interpolate.RBFInterpolator` (``kernel="thin_plate_spline"``,
    ``degree=1``), whose per-point ``smoothing`` is :math:`\lambda w_i`. The
    weights are :math:`w_i = e_i / \bar e` when error variances are given (a
    datum with zero error variance is then honoured exactly), else 1.
    Coordinates are centred and divided by the half-diagonal of the data
    bounding box, so :math:`\lambda` is dimensionless.

    ``smoothing="auto"`` chooses :math:`\lambda` from
    :math:`\{0, 10^{-6}, 10^{-5}, \dots, 10^{1}\}` by 5-fold
    cross-validation (random folds, seeded) on at most 2000 data: the value
    with the smallest held-out RMSE (a cross-validation rule in the spirit of
    [Wahba 1990, ch. 4]; ties go to the larger smoothing).

    There is no variance for the spline: :meth:`predict` returns NaN as std.

    Parameters
    ----------
    smoothing : float or "auto"
        :math:`\lambda` (dimensionless, >= 0).
    neighbours : int or None
        Nearest data used by each evaluation (``RBFInterpolator(neighbors=)``),
        >= 3; None = global (all data, O(N^3); keep N below a few thousand).

    Attributes
    ----------
    smoothing_ : float
        The :math:`\lambda` used.
    cv_scores_ : dict or None
        Held-out RMSE (m) of each candidate when chosen automatically.
    cv_ : CrossValidation or None
        The 5-fold held-out residuals of the chosen smoothing (std NaN).
    x_, y_, z_ : ndarray (n,)
        The data (m).
    error_variance_ : ndarray (n,)
        Their measurement-error variances (m^2).
    n_data_ : int
        Number of data.
    interpolator_ : scipy.interpolate.RBFInterpolator
        The fitted spline, in centred and scaled coordinates.
    tree_ : scipy.spatial.cKDTree
        KD-tree of the data, coordinates relative to their mean (m).

    Examples
    --------
    Without smoothing the spline passes through the data, and a plane is
    reproduced exactly (its polynomial part):

    >>> tps = ThinPlateSpline(smoothing=0.0).fit([0, 10, 0, 10, 5], [0, 0, 10, 10, 5], [0, 1, 2, 3, 1.5])
    >>> est, std = tps.predict([2.0], [7.0])
    >>> round(float(est[0]), 9), bool(np.isnan(std[0]))
    (1.6, True)
    """

    CANDIDATES = (0.0, 1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0, 10.0)

    def __init__(self, smoothing: Union[float, str] = "auto", neighbours: Optional[int] = None) -> None:
        self.smoothing = smoothing
        self.neighbours = neighbours

    def _rbf(self, xy: np.ndarray, z: np.ndarray, smooth: Union[float, np.ndarray]) -> Any:
        from scipy.interpolate import RBFInterpolator

        k = self.neighbours
        if k is not None:
            k = min(int(k), len(z))
        return RBFInterpolator(xy, z, neighbors=k, smoothing=smooth, kernel="thin_plate_spline", degree=1)

    def fit(self, x: ArrayLike, y: ArrayLike, z: ArrayLike, error_variance: ArrayLike | None = None) -> ThinPlateSpline:
        """Fit the spline (choosing the smoothing when "auto").

        Parameters
        ----------
        x, y : array_like (n,)
            Easting and northing of the data (m).
        z : array_like (n,)
            Values (m).
        error_variance : array_like (n,) or float, optional
            Measurement-error variance of each datum (m^2); sets the relative
            smoothing weights. Default 0 (equal weights).

        Returns
        -------
        ThinPlateSpline
            ``self``, fitted.

        Raises
        ------
        SurfaceError
            Bad data, ``neighbours`` or ``smoothing``.
        """
        xa, ya, za, e = check_points(x, y, z, error_variance)
        k = self.neighbours
        if k is not None and (int(k) != k or int(k) < 3):
            raise SurfaceError(
                f"neighbours must be an integer >= 3 or None, got {k!r}; 32 is usual ([processing] neighbours)"
            )
        self._origin = (float(np.mean(xa)), float(np.mean(ya)))
        scale = 0.5 * math.hypot(np.ptp(xa), np.ptp(ya))
        self._scale = scale if scale > 0 else 1.0
        xy = np.column_stack([(xa - self._origin[0]) / self._scale, (ya - self._origin[1]) / self._scale])
        me = float(np.mean(e))
        w = e / me if me > 0 else np.ones_like(za)
        self.cv_scores_: dict[float, float] | None = None
        self.cv_: CrossValidation | None = None
        if isinstance(self.smoothing, str):
            if self.smoothing != "auto":
                raise SurfaceError(
                    f"smoothing must be a number >= 0 or 'auto', got {self.smoothing!r}; "
                    "'auto' chooses it by cross-validation"
                )
            lam = self._choose(xy, za, w)
        else:
            lam = float(self.smoothing)
            if not (lam >= 0 and math.isfinite(lam)):
                raise SurfaceError(
                    f"smoothing must be a number >= 0 or 'auto', got {self.smoothing!r}; "
                    "'auto' chooses it by cross-validation"
                )
        self.smoothing_ = lam
        self.x_, self.y_, self.z_, self.error_variance_ = xa, ya, za, e
        self.n_data_ = xa.size
        self.interpolator_ = self._rbf(xy, za, lam * w)
        self.tree_ = cKDTree(np.column_stack([xa - self._origin[0], ya - self._origin[1]]))
        return self

    def _choose(self, xy: np.ndarray, z: np.ndarray, w: np.ndarray, folds: int = 5, max_points: int = 2000) -> float:
        rng = np.random.default_rng(0)
        n = len(z)
        sel = np.arange(n) if n <= max_points else np.sort(rng.choice(n, max_points, replace=False))
        xy, z, w = xy[sel], z[sel], w[sel]
        fold = rng.permutation(len(z)) % folds
        scores = {}
        preds = {}
        for lam in self.CANDIDATES:
            pred = np.empty(len(z))
            try:
                for f in range(folds):
                    tr = fold != f
                    pred[~tr] = self._rbf(xy[tr], z[tr], lam * w[tr])(xy[~tr])
            except (np.linalg.LinAlgError, ValueError):
                scores[lam] = math.inf
                continue
            scores[lam] = float(np.sqrt(np.mean((z - pred) ** 2)))
            preds[lam] = pred
        self.cv_scores_ = scores
        best = min(scores.values())
        # the largest smoothing within 0.1 % of the best score
        lam = max(lam for lam, sc in scores.items() if sc <= best * (1 + 1e-3))
        self.cv_ = CrossValidation.from_residuals(preds[lam], z - preds[lam], np.full(len(z), np.nan), sel)
        return lam

    def _check_fitted(self) -> None:
        if not hasattr(self, "interpolator_"):
            raise NotFittedError("ThinPlateSpline is not fitted yet: call fit(x, y, z) first")

    def predict(self, x: ArrayLike, y: ArrayLike, progress: Optional[Progress] = None) -> tuple[np.ndarray, np.ndarray]:
        """Spline value at points, and NaN as std (the spline has no variance).

        Parameters
        ----------
        x, y : array_like
            Target easting and northing (m), any equal shapes.
        progress : Progress, optional
            Progress sink, checked between chunks.

        Returns
        -------
        estimate : ndarray
            Spline value (m), same shape as ``x``.
        std : ndarray
            NaN, same shape as ``x``.

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
        xy = np.column_stack(
            [(xa.ravel() - self._origin[0]) / self._scale, (ya.ravel() - self._origin[1]) / self._scale]
        )
        out = self._eval(xy, progress)
        return out.reshape(shape), np.full(shape, np.nan)

    def _eval(self, xy: np.ndarray, progress: Optional[Progress] = None) -> np.ndarray:
        sink: Progress = progress or NullProgress()
        n = len(xy)
        per = 8 * 4 * (self.n_data_ if self.neighbours is None else 64 * int(self.neighbours))
        chunk = int(max(64, min(200_000, CHUNK_BYTES // per)))
        out = np.empty(n)
        for s in range(0, n, chunk):
            check_cancel(sink)
            out[s : s + chunk] = self.interpolator_(xy[s : s + chunk])
            sink.set_progress(100.0 * min(n, s + chunk) / max(n, 1))
        return out

    def grid(
        self, spec: GridSpec, max_distance_m: float | None = None, progress: Optional[Progress] = None
    ) -> SurfaceGrid:
        """Spline on a grid (std NaN); cells far from the data are NaN.

        Parameters
        ----------
        spec : GridSpec
            The north-up grid (cell centres are estimated).
        max_distance_m : float, optional
            Cells whose centre is farther than this (m) from every datum are
            masked (NaN). None = no mask.
        progress : Progress, optional
            Progress sink, checked between chunks.

        Returns
        -------
        SurfaceGrid
            Spline values (m), std NaN, method "spline".

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
        if sel.any():
            xy = np.column_stack(
                [(gx.ravel()[sel] - self._origin[0]) / self._scale, (gy.ravel()[sel] - self._origin[1]) / self._scale]
            )
            z[sel] = self._eval(xy, progress)
        return SurfaceGrid(
            spec=spec,
            z=z.reshape(spec.shape),
            std=np.full(spec.shape, np.nan),
            mask=mask,
            method="spline",
            n_data=self.n_data_,
        )
