r"""Semivariograms of reflector elevations: experimental, model, fit.

1. :func:`experimental_variogram` (omnidirectional or directional), the
   classical estimator of [Matheron 1962];
2. :class:`VariogramModel`, a bounded model (spherical, exponential or
   gaussian) with nugget, partial sill and range;
3. :func:`fit_variogram` of a model by the weighted least squares of
   [Cressie 1985].

Choosing among the models by the kriging cross-validation score is
:func:`~.kriging.choose_variogram`, beside the kriging it runs.

References
----------
[Cressie 1985] Cressie, N. (1985). Fitting variogram models by weighted least
    squares. Mathematical Geology 17(5), 563-586.
[Cressie 1993] Cressie, N. (1993). Statistics for Spatial Data, revised ed.
    Wiley. s. 2.4 (variogram estimation).
[Journel & Huijbregts 1978] Journel, A. G. & Huijbregts, C. J. (1978). Mining
    Geostatistics. Academic Press. ch. II (variogram models), ch. III.
[Matheron 1962] Matheron, G. (1962). Traite de geostatistique appliquee, tome I.
    Technip. (the classical semivariogram estimator).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Iterator

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import least_squares

from ..errors import InversionError, SurfaceError
from .base import check_points

__all__ = [
    "VARIOGRAM_MODELS",
    "ZERO_LAG_M",
    "ExperimentalVariogram",
    "VariogramModel",
    "check_model_name",
    "experimental_variogram",
    "fit_variogram",
]

#: Lags (m) at or below this are treated as zero (a target on a datum).
ZERO_LAG_M = 1e-9


@dataclass(frozen=True)
class ExperimentalVariogram:
    r"""Binned experimental semivariogram.

    Iterating yields ``(lag_m, semivariance, n_pairs)`` so that
    ``lags, gamma, counts = experimental_variogram(...)`` works.

    Attributes
    ----------
    lag_m : ndarray (n_lags,)
        Mean pair distance in each bin (m); the bin centre for empty bins.
    semivariance : ndarray (n_lags,)
        :math:`\hat\gamma(h)` (m^2); NaN for empty bins.
    n_pairs : ndarray of int (n_lags,)
        Number of pairs in each bin (of the subsample when one was used).
    bin_edges_m : ndarray (n_lags + 1,)
        Bin edges (m), from 0 to the largest lag.
    azimuth_deg : float or None
        Direction of a directional variogram, degrees clockwise from north
        (None = omnidirectional).
    tolerance_deg : float
        Half-width of the direction window (degrees).
    n_points_used : int
        Number of data used (less than the input when subsampled).
    """

    lag_m: np.ndarray
    semivariance: np.ndarray
    n_pairs: np.ndarray
    bin_edges_m: np.ndarray
    azimuth_deg: float | None
    tolerance_deg: float
    n_points_used: int

    def __iter__(self) -> Iterator[np.ndarray]:
        """Iterate over ``lag_m`` (m), ``semivariance`` (m^2) and ``n_pairs``."""
        return iter((self.lag_m, self.semivariance, self.n_pairs))


def experimental_variogram(
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    n_lags: int = 15,
    max_lag_m: float | None = None,
    azimuth_deg: float | None = None,
    tolerance_deg: float = 22.5,
    max_points: int = 5000,
    seed: int = 0,
) -> ExperimentalVariogram:
    r"""Experimental semivariogram, omnidirectional or directional.

    The classical estimator [Matheron 1962], [Cressie 1993, eq. 2.4.2]:

    .. math::

        \hat\gamma(h_k) = \frac{1}{2 N(h_k)} \sum_{(i,j) \in N(h_k)} (z_i - z_j)^2

    over the pairs whose separation falls in bin *k* (and, for a directional
    variogram, whose direction is within ``tolerance_deg`` of ``azimuth_deg``
    or of its opposite).

    Scaling: with more than ``max_points`` data, a random subset of
    ``max_points`` points (seeded, reproducible) is used; 5000 points still give
    12.5 million pairs. Pairs are formed in row blocks, so the memory stays
    about ``256 * max_points * 8`` bytes and never holds an N x N matrix.

    Parameters
    ----------
    x, y : array_like (n,)
        Easting and northing of the data (m).
    z : array_like (n,)
        Values (m).
    n_lags : int
        Number of equal-width bins on [0, max_lag_m], >= 1.
    max_lag_m : float, optional
        Largest separation (m); default half the diagonal of the data bounding
        box (common practice: beyond about half the field size too few pairs
        remain, [Journel & Huijbregts 1978, ch. III]).
    azimuth_deg : float, optional
        Direction (degrees clockwise from north) of a directional variogram.
    tolerance_deg : float
        Half-width of the direction window (degrees), (0, 90].
    max_points : int
        Subsampling threshold (number of data).
    seed : int
        Random seed of the subsample.

    Returns
    -------
    ExperimentalVariogram
        Lags (m), semivariances (m^2) and pair counts per bin.

    Raises
    ------
    SurfaceError
        ``n_lags`` < 1, ``tolerance_deg`` outside (0, 90], or no positive
        largest lag.

    >>> v = experimental_variogram([0, 1, 2, 3], [0, 0, 0, 0], [0, 1, 0, 1], n_lags=3, max_lag_m=3.5)
    >>> v.n_pairs.tolist(), v.semivariance.tolist()
    ([3, 2, 1], [0.5, 0.0, 0.5])
    """
    x, y, z, _ = check_points(x, y, z, min_points=2)
    n_lags = int(n_lags)
    if n_lags < 1:
        raise SurfaceError(f"n_lags must be >= 1, got {n_lags}; give at least one lag bin")
    if not 0 < float(tolerance_deg) <= 90:
        raise SurfaceError(
            f"tolerance_deg must be in (0, 90] degrees, got {tolerance_deg!r}; "
            "22.5 is usual, 90 makes the variogram omnidirectional"
        )
    if x.size > max_points:
        sel = np.sort(np.random.default_rng(seed).choice(x.size, int(max_points), replace=False))
        x, y, z = x[sel], y[sel], z[sel]
    n = x.size
    if max_lag_m is None:
        max_lag_m = 0.5 * math.hypot(x.max() - x.min(), y.max() - y.min())
    max_lag_m = float(max_lag_m)
    if not (max_lag_m > 0 and math.isfinite(max_lag_m)):
        raise SurfaceError(f"max_lag_m must be positive, got {max_lag_m!r} (all data at one location?); give max_lag_m")
    edges = np.linspace(0.0, max_lag_m, n_lags + 1)
    width = max_lag_m / n_lags
    sum_sq = np.zeros(n_lags)
    sum_h = np.zeros(n_lags)
    count = np.zeros(n_lags, dtype=np.int64)
    directional = azimuth_deg is not None
    az0 = float(azimuth_deg) % 180.0 if azimuth_deg is not None else 0.0
    tol = float(tolerance_deg)
    block = max(1, min(n, 2_000_000 // max(n, 1)))
    for start in range(0, n - 1, block):
        stop = min(n - 1, start + block)
        i = np.arange(start, stop)
        # pairs (i, j) with j > i: upper triangle of the block rows
        dx = x[None, :] - x[i, None]
        dy = y[None, :] - y[i, None]
        keep = np.arange(n)[None, :] > i[:, None]
        h = np.hypot(dx, dy)
        keep &= h <= max_lag_m
        if directional:
            az = np.degrees(np.arctan2(dx, dy)) % 180.0
            diff = np.abs(az - az0)
            diff = np.minimum(diff, 180.0 - diff)
            keep &= diff <= tol
        ii, jj = np.nonzero(keep)
        hk = h[ii, jj]
        dz2 = (z[i[ii]] - z[jj]) ** 2
        k = np.minimum((hk / width).astype(np.int64), n_lags - 1)
        sum_sq += np.bincount(k, weights=dz2, minlength=n_lags)
        sum_h += np.bincount(k, weights=hk, minlength=n_lags)
        count += np.bincount(k, minlength=n_lags)
    with np.errstate(invalid="ignore", divide="ignore"):
        gamma = np.where(count > 0, sum_sq / (2.0 * np.maximum(count, 1)), np.nan)
        lag = np.where(count > 0, sum_h / np.maximum(count, 1), 0.5 * (edges[:-1] + edges[1:]))
    return ExperimentalVariogram(
        lag_m=lag,
        semivariance=gamma,
        n_pairs=count,
        bin_edges_m=edges,
        azimuth_deg=None if azimuth_deg is None else float(azimuth_deg) % 360.0,
        tolerance_deg=float(tolerance_deg),
        n_points_used=int(n),
    )


def _unit_spherical(r: np.ndarray) -> np.ndarray:
    r = np.minimum(r, 1.0)
    return 1.5 * r - 0.5 * r**3


def _unit_exponential(r: np.ndarray) -> np.ndarray:
    return -np.expm1(-3.0 * r)


def _unit_gaussian(r: np.ndarray) -> np.ndarray:
    return -np.expm1(-3.0 * r * r)


def _slope_spherical(r: np.ndarray) -> np.ndarray:
    return np.where(r < 1.0, 1.5 - 1.5 * r * r, 0.0)


def _slope_exponential(r: np.ndarray) -> np.ndarray:
    return 3.0 * np.exp(-3.0 * r)


def _slope_gaussian(r: np.ndarray) -> np.ndarray:
    return 6.0 * r * np.exp(-3.0 * r * r)


#: Derivatives :math:`g'(r)` of the correlation structures (for the fit's analytic Jacobian).
VARIOGRAM_SLOPES: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "spherical": _slope_spherical,
    "exponential": _slope_exponential,
    "gaussian": _slope_gaussian,
}

#: Correlation structures :math:`g(h/a)` of the models, with ``a`` the (practical) range.
VARIOGRAM_MODELS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "spherical": _unit_spherical,
    "exponential": _unit_exponential,
    "gaussian": _unit_gaussian,
}


def check_model_name(model: str) -> None:
    """Check a variogram model name.

    Parameters
    ----------
    model : str
        "spherical", "exponential" or "gaussian".

    Raises
    ------
    SurfaceError
        Any other name.
    """
    if model not in VARIOGRAM_MODELS:
        raise SurfaceError(
            f"unknown variogram model {model!r}; expected one of {sorted(VARIOGRAM_MODELS)} "
            "([processing] variogram_model, where 'auto' picks the best of them)"
        )


@dataclass(frozen=True)
class VariogramModel:
    r"""A bounded semivariogram model ([Journel & Huijbregts 1978, ch. II]).

    .. math::

        \gamma(h) = c_0 + c\, g(h / a) \quad (h > 0), \qquad \gamma(0) = 0,

    with nugget :math:`c_0`, *partial* sill :math:`c` (total sill
    :math:`c_0 + c`) and range :math:`a`:

    * spherical: :math:`g(r) = 1.5 r - 0.5 r^3` for :math:`r < 1`, 1 beyond
      (reaches the sill at :math:`h = a`);
    * exponential: :math:`g(r) = 1 - e^{-3r}`;
    * gaussian: :math:`g(r) = 1 - e^{-3r^2}`.

    For the exponential and gaussian models ``range_m`` is the *practical*
    range, where 95 % of the sill is reached (:math:`1 - e^{-3}`), a common
    convention (e.g. [Journel & Huijbregts 1978]). PyKrige uses the same
    practical range for the exponential model, and ``4/7 a`` instead of
    :math:`a/\sqrt 3` as the gaussian length scale.

    Attributes
    ----------
    model : str
        "spherical", "exponential" or "gaussian".
    nugget : float
        :math:`c_0` (m^2), >= 0.
    sill : float
        Partial sill :math:`c` (m^2), the sill above the nugget, >= 0.
    range_m : float
        :math:`a` (m), > 0.

    >>> v = VariogramModel("spherical", nugget=1.0, sill=4.0, range_m=100.0)
    >>> v([0.0, 50.0, 100.0, 200.0]).tolist()
    [0.0, 3.75, 5.0, 5.0]
    >>> v.total_sill
    5.0
    """

    model: str
    nugget: float
    sill: float
    range_m: float

    def __post_init__(self) -> None:
        """Check the model name and parameters; store the parameters as floats."""
        check_model_name(self.model)
        for name in ("nugget", "sill", "range_m"):
            v = float(getattr(self, name))
            if not (math.isfinite(v) and v >= 0):
                raise SurfaceError(
                    f"VariogramModel {name} must be finite and >= 0, got {getattr(self, name)!r}; "
                    "give a non-negative value or let the model be fitted (variogram 'auto')"
                )
            object.__setattr__(self, name, v)
        if not self.range_m > 0:
            raise SurfaceError(
                f"VariogramModel range_m must be > 0 (m), got {self.range_m!r}; "
                "give the distance at which the data stop being correlated"
            )
        if not self.nugget + self.sill > 0:
            raise SurfaceError(
                f"VariogramModel needs nugget + sill > 0 (m^2), got nugget={self.nugget!r} and "
                f"sill={self.sill!r} (a flat zero variogram); give a positive sill"
            )

    @property
    def total_sill(self) -> float:
        """Nugget + partial sill (m^2), the variance of the signal."""
        return self.nugget + self.sill

    def __call__(self, h: ArrayLike) -> np.ndarray:
        r"""Semivariance :math:`\gamma(h)` (m^2) at lag ``h`` (m); 0 at h <= ZERO_LAG_M."""
        h = np.asarray(h, dtype=float)
        g = self.nugget + self.sill * VARIOGRAM_MODELS[self.model](h / self.range_m)
        return np.where(h > ZERO_LAG_M, g, 0.0)

    def normalised(self, h: ArrayLike) -> np.ndarray:
        r"""Semivariance divided by the total sill, :math:`\gamma(h) / (c_0 + c)`.

        Kriging systems built from it are well scaled (the Lagrange row of
        ones is on the same scale as the rest) and have the same weights.

        Parameters
        ----------
        h : array_like
            Lags (m).

        Returns
        -------
        ndarray
            Dimensionless, in [0, 1]; 0 at h <= ZERO_LAG_M.

        >>> VariogramModel("spherical", nugget=1.0, sill=4.0, range_m=100.0).normalised([0.0, 50.0]).tolist()
        [0.0, 0.75]
        """
        return self.normalised_inplace(np.array(h, dtype=float))

    def normalised_inplace(self, h: np.ndarray) -> np.ndarray:
        """:meth:`normalised` overwriting the float array ``h`` (no large temporaries).

        Parameters
        ----------
        h : ndarray of float
            Lags (m); overwritten.

        Returns
        -------
        ndarray
            ``h`` itself, now holding the normalised semivariance.
        """
        zero = h <= ZERO_LAG_M
        h *= 1.0 / self.range_m
        if self.model == "spherical":
            np.minimum(h, 1.0, out=h)
            t = h * h
            t *= -0.5
            t += 1.5
            h *= t  # 1.5 r - 0.5 r^3
            del t
        else:
            if self.model == "gaussian":
                np.multiply(h, h, out=h)
            h *= -3.0
            np.expm1(h, out=h)
            h *= -1.0  # 1 - exp(-3 r) or 1 - exp(-3 r^2)
        s = self.total_sill
        h *= self.sill / s
        h += self.nugget / s
        h[zero] = 0.0
        return h

    def covariance(self, h: ArrayLike) -> np.ndarray:
        r"""Covariance :math:`C(h) = c_0 + c - \gamma(h)` (m^2) at lag ``h`` (m).

        Parameters
        ----------
        h : array_like
            Lags (m).

        Returns
        -------
        ndarray
            Covariance (m^2); the total sill at h = 0.
        """
        return self.total_sill - self(h)


def fit_variogram(
    lags: ArrayLike,
    gamma: ArrayLike,
    counts: ArrayLike,
    model: str = "spherical",
    start: VariogramModel | None = None,
) -> VariogramModel:
    r"""Fit a variogram model by weighted least squares [Cressie 1985].

    Minimises Cressie's criterion

    .. math::

        \sum_k N(h_k) \left[\frac{\hat\gamma(h_k)}{\gamma(h_k;\theta)} - 1\right]^2

    i.e. weights :math:`N(h_k) / \gamma(h_k;\theta)^2` on the squared
    residuals, with :func:`scipy.optimize.least_squares` inside bounds
    :math:`0 \le c_0 \le \max\hat\gamma`, :math:`0 < c \le 2 \max\hat\gamma`,
    :math:`h_{max}/1000 \le a \le 3 h_{max}`, from several starting points
    (the best is kept), or from ``start`` alone. Empty bins (``counts == 0``)
    are ignored. The Jacobian is analytic.

    Parameters
    ----------
    lags : array_like (n_lags,)
        Mean pair distance of each bin (m), as returned by
        :func:`experimental_variogram`.
    gamma : array_like (n_lags,)
        Experimental semivariance of each bin (m^2).
    counts : array_like (n_lags,)
        Number of pairs in each bin.
    model : str
        "spherical", "exponential" or "gaussian" (see :class:`VariogramModel`).
    start : VariogramModel, optional
        The one starting point (clipped into the bounds): the same model fitted
        to nearly the same data, such as the previous step of the 3D
        relocation, whose points move by centimetres. Default: the cold starts
        (three ranges, two nuggets).

    Returns
    -------
    VariogramModel
        The fitted model (nugget and sill in m^2, range in m).

    Raises
    ------
    SurfaceError
        Unequal lengths or an unknown model.
    InversionError
        Fewer than 3 usable bins, or a variogram that is zero everywhere.

    >>> truth = VariogramModel("exponential", nugget=0.5, sill=2.0, range_m=300.0)
    >>> h = np.linspace(20, 600, 15)
    >>> fit = fit_variogram(h, truth(h), np.full(15, 100), "exponential")
    >>> round(fit.nugget, 6), round(fit.sill, 6), round(fit.range_m, 3)
    (0.5, 2.0, 300.0)
    """
    check_model_name(model)
    lag_a = np.asarray(lags, dtype=float).ravel()
    gamma_a = np.asarray(gamma, dtype=float).ravel()
    count_a = np.asarray(counts, dtype=float).ravel()
    if not (lag_a.shape == gamma_a.shape == count_a.shape):
        raise SurfaceError(
            f"lags, gamma and counts must have equal lengths, got {lag_a.shape}, {gamma_a.shape}, "
            f"{count_a.shape}; pass the three arrays of one experimental variogram"
        )
    ok = (count_a > 0) & np.isfinite(gamma_a) & np.isfinite(lag_a) & (lag_a > 0)
    if ok.sum() < 3:
        raise InversionError(
            f"a variogram fit needs at least 3 non-empty lag bins, got {int(ok.sum())} (too few or too "
            'clustered data; in survey.toml: set [processing] surface_method = "spline", which needs no variogram)'
        )
    h, g, w = lag_a[ok], gamma_a[ok], count_a[ok]
    gmax = float(g.max())
    if not gmax > 0:
        raise InversionError(
            "the experimental variogram is zero at every lag (all values equal); a constant surface "
            "needs no kriging - give a variogram model explicitly"
        )
    hmax = float(h.max())
    unit = VARIOGRAM_MODELS[model]
    sw = np.sqrt(w)
    tiny = 1e-12 * gmax

    def resid(p: np.ndarray) -> np.ndarray:
        c0, c, a = p
        gm = c0 + c * unit(h / a)
        return sw * (g / np.maximum(gm, tiny) - 1.0)

    slope = VARIOGRAM_SLOPES[model]

    def jac(p: np.ndarray) -> np.ndarray:
        # d/dp of sw (g / gm - 1) = -sw g / gm^2 dgm/dp, with dgm/dc0 = 1, dgm/dc = unit(r),
        # dgm/da = -c r unit'(r) / a (r = h / a); zero where gm is held at its floor
        c0, c, a = p
        r = h / a
        gm = c0 + c * unit(r)
        f = np.where(gm > tiny, -sw * g / np.maximum(gm, tiny) ** 2, 0.0)
        return np.column_stack([f, f * unit(r), f * (-c * r * slope(r) / a)])

    lower = [0.0, 1e-9 * gmax, hmax / 1000.0]
    upper = [gmax, 2.0 * gmax, 3.0 * hmax]
    tail = float(np.mean(g[-max(1, len(g) // 4) :]))
    starts = []
    if start is not None:
        starts.append(np.clip([start.nugget, start.sill, start.range_m], lower, upper))
    else:
        for a0 in (0.25 * hmax, 0.5 * hmax, 1.0 * hmax):
            for c00 in (0.0, 0.5 * float(g[0])):
                c0s = min(max(c00, 0.0), gmax)
                cs = min(max(tail - c0s, 0.05 * gmax), 2.0 * gmax)
                starts.append(np.clip([c0s, cs, a0], lower, upper))
    best = None
    for p0 in starts:
        try:
            r = least_squares(resid, p0, jac=jac, bounds=(lower, upper), x_scale="jac", method="trf")
        except ValueError:  # pragma: no cover - p0 clipped inside the bounds
            continue
        if best is None or r.cost < best.cost:
            best = r
    if best is None:  # pragma: no cover - every start lies inside the bounds
        raise InversionError(f"the {model} variogram fit could not start; give the variogram model explicitly")
    c0, c, a = best.x
    return VariogramModel(model=model, nugget=float(c0), sill=float(c), range_m=float(a))
