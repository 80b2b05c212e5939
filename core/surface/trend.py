"""Regional trend removal for residual kriging: fit a plane, grid the residuals, add it back."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .interpolation import OrdinaryKriging, SurfaceGrid, ThinPlateSpline, interpolate_surface

__all__ = ["NoTrend", "PlaneTrend", "fit_trend", "grid_with_trend", "predict_with_trend"]


@dataclass(frozen=True)
class PlaneTrend:
    """A regional plane z = a + b (x - x0) + c (y - y0) fitted by weighted least squares.

    A dipping reflector is a trend, not a stationary random field: its
    experimental variogram grows like the square of the lag and no bounded
    model fits it. Kriging the residuals from the plane (residual kriging
    with a linear drift; Journel & Huijbregts 1978, ch. V) gives a variogram
    that levels off and an honest standard deviation. ``coef`` = (a, b, c),
    weights 1/sigma^2.
    """

    x0: float
    y0: float
    coef: tuple

    @classmethod
    def fit(cls, x, y, z, sigma):
        x0, y0 = float(np.mean(x)), float(np.mean(y))
        w = 1.0 / np.maximum(np.asarray(sigma, float), 1e-3)
        a = np.column_stack([np.ones_like(x), x - x0, y - y0]) * w[:, None]
        coef = np.linalg.lstsq(a, z * w, rcond=None)[0]
        return cls(x0, y0, tuple(float(c) for c in coef))

    def __call__(self, x, y):
        a, b, c = self.coef
        return a + b * (np.asarray(x, float) - self.x0) + c * (np.asarray(y, float) - self.y0)


class NoTrend:
    """No trend: zero everywhere (the residuals are the data)."""

    coef = (0.0, 0.0, 0.0)

    def __call__(self, x, y):
        return np.zeros(np.broadcast(np.asarray(x), np.asarray(y)).shape)


def fit_trend(settings, x, y, z, s):
    """The plane of ``settings.trend = "linear"`` (with at least 3 points), else no trend."""
    return PlaneTrend.fit(x, y, z, s) if settings.trend == "linear" and len(x) >= 3 else NoTrend()


def grid_with_trend(x, y, z, s, spec, settings, method="kriging", progress=None):
    """Interpolate (x, y, z) with sigma s onto ``spec``: trend removed, residuals gridded, trend added back.

    With ``variogram_model = "auto"`` the surface module fits each model and
    keeps the one with the best leave-one-out mean logarithmic score (a
    proper scoring rule: small residuals *and* honest standard deviations;
    Gneiting & Raftery 2007). Returns
    ``(SurfaceGrid, diagnostics)``; the diagnostics carry the ``trend``, the
    ``variogram_scores`` and a cross-validation expressed in elevations.
    """
    trend = fit_trend(settings, x, y, z, s)
    surf, diag = interpolate_surface(
        x, y, z - trend(x, y), s, spec, method=method, neighbours=settings.neighbours,
        variogram_model=settings.variogram_model, max_distance_m=settings.max_distance_m, progress=progress,
    )
    cx, cy = np.meshgrid(spec.x_centres, spec.y_centres)
    z_grid = np.where(surf.mask, np.nan, surf.z + trend(cx, cy))
    diag["trend"] = trend
    cv = diag.get("cross_validation")
    if cv is not None:
        idx = np.asarray(cv.index)
        diag["cross_validation"] = replace(cv, estimate=cv.estimate + trend(x[idx], y[idx]))
    return SurfaceGrid(spec, z_grid, surf.std, surf.mask, surf.method, surf.n_data), diag


def predict_with_trend(x, y, z, s, diag, settings, x_new, y_new):
    """Estimate and standard deviation at points, with the model and trend of ``diag``."""
    trend = diag.get("trend") or NoTrend()
    r = z - trend(x, y)
    if diag.get("variogram") is not None:
        model = OrdinaryKriging(diag["variogram"], neighbours=settings.neighbours).fit(x, y, r, s**2)
    else:
        model = ThinPlateSpline("auto", neighbours=settings.neighbours).fit(x, y, r, s**2)
    est, std = model.predict(x_new, y_new)
    return est + trend(x_new, y_new), std
