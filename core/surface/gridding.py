"""The surface step the pipeline calls: scattered reflector points to a grid.

:func:`interpolate_surface` runs kriging (with its standard deviation and
leave-one-out cross-validation) or the smoothing spline over a
:class:`~rockhead.core.grid.GridSpec` and masks the cells farther than
:func:`default_max_distance` from every datum; :func:`cross_validate` is the
leave-one-out check of kriging on its own. The result type
:class:`~.base.SurfaceGrid` lives in :mod:`~.base`, beside the gridders that
make it.
"""

from __future__ import annotations

import math
from typing import Any, Mapping, Optional, Union

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from ..errors import SurfaceError
from ..grid import GridSpec
from ..progress import NullProgress, Progress, SubProgress, check_cancel
from .base import CrossValidation, SurfaceGrid, check_points
from .kriging import OrdinaryKriging, choose_variogram
from .spline import ThinPlateSpline
from .variogram import VariogramModel

__all__ = ["cross_validate", "default_max_distance", "interpolate_surface"]


def cross_validate(
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    error_variance: ArrayLike | None = None,
    *,
    variogram: Union[VariogramModel, str] = "auto",
    neighbours: Optional[int] = 32,
    variogram_model: str = "auto",
    progress: Optional[Progress] = None,
    max_points: Optional[int] = None,
) -> CrossValidation:
    """Leave-one-out cross-validation of ordinary kriging.

    See :meth:`~.kriging.OrdinaryKriging.cross_validate`.

    Parameters
    ----------
    x, y : array_like (n,)
        Easting and northing of the data (m).
    z : array_like (n,)
        Values (m).
    error_variance : array_like (n,) or float, optional
        Measurement-error variance of each datum (m^2); default 0.
    variogram : VariogramModel or "auto"
        The model, or "auto" to fit one (see :func:`~.kriging.choose_variogram`).
    neighbours : int or None
        Kriging neighbourhood size (None = global).
    variogram_model : str
        Model fitted with ``variogram="auto"``: "auto", "spherical",
        "exponential" or "gaussian".
    progress : Progress, optional
        Progress sink, checked between chunks.
    max_points : int, optional
        Validate a random subset of this many data (default all).

    Returns
    -------
    CrossValidation
        Per-point estimate, residual, std and standardised residual (m), and
        the summary: mean error, RMSE, mean standardised squared error (~1 when
        the model is right) and the fraction within 2 sigma (~0.95).
    """
    ok = OrdinaryKriging(variogram, neighbours=neighbours, variogram_model=variogram_model)
    return ok.fit(x, y, z, error_variance).cross_validate(progress, max_points=max_points)


def default_max_distance(x: ArrayLike, y: ArrayLike, variogram: VariogramModel | None = None) -> float:
    """Return the default masking distance (m).

    15 % of the diagonal of the data bounding box, and not more than the
    variogram range (beyond it kriging returns the mean), but never less than
    the median distance between neighbouring data (so that the cells between
    data along a line are mapped even when the fitted range collapses, e.g.
    over a flat reflector). A rule of this project, to be overridden with
    site knowledge (``[processing] max_distance_m``).

    Parameters
    ----------
    x, y : array_like (n,)
        Easting and northing of the data (m).
    variogram : VariogramModel, optional
        The kriging model, whose range caps the distance.

    Returns
    -------
    float
        Masking distance (m).

    >>> default_max_distance([0, 10, 20, 300], [0, 0, 0, 400])  # diagonal 500 m
    75.0
    >>> default_max_distance([0, 20, 40, 60], [0, 0, 0, 0])  # one line: the 20 m spacing
    20.0
    """
    xa = np.asarray(x, float)
    ya = np.asarray(y, float)
    d = 0.15 * math.hypot(np.ptp(xa), np.ptp(ya))
    if variogram is not None:
        d = min(d, variogram.range_m)
    if xa.size > 1:
        nn = cKDTree(np.column_stack([xa, ya])).query(np.column_stack([xa, ya]), k=2)[0][:, 1]
        d = max(d, float(np.median(nn)))
    return float(d)


def _checked(x, y, z, sigma):
    """Checked data and measurement-error variances (m²) from standard errors (m)."""
    if sigma is not None:
        sig = np.asarray(sigma, dtype=float)
        if np.any(sig < 0):
            raise SurfaceError(
                f"sigma must be >= 0 (m), got {float(sig[sig < 0].ravel()[0])!r}; give the standard error of "
                "each elevation, 0 for an exact one"
            )
        e = np.square(sig)
    else:
        e = None
    return check_points(x, y, z, e)


def kriging_model(
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    sigma: ArrayLike | None = None,
    neighbours: Optional[int] = 32,
    variogram_model: str = "auto",
) -> OrdinaryKriging:
    """The fitted kriging model :func:`interpolate_surface` grids with (same checks, same variogram choice).

    Parameters
    ----------
    x, y, z : array_like (n,)
        Easting, northing (m) and value (m).
    sigma : array_like (n,) or float, optional
        Standard error of each value (m), >= 0.
    neighbours : int or None
        Local neighbourhood size (None = global).
    variogram_model : str
        "auto" or a model name (:func:`~.kriging.choose_variogram`).

    Returns
    -------
    OrdinaryKriging
        Fitted (``variogram_`` is the chosen model).
    """
    xa, ya, za, ev = _checked(x, y, z, sigma)
    variogram, _ = choose_variogram(xa, ya, za, ev, variogram_model, neighbours=neighbours)
    return OrdinaryKriging(variogram, neighbours=neighbours).fit(xa, ya, za, ev)


def interpolate_surface(
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    sigma: ArrayLike | None = None,
    spec: GridSpec | None = None,
    method: str = "kriging",
    neighbours: Optional[int] = 32,
    variogram_model: str = "auto",
    max_distance_m: float | None = None,
    progress: Optional[Progress] = None,
    variogram: VariogramModel | None = None,
    cv_max_points: int = 20000,
    variogram_starts: Optional[Mapping[str, VariogramModel]] = None,
) -> tuple[SurfaceGrid, dict[str, Any]]:
    """Reflector surface on a grid, with diagnostics (the pipeline's call).

    Parameters
    ----------
    x, y : array_like (n,)
        Easting and northing of the reflector points (m).
    z : array_like (n,)
        Reflector elevation (m).
    sigma : array_like (n,) or float, optional
        Standard error of each elevation (m), >= 0; 0 (or tiny) for boreholes.
        Its square is the measurement-error variance on the kriging diagonal
        (and the relative smoothing weight of the spline).
    spec : GridSpec, optional
        The grid; default :meth:`GridSpec.from_data`.
    method : str
        "kriging" or "spline".
    neighbours : int or None
        Local neighbourhood size (None = global).
    variogram_model : str
        "auto" (default: the best of spherical, exponential and gaussian by
        leave-one-out log score, see :func:`~.kriging.choose_variogram`) or one of them.
    max_distance_m : float, optional
        Mask distance (m); default :func:`default_max_distance`.
    progress : Progress, optional
        Progress sink; cancellation is checked between chunks.
    variogram : VariogramModel, optional
        Use this model instead of fitting one.
    cv_max_points : int
        Leave-one-out cross-validation of at most this many data (random,
        seeded), each estimated from all others.
    variogram_starts : mapping of str to VariogramModel, optional
        Candidate models fitted to nearly the same data (``variogram_fitted``
        of an earlier call), each refitted from there alone (``starts`` of
        :func:`~.kriging.choose_variogram`).

    Returns
    -------
    surface : SurfaceGrid
        Elevation (m) and its std (m; NaN for the spline) on ``spec``.
    diagnostics : dict
        ``method``, ``n_data``, ``experimental_variogram``
        (ExperimentalVariogram or None), ``variogram`` (VariogramModel used,
        kriging), ``variogram_fitted`` (model name -> model before the nugget
        split), ``variogram_scores`` (model name -> log score, with "auto"),
        ``cross_validation`` (CrossValidation; for the spline std is NaN),
        ``smoothing`` (spline), ``max_distance_m``, ``n_cells``,
        ``n_cells_estimated``.

    Raises
    ------
    SurfaceError
        A negative sigma, bad data or an unknown method.
    InversionError
        Too few data, or a kriging system that cannot be solved.
    CancelledError
        The user cancelled.
    """
    sink: Progress = progress or NullProgress()
    xa, ya, za, ev = _checked(x, y, z, sigma)
    if spec is None:
        spec = GridSpec.from_data(xa, ya)
    diag: dict[str, Any] = {
        "method": method,
        "n_data": int(xa.size),
        "experimental_variogram": None,
        "variogram": None,
        "variogram_fitted": None,
        "variogram_scores": None,
        "smoothing": None,
    }
    model: Union[OrdinaryKriging, ThinPlateSpline]
    if method == "kriging":
        check_cancel(sink)
        if variogram is None:
            variogram, info = choose_variogram(
                xa, ya, za, ev, variogram_model, neighbours=neighbours, starts=variogram_starts
            )
            diag["experimental_variogram"] = info["experimental_variogram"]
            diag["variogram_fitted"] = info["fitted"]
            diag["variogram_scores"] = info["scores"]
        check_cancel(sink)
        sink.set_progress(5)
        kriging = OrdinaryKriging(variogram, neighbours=neighbours).fit(xa, ya, za, ev)
        diag["variogram"] = kriging.variogram_
        diag["cross_validation"] = kriging.cross_validate(SubProgress(sink, 5, 25), max_points=cv_max_points)
        model = kriging
        p0 = 25
    elif method == "spline":
        spline = ThinPlateSpline("auto", neighbours=neighbours).fit(xa, ya, za, ev)
        diag["smoothing"] = spline.smoothing_
        diag["cross_validation"] = spline.cv_  # 5-fold, std NaN; None with a fixed smoothing
        model = spline
        p0 = 20
    else:
        raise SurfaceError(
            f"method must be 'kriging' or 'spline', got {method!r}; choose one of them ([processing] surface_method)"
        )
    if max_distance_m is None:
        max_distance_m = default_max_distance(xa, ya, diag["variogram"])
    diag["max_distance_m"] = float(max_distance_m)
    surf = model.grid(spec, max_distance_m, SubProgress(sink, p0, 100))
    diag["n_cells"] = spec.size
    diag["n_cells_estimated"] = int((~surf.mask).sum())
    sink.set_progress(100)
    return surf, diag
