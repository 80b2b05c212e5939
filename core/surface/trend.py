"""Regional trend removal for residual kriging: fit a plane, grid the residuals, add it back."""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any, Mapping, Optional, Union

import numpy as np
from numpy.typing import ArrayLike

from ..grid import GridSpec
from ..progress import Progress
from .base import SurfaceGrid
from .gridding import interpolate_surface, kriging_model
from .kriging import OrdinaryKriging
from .spline import ThinPlateSpline
from .variogram import VariogramModel

__all__ = ["NoTrend", "PlaneTrend", "fit_trend", "grid_with_trend", "model_with_trend", "predict_with_trend"]


@dataclass(frozen=True)
class PlaneTrend:
    """A regional plane z = a + b (x - x0) + c (y - y0) fitted by weighted least squares.

    A dipping reflector is a trend, not a stationary random field: its
    experimental variogram grows like the square of the lag and no bounded
    model fits it. Kriging the residuals from the plane (residual kriging
    with a linear drift; Journel & Huijbregts 1978, ch. V) gives a variogram
    that levels off and an honest standard deviation.

    Attributes
    ----------
    x0, y0 : float
        Easting and northing (m) of the plane's reference point (the data mean).
    coef : tuple of float
        (a, b, c): elevation at the reference point (m) and the slopes
        dz/dx and dz/dy (m/m).

    >>> t = PlaneTrend.fit(np.array([0.0, 10, 0]), np.array([0.0, 0, 10]), np.array([5.0, 6, 3]), np.ones(3))
    >>> [round(c, 9) for c in t.coef], round(float(t(10.0, 10.0)), 9)
    ([4.666666667, 0.1, -0.2], 4.0)
    """

    x0: float
    y0: float
    coef: tuple[float, ...]

    @classmethod
    def fit(cls, x: np.ndarray, y: np.ndarray, z: np.ndarray, sigma: ArrayLike) -> PlaneTrend:
        """Fit the plane with weights 1/sigma^2 (sigma floored at 1 mm).

        Parameters
        ----------
        x, y : ndarray (n,)
            Easting and northing of the data (m).
        z : ndarray (n,)
            Elevations (m).
        sigma : array_like (n,)
            Standard error of each elevation (m).

        Returns
        -------
        PlaneTrend
        """
        x0, y0 = float(np.mean(x)), float(np.mean(y))
        w = 1.0 / np.maximum(np.asarray(sigma, float), 1e-3)
        a = np.column_stack([np.ones_like(x), x - x0, y - y0]) * w[:, None]
        coef = np.linalg.lstsq(a, z * w, rcond=None)[0]
        return cls(x0, y0, tuple(float(c) for c in coef))

    @classmethod
    def fit_along(cls, x: np.ndarray, y: np.ndarray, z: np.ndarray, sigma: ArrayLike, unit: ArrayLike) -> PlaneTrend:
        """Fit a plane that slopes only along ``unit`` (data along one line; weights as :meth:`fit`).

        z = a + g t with t the distance along ``unit`` from the data mean:
        the plane's slopes are (g u_x, g u_y), level across the line.

        >>> t = PlaneTrend.fit_along(np.array([0.0, 10, 20]), np.array([0.0, 1, 0]),
        ...                          np.array([5.0, 6, 7]), np.ones(3), [1.0, 0.0])
        >>> [round(c, 9) for c in t.coef]
        [6.0, 0.1, 0.0]
        """
        u = np.asarray(unit, float) / np.linalg.norm(unit)
        x0, y0 = float(np.mean(x)), float(np.mean(y))
        w = 1.0 / np.maximum(np.asarray(sigma, float), 1e-3)
        t = (x - x0) * u[0] + (y - y0) * u[1]
        a, g = np.linalg.lstsq(np.column_stack([np.ones_like(t), t]) * w[:, None], z * w, rcond=None)[0]
        return cls(x0, y0, (float(a), float(g * u[0]) + 0.0, float(g * u[1]) + 0.0))

    def __call__(self, x: ArrayLike, y: ArrayLike) -> np.ndarray:
        """Elevation of the plane (m) at easting ``x`` and northing ``y`` (m)."""
        a, b, c = self.coef
        return a + b * (np.asarray(x, float) - self.x0) + c * (np.asarray(y, float) - self.y0)


class NoTrend:
    """No trend: zero everywhere (the residuals are the data)."""

    coef = (0.0, 0.0, 0.0)

    def __call__(self, x: ArrayLike, y: ArrayLike) -> np.ndarray:
        """Zeros (m) of the broadcast shape of ``x`` and ``y``."""
        return np.zeros(np.broadcast(np.asarray(x), np.asarray(y)).shape)


def fit_trend(
    settings: Any, x: np.ndarray, y: np.ndarray, z: np.ndarray, s: ArrayLike, along_unit: Optional[ArrayLike] = None
) -> Union[PlaneTrend, NoTrend]:
    """Fit the trend the settings ask for (sloping only along ``along_unit`` when given).

    Parameters
    ----------
    settings : Settings
        ``settings.trend`` is "linear" (a plane) or "none" (``[processing] trend``).
    x, y : ndarray (n,)
        Easting and northing of the data (m).
    z : ndarray (n,)
        Elevations (m).
    s : array_like (n,)
        Standard error of each elevation (m).
    along_unit : array_like (2,), optional
        Direction of a single line the data lie along (:meth:`PlaneTrend.fit_along`).

    Returns
    -------
    PlaneTrend or NoTrend
        The plane with ``trend = "linear"`` and at least 3 points, else no trend.
    """
    if settings.trend != "linear" or len(x) < 3:
        return NoTrend()
    return PlaneTrend.fit(x, y, z, s) if along_unit is None else PlaneTrend.fit_along(x, y, z, s, along_unit)


def grid_with_trend(
    x: np.ndarray,
    y: np.ndarray,
    z: np.ndarray,
    s: np.ndarray,
    spec: GridSpec,
    settings: Any,
    method: str = "kriging",
    progress: Optional[Progress] = None,
    corridor: Any = None,
    variogram_starts: Optional[Mapping[str, VariogramModel]] = None,
) -> tuple[SurfaceGrid, dict[str, Any]]:
    """Interpolate (x, y, z) with sigma s onto ``spec``: trend removed, residuals gridded, trend added back.

    With ``variogram_model = "auto"`` the surface module fits each model and
    keeps the one with the best leave-one-out mean logarithmic score (a
    proper scoring rule: small residuals *and* honest standard deviations;
    Gneiting & Raftery 2007).

    Parameters
    ----------
    x, y : ndarray (n,)
        Easting and northing of the reflector points (m).
    z : ndarray (n,)
        Reflector elevation (m).
    s : ndarray (n,)
        Standard error of each elevation (m).
    spec : GridSpec
        The output grid.
    settings : Settings
        Uses ``trend``, ``neighbours``, ``variogram_model`` and ``max_distance_m``.
    method : str
        "kriging" or "spline".
    progress : Progress, optional
        Progress sink; cancellation is checked between chunks.
    corridor : LineCorridor, optional
        The data are one line's (:func:`~.corridor.line_corridor`): the trend
        slopes only along it, cells outside the corridor are masked and the
        std includes the unknown cross-line dip (distance x its assumed tangent).
    variogram_starts : mapping of str to VariogramModel, optional
        Candidates fitted to nearly the same data, refitted from there
        (see :func:`~.gridding.interpolate_surface`).

    Returns
    -------
    surface : SurfaceGrid
        Elevation (m) with the trend added back, and its std (m).
    diagnostics : dict
        Those of :func:`~.gridding.interpolate_surface`, plus ``trend``; the
        ``cross_validation`` estimates are elevations (trend added back).
    """
    trend = fit_trend(settings, x, y, z, s, None if corridor is None else corridor.unit)
    surf, diag = interpolate_surface(
        x,
        y,
        z - trend(x, y),
        s,
        spec,
        method=method,
        neighbours=settings.neighbours,
        variogram_model=settings.variogram_model,
        max_distance_m=settings.max_distance_m,
        progress=progress,
        variogram_starts=variogram_starts,
    )
    if corridor is not None:
        mask = surf.mask | corridor.outside(spec)
        std = np.hypot(surf.std, corridor.cross_sigma_m(spec))
        surf = SurfaceGrid(
            spec, np.where(mask, np.nan, surf.z), np.where(mask, np.nan, std), mask, surf.method, surf.n_data
        )
    cx, cy = np.meshgrid(spec.x_centres, spec.y_centres)
    z_grid = np.where(surf.mask, np.nan, surf.z + trend(cx, cy))
    diag["trend"] = trend
    cv = diag.get("cross_validation")
    if cv is not None:
        idx = np.asarray(cv.index)
        diag["cross_validation"] = replace(cv, estimate=cv.estimate + trend(x[idx], y[idx]))
    return SurfaceGrid(spec, z_grid, surf.std, surf.mask, surf.method, surf.n_data), diag


def model_with_trend(
    x: np.ndarray, y: np.ndarray, z: np.ndarray, s: np.ndarray, settings: Any, corridor: Any = None
) -> dict[str, Any]:
    """The trend and kriging variogram :func:`grid_with_trend` would use, without gridding anything.

    For estimates at a few points (:func:`predict_with_trend`): the same plane
    and the same variogram choice (``settings.variogram_model``, leave-one-out
    log score with ``"auto"``) as the grid, none of its cells or cross-validation.

    Parameters
    ----------
    x, y, z, s : ndarray (n,)
        Easting, northing, elevation and its standard error (m).
    settings : Settings
        Uses ``trend``, ``neighbours`` and ``variogram_model``.
    corridor : LineCorridor, optional
        The data are one line's: the trend slopes only along it.

    Returns
    -------
    dict
        ``trend`` and ``variogram``.

    Raises
    ------
    SurfaceError, InversionError
        As :func:`~.gridding.interpolate_surface` with the same data.
    """
    trend = fit_trend(settings, x, y, z, s, None if corridor is None else corridor.unit)
    kriging = kriging_model(x, y, z - trend(x, y), s, settings.neighbours, settings.variogram_model)
    return {"trend": trend, "variogram": kriging.variogram_}


def predict_with_trend(
    x: np.ndarray,
    y: np.ndarray,
    z: np.ndarray,
    s: np.ndarray,
    diag: dict[str, Any],
    settings: Any,
    x_new: ArrayLike,
    y_new: ArrayLike,
) -> tuple[np.ndarray, np.ndarray]:
    """Estimate and standard deviation at points, with the model and trend of ``diag``.

    Parameters
    ----------
    x, y : ndarray (n,)
        Easting and northing of the data (m).
    z : ndarray (n,)
        Elevations (m).
    s : ndarray (n,)
        Standard error of each elevation (m).
    diag : dict
        Diagnostics of :func:`grid_with_trend` (its ``trend`` and ``variogram``;
        without a variogram the spline is refitted).
    settings : Settings
        Uses ``neighbours``.
    x_new, y_new : array_like
        Easting and northing of the targets (m).

    Returns
    -------
    estimate : ndarray
        Elevation (m) with the trend added back.
    std : ndarray
        Its standard deviation (m); NaN for the spline.
    """
    trend = diag.get("trend") or NoTrend()
    r = z - trend(x, y)
    model: Union[OrdinaryKriging, ThinPlateSpline]
    if diag.get("variogram") is not None:
        model = OrdinaryKriging(diag["variogram"], neighbours=settings.neighbours).fit(x, y, r, s**2)
    else:
        model = ThinPlateSpline("auto", neighbours=settings.neighbours).fit(x, y, r, s**2)
    est, std = model.predict(x_new, y_new)
    return est + trend(x_new, y_new), std
