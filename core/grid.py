"""The output grid and sampling helpers (north-up: row 0 is the northern row).

:class:`GridSpec` is the one raster grid of the project: square cells, row 0
the northern row, column 0 the western column, ``x0, y0`` the centre of the
north-west cell (GeoTIFF order). :func:`nice_step` and :func:`next_nice_step`
give the 1-2-5 steps (1, 2, 5 x 10^k) of cell sizes, contour intervals and
symbol spacings.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Optional

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from .errors import GridError, RockheadWarning

__all__ = ["GridSpec", "bilinear", "fill_nearest", "next_nice_step", "nice_step"]


def bilinear(spec: GridSpec, grid: ArrayLike, x_m: ArrayLike, y_m: ArrayLike) -> np.ndarray:
    """Sample a north-up grid bilinearly between its cell centres.

    Parameters
    ----------
    spec : GridSpec
        The grid of ``grid``.
    grid : array_like (ny, nx)
        Values, row 0 north.
    x_m, y_m : array_like
        Easting and northing (m) of the sample points, equal shapes.

    Returns
    -------
    ndarray
        Sampled values, shape of ``x_m``; NaN outside the cell centres' hull
        or next to a NaN cell.

    >>> spec = GridSpec(x0=0.0, y0=10.0, cell_size_m=10.0, nx=2, ny=2)
    >>> bilinear(spec, [[0.0, 1.0], [2.0, 3.0]], [5.0, 20.0], [5.0, 5.0]).tolist()
    [1.5, nan]
    """
    from scipy.ndimage import map_coordinates

    col = (np.asarray(x_m, float) - spec.x0) / spec.cell_size_m
    row = (spec.y0 - np.asarray(y_m, float)) / spec.cell_size_m
    return map_coordinates(np.asarray(grid, float), [row, col], order=1, mode="constant", cval=np.nan)


def fill_nearest(grid: np.ndarray) -> np.ndarray:
    """Fill NaN cells with the value of the nearest finite cell.

    Parameters
    ----------
    grid : ndarray (ny, nx)
        Values with NaN gaps (not all NaN).

    Returns
    -------
    ndarray (ny, nx)
        ``grid`` itself when it has no NaN, else a filled copy.

    >>> fill_nearest(np.array([[1.0, np.nan, np.nan, 4.0]])).tolist()
    [[1.0, 1.0, 4.0, 4.0]]
    """
    from scipy.ndimage import distance_transform_edt

    bad = ~np.isfinite(grid)
    if not bad.any():
        return grid
    idx = distance_transform_edt(bad, return_distances=False, return_indices=True)
    return grid[tuple(idx)]


def nice_step(value: float) -> float:
    """Return the largest 1-2-5 step (1, 2, 5 x 10^k) not above ``value``.

    Parameters
    ----------
    value : float
        A length (m) or interval, > 0; a step within 1e-12 (relative) above
        ``value`` still counts as not above it.

    Returns
    -------
    float
        The step, computed as ``m * 10.0**k`` (within one unit in the last
        place of its decimal value).

    Raises
    ------
    GridError
        ``value`` is not positive and finite.

    >>> [nice_step(v) for v in (0.7, 1.0, 3.3, 7.9, 12.0, 260.0)]
    [0.5, 1.0, 2.0, 5.0, 10.0, 200.0]
    """
    if not (value > 0 and math.isfinite(value)):
        raise GridError(
            f"a 1-2-5 step needs a positive finite value, got {value!r}; for a cell size set a positive "
            "[processing] cell_size_m or leave it unset to choose it from the data spacing"
        )
    e = math.floor(math.log10(value))
    base = 10.0**e
    for m in (5.0, 2.0, 1.0):
        if m * base <= value * (1 + 1e-12):
            return float(m * base)
    return float(base / 2)  # pragma: no cover - log10 rounding guard


def next_nice_step(value: float) -> float:
    """Return the next 1-2-5 step above ``value``, itself a step.

    Parameters
    ----------
    value : float
        A 1-2-5 step (e.g. from :func:`nice_step`), > 0.

    Returns
    -------
    float
        2, 5 or 10 x 10^k after 1, 2 or 5 x 10^k.

    Raises
    ------
    GridError
        ``value`` is not positive and finite.

    >>> [next_nice_step(v) for v in (0.5, 1.0, 2.0, 50.0)]
    [1.0, 2.0, 5.0, 100.0]
    """
    if not (value > 0 and math.isfinite(value)):
        raise GridError(f"the next 1-2-5 step needs a positive finite step, got {value!r}; give 1, 2 or 5 x 10^k")
    e = math.floor(math.log10(value) + 1e-12)
    m = round(value / 10.0**e)
    return float({1: 2, 2: 5, 5: 10}.get(m, 10) * 10.0**e)


@dataclass(frozen=True)
class GridSpec:
    """A regular north-up grid of square cells.

    Row 0 is the northernmost row, column 0 the westernmost column (GeoTIFF
    order). ``x0, y0`` is the centre of the first cell (row 0, column 0).

    Parameters
    ----------
    x0, y0 : float
        Easting and northing (m) of the centre of the north-west cell.
    cell_size_m : float
        Cell side (m), > 0.
    nx, ny : int
        Number of columns (west to east) and rows (north to south), >= 1.

    >>> g = GridSpec(x0=0.5, y0=9.5, cell_size_m=1.0, nx=4, ny=10)
    >>> g.shape, g.x_centres[:2].tolist(), g.y_centres[:2].tolist()
    ((10, 4), [0.5, 1.5], [9.5, 8.5])
    >>> g.bounds  # west, east, south, north of the cell edges
    (0.0, 4.0, 0.0, 10.0)
    """

    x0: float
    y0: float
    cell_size_m: float
    nx: int
    ny: int

    def __post_init__(self) -> None:
        """Check the fields; store ``nx, ny`` as int and the rest as float."""
        c = float(self.cell_size_m)
        if not (c > 0 and math.isfinite(c)):
            raise GridError(
                f"GridSpec cell_size_m must be positive and finite, got {self.cell_size_m!r}; "
                "set a positive [processing] cell_size_m (m) or leave it unset to choose it from the data"
            )
        for name in ("nx", "ny"):
            v = getattr(self, name)
            if int(v) != v or int(v) < 1:
                raise GridError(
                    f"GridSpec {name} must be a positive integer, got {v!r}; a grid has at least one column and one row"
                )
            object.__setattr__(self, name, int(v))
        for name in ("x0", "y0"):
            if not math.isfinite(float(getattr(self, name))):
                raise GridError(
                    f"GridSpec {name} must be finite, got {getattr(self, name)!r}; give the easting and "
                    "northing (m) of the centre of the north-west cell"
                )
            object.__setattr__(self, name, float(getattr(self, name)))
        object.__setattr__(self, "cell_size_m", c)

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx), the shape of grid arrays (rows north to south)."""
        return (self.ny, self.nx)

    @property
    def size(self) -> int:
        """Number of cells."""
        return self.nx * self.ny

    @property
    def x_centres(self) -> np.ndarray:
        """Cell-centre eastings (m) of the columns, west to east, shape (nx,)."""
        return self.x0 + self.cell_size_m * np.arange(self.nx)

    @property
    def y_centres(self) -> np.ndarray:
        """Cell-centre northings (m) of the rows, north to south, shape (ny,)."""
        return self.y0 - self.cell_size_m * np.arange(self.ny)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(west, east, south, north) of the outer cell edges (m)."""
        h = self.cell_size_m / 2
        return (
            self.x0 - h,
            self.x0 + (self.nx - 1) * self.cell_size_m + h,
            self.y0 - (self.ny - 1) * self.cell_size_m - h,
            self.y0 + h,
        )

    @property
    def geotransform(self) -> tuple[float, float, float, float, float, float]:
        """GDAL-style affine (west, cell, 0, north, 0, -cell) of the north-up grid."""
        w, _, _, n = self.bounds
        return (w, self.cell_size_m, 0.0, n, 0.0, -self.cell_size_m)

    def coords(self) -> tuple[np.ndarray, np.ndarray]:
        """Return the cell-centre coordinates as two (ny, nx) arrays.

        Returns
        -------
        x, y : ndarray (ny, nx)
            Easting and northing (m) of every cell centre, row 0 north.
        """
        gx, gy = np.meshgrid(self.x_centres, self.y_centres)
        return gx, gy

    @classmethod
    def from_data(
        cls,
        x: ArrayLike,
        y: ArrayLike,
        cell_size_m: Optional[float] = None,
        pad_m: Optional[float] = None,
        max_cells: int = 16_000_000,
    ) -> GridSpec:
        """Make a grid covering the data bounds plus a margin, with a round cell size.

        The default cell size is half the median nearest-neighbour distance of the
        data, rounded *down* to a 1-2-5 step (so the grid resolves the data
        spacing). The default margin is 5 % of the larger side of the data
        bounds. Cell edges are snapped to multiples of the cell size.

        Parameters
        ----------
        x, y : array_like
            Data eastings and northings (m).
        cell_size_m : float, optional
            Cell size (m); default from the data spacing as above.
        pad_m : float, optional
            Margin added on every side of the data bounds (m), >= 0.
        max_cells : int
            If the default cell size gives more cells, the next larger 1-2-5
            step is taken (with a warning); a given ``cell_size_m`` that needs
            more is refused.

        Returns
        -------
        GridSpec
            The grid; its cell edges are multiples of the cell size.

        Raises
        ------
        GridError
            No data, unequal lengths, NaN coordinates, a bad cell size or margin,
            no cell size to be had from the data, or a given cell size needing
            more than ``max_cells`` cells.

        Warns
        -----
        RockheadWarning
            The default cell size was enlarged to stay within ``max_cells``.

        >>> g = GridSpec.from_data([0, 10, 0, 10], [0, 0, 10, 10], pad_m=0)
        >>> g.cell_size_m, g.shape, g.bounds
        (5.0, (2, 2), (0.0, 10.0, 0.0, 10.0))
        """
        xa = np.asarray(x, dtype=float).ravel()
        ya = np.asarray(y, dtype=float).ravel()
        if xa.shape != ya.shape or xa.size == 0:
            raise GridError(
                f"x and y must be non-empty and of equal length, got {xa.shape} and {ya.shape}; "
                "give one easting and one northing per point"
            )
        if not (np.all(np.isfinite(xa)) and np.all(np.isfinite(ya))):
            bad = int(np.flatnonzero(~(np.isfinite(xa) & np.isfinite(ya)))[0])
            raise GridError(
                f"x and y contain NaN or infinite values (first at index {bad}: x={float(xa[bad])!r}, "
                f"y={float(ya[bad])!r}); drop those points first"
            )
        xmin, xmax, ymin, ymax = xa.min(), xa.max(), ya.min(), ya.max()
        auto = cell_size_m is None
        if cell_size_m is None:
            xy = np.column_stack([xa, ya])
            tree = cKDTree(xy)
            sample = xy
            if len(xy) > 100_000:
                sample = xy[np.random.default_rng(0).choice(len(xy), 100_000, replace=False)]
            if len(xy) < 2:
                nn = 0.0
            else:
                d, _ = tree.query(sample, k=2, workers=-1)
                nn = float(np.median(d[:, 1]))
            if not nn > 0:
                raise GridError(
                    f"cannot choose a cell size from the data: the median distance to the nearest other "
                    f"point is {nn!r} m (fewer than two distinct points, or most points duplicated); "
                    "set [processing] cell_size_m"
                )
            cell = nice_step(nn / 2)
        else:
            cell = float(cell_size_m)
            if not (cell > 0 and math.isfinite(cell)):
                raise GridError(
                    f"cell_size_m must be positive and finite, got {cell_size_m!r}; set a positive "
                    "[processing] cell_size_m (m) or leave it unset to choose it from the data"
                )
        if pad_m is None:
            pad_m = 0.05 * max(xmax - xmin, ymax - ymin)
        pad_m = float(pad_m)
        if not (pad_m >= 0 and math.isfinite(pad_m)):
            raise GridError(f"pad_m must be >= 0 and finite (m), got {pad_m!r}; give the margin around the data")
        while True:
            west = math.floor((xmin - pad_m) / cell) * cell
            east = math.ceil((xmax + pad_m) / cell) * cell
            south = math.floor((ymin - pad_m) / cell) * cell
            north = math.ceil((ymax + pad_m) / cell) * cell
            nx = max(1, round((east - west) / cell))
            ny = max(1, round((north - south) / cell))
            if nx * ny <= max_cells:
                break
            if not auto:
                least = math.sqrt((east - west) * (north - south) / max_cells)
                step = nice_step(least)
                step = step if step >= least else next_nice_step(step)
                raise GridError(
                    f"a {cell:g} m cell over the {east - west:g} m x {north - south:g} m extent of the data "
                    f"needs {nx * ny:,} cells, more than {max_cells:,}; give a larger cell size "
                    f"({step:g} m or more)"
                )
            new = next_nice_step(cell)
            warnings.warn(
                f"a {cell:g} m cell would need {nx * ny} cells (> {max_cells}); using {new:g} m cells. "
                "Give cell_size_m to choose yourself.",
                RockheadWarning,
                stacklevel=2,
            )
            cell = new
        return cls(x0=west + cell / 2, y0=north - cell / 2, cell_size_m=cell, nx=nx, ny=ny)
