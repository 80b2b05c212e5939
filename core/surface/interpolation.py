"""Reflector surface from scattered elevation points: variogram, kriging, spline.

The surface step turns georeferenced reflector points (elevation with a standard
error, and boreholes as near-exact data) into a regular grid of reflector
elevation with its kriging standard deviation:

1. :func:`experimental_variogram` (omnidirectional or directional),
2. :func:`fit_variogram` of a spherical, exponential or gaussian model by the
   weighted least squares of [Cressie 1985]; :func:`choose_variogram` fits all
   three, moves the mean measurement-error variance out of the nugget and keeps
   the model with the best leave-one-out log score,
3. :class:`OrdinaryKriging` with the measurement-error variance of each datum on
   the diagonal of the kriging system, in a local neighbourhood of the ``k``
   nearest data (KD-tree) so that it scales to millions of points and cells,
4. :meth:`OrdinaryKriging.cross_validate`, leave-one-out residuals and their
   standardised statistics,
5. :class:`ThinPlateSpline` (smoothing) as an alternative without a variance,
6. :func:`interpolate_surface`, the call the pipeline uses.

Grid convention
---------------
A :class:`GridSpec` is *north-up*: row 0 is the northernmost row and column 0
the westernmost column, as GeoTIFF and most GIS rasters expect. ``x0, y0`` is the
centre of the first cell (row 0, column 0, the north-west corner cell); cell
centres are ``x = x0 + j * cell_size_m`` and ``y = y0 - i * cell_size_m``.

Kriging with measurement error
------------------------------
The data are :math:`Z_i = Y(\\mathbf s_i) + \\varepsilon_i` with a second-order
stationary signal :math:`Y` of semivariogram :math:`\\gamma` and independent
measurement errors of known variance :math:`e_i`. The nugget of :math:`\\gamma`
is micro-scale variation of the signal (honoured at data without error), the
:math:`e_i` are measurement error, the split of [Cressie 1993, s. 3.2.1]
(:math:`c_0 = c_{MS} + c_{ME}`). Ordinary kriging of the signal at
:math:`\\mathbf s_0` with weights :math:`\\lambda` and Lagrange multiplier
:math:`\\mu` solves

.. math::

    \\sum_j \\lambda_j \\left[\\gamma(\\mathbf s_i - \\mathbf s_j)
        - e_i \\delta_{ij}\\right] + \\mu = \\gamma(\\mathbf s_i - \\mathbf s_0),
    \\qquad \\sum_j \\lambda_j = 1,

with :math:`\\gamma(0) = 0`, and the kriging variance (mean squared error of
:math:`\\hat Y(\\mathbf s_0)` for :math:`Y(\\mathbf s_0)`) is

.. math::

    \\sigma_K^2(\\mathbf s_0) = \\sum_i \\lambda_i\\, \\gamma(\\mathbf s_i - \\mathbf s_0) + \\mu .

This is the covariance form :math:`(C + \\mathrm{diag}(e))\\lambda + m\\mathbf 1 = \\mathbf c_0`
written with :math:`C(h) = c_0 + c - \\gamma(h)`. With all :math:`e_i = 0` it is
ordinary kriging ([Journel & Huijbregts 1978], [Cressie 1993, eq. 3.2.12]) and
honours every datum exactly; a datum with :math:`e_i > 0` is smoothed, and the
variance at its location is between 0 and :math:`e_i`.

References
----------
[Cressie 1985] Cressie, N. (1985). Fitting variogram models by weighted least
    squares. Mathematical Geology 17(5), 563-586.
[Cressie 1993] Cressie, N. (1993). Statistics for Spatial Data, revised ed.
    Wiley. s. 2.4 (variogram estimation), s. 3.2 (ordinary kriging, measurement
    error in s. 3.2.1).
[Journel & Huijbregts 1978] Journel, A. G. & Huijbregts, C. J. (1978). Mining
    Geostatistics. Academic Press. ch. II (variogram models), ch. V (kriging).
[Matheron 1962] Matheron, G. (1962). Traite de geostatistique appliquee, tome I.
    Technip. (the classical semivariogram estimator).
[Dubrule 1983] Dubrule, O. (1983). Cross validation of kriging in a unique
    neighborhood. Mathematical Geology 15(6), 687-699.
[Duchon 1977] Duchon, J. (1977). Splines minimizing rotation-invariant
    semi-norms in Sobolev spaces. Springer, LNM vol. 571, 85-100.
[Wahba 1990] Wahba, G. (1990). Spline Models for Observational Data. SIAM.
[Gneiting & Raftery 2007] Gneiting, T. & Raftery, A. E. (2007). Strictly proper
    scoring rules, prediction, and estimation. JASA 102(477), 359-378.
"""

from __future__ import annotations

import math
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares
from scipy.spatial import cKDTree

from ..errors import InversionError
from ..grid import GridSpec
from ..progress import NullProgress, check_cancel

__all__ = [
    "VARIOGRAM_MODELS",
    "CrossValidation",
    "ExperimentalVariogram",
    "GridSpec",
    "OrdinaryKriging",
    "SurfaceGrid",
    "ThinPlateSpline",
    "VariogramModel",
    "choose_variogram",
    "cross_validate",
    "default_max_distance",
    "experimental_variogram",
    "fit_variogram",
    "interpolate_surface",
]

#: Lags (m) at or below this are treated as zero (a target on a datum).
ZERO_LAG_M = 1e-9

#: Largest data count for a global (unique-neighbourhood) kriging system.
GLOBAL_MAX_DATA = 6000

#: Memory budget (bytes) of one chunk of batched local kriging systems. Small
#: chunks (~120 targets for k = 32) keep the (chunk, k+1, k+1) arrays in the CPU
#: cache: assembling them was twice as fast per target as with 700-target chunks.
CHUNK_BYTES = 8 * 2**20

#: Memory budget (bytes) of one chunk of right-hand sides (global kriging, spline).
GLOBAL_CHUNK_BYTES = 64 * 2**20


@dataclass(frozen=True)
class SurfaceGrid:
    """An interpolated surface on a :class:`GridSpec`.

    Attributes
    ----------
    spec : GridSpec
    z : ndarray (ny, nx)
        Estimated elevation (m); NaN where masked. Row 0 is the north row.
    std : ndarray (ny, nx)
        Standard deviation of the estimate (m); NaN where masked, and NaN
        everywhere for a method without a variance (the spline).
    mask : ndarray of bool (ny, nx)
        True where the cell is *not* estimated (farther than ``max_distance_m``
        from every datum).
    method : str
        "kriging" or "spline".
    n_data : int
        Number of data used.
    """

    spec: GridSpec
    z: np.ndarray
    std: np.ndarray
    mask: np.ndarray
    method: str
    n_data: int


# --------------------------------------------------------------------------- input checks


def _as_xyz(x, y, z, error_variance=None, *, min_points=3):
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    z = np.asarray(z, dtype=float).ravel()
    if not (x.shape == y.shape == z.shape):
        raise ValueError(f"x, y and z must have the same length, got {x.shape}, {y.shape} and {z.shape}")
    if x.size < min_points:
        raise InversionError(
            f"a surface needs at least {min_points} data points, got {x.size}; add points or boreholes"
        )
    bad = ~(np.isfinite(x) & np.isfinite(y) & np.isfinite(z))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(
            f"{int(bad.sum())} data point(s) have NaN or infinite x, y or z (first at index {i}: "
            f"x={x[i]!r}, y={y[i]!r}, z={z[i]!r}); drop them before interpolating"
        )
    if error_variance is None:
        e = np.zeros_like(z)
    else:
        e = np.broadcast_to(np.asarray(error_variance, dtype=float), z.shape).astype(float).ravel()
        badv = ~np.isfinite(e) | (e < 0)
        if badv.any():
            i = int(np.flatnonzero(badv)[0])
            raise ValueError(
                f"error_variance must be finite and >= 0 (m^2), got {e[i]!r} at index {i}; "
                "give sigma_m**2 per datum, 0 for an exact datum"
            )
    return x, y, z, e


def _as_targets(x, y):
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.shape != y.shape:
        raise ValueError(f"target x and y must have the same shape, got {x.shape} and {y.shape}")
    return x, y


# --------------------------------------------------------------------------- variogram


@dataclass(frozen=True)
class ExperimentalVariogram:
    """Binned experimental semivariogram.

    Iterating yields ``(lag_m, semivariance, n_pairs)`` so that
    ``lags, gamma, counts = experimental_variogram(...)`` works.

    Attributes
    ----------
    lag_m : ndarray (n_lags,)
        Mean pair distance in each bin (m); the bin centre for empty bins.
    semivariance : ndarray (n_lags,)
        :math:`\\hat\\gamma(h)` (m^2); NaN for empty bins.
    n_pairs : ndarray of int (n_lags,)
        Number of pairs in each bin (of the subsample when one was used).
    bin_edges_m : ndarray (n_lags + 1,)
    azimuth_deg : float or None
        Direction of a directional variogram (None = omnidirectional).
    tolerance_deg : float
        Half-width of the direction window.
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

    def __iter__(self):
        return iter((self.lag_m, self.semivariance, self.n_pairs))


def experimental_variogram(
    x,
    y,
    z,
    n_lags=15,
    max_lag_m=None,
    azimuth_deg=None,
    tolerance_deg=22.5,
    max_points=5000,
    seed=0,
):
    """Experimental semivariogram, omnidirectional or directional.

    The classical estimator [Matheron 1962], [Cressie 1993, eq. 2.4.2]:

    .. math::

        \\hat\\gamma(h_k) = \\frac{1}{2 N(h_k)} \\sum_{(i,j) \\in N(h_k)} (z_i - z_j)^2

    over the pairs whose separation falls in bin *k* (and, for a directional
    variogram, whose direction is within ``tolerance_deg`` of ``azimuth_deg``
    or of its opposite).

    Scaling: with more than ``max_points`` data, a random subset of
    ``max_points`` points (seeded, reproducible) is used; 5000 points still give
    12.5 million pairs. Pairs are formed in row blocks, so the memory stays
    about ``256 * max_points * 8`` bytes and never holds an N x N matrix.

    Parameters
    ----------
    x, y, z : array_like
        Coordinates (m) and values (m).
    n_lags : int
        Number of equal-width bins on [0, max_lag_m].
    max_lag_m : float, optional
        Largest separation; default half the diagonal of the data bounding box
        (common practice: beyond about half the field size too few pairs remain,
        [Journel & Huijbregts 1978, ch. III]).
    azimuth_deg : float, optional
        Direction (degrees clockwise from north) of a directional variogram.
    tolerance_deg : float
        Half-width of the direction window (degrees), (0, 90].
    max_points, seed : int
        Subsampling threshold and random seed.

    Returns
    -------
    ExperimentalVariogram

    >>> v = experimental_variogram([0, 1, 2, 3], [0, 0, 0, 0], [0, 1, 0, 1], n_lags=3, max_lag_m=3.5)
    >>> v.n_pairs.tolist(), v.semivariance.tolist()
    ([3, 2, 1], [0.5, 0.0, 0.5])
    """
    x, y, z, _ = _as_xyz(x, y, z, min_points=2)
    n_lags = int(n_lags)
    if n_lags < 1:
        raise ValueError(f"n_lags must be >= 1, got {n_lags}")
    if not 0 < float(tolerance_deg) <= 90:
        raise ValueError(f"tolerance_deg must be in (0, 90], got {tolerance_deg!r}")
    if x.size > max_points:
        sel = np.sort(np.random.default_rng(seed).choice(x.size, int(max_points), replace=False))
        x, y, z = x[sel], y[sel], z[sel]
    n = x.size
    if max_lag_m is None:
        max_lag_m = 0.5 * math.hypot(x.max() - x.min(), y.max() - y.min())
    max_lag_m = float(max_lag_m)
    if not (max_lag_m > 0 and math.isfinite(max_lag_m)):
        raise ValueError(
            f"max_lag_m must be positive, got {max_lag_m!r} (all data at one location?); give max_lag_m"
        )
    edges = np.linspace(0.0, max_lag_m, n_lags + 1)
    width = max_lag_m / n_lags
    sum_sq = np.zeros(n_lags)
    sum_h = np.zeros(n_lags)
    count = np.zeros(n_lags, dtype=np.int64)
    directional = azimuth_deg is not None
    if directional:
        az0 = float(azimuth_deg) % 180.0
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


def _unit_spherical(r):
    r = np.minimum(r, 1.0)
    return 1.5 * r - 0.5 * r**3


def _unit_exponential(r):
    return -np.expm1(-3.0 * r)


def _unit_gaussian(r):
    return -np.expm1(-3.0 * r * r)


#: Correlation structures :math:`g(h/a)` of the models, with ``a`` the (practical) range.
VARIOGRAM_MODELS = {
    "spherical": _unit_spherical,
    "exponential": _unit_exponential,
    "gaussian": _unit_gaussian,
}


def _check_model_name(model):
    if model not in VARIOGRAM_MODELS:
        raise ValueError(
            f"unknown variogram model {model!r}; expected one of {sorted(VARIOGRAM_MODELS)}"
        )


@dataclass(frozen=True)
class VariogramModel:
    """A bounded semivariogram model ([Journel & Huijbregts 1978, ch. II]).

    .. math::

        \\gamma(h) = c_0 + c\\, g(h / a) \\quad (h > 0), \\qquad \\gamma(0) = 0,

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
    :math:`a/\\sqrt 3` as the gaussian length scale.

    Attributes
    ----------
    model : str
        "spherical", "exponential" or "gaussian".
    nugget : float
        :math:`c_0` (m^2).
    sill : float
        Partial sill :math:`c` (m^2), the sill above the nugget.
    range_m : float
        :math:`a` (m).

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

    def __post_init__(self):
        _check_model_name(self.model)
        for name in ("nugget", "sill", "range_m"):
            v = float(getattr(self, name))
            if not (math.isfinite(v) and v >= 0):
                raise ValueError(
                    f"VariogramModel {name} must be finite and >= 0, got {getattr(self, name)!r}"
                )
            object.__setattr__(self, name, v)
        if not self.range_m > 0:
            raise ValueError(f"VariogramModel range_m must be > 0, got {self.range_m!r}")
        if not self.nugget + self.sill > 0:
            raise ValueError("VariogramModel needs nugget + sill > 0 (a flat zero variogram)")

    @property
    def total_sill(self) -> float:
        """Nugget + partial sill (m^2), the variance of the signal."""
        return self.nugget + self.sill

    def __call__(self, h):
        """Semivariance :math:`\\gamma(h)` (m^2) at lag ``h`` (m); 0 at h <= ZERO_LAG_M."""
        h = np.asarray(h, dtype=float)
        g = self.nugget + self.sill * VARIOGRAM_MODELS[self.model](h / self.range_m)
        return np.where(h > ZERO_LAG_M, g, 0.0)

    def _unit(self, h):
        """:math:`\\gamma(h)` divided by the total sill (for well-scaled systems)."""
        return self._unit_inplace(np.array(h, dtype=float))

    def _unit_inplace(self, h):
        """:meth:`_unit` overwriting the float array ``h`` (no large temporaries)."""
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

    def covariance(self, h):
        """Covariance :math:`C(h) = c_0 + c - \\gamma(h)` (m^2)."""
        return self.total_sill - self(h)


def fit_variogram(lags, gamma, counts, model="spherical"):
    """Fit a variogram model by weighted least squares [Cressie 1985].

    Minimises Cressie's criterion

    .. math::

        \\sum_k N(h_k) \\left[\\frac{\\hat\\gamma(h_k)}{\\gamma(h_k;\\theta)} - 1\\right]^2

    i.e. weights :math:`N(h_k) / \\gamma(h_k;\\theta)^2` on the squared
    residuals, with :func:`scipy.optimize.least_squares` inside bounds
    :math:`0 \\le c_0 \\le \\max\\hat\\gamma`, :math:`0 < c \\le 2 \\max\\hat\\gamma`,
    :math:`h_{max}/1000 \\le a \\le 3 h_{max}`, from several starting points
    (the best is kept). Empty bins (``counts == 0``) are ignored.

    Parameters
    ----------
    lags, gamma, counts : array_like
        As returned by :func:`experimental_variogram`.
    model : str
        "spherical", "exponential" or "gaussian" (see :class:`VariogramModel`).

    Returns
    -------
    VariogramModel

    >>> truth = VariogramModel("exponential", nugget=0.5, sill=2.0, range_m=300.0)
    >>> h = np.linspace(20, 600, 15)
    >>> fit = fit_variogram(h, truth(h), np.full(15, 100), "exponential")
    >>> round(fit.nugget, 6), round(fit.sill, 6), round(fit.range_m, 3)
    (0.5, 2.0, 300.0)
    """
    _check_model_name(model)
    lags = np.asarray(lags, dtype=float).ravel()
    gamma = np.asarray(gamma, dtype=float).ravel()
    counts = np.asarray(counts, dtype=float).ravel()
    if not (lags.shape == gamma.shape == counts.shape):
        raise ValueError(
            f"lags, gamma and counts must have equal lengths, got {lags.shape}, {gamma.shape}, {counts.shape}"
        )
    ok = (counts > 0) & np.isfinite(gamma) & np.isfinite(lags) & (lags > 0)
    if ok.sum() < 3:
        raise InversionError(
            f"a variogram fit needs at least 3 non-empty lag bins, got {int(ok.sum())}; "
            "use fewer lags, a larger max_lag_m, or give the variogram model explicitly"
        )
    h, g, w = lags[ok], gamma[ok], counts[ok]
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

    def resid(p):
        c0, c, a = p
        gm = c0 + c * unit(h / a)
        return sw * (g / np.maximum(gm, tiny) - 1.0)

    lower = [0.0, 1e-9 * gmax, hmax / 1000.0]
    upper = [gmax, 2.0 * gmax, 3.0 * hmax]
    tail = float(np.mean(g[-max(1, len(g) // 4):]))
    best = None
    for a0 in (0.25 * hmax, 0.5 * hmax, 1.0 * hmax):
        for c00 in (0.0, 0.5 * float(g[0])):
            c0s = min(max(c00, 0.0), gmax)
            cs = min(max(tail - c0s, 0.05 * gmax), 2.0 * gmax)
            p0 = np.clip([c0s, cs, a0], lower, upper)
            try:
                r = least_squares(resid, p0, bounds=(lower, upper), x_scale="jac", method="trf")
            except ValueError:  # pragma: no cover - p0 clipped inside the bounds
                continue
            if best is None or r.cost < best.cost:
                best = r
    c0, c, a = best.x
    return VariogramModel(model=model, nugget=float(c0), sill=float(c), range_m=float(a))


# --------------------------------------------------------------------------- kriging


@dataclass(frozen=True)
class CrossValidation:
    """Leave-one-out cross-validation of an interpolator.

    Attributes
    ----------
    estimate : ndarray (n,)
        Estimate at each datum from all the *other* data.
    residual : ndarray (n,)
        Datum minus estimate (m).
    std : ndarray (n,)
        Standard deviation of the residual (m): :math:`\\sqrt{\\sigma_K^2 + e_i}`
        (kriging variance of the signal plus the datum's own measurement error);
        NaN for the spline.
    standardised : ndarray (n,)
        ``residual / std``.
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
        :math:`\\tfrac12\\overline{\\log(2\\pi s_i^2) + r_i^2/s_i^2}`, a proper
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
    def from_residuals(cls, estimate, residual, std, index=None):
        estimate = np.asarray(estimate, float)
        residual = np.asarray(residual, float)
        std = np.asarray(std, float)
        with np.errstate(invalid="ignore", divide="ignore"):
            s = residual / std
        has = np.isfinite(s)
        msse = float(np.mean(s[has] ** 2)) if has.any() else float("nan")
        within = float(np.mean(np.abs(s[has]) <= 2.0)) if has.any() else float("nan")
        if has.all() and np.all(std > 0):
            score = float(0.5 * np.mean(np.log(2 * np.pi * std**2) + s**2))
        else:
            score = float("nan")
        return cls(
            estimate=estimate,
            residual=residual,
            std=std,
            standardised=s,
            mean_error=float(np.mean(residual)),
            rmse=float(np.sqrt(np.mean(residual**2))),
            mean_standardised_squared_error=msse,
            fraction_within_2sigma=within,
            mean_log_score=score,
            index=np.arange(residual.size) if index is None else np.asarray(index),
        )

    def summary(self) -> dict:
        """The summary statistics as a plain dict."""
        return {
            "mean_error": self.mean_error,
            "rmse": self.rmse,
            "mean_standardised_squared_error": self.mean_standardised_squared_error,
            "fraction_within_2sigma": self.fraction_within_2sigma,
            "mean_log_score": self.mean_log_score,
            "n_validated": int(self.residual.size),
        }


def choose_variogram(x, y, z, error_variance=None, model="auto", neighbours=32, max_points=2000,
                     experimental=None):
    """Fit a variogram to data, for kriging with measurement error.

    1. :func:`experimental_variogram` of the data (unless ``experimental`` is given);
    2. :func:`fit_variogram` of ``model``, or of each of the three models when
       ``model="auto"``;
    3. the mean error variance :math:`\\bar e` is subtracted from each fitted
       nugget, which then holds only micro-scale variation:
       :math:`c_{MS} = \\max(c_0 - \\bar e, 0)` ([Cressie 1993, s. 3.2.1]; the
       experimental variogram of noisy data is that of the signal plus
       :math:`(e_i + e_j)/2` on average);
    4. with ``model="auto"`` the model with the lowest leave-one-out
       :attr:`CrossValidation.mean_log_score` (on at most ``max_points``
       data) is chosen: smooth reflectors usually pick the gaussian model,
       whose parabolic start the spherical and exponential models cannot
       follow (they overstate the short-lag variance and so the std).

    Returns
    -------
    variogram : VariogramModel
    info : dict
        ``experimental_variogram``, ``fitted`` (model name -> VariogramModel as
        fitted, before the nugget split), ``scores`` (model name -> mean log
        score, with "auto") and ``mean_error_variance``.
    """
    x, y, z, e = _as_xyz(x, y, z, error_variance)
    models = sorted(VARIOGRAM_MODELS) if model == "auto" else [model]
    for m in models:
        _check_model_name(m)
    ev = experimental if experimental is not None else experimental_variogram(x, y, z)
    mean_e = float(np.mean(e))
    fitted = {}
    used = {}
    for m in models:
        v = fit_variogram(ev.lag_m, ev.semivariance, ev.n_pairs, m)
        fitted[m] = v
        used[m] = VariogramModel(m, max(v.nugget - mean_e, 0.0), v.sill, v.range_m)
    info = {"experimental_variogram": ev, "fitted": fitted, "scores": None, "mean_error_variance": mean_e}
    if len(models) == 1:
        return used[models[0]], info
    scores = {}
    for m in models:
        try:
            cv = OrdinaryKriging(used[m], neighbours=neighbours).fit(x, y, z, e).cross_validate(
                max_points=max_points
            )
            sc = cv.mean_log_score
        except (InversionError, np.linalg.LinAlgError):
            sc = float("nan")
        scores[m] = sc if math.isfinite(sc) else float("inf")
    info["scores"] = scores
    best = min(models, key=lambda m: scores[m])
    return used[best], info


# --------------------------------------------------------------------------- BLAS threads

_BLAS_SYMBOLS = (
    ("openblas_get_num_threads", "openblas_set_num_threads"),
    ("scipy_openblas_get_num_threads64_", "scipy_openblas_set_num_threads64_"),
    ("scipy_openblas_get_num_threads", "scipy_openblas_set_num_threads"),
    ("openblas_get_num_threads64_", "openblas_set_num_threads64_"),
)
_blas_controls_cache = None
_blas_lock = threading.Lock()
_blas_depth = 0
_blas_saved = []


def _blas_controls():
    """(get, set) thread-count functions of every OpenBLAS loaded in this process.

    Found through /proc/self/maps (Linux); elsewhere through threadpoolctl when
    it is installed; otherwise none (the solves then run with the BLAS default).
    """
    global _blas_controls_cache
    if _blas_controls_cache is not None:
        return _blas_controls_cache
    controls = []
    try:
        with open("/proc/self/maps", encoding="utf-8", errors="replace") as f:
            paths = {line.split()[-1] for line in f if ".so" in line and "openblas" in line.lower()}
    except OSError:
        paths = set()
    if paths:
        import ctypes

        seen = set()
        for path in sorted(paths):
            real = os.path.realpath(path)
            if real in seen:
                continue
            seen.add(real)
            try:
                lib = ctypes.CDLL(path)
            except OSError:
                continue
            for get_name, set_name in _BLAS_SYMBOLS:
                if hasattr(lib, get_name) and hasattr(lib, set_name):
                    get_fn = getattr(lib, get_name)
                    set_fn = getattr(lib, set_name)
                    get_fn.restype = ctypes.c_int
                    set_fn.argtypes = [ctypes.c_int]
                    controls.append((get_fn, set_fn))
                    break
    else:
        try:
            from threadpoolctl import ThreadpoolController
        except ImportError:
            ThreadpoolController = None
        if ThreadpoolController is not None:
            ctl = ThreadpoolController()

            def _get(ctl=ctl):
                counts = [m.get("num_threads", 1) for m in ctl.info() if m.get("user_api") == "blas"]
                return max(counts or [1])

            def _set(n, ctl=ctl):
                ctl.limit(limits=n, user_api="blas")

            controls.append((_get, _set))
    _blas_controls_cache = controls
    return controls


class _SingleThreadedBlas:
    """Context manager: BLAS/LAPACK on one thread while our own threads run.

    The batched solves call LAPACK on tiny (k+1) systems; a threaded BLAS then
    spends its time waking threads (measured 10-300 x slower on a loaded
    2-core machine with Debian's OpenBLAS), and our worker threads on top of
    BLAS threads would oversubscribe the cores. The previous thread counts are
    restored on exit; nesting and concurrent use are counted under a lock.
    """

    def __enter__(self):
        global _blas_depth, _blas_saved
        with _blas_lock:
            if _blas_depth == 0:
                controls = _blas_controls()
                _blas_saved = [(fset, int(fget())) for fget, fset in controls]
                for fset, _ in _blas_saved:
                    fset(1)
            _blas_depth += 1
        return self

    def __exit__(self, *exc):
        global _blas_depth
        with _blas_lock:
            _blas_depth -= 1
            if _blas_depth == 0:
                for fset, n in _blas_saved:
                    fset(max(1, n))
        return False


def _default_threads():
    n = os.cpu_count() or 1
    return max(1, min(n, 8))


class OrdinaryKriging:
    """Ordinary kriging with measurement error, local or global neighbourhood.

    See the module docstring for the kriging system; it is solved for every
    target with its ``neighbours`` nearest data (``cKDTree``), in batches: a
    chunk of targets builds a (chunk, k+1, k+1) stack of systems solved at once
    by :func:`numpy.linalg.solve`; the chunk size keeps each batch under
    about 8 MiB (cache-sized), so memory does not grow with the number of data or targets
    (no N x M matrix). Chunks run on ``n_threads`` threads (NumPy releases the
    GIL in the batched solve) while BLAS is held to one thread (OpenBLAS found
    in the process, or threadpoolctl; where neither works the chunks run on one
    thread and BLAS keeps its own); each thread's KD-tree query is
    single-threaded, so there is no nested thread pool. With ``neighbours=None`` (global, for at
    most ``GLOBAL_MAX_DATA`` data) the (N+1) system is inverted once.

    Systems are assembled with the variogram divided by its total sill (the
    Lagrange row of ones is then on the same scale as the rest), which does not
    change the weights.

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
    variogram_info_ : dict
        What :func:`choose_variogram` returned beside the model (when fitted).
    n_data_ : int

    Examples
    --------
    A datum without error is honoured exactly; the kriging std there is zero.

    >>> ok = OrdinaryKriging(VariogramModel("spherical", 0.0, 1.0, 10.0), neighbours=None)
    >>> ok = ok.fit([0.0, 4.0, 0.0, 4.0], [0.0, 0.0, 3.0, 3.0], [1.0, 2.0, 3.0, 4.0])
    >>> est, std = ok.predict([4.0], [0.0])
    >>> round(float(est[0]), 12), round(float(std[0]), 6)
    (2.0, 0.0)
    """

    def __init__(self, variogram="auto", neighbours=32, variogram_model="auto", n_threads=None):
        self.variogram = variogram
        self.neighbours = neighbours
        self.variogram_model = variogram_model
        self.n_threads = n_threads

    # -- fitting
    def fit(self, x, y, z, error_variance=None):
        """Store the data (and fit the variogram when "auto").

        Parameters
        ----------
        x, y, z : array_like (n,)
            Data coordinates and values (m).
        error_variance : array_like (n,) or float, optional
            Measurement-error variance of each datum (m^2): sigma_m**2 of a
            seismic point, ~0 for a borehole. Default 0 (exact data).

        Returns
        -------
        self
        """
        x, y, z, e = _as_xyz(x, y, z, error_variance)
        k = self.neighbours
        if k is not None:
            if int(k) != k or int(k) < 1:
                raise ValueError(f"neighbours must be a positive integer or None, got {k!r}")
            k = min(int(k), x.size)
        elif x.size > GLOBAL_MAX_DATA:
            raise InversionError(
                f"global kriging (neighbours=None) of {x.size} data would need a "
                f"{x.size + 1}^2 system; use a local neighbourhood, e.g. neighbours=32 "
                f"(global is limited to {GLOBAL_MAX_DATA} data)"
            )
        self.experimental_variogram_ = None
        self.variogram_info_ = None
        if isinstance(self.variogram, VariogramModel):
            vario = self.variogram
        elif isinstance(self.variogram, str) and self.variogram == "auto":
            vario, info = choose_variogram(x, y, z, e, self.variogram_model, neighbours=k)
            self.experimental_variogram_ = info["experimental_variogram"]
            self.variogram_info_ = info
        else:
            raise ValueError(
                f"variogram must be a VariogramModel or 'auto', got {self.variogram!r}"
            )
        # centred coordinates: differences stay exact and the systems well scaled
        self._origin = (float(np.mean(x)), float(np.mean(y)))
        self.x_ = x
        self.y_ = y
        self.z_ = z
        self.error_variance_ = e
        self.variogram_ = vario
        self.n_data_ = x.size
        self._k = k
        self._xc = x - self._origin[0]
        self._yc = y - self._origin[1]
        self._e_unit = e / vario.total_sill
        self._check_duplicates()
        self.tree_ = cKDTree(np.column_stack([self._xc, self._yc]))
        self._ainv = None
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

    def _check_duplicates(self):
        xy = np.column_stack([self._xc, self._yc])
        pairs = cKDTree(xy).query_pairs(ZERO_LAG_M, output_type="ndarray")
        if len(pairs):
            e = self.error_variance_
            exact = (e[pairs[:, 0]] + e[pairs[:, 1]]) <= 0
            if exact.any():
                i, j = pairs[np.flatnonzero(exact)[0]]
                raise InversionError(
                    f"data {i} and {j} are at the same location ({self.x_[i]!r}, {self.y_[i]!r}) and both "
                    "have zero error variance, so the kriging system is singular; average them, or give "
                    "them an error variance"
                )

    def _check_fitted(self):
        if not hasattr(self, "variogram_"):
            raise RuntimeError("OrdinaryKriging is not fitted yet: call fit(x, y, z) first")

    def _global_matrix(self):
        n = self.n_data_
        d = np.hypot(self._xc[:, None] - self._xc[None, :], self._yc[:, None] - self._yc[None, :])
        a = np.empty((n + 1, n + 1))
        a[:n, :n] = self.variogram_._unit(d)
        a[np.arange(n), np.arange(n)] = -self._e_unit
        a[n, :n] = 1.0
        a[:n, n] = 1.0
        a[n, n] = 0.0
        return a

    # -- solving
    def _chunk_size(self, k):
        per = 8.0 * 8 * (k + 1) ** 2  # ~8 arrays of (k+1)^2 doubles per target
        return int(max(16, min(8192, CHUNK_BYTES // per)))

    def _solve_local(self, tx, ty, idx, zvals=None):
        """Batched solve for targets (tx, ty) (centred) with neighbour index (c, k)."""
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
        a[:, :k, :k] = self.variogram_._unit_inplace(h)
        del h
        r = np.arange(k)
        a[:, r, r] = -self._e_unit[idx]
        a[:, k, :k] = 1.0
        a[:, :k, k] = 1.0
        a[:, k, k] = 0.0
        b = np.empty((c, k + 1))
        b[:, :k] = self.variogram_._unit_inplace(np.hypot(xs - tx[:, None], ys - ty[:, None]))
        b[:, k] = 1.0
        try:
            sol = np.linalg.solve(a, b[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError as exc:
            raise InversionError(
                f"a local kriging system is singular ({exc}); usual causes: data at the same place with "
                f"no error variance, or a {self.variogram_.model} model without nugget on dense data. "
                "Give the data an error variance or the model a small nugget"
            ) from exc
        lam = sol[:, :k]
        z = self.z_[idx] if zvals is None else zvals
        est = np.einsum("ij,ij->i", lam, z)
        var = (np.einsum("ij,ij->i", lam, b[:, :k]) + sol[:, k]) * self.variogram_.total_sill
        return est, var

    def _predict_chunk(self, tx, ty):
        """Estimate and kriging variance for centred targets (one chunk)."""
        if self._k is None:
            n = self.n_data_
            b = np.empty((tx.size, n + 1))
            d = np.hypot(tx[:, None] - self._xc[None, :], ty[:, None] - self._yc[None, :])
            b[:, :n] = self.variogram_._unit_inplace(d)
            del d
            b[:, n] = 1.0
            sol = b @ self._ainv  # A symmetric: rows are the weights and the Lagrange multiplier
            est = sol[:, :n] @ self.z_
            var = np.einsum("ij,ij->i", sol, b) * self.variogram_.total_sill
            return est, var
        _, idx = self.tree_.query(np.column_stack([tx, ty]), k=self._k, workers=1)
        if self._k == 1:
            idx = idx[:, None]
        return self._solve_local(tx, ty, idx)

    def _run_chunks(self, n, chunk, work, progress, p0=0.0, p1=100.0):
        """Apply ``work(slice)`` to chunks of range(n) on threads, in order."""
        progress = progress or NullProgress()
        slices = [slice(s, min(n, s + chunk)) for s in range(0, n, chunk)]
        threads = self.n_threads or _default_threads()
        out = [None] * len(slices)
        if self._k is None:  # global: few large solves, let BLAS use its threads
            threads = 1
        elif not _blas_controls():  # BLAS threads cannot be limited: do not add ours on top
            threads = 1
        else:
            with _SingleThreadedBlas():
                return self._run_threads(slices, threads, work, progress, p0, p1, out)
        return self._run_threads(slices, threads, work, progress, p0, p1, out)

    @staticmethod
    def _run_threads(slices, threads, work, progress, p0, p1, out):
        if threads <= 1 or len(slices) <= 1:
            for i, sl in enumerate(slices):
                check_cancel(progress)
                out[i] = work(sl)
                progress.set_progress(p0 + (p1 - p0) * (i + 1) / len(slices))
            return out
        with ThreadPoolExecutor(max_workers=threads) as pool:
            # submit in bounded waves so memory stays ~threads x chunk
            pending = {}
            nxt = 0
            done = 0
            try:
                while done < len(slices):
                    while nxt < len(slices) and len(pending) < 2 * threads:
                        pending[nxt] = pool.submit(work, slices[nxt])
                        nxt += 1
                    first = min(pending)
                    out[first] = pending.pop(first).result()
                    done += 1
                    progress.set_progress(p0 + (p1 - p0) * done / len(slices))
                    check_cancel(progress)
            finally:
                for f in pending.values():
                    f.cancel()
        return out

    def predict(self, x, y, progress=None):
        """Kriging estimate and standard deviation at points.

        Parameters
        ----------
        x, y : array_like
            Target coordinates (m), any equal shapes.
        progress : object, optional
            Progress sink (``set_progress``/``is_canceled``), checked between chunks.

        Returns
        -------
        estimate, std : ndarray
            Same shape as ``x``; ``std`` is :math:`\\sigma_K` (m), the square
            root of the kriging variance (negative round-off clipped to 0).
        """
        self._check_fitted()
        x, y = _as_targets(x, y)
        shape = x.shape
        tx = x.ravel() - self._origin[0]
        ty = y.ravel() - self._origin[1]
        est, var = self._predict_centred(tx, ty, progress)
        return est.reshape(shape), np.sqrt(np.maximum(var, 0.0)).reshape(shape)

    def _predict_centred(self, tx, ty, progress=None, p0=0.0, p1=100.0):
        n = tx.size
        if self._k is None:
            chunk = int(max(16, min(8192, GLOBAL_CHUNK_BYTES // (8 * 4 * (self.n_data_ + 1)))))
        else:
            chunk = self._chunk_size(self._k)
        est = np.empty(n)
        var = np.empty(n)

        def work(sl):
            e, v = self._predict_chunk(tx[sl], ty[sl])
            est[sl] = e
            var[sl] = v

        self._run_chunks(n, chunk, work, progress, p0, p1)
        return est, var

    def grid(self, spec, max_distance_m=None, progress=None):
        """Estimate and std on a grid; cells far from the data are NaN.

        Parameters
        ----------
        spec : GridSpec
        max_distance_m : float, optional
            Cells whose centre is farther than this from every datum are masked
            (NaN), so nothing is extrapolated silently. None = no mask.
        progress : object, optional

        Returns
        -------
        SurfaceGrid
        """
        self._check_fitted()
        mask = _distance_mask(self.tree_, spec, max_distance_m, self._origin)
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
            spec=spec, z=z.reshape(spec.shape), std=s.reshape(spec.shape), mask=mask,
            method="kriging", n_data=self.n_data_,
        )

    def cross_validate(self, progress=None, max_points=None, seed=0):
        """Leave-one-out cross-validation of the fitted kriging.

        Each datum is estimated from the others with the same variogram. In a
        local neighbourhood the datum's own index is removed from its k+1
        nearest data (so it is never its own neighbour, even beside a
        duplicate). In the global case the closed form of [Dubrule 1983] is
        used: with :math:`B = A^{-1}` of the (N+1) system,
        :math:`z_i - \\hat z_{-i} = (B[\\mathbf z; 0])_i / B_{ii}` and
        :math:`\\sigma_K^2 + e_i = -1/B_{ii}` (variogram form).

        The residual's variance is :math:`\\sigma_K^2(\\mathbf s_i) + e_i`: the
        error of predicting the signal plus the datum's own measurement error.

        Parameters
        ----------
        progress : object, optional
        max_points : int, optional
            Validate only a random subset of this many data (each still
            estimated from *all* the other data); default all.
        seed : int
            Seed of that subset.

        Returns
        -------
        CrossValidation
        """
        self._check_fitted()
        n = self.n_data_
        sel = np.arange(n)
        if max_points is not None and n > int(max_points):
            sel = np.sort(np.random.default_rng(seed).choice(n, int(max_points), replace=False))
        s = self.variogram_.total_sill
        if self._k is None:
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

        def work(sl):
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


def _distance_mask(tree, spec, max_distance_m, origin):
    """True for cells farther than max_distance_m from every datum (tree in centred coords)."""
    if max_distance_m is None:
        return np.zeros(spec.shape, dtype=bool)
    md = float(max_distance_m)
    if not md > 0:
        raise ValueError(f"max_distance_m must be > 0 (m), got {max_distance_m!r}")
    mask = np.empty(spec.shape, dtype=bool)
    xc = spec.x_centres - origin[0]
    rows = max(1, 2_000_000 // spec.nx)
    for r0 in range(0, spec.ny, rows):
        yc = spec.y_centres[r0:r0 + rows] - origin[1]
        gx, gy = np.meshgrid(xc, yc)
        d, _ = tree.query(np.column_stack([gx.ravel(), gy.ravel()]), k=1, workers=-1,
                          distance_upper_bound=md * (1 + 1e-12))
        mask[r0:r0 + rows] = (d > md).reshape(gx.shape)
    return mask


def cross_validate(x, y, z, error_variance=None, *, variogram="auto", neighbours=32,
                   variogram_model="auto", progress=None, max_points=None):
    """Leave-one-out cross-validation of ordinary kriging (see
    :meth:`OrdinaryKriging.cross_validate`; ``max_points`` validates a random subset).

    Returns
    -------
    CrossValidation
        Per-point estimate, residual, std and standardised residual, and the
        summary: mean error, RMSE, mean standardised squared error (~1 when the
        model is right) and the fraction within 2 sigma (~0.95).
    """
    ok = OrdinaryKriging(variogram, neighbours=neighbours, variogram_model=variogram_model)
    return ok.fit(x, y, z, error_variance).cross_validate(progress, max_points=max_points)


# --------------------------------------------------------------------------- spline


class ThinPlateSpline:
    """Smoothing thin-plate spline ([Duchon 1977], [Wahba 1990]).

    Minimises, over functions :math:`f` with a linear polynomial part,

    .. math::

        \\sum_i \\frac{(z_i - f(\\mathbf s_i))^2}{w_i} + \\lambda\\, J_2(f),

    with :math:`J_2` the bending energy; solved by
    :class:`scipy.interpolate.RBFInterpolator` (``kernel="thin_plate_spline"``,
    ``degree=1``), whose per-point ``smoothing`` is :math:`\\lambda w_i`. The
    weights are :math:`w_i = e_i / \\bar e` when error variances are given (a
    datum with zero error variance is then honoured exactly), else 1.
    Coordinates are centred and divided by the half-diagonal of the data
    bounding box, so :math:`\\lambda` is dimensionless.

    ``smoothing="auto"`` chooses :math:`\\lambda` from
    :math:`\\{0, 10^{-6}, 10^{-5}, \\dots, 10^{1}\\}` by 5-fold
    cross-validation (random folds, seeded) on at most 2000 data: the value
    with the smallest held-out RMSE (a cross-validation rule in the spirit of
    [Wahba 1990, ch. 4]; ties go to the larger smoothing).

    There is no variance for the spline: :meth:`predict` returns NaN as std.

    Parameters
    ----------
    smoothing : float or "auto"
        :math:`\\lambda`.
    neighbours : int or None
        Nearest data used by each evaluation (``RBFInterpolator(neighbors=)``);
        None = global (all data, O(N^3); keep N below a few thousand).

    Attributes
    ----------
    smoothing_ : float
        The :math:`\\lambda` used.
    cv_scores_ : dict or None
        Held-out RMSE (m) of each candidate when chosen automatically.
    cv_ : CrossValidation or None
        The 5-fold held-out residuals of the chosen smoothing (std NaN).
    """

    CANDIDATES = (0.0, 1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0, 10.0)

    def __init__(self, smoothing="auto", neighbours=None):
        self.smoothing = smoothing
        self.neighbours = neighbours

    def _rbf(self, xy, z, smooth):
        from scipy.interpolate import RBFInterpolator

        k = self.neighbours
        if k is not None:
            k = min(int(k), len(z))
        return RBFInterpolator(xy, z, neighbors=k, smoothing=smooth, kernel="thin_plate_spline", degree=1)

    def fit(self, x, y, z, error_variance=None):
        """Fit the spline (choosing the smoothing when "auto"); returns self."""
        x, y, z, e = _as_xyz(x, y, z, error_variance)
        k = self.neighbours
        if k is not None and (int(k) != k or int(k) < 3):
            raise ValueError(f"neighbours must be an integer >= 3 or None, got {k!r}")
        self._origin = (float(np.mean(x)), float(np.mean(y)))
        scale = 0.5 * math.hypot(np.ptp(x), np.ptp(y))
        self._scale = scale if scale > 0 else 1.0
        xy = np.column_stack([(x - self._origin[0]) / self._scale, (y - self._origin[1]) / self._scale])
        me = float(np.mean(e))
        w = e / me if me > 0 else np.ones_like(z)
        self.cv_scores_ = None
        self.cv_ = None
        if isinstance(self.smoothing, str):
            if self.smoothing != "auto":
                raise ValueError(f"smoothing must be a number >= 0 or 'auto', got {self.smoothing!r}")
            lam = self._choose(xy, z, w)
        else:
            lam = float(self.smoothing)
            if not (lam >= 0 and math.isfinite(lam)):
                raise ValueError(f"smoothing must be a number >= 0 or 'auto', got {self.smoothing!r}")
        self.smoothing_ = lam
        self.x_, self.y_, self.z_, self.error_variance_ = x, y, z, e
        self.n_data_ = x.size
        self.interpolator_ = self._rbf(xy, z, lam * w)
        self.tree_ = cKDTree(np.column_stack([x - self._origin[0], y - self._origin[1]]))
        return self

    def _choose(self, xy, z, w, folds=5, max_points=2000):
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

    def predict(self, x, y, progress=None):
        """Spline value at points, and NaN as std (the spline has no variance)."""
        if not hasattr(self, "interpolator_"):
            raise RuntimeError("ThinPlateSpline is not fitted yet: call fit(x, y, z) first")
        x, y = _as_targets(x, y)
        shape = x.shape
        xy = np.column_stack([(x.ravel() - self._origin[0]) / self._scale,
                              (y.ravel() - self._origin[1]) / self._scale])
        out = self._eval(xy, progress)
        return out.reshape(shape), np.full(shape, np.nan)

    def _eval(self, xy, progress=None):
        progress = progress or NullProgress()
        n = len(xy)
        per = 8 * 4 * (self.n_data_ if self.neighbours is None else 64 * int(self.neighbours))
        chunk = int(max(64, min(200_000, GLOBAL_CHUNK_BYTES // per)))
        out = np.empty(n)
        for s in range(0, n, chunk):
            check_cancel(progress)
            out[s:s + chunk] = self.interpolator_(xy[s:s + chunk])
            progress.set_progress(100.0 * min(n, s + chunk) / max(n, 1))
        return out

    def grid(self, spec, max_distance_m=None, progress=None):
        """Spline on a grid (std NaN); cells far from the data are NaN. See
        :meth:`OrdinaryKriging.grid`."""
        if not hasattr(self, "interpolator_"):
            raise RuntimeError("ThinPlateSpline is not fitted yet: call fit(x, y, z) first")
        mask = _distance_mask(self.tree_, spec, max_distance_m, self._origin)
        gx, gy = spec.coords()
        sel = ~mask.ravel()
        z = np.full(spec.size, np.nan)
        if sel.any():
            xy = np.column_stack([(gx.ravel()[sel] - self._origin[0]) / self._scale,
                                  (gy.ravel()[sel] - self._origin[1]) / self._scale])
            z[sel] = self._eval(xy, progress)
        return SurfaceGrid(spec=spec, z=z.reshape(spec.shape), std=np.full(spec.shape, np.nan),
                           mask=mask, method="spline", n_data=self.n_data_)


# --------------------------------------------------------------------------- pipeline entry


def default_max_distance(x, y, variogram=None):
    """Default masking distance (m): 15 % of the diagonal of the data bounding
    box, and not more than the variogram range (beyond it kriging returns the
    mean), but never less than the median distance between neighbouring data
    (so that the cells between data along a line are mapped even when the
    fitted range collapses, e.g. over a flat reflector). A rule of this
    project, to be overridden with site knowledge.

    >>> default_max_distance([0, 10, 20, 300], [0, 0, 0, 400])  # diagonal 500 m
    75.0
    >>> default_max_distance([0, 20, 40, 60], [0, 0, 0, 0])  # one line: the 20 m spacing
    20.0
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    d = 0.15 * math.hypot(np.ptp(x), np.ptp(y))
    if variogram is not None:
        d = min(d, variogram.range_m)
    if x.size > 1:
        from scipy.spatial import cKDTree

        nn = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=2)[0][:, 1]
        d = max(d, float(np.median(nn)))
    return float(d)


def interpolate_surface(
    x,
    y,
    z,
    sigma=None,
    spec=None,
    method="kriging",
    neighbours=32,
    variogram_model="auto",
    max_distance_m=None,
    progress=None,
    variogram=None,
    cv_max_points=20000,
):
    """Reflector surface on a grid, with diagnostics (the pipeline's call).

    Parameters
    ----------
    x, y, z : array_like (n,)
        Reflector points (m): easting, northing, elevation.
    sigma : array_like (n,) or float, optional
        Standard error of each elevation (m); 0 (or tiny) for boreholes.
        Its square is the measurement-error variance on the kriging diagonal
        (and the relative smoothing weight of the spline).
    spec : GridSpec, optional
        Default :meth:`GridSpec.from_data`.
    method : "kriging" or "spline"
    neighbours : int or None
        Local neighbourhood size (None = global).
    variogram_model : str
        "auto" (default: the best of spherical, exponential and gaussian by
        leave-one-out log score, see :func:`choose_variogram`) or one of them.
    max_distance_m : float, optional
        Mask distance; default :func:`default_max_distance`.
    progress : object, optional
        Progress sink; cancellation is checked between chunks.
    variogram : VariogramModel, optional
        Use this model instead of fitting one.
    cv_max_points : int
        Leave-one-out cross-validation of at most this many data (random,
        seeded), each estimated from all others.

    Returns
    -------
    surface : SurfaceGrid
    diagnostics : dict
        ``method``, ``n_data``, ``experimental_variogram``
        (ExperimentalVariogram or None), ``variogram`` (VariogramModel used,
        kriging), ``variogram_fitted`` (model name -> model before the nugget
        split), ``variogram_scores`` (model name -> log score, with "auto"),
        ``cross_validation`` (CrossValidation; for the spline std is NaN),
        ``smoothing`` (spline), ``max_distance_m``, ``n_cells``,
        ``n_cells_estimated``.
    """
    from ..progress import SubProgress

    progress = progress or NullProgress()
    if sigma is not None:
        sig = np.asarray(sigma, dtype=float)
        if np.any(sig < 0):
            raise ValueError(f"sigma must be >= 0 (m), got {sig[sig < 0].ravel()[0]!r}")
        e = np.square(sig)
    else:
        e = None
    x, y, z, e = _as_xyz(x, y, z, e)
    if spec is None:
        spec = GridSpec.from_data(x, y)
    diag = {"method": method, "n_data": int(x.size), "experimental_variogram": None, "variogram": None,
            "variogram_fitted": None, "variogram_scores": None, "smoothing": None}
    if method == "kriging":
        check_cancel(progress)
        if variogram is None:
            variogram, info = choose_variogram(x, y, z, e, variogram_model, neighbours=neighbours)
            diag["experimental_variogram"] = info["experimental_variogram"]
            diag["variogram_fitted"] = info["fitted"]
            diag["variogram_scores"] = info["scores"]
        check_cancel(progress)
        progress.set_progress(5)
        model = OrdinaryKriging(variogram, neighbours=neighbours).fit(x, y, z, e)
        diag["variogram"] = model.variogram_
        diag["cross_validation"] = model.cross_validate(
            SubProgress(progress, 5, 25), max_points=cv_max_points
        )
        p0 = 25
    elif method == "spline":
        model = ThinPlateSpline("auto", neighbours=neighbours).fit(x, y, z, e)
        diag["smoothing"] = model.smoothing_
        diag["cross_validation"] = model.cv_  # 5-fold, std NaN; None with a fixed smoothing
        p0 = 20
    else:
        raise ValueError(f"method must be 'kriging' or 'spline', got {method!r}")
    if max_distance_m is None:
        max_distance_m = default_max_distance(x, y, diag["variogram"])
    diag["max_distance_m"] = float(max_distance_m)
    surf = model.grid(spec, max_distance_m, SubProgress(progress, p0, 100))
    diag["n_cells"] = spec.size
    diag["n_cells_estimated"] = int((~surf.mask).sum())
    progress.set_progress(100)
    return surf, diag
