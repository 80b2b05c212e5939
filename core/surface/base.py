"""What every gridder of the surface step shares: checked data in, a grid out.

* :func:`check_points` and :func:`check_targets`, the input checks of the
  scattered reflector points (easting, northing, elevation and the
  measurement-error variance of each) and of the points to estimate at;
* :class:`SurfaceGrid`, an interpolated surface with its standard deviation
  and the mask of cells left unestimated;
* :func:`distance_mask`, the cells too far from every datum to be estimated
  (nothing is extrapolated silently);
* :class:`CrossValidation`, held-out residuals of an interpolator and their
  summary statistics.

The gridders themselves are :class:`~.kriging.OrdinaryKriging` and
:class:`~.spline.ThinPlateSpline`; :func:`~.gridding.interpolate_surface`
runs one of them for the pipeline.

References
----------
[Cressie 1993] Cressie, N. (1993). Statistics for Spatial Data, revised ed.
    Wiley. s. 2.6.4 (cross-validation of the variogram).
[Gneiting & Raftery 2007] Gneiting, T. & Raftery, A. E. (2007). Strictly proper
    scoring rules, prediction, and estimation. JASA 102(477), 359-378.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from ..errors import InversionError, SurfaceError
from ..grid import GridSpec

__all__ = ["CrossValidation", "SurfaceGrid", "check_points", "check_targets", "distance_mask"]


@dataclass(frozen=True)
class SurfaceGrid:
    """An interpolated surface on a :class:`~rockhead.core.grid.GridSpec`.

    Attributes
    ----------
    spec : GridSpec
        The north-up grid (row 0 north, cell centres).
    z : ndarray (ny, nx)
        Estimated elevation (m); NaN where masked. Row 0 is the north row.
    std : ndarray (ny, nx)
        Standard deviation of the estimate (m); NaN where masked, and NaN
        everywhere for a method without a variance (the spline).
    mask : ndarray of bool (ny, nx)
        True where the cell is *not* estimated (farther than ``max_distance_m``
        from every datum).
    method : str
        "kriging", "spline" or "tomography".
    n_data : int
        Number of data used.
    """

    spec: GridSpec
    z: np.ndarray
    std: np.ndarray
    mask: np.ndarray
    method: str
    n_data: int


def check_points(
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    error_variance: ArrayLike | None = None,
    *,
    min_points: int = 3,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Check scattered data and return them as flat float arrays.

    Parameters
    ----------
    x, y : array_like (n,)
        Easting and northing of the data (m).
    z : array_like (n,)
        Values (m), e.g. reflector elevations.
    error_variance : array_like (n,) or float, optional
        Measurement-error variance of each datum (m^2), >= 0; default 0
        (exact data).
    min_points : int
        Fewest data accepted.

    Returns
    -------
    x, y, z, error_variance : ndarray (n,)
        Easting (m), northing (m), value (m) and error variance (m^2).

    Raises
    ------
    SurfaceError
        Unequal lengths, a NaN or infinite coordinate or value, or a negative
        or non-finite error variance.
    InversionError
        Fewer than ``min_points`` data.

    >>> x, y, z, e = check_points([0, 1, 2], [0, 0, 1], [5, 6, 7], 0.25)
    >>> z.tolist(), e.tolist()
    ([5.0, 6.0, 7.0], [0.25, 0.25, 0.25])
    """
    xa = np.asarray(x, dtype=float).ravel()
    ya = np.asarray(y, dtype=float).ravel()
    za = np.asarray(z, dtype=float).ravel()
    if not (xa.shape == ya.shape == za.shape):
        raise SurfaceError(
            f"x, y and z must have the same length, got {xa.shape}, {ya.shape} and {za.shape}; "
            "give one easting, northing and value per data point"
        )
    if xa.size < min_points:
        raise InversionError(
            f"a surface needs at least {min_points} data points, got {xa.size}; add points or boreholes"
        )
    bad = ~(np.isfinite(xa) & np.isfinite(ya) & np.isfinite(za))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise SurfaceError(
            f"{int(bad.sum())} data point(s) have NaN or infinite x, y or z (first at index {i}: "
            f"x={float(xa[i])!r}, y={float(ya[i])!r}, z={float(za[i])!r}); drop them before interpolating"
        )
    if error_variance is None:
        e = np.zeros_like(za)
    else:
        e = np.broadcast_to(np.asarray(error_variance, dtype=float), za.shape).astype(float).ravel()
        badv = ~np.isfinite(e) | (e < 0)
        if badv.any():
            i = int(np.flatnonzero(badv)[0])
            raise SurfaceError(
                f"error_variance must be finite and >= 0 (m^2), got {float(e[i])!r} at index {i}; "
                "give sigma_m**2 per datum, 0 for an exact datum"
            )
    return xa, ya, za, e


def check_targets(x: ArrayLike, y: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Check the points to estimate at and return them as float arrays.

    Parameters
    ----------
    x, y : array_like
        Easting and northing (m) of the targets, equal shapes (any).

    Returns
    -------
    x, y : ndarray
        The same, as float arrays of the input shape.

    Raises
    ------
    SurfaceError
        The shapes differ.
    """
    xa = np.asarray(x, dtype=float)
    ya = np.asarray(y, dtype=float)
    if xa.shape != ya.shape:
        raise SurfaceError(
            f"target x and y must have the same shape, got {xa.shape} and {ya.shape}; "
            "give one easting and one northing per target point"
        )
    return xa, ya


def distance_mask(
    tree: cKDTree, spec: GridSpec, max_distance_m: float | None, origin: tuple[float, float]
) -> np.ndarray:
    """Cells whose centre is farther than ``max_distance_m`` from every datum.

    Parameters
    ----------
    tree : scipy.spatial.cKDTree
        KD-tree of the data in coordinates relative to ``origin`` (m).
    spec : GridSpec
        The grid.
    max_distance_m : float or None
        Masking distance (m), > 0; None masks nothing.
    origin : (float, float)
        Easting and northing (m) subtracted from the data in ``tree``.

    Returns
    -------
    ndarray of bool (ny, nx)
        True where the cell is masked (not to be estimated).

    Raises
    ------
    SurfaceError
        ``max_distance_m`` is not positive.

    >>> spec = GridSpec(x0=0.0, y0=0.0, cell_size_m=10.0, nx=4, ny=1)
    >>> distance_mask(cKDTree([[0.0, 0.0]]), spec, 15.0, (0.0, 0.0)).tolist()
    [[False, False, True, True]]
    """
    if max_distance_m is None:
        return np.zeros(spec.shape, dtype=bool)
    md = float(max_distance_m)
    if not md > 0:
        raise SurfaceError(
            f"max_distance_m must be > 0 (m), got {max_distance_m!r}; give a positive masking distance "
            "([processing] max_distance_m) or leave it unset for the default from the data spacing"
        )
    mask = np.empty(spec.shape, dtype=bool)
    xc = spec.x_centres - origin[0]
    rows = max(1, 2_000_000 // spec.nx)
    for r0 in range(0, spec.ny, rows):
        yc = spec.y_centres[r0 : r0 + rows] - origin[1]
        gx, gy = np.meshgrid(xc, yc)
        d, _ = tree.query(
            np.column_stack([gx.ravel(), gy.ravel()]), k=1, workers=-1, distance_upper_bound=md * (1 + 1e-12)
        )
        mask[r0 : r0 + rows] = (d > md).reshape(gx.shape)
    return mask


@dataclass(frozen=True)
class CrossValidation:
    r"""Held-out (leave-one-out or k-fold) residuals of an interpolator.

    Attributes
    ----------
    estimate : ndarray (n,)
        Estimate at each datum from the *other* data (m).
    residual : ndarray (n,)
        Datum minus estimate (m).
    std : ndarray (n,)
        Standard deviation of the residual (m): :math:`\sqrt{\sigma_K^2 + e_i}`
        (kriging variance of the signal plus the datum's own measurement error);
        NaN for the spline.
    standardised : ndarray (n,)
        ``residual / std`` (dimensionless).
    mean_error : float
        Mean residual (m); near 0 for an unbiased interpolator.
    rmse : float
        Root mean square residual (m).
    mean_standardised_squared_error : float
        Mean of ``standardised**2``; near 1 when the variance model is right
        (common practice; [Cressie 1993, s. 2.6.4]).
    fraction_within_2sigma : float
        Fraction of ``|standardised| <= 2`` (about 0.954 for Gaussian errors).
    mean_log_score : float
        Mean negative Gaussian log predictive density,
        :math:`\tfrac12\overline{\log(2\pi s_i^2) + r_i^2/s_i^2}`, a proper
        scoring rule that rewards both small residuals and honest std
        ([Gneiting & Raftery 2007]); lower is better. NaN without std.
    index : ndarray of int
        Indices of the validated data (all, or a random subset).
    """

    estimate: np.ndarray
    residual: np.ndarray
    std: np.ndarray
    standardised: np.ndarray
    mean_error: float
    rmse: float
    mean_standardised_squared_error: float
    fraction_within_2sigma: float
    mean_log_score: float
    index: np.ndarray

    @classmethod
    def from_residuals(
        cls, estimate: ArrayLike, residual: ArrayLike, std: ArrayLike, index: ArrayLike | None = None
    ) -> CrossValidation:
        """Summarise held-out residuals.

        Parameters
        ----------
        estimate, residual : array_like (n,)
            Held-out estimate and datum minus estimate (m).
        std : array_like (n,)
            Standard deviation of each residual (m); NaN where there is none.
        index : array_like of int (n,), optional
            Indices of these data among all; default ``0 .. n-1``.

        Returns
        -------
        CrossValidation

        >>> cv = CrossValidation.from_residuals([0.0, 0.0], [1.0, -1.0], [1.0, 0.5])
        >>> cv.rmse, cv.mean_standardised_squared_error, cv.fraction_within_2sigma
        (1.0, 2.5, 1.0)
        """
        est = np.asarray(estimate, float)
        res = np.asarray(residual, float)
        sd = np.asarray(std, float)
        with np.errstate(invalid="ignore", divide="ignore"):
            s = res / sd
        has = np.isfinite(s)
        msse = float(np.mean(s[has] ** 2)) if has.any() else float("nan")
        within = float(np.mean(np.abs(s[has]) <= 2.0)) if has.any() else float("nan")
        if has.all() and np.all(sd > 0):
            score = float(0.5 * np.mean(np.log(2 * np.pi * sd**2) + s**2))
        else:
            score = float("nan")
        return cls(
            estimate=est,
            residual=res,
            std=sd,
            standardised=s,
            mean_error=float(np.mean(res)),
            rmse=float(np.sqrt(np.mean(res**2))),
            mean_standardised_squared_error=msse,
            fraction_within_2sigma=within,
            mean_log_score=score,
            index=np.arange(res.size) if index is None else np.asarray(index),
        )

    def summary(self) -> dict[str, Any]:
        """Return the summary statistics as a plain dict.

        Returns
        -------
        dict
            ``mean_error`` (m), ``rmse`` (m), ``mean_standardised_squared_error``,
            ``fraction_within_2sigma``, ``mean_log_score`` and ``n_validated``.
        """
        return {
            "mean_error": self.mean_error,
            "rmse": self.rmse,
            "mean_standardised_squared_error": self.mean_standardised_squared_error,
            "fraction_within_2sigma": self.fraction_within_2sigma,
            "mean_log_score": self.mean_log_score,
            "n_validated": int(self.residual.size),
        }
