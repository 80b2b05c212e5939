"""The corridor a single seismic line can map, and how to tell a single line.

A straight line sees only the along-line component of the reflector's
normal (Sheriff & Geldart 1995, ch. 4): the cross-line dip is unknown. A
surface gridded from the points of one line has no cross-line information
either: its plane trend across the line and the gradient a relocation would
read off it are set by the survey's scatter about the line, not by the
reflector. So a single line maps only a corridor along it, its trend varies
only along the line, and its points stay in the line's vertical plane.

References
----------
[Sheriff & Geldart 1995] Sheriff, R. E. & Geldart, L. P. (1995). Exploration
    Seismology, 2nd ed., Cambridge University Press, ch. 4.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

import numpy as np
from numpy.typing import ArrayLike

from ..errors import SurfaceError
from ..grid import GridSpec

__all__ = ["STRAIGHTNESS", "LineCorridor", "line_corridor"]

#: Points count as one straight line when their largest distance from their principal axis is at
#: most this fraction of their length along it (a 10 % bow).
STRAIGHTNESS = 0.1


@dataclass(frozen=True)
class LineCorridor:
    r"""A strip along a single seismic line: where its reflector points can be mapped.

    Attributes
    ----------
    points_xy : (n, 2) ndarray
        The reflector points along the line (m, working CRS).
    unit : (2,) ndarray
        Unit vector along the line (principal axis of the points).
    width_m : float
        Full width of the corridor (m): cells farther than ``width_m / 2``
        from every point are not mapped.
    cross_dip_deg : float
        The cross-line dip assumed possible (degrees): a cell at distance d
        from the line may differ from the line's value by
        :math:`d \tan\delta_c`, taken as one more standard deviation of its
        elevation (:meth:`cross_sigma_m`).
    """

    points_xy: np.ndarray
    unit: np.ndarray
    width_m: float
    cross_dip_deg: float = 10.0

    def distance_m(self, spec: GridSpec) -> np.ndarray:
        """(ny, nx) distance (m) of each cell centre of ``spec`` from the nearest point of the line."""
        from scipy.spatial import cKDTree

        X, Y = np.meshgrid(spec.x_centres, spec.y_centres)
        d, _ = cKDTree(self.points_xy).query(np.column_stack([X.ravel(), Y.ravel()]), k=1)
        return d.reshape(X.shape)

    def outside(self, spec: GridSpec) -> np.ndarray:
        """(ny, nx) bool: True for the cells of ``spec`` outside the corridor."""
        return self.distance_m(spec) > 0.5 * self.width_m

    def cross_sigma_m(self, spec: GridSpec) -> np.ndarray:
        """(ny, nx) elevation uncertainty (m) from the unknown cross-line dip: distance x tan(cross_dip_deg)."""
        return self.distance_m(spec) * np.tan(np.radians(self.cross_dip_deg))


def line_corridor(
    x_m: ArrayLike,
    y_m: ArrayLike,
    width_m: Optional[float],
    depth_m: Optional[ArrayLike] = None,
    cross_dip_deg: float = 10.0,
    line: Optional[ArrayLike] = None,
) -> Optional[LineCorridor]:
    """The corridor of the points when they lie along one straight line, else None.

    The points are one straight line when their largest distance from their
    principal axis is at most :data:`STRAIGHTNESS` times their extent along
    it (two lines, a crossing, an L-shaped line or parallel lines further
    apart than that carry cross-line information). Points of two or more
    lines (``line`` labels) count as one line only if the corridor holds
    them all: parallel lines of a long, narrow survey are far less than 10 %
    of its length apart, yet each lies well outside the others' corridor.

    Parameters
    ----------
    x_m, y_m : array_like (n,)
        Reflector points (m), finite.
    width_m : float or None
        Full corridor width (m); None: the median of ``depth_m`` (half the
        depth either side, about the first Fresnel zone of a shallow
        reflection at the frequencies of engineering surveys; from memory).
    depth_m : array_like (n,), optional
        Reflector depth below ground at the points (m), for the default width.
    cross_dip_deg : float
        Cross-line dip assumed possible (degrees), see :class:`LineCorridor`.
    line : array_like (n,), optional
        Line label of each point.

    Returns
    -------
    LineCorridor or None

    Raises
    ------
    SurfaceError
        No width given and no finite positive depth to take it from.

    Examples
    --------
    >>> c = line_corridor([0.0, 10.0, 20.0], [0.0, 0.1, 0.0], 8.0)
    >>> [round(float(v), 3) + 0.0 for v in c.unit], c.width_m
    ([1.0, 0.0], 8.0)
    >>> line_corridor([0.0, 10.0, 0.0], [0.0, 0.0, 10.0], 8.0) is None
    True

    Two parallel lines 1 km long and 60 m apart: within 10 % of the length of
    each other, but each 30 m from the axis, outside an 8 m corridor:

    >>> x = np.r_[np.arange(0.0, 1001.0, 10.0), np.arange(0.0, 1001.0, 10.0)]
    >>> y = np.r_[np.zeros(101), np.full(101, 60.0)]
    >>> line_corridor(x, y, 8.0, line=["A"] * 101 + ["B"] * 101) is None
    True
    """
    xy = np.column_stack([np.asarray(x_m, float), np.asarray(y_m, float)])
    if len(xy) < 2:
        return None
    centred = xy - xy.mean(axis=0)
    _, _, vt = np.linalg.svd(centred, full_matrices=False)
    unit = vt[0]
    along = centred @ unit
    across = centred @ np.array([-unit[1], unit[0]])
    extent = float(along.max() - along.min())
    if extent <= 0 or float(np.max(np.abs(across))) > STRAIGHTNESS * extent:
        return None
    if unit[0] < 0 or (unit[0] == 0 and unit[1] < 0):
        unit = -unit
    if width_m is None:
        d = np.asarray(depth_m if depth_m is not None else [], float)
        d = d[np.isfinite(d) & (d > 0)]
        if not len(d):
            raise SurfaceError(
                "the width of a single line's corridor needs the reflector depth, and no point has one; "
                "set [processing] line_corridor_m"
            )
        width_m = float(np.median(d))
    if line is not None and len(np.unique(np.asarray(line).astype(str))) > 1:
        if float(np.max(np.abs(across))) > 0.5 * float(width_m):
            return None
    return LineCorridor(xy, unit + 0.0, float(width_m), float(cross_dip_deg))
