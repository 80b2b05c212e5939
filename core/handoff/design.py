"""Design-level answers: how likely is rock above a level, and how much rock lies above it.

Probability. The map's posterior at each cell is Gaussian, mean :math:`z` (the
kriged elevation) and standard deviation :math:`\\sigma` (the kriging standard
deviation), so

.. math::

    P(Z > z_d) = \\Phi\\left(\\frac{z - z_d}{\\sigma}\\right),

:math:`\\Phi` the standard normal distribution function. It is a per-cell
probability: "rock is above the pile toe at this cell".

Volume. The rock above the design level over an area :math:`A` is
:math:`V = \\int_A \\max(Z(\\mathbf x) - z_d, 0)\\,dA`. Its distribution needs the
joint behaviour of all cells (a high cell makes its neighbours likely high
too), so it comes from conditional simulations of the surface
(:mod:`~..surface.simulation`), each integrated over the area: P10, P50 and
P90 are the 10th, 50th and 90th percentiles of the simulated volumes (90 % of
the realisations give less than P90). Nodes are the mapped cell centres inside
the area; where there are more than the simulation can take jointly, every
m-th cell in both directions is used and each node stands for an equal share
of the mapped area.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

import numpy as np

from ..errors import SurfaceError
from ..surface.simulation import MAX_SIMULATION_POINTS, simulate_conditional

__all__ = ["DesignVolume", "cells_inside", "probability_above", "rock_volume"]


def probability_above(elevation_m, sigma_m, design_elevation_m) -> np.ndarray:
    """P(reflector elevation > design elevation) per cell, :math:`\\Phi((z - z_d)/\\sigma)`.

    NaN where the map is empty; 1 or 0 where sigma is 0 (0.5 on the level).

    >>> probability_above(np.array([101.0, 100.0, 99.0]), np.array([1.0, 2.0, 1.0]), 100.0).round(4).tolist()
    [0.8413, 0.5, 0.1587]
    """
    from scipy.special import ndtr

    z = np.asarray(elevation_m, float)
    s = np.asarray(sigma_m, float)
    diff = z - float(design_elevation_m)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = ndtr(diff / s)
    exact = s == 0
    p = np.where(exact, np.where(diff > 0, 1.0, np.where(diff < 0, 0.0, 0.5)), p)
    return np.where(np.isfinite(z) & np.isfinite(s), p, np.nan)


def cells_inside(spec, polygon) -> np.ndarray:
    """Boolean grid: cell centres inside ``polygon`` (shapely), all True for None."""
    if polygon is None:
        return np.ones(spec.shape, bool)
    gx, gy = spec.coords()
    try:
        from shapely import contains_xy  # shapely >= 2.0

        inside = contains_xy(polygon, gx.ravel(), gy.ravel())
    except ImportError:  # shapely 1.8
        from shapely.vectorized import contains

        inside = contains(polygon, gx.ravel(), gy.ravel())
    return np.asarray(inside, bool).reshape(spec.shape)


@dataclass(frozen=True)
class DesignVolume:
    """Rock volume above a design level from conditional simulations.

    Attributes
    ----------
    design_elevation_m : float
    area_m2 : float
        Area asked for: the polygon's, or the mapped area when no polygon.
    mapped_area_m2 : float
        Mapped part of it (cells estimated); the volume covers only this part.
    volumes_m3 : ndarray (n_simulations,)
        Volume of each realisation.
    map_volume_m3 : float
        Volume under the kriged map itself (every cell), for comparison: it is
        below the simulations' mean where the level cuts the surface, since
        max(Z - z_d, 0) is convex.
    node_spacing_m : float
        Spacing of the simulated nodes (the cell size, or a multiple of it).
    n_nodes : int
    jitter_m2 : float
        Variance added to the covariance diagonal for a stable factor.
    seed : int
    """

    design_elevation_m: float
    area_m2: float
    mapped_area_m2: float
    volumes_m3: np.ndarray
    map_volume_m3: float
    node_spacing_m: float
    n_nodes: int
    jitter_m2: float
    seed: int

    @property
    def n_simulations(self) -> int:
        """Number of simulated surfaces."""
        return len(self.volumes_m3)

    def percentile_m3(self, q: float) -> float:
        """The q-th percentile (0-100) of the simulated volumes (m^3)."""
        return float(np.percentile(self.volumes_m3, q))

    @property
    def p10_m3(self) -> float:
        """10th percentile of the simulated volumes (m^3)."""
        return self.percentile_m3(10)

    @property
    def p50_m3(self) -> float:
        """Median of the simulated volumes (m^3)."""
        return self.percentile_m3(50)

    @property
    def p90_m3(self) -> float:
        """90th percentile of the simulated volumes (m^3): 90 % of them stay below it."""
        return self.percentile_m3(90)

    @property
    def mean_m3(self) -> float:
        """Mean of the simulated volumes (m^3)."""
        return float(np.mean(self.volumes_m3))

    @property
    def sd_m3(self) -> float:
        """Standard deviation of the simulated volumes (m^3)."""
        return float(np.std(self.volumes_m3, ddof=1))

    @property
    def probability_any_rock(self) -> float:
        """Fraction of the realisations with some rock above the level."""
        return float(np.mean(self.volumes_m3 > 0))

    @property
    def mapped_fraction(self) -> float:
        """Mapped part of the design area, 0 to 1 (NaN for an empty area)."""
        return self.mapped_area_m2 / self.area_m2 if self.area_m2 > 0 else float("nan")


def rock_volume(
    spec,
    elevation_m,
    design_elevation_m: float,
    variogram,
    data_xy,
    error_variance,
    *,
    area=None,
    neighbours=32,
    n_simulations: int = 500,
    seed: int = 1,
    max_nodes: Optional[int] = None,
    progress=None,
) -> DesignVolume:
    """P10/P50/P90 of the rock volume above ``design_elevation_m`` (see the module docstring).

    Parameters
    ----------
    spec : GridSpec
    elevation_m : ndarray (ny, nx)
        The kriged map (NaN where not mapped).
    design_elevation_m : float
    variogram : VariogramModel
        The map's variogram (of the residuals when a trend was removed).
    data_xy : (x_m, y_m)
        The data the map was kriged from.
    error_variance : array_like
        Their measurement-error variances (m^2).
    area : shapely Polygon, optional
        Default: the whole mapped area.
    neighbours : int or None
        The map's kriging neighbourhood.
    n_simulations, seed : int
    max_nodes : int, optional
        Most simulated nodes (default: what :data:`MAX_SIMULATION_POINTS`
        leaves beside the data).
    progress : optional

    Returns
    -------
    DesignVolume

    Raises
    ------
    SurfaceError
        No mapped cell inside the area.
    """
    z = np.asarray(elevation_m, float)
    zd = float(design_elevation_m)
    inside = cells_inside(spec, area)
    mapped = inside & np.isfinite(z)
    cell_area = spec.cell_size_m**2
    area_m2 = float(area.area) if area is not None else float(mapped.sum() * cell_area)
    mapped_area = float(mapped.sum() * cell_area)
    if not mapped.any():
        raise SurfaceError(
            "no mapped cell lies inside the design area: the area is outside the mapped part of the site"
        )
    map_volume = float(np.sum(np.maximum(z[mapped] - zd, 0.0)) * cell_area)
    x, y = (np.asarray(a, float) for a in data_xy)
    if max_nodes is None:
        max_nodes = max(200, MAX_SIMULATION_POINTS - min(x.size, MAX_SIMULATION_POINTS // 2))
    stride = 1
    while True:
        sub = np.zeros_like(mapped)
        sub[::stride, ::stride] = mapped[::stride, ::stride]
        if sub.sum() <= max_nodes or stride > max(spec.nx, spec.ny):
            break
        stride += 1
    if not sub.any():  # a tiny area between the strided nodes: take its mapped cells' centre cell
        r, c = np.argwhere(mapped)[len(np.argwhere(mapped)) // 2]
        sub[r, c] = True
    gx, gy = spec.coords()
    sim = simulate_conditional(
        variogram, x, y, error_variance, gx[sub], gy[sub], z[sub], n_simulations, seed, neighbours, progress
    )
    weight = mapped_area / sub.sum()  # each node stands for an equal share of the mapped area
    volumes = np.sum(np.maximum(sim.values - zd, 0.0), axis=0) * weight
    return DesignVolume(
        zd, area_m2, mapped_area, volumes, map_volume, spec.cell_size_m * stride, int(sub.sum()), sim.jitter, int(seed)
    )
