"""Ground elevation model: z(x, y) from a DEM raster or from the surveyed stations.

Depth below ground is ground elevation minus reflector elevation, so every
map product needs the ground surface at arbitrary points of the working CRS.

From a DEM
    Bilinear interpolation between the DEM's cell centres (exact for any
    function linear in x and in y, such as a plane). Points within the outer
    half cell of the DEM take the value of the nearest edge cell row/column;
    points outside the DEM, or next to an empty (nodata) cell, get NaN. A DEM in
    another CRS is sampled by transforming the query points into the DEM's CRS
    with pyproj (point by point, no resampling of the DEM). Heights are taken as
    they are: the DEM and the survey must share the vertical datum.

From stations
    Linear interpolation on the Delaunay triangulation of the stations inside
    their convex hull (scipy's ``LinearNDInterpolator``; exact at the stations
    and for a planar ground) and, outside it, the elevation of the nearest
    point of the hull's outline (linear between the outline's two stations):
    a flat extension, never an extrapolated slope, continuous at the outline.
    Stations on one straight line (a single seismic line) are interpolated
    along the line and extended flat across and beyond it. Stations at the
    same position are averaged.

Where the ground is known (:meth:`GroundModel.sigma_m`)
    A DEM is taken as exact where it has a value. Stations give the ground
    inside their convex hull (their line, for one straight line); outside it
    the flat extension is off by up to the distance times the ground's slope,
    so the ground there carries a standard deviation of the distance beyond
    the hull times the steepest slope measured between the stations (a
    stated assumption: the ground beyond is no steeper), and beyond a buffer
    the ground, and so the depth, is unknown (NaN).
"""

from __future__ import annotations

import os
import warnings
from pathlib import Path
from typing import Callable, Optional, Union, cast

import numpy as np
import pyproj
from numpy.typing import ArrayLike

from ..crs import parse_crs
from ..errors import GeoreferenceError, InputFileError, RockheadWarning
from ..formats.gdalio import Raster, read_raster

__all__ = ["GroundModel"]


class _LinearTin:
    """Piecewise-linear interpolation on a Delaunay triangulation (2-D).

    The interpolant of scipy's ``LinearNDInterpolator`` (barycentric weights
    on the triangle holding the point) with the point location done here by a
    visibility walk (Lawson 1977), vectorised over all query points: start in
    the triangle with the nearest centroid (KD-tree) and step across the edge
    facing the most negative barycentric coordinate until inside (or out of
    the hull: NaN). On a Delaunay triangulation the walk terminates. This
    avoids scipy's per-simplex LAPACK set-up, which can take seconds when BLAS
    threads compete on a busy machine.

    [Lawson 1977] Lawson, C. L. (1977). Software for C1 surface interpolation.
        In Mathematical Software III, Academic Press, 161-194.
    """

    def __init__(self, xy, z):
        from scipy.spatial import Delaunay, cKDTree

        self.tri = Delaunay(xy)
        self.z = np.asarray(z, float)
        v = xy[self.tri.simplices]  # (t, 3, 2)
        self.a = v[:, 0]
        self.e1 = v[:, 1] - v[:, 0]
        self.e2 = v[:, 2] - v[:, 0]
        det = self.e1[:, 0] * self.e2[:, 1] - self.e1[:, 1] * self.e2[:, 0]
        self.det = np.where(det != 0, det, 1e-300)
        self.tree = cKDTree(v.mean(axis=1))

    def barycentric(self, q, t):
        r = q - self.a[t]
        e1, e2, det = self.e1[t], self.e2[t], self.det[t]
        l1 = (r[:, 0] * e2[:, 1] - r[:, 1] * e2[:, 0]) / det
        l2 = (e1[:, 0] * r[:, 1] - e1[:, 1] * r[:, 0]) / det
        return np.column_stack([1.0 - l1 - l2, l1, l2])

    def __call__(self, q):
        out = np.full(len(q), np.nan)
        if len(q) == 0:
            return out
        cur = self.tree.query(q, k=1)[1]
        todo = np.arange(len(q))
        limit = 100 + 10 * int(np.sqrt(len(self.det)))
        for _ in range(limit):
            lam = self.barycentric(q[todo], cur)
            worst = np.argmin(lam, axis=1)
            inside = lam[np.arange(len(todo)), worst] >= -1e-10
            if inside.any():
                t = cur[inside]
                out[todo[inside]] = np.sum(lam[inside] * self.z[self.tri.simplices[t]], axis=1)
            nxt = self.tri.neighbors[cur[~inside], worst[~inside]]
            keep = nxt >= 0  # -1: the point is outside the hull
            todo = todo[~inside][keep]
            cur = nxt[keep]
            if len(todo) == 0:
                break
        return out


class GroundModel:
    """Ground elevation (m) at points of the working CRS.

    Build it with :meth:`from_raster`, :meth:`from_dem` or :meth:`from_stations`;
    call it (or :meth:`ground`) with easting and northing arrays.

    Attributes
    ----------
    source_ : str
        ``"dem"`` or ``"stations"``.
    description_ : str
        One line for the report (file name, CRS, number of stations).
    """

    def __init__(
        self,
        sampler: Callable[[np.ndarray, np.ndarray], np.ndarray],
        source: str,
        description: str,
        extent: Optional[tuple[float, float, float, float]] = None,
    ):
        self._sampler = sampler
        self.source_ = source
        self.description_ = description
        self._extent = extent  # (xmin, xmax, ymin, ymax) in the sampler's CRS, DEM only
        self._to_dem: Optional[pyproj.Transformer] = None
        self._outside: Optional[Callable[[np.ndarray, np.ndarray], np.ndarray]] = None  # stations only
        self.slope_bound_ = 0.0
        self._recipe: Optional[tuple] = None  # (builder, arguments) that make this model again (pickling)

    def __reduce__(self):
        """Pickle as the recipe that built the model (its samplers are closures); the model is built again.

        Raises
        ------
        TypeError
            A model made from a sampler directly, not by one of the ``from_*`` builders.
        """
        if self._recipe is None:
            raise TypeError("a GroundModel made from a sampler directly cannot be pickled")
        return (_rebuild, self._recipe)

    # ---------------------------------------------------------------- DEM
    @classmethod
    def from_raster(
        cls,
        path: Union[str, Path],
        working_crs: Optional[Union[str, int, pyproj.CRS]] = None,
        *,
        band: int = 1,
        engine: Optional[str] = None,
    ) -> GroundModel:
        """Build the ground model from a DEM file (any format GDAL reads).

        Parameters
        ----------
        path : str or Path
            The DEM file (heights in m, on the survey's vertical datum).
        working_crs : str, int or pyproj.CRS, optional
            The survey's working CRS; a DEM in another CRS is sampled through
            a transformation.
        band : int
            1-based band of the heights.
        engine : {None, "osgeo", "pypi"}
            The way to GDAL, as in :func:`core.formats.gdalio.read_raster`.

        Returns
        -------
        GroundModel
            Bilinear in the DEM's cells (see the module notes).

        Raises
        ------
        InputFileError
            A DEM under 2 x 2 cells or without any valid cell (or unreadable).
        GeoreferenceError
            An unknown working CRS or no transformation to the DEM's CRS.
        """
        raster = read_raster(path, band, engine_name=engine)
        return cls.from_dem(raster, working_crs, name=os.path.basename(os.fspath(path)))

    @classmethod
    def from_dem(
        cls, raster: Raster, working_crs: Optional[Union[str, int, pyproj.CRS]] = None, *, name: str = "DEM"
    ) -> GroundModel:
        """Build the ground model from a DEM already in memory.

        Parameters
        ----------
        raster : core.formats.gdalio.Raster
            The DEM (heights in m; NaN for nodata).
        working_crs : str, int or pyproj.CRS, optional
            The survey's working CRS, as in :meth:`from_raster`.
        name : str
            The DEM's name in messages and the description.

        Returns
        -------
        GroundModel

        Raises
        ------
        InputFileError
            A DEM under 2 x 2 cells or without any valid cell.
        GeoreferenceError
            An unknown working CRS or no transformation to the DEM's CRS.
        """
        from scipy.interpolate import RegularGridInterpolator

        values = np.asarray(raster.values, dtype=float)
        ny, nx = values.shape
        if ny < 2 or nx < 2:
            raise InputFileError(name, None, None, f"DEM has {ny} x {nx} cells; at least 2 x 2 are needed")
        if not np.any(np.isfinite(values)):
            raise InputFileError(name, None, None, "DEM has no valid cell (all nodata)")
        recipe = ("dem", (raster, working_crs, name))
        x = raster.x_centres
        y = raster.y_centres
        if x[1] < x[0]:
            x, values = x[::-1], values[:, ::-1]
        if y[1] < y[0]:
            y, values = y[::-1], values[::-1]
        interp = RegularGridInterpolator((y, x), values, method="linear", bounds_error=False, fill_value=np.nan)
        hx, hy = abs(raster.dx) / 2, abs(raster.dy) / 2
        extent = (x[0] - hx, x[-1] + hx, y[0] - hy, y[-1] + hy)

        def sample(px, py):
            inside = (px >= extent[0]) & (px <= extent[1]) & (py >= extent[2]) & (py <= extent[3])
            qx = np.clip(px, x[0], x[-1])  # outer half cell: value of the edge row/column
            qy = np.clip(py, y[0], y[-1])
            z = interp(np.column_stack([qy.ravel(), qx.ravel()])).reshape(px.shape)
            return np.where(inside, z, np.nan)

        model = cls(sample, "dem", "", extent)
        dem_crs = cast(Optional[pyproj.CRS], raster.crs)
        work = None if working_crs is None else parse_crs(working_crs)
        crs_note = dem_crs.name if dem_crs is not None else "no CRS"
        if work is not None and dem_crs is None:
            warnings.warn(
                f"{name} declares no CRS; it is taken to be in the working CRS '{work.name}'",
                RockheadWarning,
                stacklevel=2,
            )
        elif work is not None and dem_crs is not None and not dem_crs.equals(work, ignore_axis_order=True):
            try:
                model._to_dem = pyproj.Transformer.from_crs(work, dem_crs, always_xy=True)
            except pyproj.exceptions.ProjError as exc:
                raise GeoreferenceError(
                    f"cannot transform from the working CRS '{work.name}' to the CRS of {name} '{dem_crs.name}': {exc}"
                ) from exc
            crs_note += f", sampled through a transformation from '{work.name}'"
        cells = f"{nx} x {ny} cells of {abs(raster.dx):g} x {abs(raster.dy):g}"
        model.description_ = f"{name} ({cells}, {crs_note})"
        model._recipe = recipe
        return model

    # ----------------------------------------------------------- stations
    @classmethod
    def from_stations(cls, x_m: ArrayLike, y_m: ArrayLike, z_m: ArrayLike) -> GroundModel:
        """Build the ground model from surveyed stations (see the module notes).

        Parameters
        ----------
        x_m, y_m : array_like
            Station easting and northing in the working CRS (m).
        z_m : array_like
            Ground elevation at the stations (m).

        Returns
        -------
        GroundModel
            Linear on the stations' triangulation, flat beyond it.

        Raises
        ------
        GeoreferenceError
            Arrays of different lengths, or no station with finite x, y and z.
        """
        x = np.asarray(x_m, dtype=float).ravel()
        y = np.asarray(y_m, dtype=float).ravel()
        z = np.asarray(z_m, dtype=float).ravel()
        model = cls._stations_model(x, y, z)
        model._recipe = ("stations", (x, y, z))
        return model

    @classmethod
    def _stations_model(cls, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> GroundModel:
        from scipy.spatial import QhullError, cKDTree

        if not (len(x) == len(y) == len(z)):
            raise GeoreferenceError(f"station arrays differ in length: x {len(x)}, y {len(y)}, z {len(z)}")
        ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(z)
        if not np.any(ok):
            raise GeoreferenceError("no station has a finite x, y and z; check the stations file")
        xy, inverse = np.unique(np.column_stack([x[ok], y[ok]]), axis=0, return_inverse=True)
        inverse = np.asarray(inverse).ravel()
        zs = np.bincount(inverse, weights=z[ok]) / np.bincount(inverse)
        n = len(xy)
        note = f"{n} station positions"
        if n == 1:
            z0 = float(zs[0])
            model = cls(lambda px, py: np.full(px.shape, z0), "stations", note + " (flat)")
            model._outside = lambda px, py: np.hypot(px - xy[0, 0], py - xy[0, 1])
            return model
        centre = xy.mean(axis=0)
        _, s, vt = np.linalg.svd(xy - centre, full_matrices=False)
        # one straight line of stations: interpolate along it, flat across and beyond it
        u = vt[0]
        t = (xy - centre) @ u
        order = np.argsort(t)
        t, zline = t[order], zs[order]

        def along(px, py):
            tq = (px - centre[0]) * u[0] + (py - centre[1]) * u[1]
            return np.interp(tq, t, zline)

        def on_line():
            model = cls(along, "stations", note + " on one straight line")
            ends = centre + np.outer([t[0], t[-1]], u)
            model._outside = lambda px, py: _segment_distance(px, py, ends[0], ends[1])
            dt = np.diff(t)
            keep = dt > 1e-6
            model.slope_bound_ = float(np.max(np.abs(np.diff(zline))[keep] / dt[keep])) if keep.any() else 0.0
            return model

        if n == 2 or s[1] <= 1e-9 * s[0]:
            return on_line()
        try:
            linear = _LinearTin(xy - centre, zs)
        except QhullError:  # nearly collinear stations that pass the test above
            return on_line()
        nearest = cKDTree(xy - centre)
        hull = _Hull(xy)

        def sample(px, py):
            q = np.column_stack([px.ravel() - centre[0], py.ravel() - centre[1]])
            z = linear(q)
            out = ~np.isfinite(z)
            if np.any(out):
                _, bx, by = hull.nearest(px.ravel()[out], py.ravel()[out])
                # the triangulation's value at the outline's nearest point (on an edge: the walk's
                # tolerance takes it in; should rounding leave it out, the nearest station's value)
                zb = linear(np.column_stack([bx - centre[0], by - centre[1]]))
                miss = ~np.isfinite(zb)
                if np.any(miss):
                    zb[miss] = zs[nearest.query(q[out][miss])[1]]
                z[out] = zb
            return z.reshape(px.shape)

        model = cls(sample, "stations", note)
        model._outside = hull.distance
        model.slope_bound_ = _steepest_slope(xy, zs, nearest)
        return model

    # ------------------------------------------------------------ queries
    def ground(self, x_m: ArrayLike, y_m: ArrayLike) -> np.ndarray:
        """Return the ground elevation at points of the working CRS.

        Parameters
        ----------
        x_m, y_m : float or array_like
            Easting and northing (m), broadcast together.

        Returns
        -------
        ndarray
            Ground elevation (m); NaN off a DEM or next to its nodata cells.
        """
        px, py = np.broadcast_arrays(np.asarray(x_m, dtype=float), np.asarray(y_m, dtype=float))
        if self._to_dem is not None:
            px, py = self._to_dem.transform(px, py)
            px, py = np.asarray(px, dtype=float), np.asarray(py, dtype=float)
        return np.asarray(self._sampler(px, py), dtype=float)

    __call__ = ground

    def outside_distance_m(self, x_m: ArrayLike, y_m: ArrayLike) -> np.ndarray:
        """Distance (m) of points beyond the ground's data: 0 on a DEM's cells or inside the stations' hull.

        Parameters
        ----------
        x_m, y_m : float or array_like
            Easting and northing (m), broadcast together.

        Returns
        -------
        ndarray
            0 where the ground is data; for stations, the distance to their
            convex hull (to their line, for one straight line); inf off a DEM.
        """
        px, py = np.broadcast_arrays(np.asarray(x_m, dtype=float), np.asarray(y_m, dtype=float))
        if self._outside is None:
            return np.where(np.isfinite(self.ground(px, py)), 0.0, np.inf)
        return np.asarray(self._outside(px, py), dtype=float)

    def sigma_m(self, x_m: ArrayLike, y_m: ArrayLike, buffer_m: float) -> np.ndarray:
        """Standard deviation (m) of the ground elevation, NaN where the ground is unknown.

        0 on a DEM's cells and inside the stations' hull; within ``buffer_m``
        beyond the hull the distance times :attr:`slope_bound_` (the flat
        extension's largest error if the ground beyond is no steeper than
        the steepest slope between the stations); NaN farther out and off a
        DEM.

        Parameters
        ----------
        x_m, y_m : float or array_like
            Easting and northing (m), broadcast together.
        buffer_m : float
            How far beyond the stations the ground is extended (m, >= 0).

        Returns
        -------
        ndarray
            Ground standard deviation (m), NaN where unknown.

        Examples
        --------
        >>> g = GroundModel.from_stations([0, 10, 0, 10], [0, 0, 10, 10], [0, 1, 0, 1])
        >>> g.sigma_m([5.0, 14.0, 30.0], [5.0, 5.0, 5.0], 10.0).tolist()
        [0.0, 0.4, nan]
        """
        d = self.outside_distance_m(x_m, y_m)
        return np.where(d <= buffer_m, d * self.slope_bound_, np.nan)

    def check_covers(self, x_m: ArrayLike, y_m: ArrayLike, what: str = "points") -> None:
        """Check that every point has a ground elevation.

        Parameters
        ----------
        x_m, y_m : float or array_like
            Easting and northing (m).
        what : str
            What the points are, for the message.

        Raises
        ------
        GeoreferenceError
            Naming how many points have none and the first of them.
        """
        z = self.ground(x_m, y_m)
        bad = ~np.isfinite(z)
        if np.any(bad):
            xs = np.broadcast_to(np.asarray(x_m, dtype=float), z.shape)[bad]
            ys = np.broadcast_to(np.asarray(y_m, dtype=float), z.shape)[bad]
            raise GeoreferenceError(
                f"{np.count_nonzero(bad)} of {z.size} {what} have no ground elevation in "
                f"{self.description_} (first at x={xs[0]:.2f}, y={ys[0]:.2f}); use a DEM that covers "
                "the survey or leave it out to use the station elevations"
            )

    def __repr__(self) -> str:
        """Return the source and description."""
        return f"GroundModel({self.source_}: {self.description_})"


def _rebuild(kind: str, args: tuple) -> GroundModel:
    """The ground model a recipe of :meth:`GroundModel.__reduce__` describes, built again (warnings said once)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if kind == "dem":
            raster, working_crs, name = args
            return GroundModel.from_dem(raster, working_crs, name=name)
        return GroundModel.from_stations(*args)


def _segment_distance(px: np.ndarray, py: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Distance (m) of points from the segment a-b."""
    ab = b - a
    length2 = float(ab @ ab)
    t = ((px - a[0]) * ab[0] + (py - a[1]) * ab[1]) / length2 if length2 > 0 else np.zeros(np.shape(px))
    t = np.clip(t, 0.0, 1.0)
    return np.hypot(px - a[0] - t * ab[0], py - a[1] - t * ab[1])


class _Hull:
    """The stations' convex hull: distance to it and the nearest point of its outline."""

    def __init__(self, xy: np.ndarray):
        from scipy.spatial import ConvexHull

        hull = ConvexHull(xy)
        self.eq = hull.equations  # outward normals: n . p + offset <= 0 inside
        self.a = xy[hull.vertices]
        self.b = np.roll(self.a, -1, axis=0)

    def nearest(self, px: np.ndarray, py: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Distance (m) to the outline and the nearest point of it (x, y in m), per point."""
        x = np.asarray(px, float).ravel()
        y = np.asarray(py, float).ravel()
        ab = self.b - self.a  # (k, 2)
        length2 = np.maximum(np.sum(ab * ab, axis=1), 1e-300)
        t = (x[:, None] - self.a[None, :, 0]) * ab[None, :, 0] + (y[:, None] - self.a[None, :, 1]) * ab[None, :, 1]
        t = np.clip(t / length2[None, :], 0.0, 1.0)
        d = np.hypot(
            x[:, None] - self.a[None, :, 0] - t * ab[None, :, 0], y[:, None] - self.a[None, :, 1] - t * ab[None, :, 1]
        )
        k = np.argmin(d, axis=1)
        rows = np.arange(len(x))
        tk = t[rows, k]
        return d[rows, k], self.a[k, 0] + tk * ab[k, 0], self.a[k, 1] + tk * ab[k, 1]

    def distance(self, px: np.ndarray, py: np.ndarray) -> np.ndarray:
        """Distance (m) to the hull, 0 inside (shape of the inputs)."""
        x = np.asarray(px, float)
        y = np.asarray(py, float)
        fx, fy = x.ravel(), y.ravel()
        out = np.max(
            fx[:, None] * self.eq[None, :, 0] + fy[:, None] * self.eq[None, :, 1] + self.eq[None, :, 2], axis=1
        )
        d = np.zeros(fx.shape)
        far = out > 0
        if far.any():
            d[far] = self.nearest(fx[far], fy[far])[0]
        return d.reshape(x.shape)


def _steepest_slope(xy: np.ndarray, z: np.ndarray, tree, k: int = 12) -> float:
    """Steepest ground slope (m/m) of planes fitted to each station's k nearest stations.

    Neighbourhoods spread along one direction only (a line's stations: second
    singular value under a quarter of the first) give their slope along it.
    """
    k = min(k, len(xy))
    _, idx = tree.query(xy - xy.mean(axis=0), k=k)
    P = xy[idx] - xy[idx].mean(axis=1, keepdims=True)  # (n, k, 2)
    dz = z[idx] - z[idx].mean(axis=1, keepdims=True)
    _, sv, vt = np.linalg.svd(P, full_matrices=False)
    planar = sv[:, 1] > 0.25 * sv[:, 0]
    slope = np.zeros(len(xy))
    if planar.any():
        A = P[planar]
        g = np.linalg.solve(np.einsum("nki,nkj->nij", A, A), np.einsum("nki,nk->ni", A, dz[planar])[..., None])[..., 0]
        slope[planar] = np.hypot(g[:, 0], g[:, 1])
    lin = ~planar
    if lin.any():
        t = np.einsum("nki,ni->nk", P[lin], vt[lin, 0])
        slope[lin] = np.abs(np.sum(t * dz[lin], axis=1) / np.maximum(np.sum(t * t, axis=1), 1e-12))
    return float(np.max(slope))
