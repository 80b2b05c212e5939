"""The output grid and sampling helpers (north-up: row 0 is the northern row)."""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from .errors import RockheadWarning

__all__ = ["GridSpec", "bilinear", "fill_nearest", "next_nice_step", "nice_step"]


def bilinear(spec, grid, x_m, y_m):
    """Bilinear sample of a north-up grid (NaN outside or next to NaN cells)."""
    from scipy.ndimage import map_coordinates

    col = (np.asarray(x_m, float) - spec.x0) / spec.cell_size_m
    row = (spec.y0 - np.asarray(y_m, float)) / spec.cell_size_m
    return map_coordinates(np.asarray(grid, float), [row, col], order=1, mode="constant", cval=np.nan)


def fill_nearest(grid):
    """Fill NaN cells with the value of the nearest finite cell."""
    from scipy.ndimage import distance_transform_edt

    bad = ~np.isfinite(grid)
    if not bad.any():
        return grid
    idx = distance_transform_edt(bad, return_distances=False, return_indices=True)
    return grid[tuple(idx)]


def nice_step(value: float) -> float:
    """Largest 1-2-5 step (1, 2, 5 x 10^k) not above ``value``.

    >>> [nice_step(v) for v in (0.7, 1.0, 3.3, 7.9, 12.0, 260.0)]
    [0.5, 1.0, 2.0, 5.0, 10.0, 200.0]
    """
    if not (value > 0 and math.isfinite(value)):
        raise ValueError(f"cell size must be a positive finite number, got {value!r}")
    e = math.floor(math.log10(value))
    base = 10.0**e
    for m in (5.0, 2.0, 1.0):
        if m * base <= value * (1 + 1e-12):
            return float(m * base)
    return float(base / 2)  # pragma: no cover - log10 rounding guard


def next_nice_step(value: float) -> float:
    """Next 1-2-5 step above ``value`` (which is itself a step)."""
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

    def __post_init__(self):
        c = float(self.cell_size_m)
        if not (c > 0 and math.isfinite(c)):
            raise ValueError(f"GridSpec cell_size_m must be positive and finite, got {self.cell_size_m!r}")
        for name in ("nx", "ny"):
            v = getattr(self, name)
            if int(v) != v or int(v) < 1:
                raise ValueError(f"GridSpec {name} must be a positive integer, got {v!r}")
            object.__setattr__(self, name, int(v))
        for name in ("x0", "y0"):
            if not math.isfinite(float(getattr(self, name))):
                raise ValueError(f"GridSpec {name} must be finite, got {getattr(self, name)!r}")
            object.__setattr__(self, name, float(getattr(self, name)))
        object.__setattr__(self, "cell_size_m", c)

    @property
    def shape(self) -> tuple:
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
    def bounds(self) -> tuple:
        """(west, east, south, north) of the outer cell edges (m)."""
        h = self.cell_size_m / 2
        return (
            self.x0 - h,
            self.x0 + (self.nx - 1) * self.cell_size_m + h,
            self.y0 - (self.ny - 1) * self.cell_size_m - h,
            self.y0 + h,
        )

    @property
    def geotransform(self) -> tuple:
        """GDAL-style affine (west, cell, 0, north, 0, -cell) of the north-up grid."""
        w, _, _, n = self.bounds
        return (w, self.cell_size_m, 0.0, n, 0.0, -self.cell_size_m)

    def coords(self) -> tuple:
        """Cell-centre coordinates as two (ny, nx) arrays (easting, northing)."""
        return np.meshgrid(self.x_centres, self.y_centres)

    @classmethod
    def from_data(cls, x, y, cell_size_m=None, pad_m=None, max_cells=16_000_000):
        """A grid covering the data bounds plus a margin, with a round cell size.

        The default cell size is half the median nearest-neighbour distance of the
        data, rounded *down* to a 1-2-5 step (so the grid resolves the data
        spacing). The default margin is 5 % of the larger side of the data
        bounds. Cell edges are snapped to multiples of the cell size.

        Parameters
        ----------
        x, y : array_like
            Data eastings and northings (m).
        cell_size_m : float, optional
            Cell size; default from the data spacing as above.
        pad_m : float, optional
            Margin added on every side of the data bounds (m).
        max_cells : int
            If the default cell size gives more cells, the next larger 1-2-5
            step is taken (with a warning). Ignored when ``cell_size_m`` is given.

        >>> g = GridSpec.from_data([0, 10, 0, 10], [0, 0, 10, 10], pad_m=0)
        >>> g.cell_size_m, g.shape, g.bounds
        (5.0, (2, 2), (0.0, 10.0, 0.0, 10.0))
        """
        x = np.asarray(x, dtype=float).ravel()
        y = np.asarray(y, dtype=float).ravel()
        if x.shape != y.shape or x.size == 0:
            raise ValueError(f"x and y must be non-empty and of equal length, got {x.shape} and {y.shape}")
        if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
            raise ValueError("x and y contain NaN or infinite values; drop those points first")
        xmin, xmax, ymin, ymax = x.min(), x.max(), y.min(), y.max()
        auto = cell_size_m is None
        if auto:
            xy = np.column_stack([x, y])
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
                raise ValueError(
                    "cannot choose a cell size from the data (fewer than two distinct points, or most "
                    "points duplicated); give cell_size_m explicitly"
                )
            cell = nice_step(nn / 2)
        else:
            cell = float(cell_size_m)
            if not (cell > 0 and math.isfinite(cell)):
                raise ValueError(f"cell_size_m must be positive and finite, got {cell_size_m!r}")
        if pad_m is None:
            pad_m = 0.05 * max(xmax - xmin, ymax - ymin)
        pad_m = float(pad_m)
        if not (pad_m >= 0 and math.isfinite(pad_m)):
            raise ValueError(f"pad_m must be >= 0, got {pad_m!r}")
        while True:
            west = math.floor((xmin - pad_m) / cell) * cell
            east = math.ceil((xmax + pad_m) / cell) * cell
            south = math.floor((ymin - pad_m) / cell) * cell
            north = math.ceil((ymax + pad_m) / cell) * cell
            nx = max(1, round((east - west) / cell))
            ny = max(1, round((north - south) / cell))
            if not auto or nx * ny <= max_cells:
                break
            new = next_nice_step(cell)
            warnings.warn(
                f"a {cell:g} m cell would need {nx * ny} cells (> {max_cells}); using {new:g} m cells. "
                "Give cell_size_m to choose yourself.",
                RockheadWarning,
                stacklevel=2,
            )
            cell = new
        return cls(x0=west + cell / 2, y0=north - cell / 2, cell_size_m=cell, nx=nx, ny=ny)
