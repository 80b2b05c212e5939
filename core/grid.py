"""The output grid and sampling helpers (north-up: row 0 is the northern row)."""

from __future__ import annotations

import numpy as np

__all__ = ["bilinear", "fill_nearest", "nice_step"]


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


def nice_step(value):
    """Largest 1-2-5 step not above ``value``."""
    e = 10.0 ** np.floor(np.log10(value))
    return float(max(m * e for m in (1, 2, 5) if m * e <= value))
