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
    and for a planar ground) and the elevation of the nearest station outside
    it (``NearestNDInterpolator``): a flat extension, never an extrapolated
    slope. Stations on one straight line (a single seismic line) are
    interpolated along the line and extended flat across and beyond it.
    Stations at the same position are averaged.
"""

from __future__ import annotations

import os
import warnings

import numpy as np

from .errors import GeoreferenceError, InputFileError, ReflectorMapperWarning
from .geotiff import Raster, read_raster

__all__ = ["GroundModel"]


def _as_crs(crs):
    import pyproj

    if crs is None:
        return None
    try:
        return pyproj.CRS.from_user_input(crs)
    except pyproj.exceptions.CRSError as exc:
        raise GeoreferenceError(f"cannot read the CRS {crs!r}: {exc}; give e.g. 'EPSG:32633'") from exc


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

    def __init__(self, sampler, source: str, description: str, extent=None):
        self._sampler = sampler
        self.source_ = source
        self.description_ = description
        self._extent = extent  # (xmin, xmax, ymin, ymax) in the sampler's CRS, DEM only
        self._to_dem = None

    # ---------------------------------------------------------------- DEM
    @classmethod
    def from_raster(cls, path, working_crs=None, *, band: int = 1, engine=None) -> GroundModel:
        """Ground model from a DEM file (any format GDAL reads; see :func:`.geotiff.read_raster`)."""
        raster = read_raster(path, band, engine=engine)
        return cls.from_dem(raster, working_crs, name=os.path.basename(os.fspath(path)))

    @classmethod
    def from_dem(cls, raster: Raster, working_crs=None, *, name: str = "DEM") -> GroundModel:
        """Ground model from a :class:`.geotiff.Raster` already in memory."""
        from scipy.interpolate import RegularGridInterpolator

        values = np.asarray(raster.values, dtype=float)
        ny, nx = values.shape
        if ny < 2 or nx < 2:
            raise InputFileError(name, None, None, f"DEM has {ny} x {nx} cells; at least 2 x 2 are needed")
        if not np.any(np.isfinite(values)):
            raise InputFileError(name, None, None, "DEM has no valid cell (all nodata)")
        x = raster.x_centres
        y = raster.y_centres
        if x[1] < x[0]:
            x, values = x[::-1], values[:, ::-1]
        if y[1] < y[0]:
            y, values = y[::-1], values[::-1]
        interp = RegularGridInterpolator(
            (y, x), values, method="linear", bounds_error=False, fill_value=np.nan
        )
        hx, hy = abs(raster.dx) / 2, abs(raster.dy) / 2
        extent = (x[0] - hx, x[-1] + hx, y[0] - hy, y[-1] + hy)

        def sample(px, py):
            inside = (px >= extent[0]) & (px <= extent[1]) & (py >= extent[2]) & (py <= extent[3])
            qx = np.clip(px, x[0], x[-1])  # outer half cell: value of the edge row/column
            qy = np.clip(py, y[0], y[-1])
            z = interp(np.column_stack([qy.ravel(), qx.ravel()])).reshape(px.shape)
            return np.where(inside, z, np.nan)

        model = cls(sample, "dem", "", extent)
        dem_crs = raster.crs
        work = _as_crs(working_crs)
        crs_note = dem_crs.name if dem_crs is not None else "no CRS"
        if work is not None and dem_crs is None:
            warnings.warn(
                f"{name} declares no CRS; it is taken to be in the working CRS '{work.name}'",
                ReflectorMapperWarning,
                stacklevel=2,
            )
        elif work is not None and not dem_crs.equals(work, ignore_axis_order=True):
            import pyproj

            try:
                model._to_dem = pyproj.Transformer.from_crs(work, dem_crs, always_xy=True)
            except pyproj.exceptions.ProjError as exc:
                raise GeoreferenceError(
                    f"cannot transform from the working CRS '{work.name}' to the CRS of {name} "
                    f"'{dem_crs.name}': {exc}"
                ) from exc
            crs_note += f", sampled through a transformation from '{work.name}'"
        cells = f"{nx} x {ny} cells of {abs(raster.dx):g} x {abs(raster.dy):g}"
        model.description_ = f"{name} ({cells}, {crs_note})"
        return model

    # ----------------------------------------------------------- stations
    @classmethod
    def from_stations(cls, x_m, y_m, z_m) -> GroundModel:
        """Ground model interpolated from surveyed stations (see the module notes)."""
        from scipy.interpolate import LinearNDInterpolator, NearestNDInterpolator

        x = np.asarray(x_m, dtype=float).ravel()
        y = np.asarray(y_m, dtype=float).ravel()
        z = np.asarray(z_m, dtype=float).ravel()
        if not (len(x) == len(y) == len(z)):
            raise GeoreferenceError(
                f"station arrays differ in length: x {len(x)}, y {len(y)}, z {len(z)}"
            )
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
            return cls(lambda px, py: np.full(px.shape, z0), "stations", note + " (flat)")
        centre = xy.mean(axis=0)
        _, s, vt = np.linalg.svd(xy - centre, full_matrices=False)
        if n == 2 or s[1] <= 1e-9 * s[0]:
            # one straight line of stations: interpolate along it, flat across and beyond it
            u = vt[0]
            t = (xy - centre) @ u
            order = np.argsort(t)
            t, zline = t[order], zs[order]

            def along(px, py):
                tq = (px - centre[0]) * u[0] + (py - centre[1]) * u[1]
                return np.interp(tq, t, zline)

            return cls(along, "stations", note + " on one straight line")
        linear = LinearNDInterpolator(xy, zs)
        nearest = NearestNDInterpolator(xy, zs)

        def sample(px, py):
            q = np.column_stack([px.ravel(), py.ravel()])
            z = linear(q)
            out = ~np.isfinite(z)
            if np.any(out):
                z[out] = nearest(q[out])
            return z.reshape(px.shape)

        return cls(sample, "stations", note)

    # ------------------------------------------------------------ queries
    def ground(self, x_m, y_m) -> np.ndarray:
        """Ground elevation (m) at the points (x_m, y_m) of the working CRS (NaN off a DEM)."""
        px, py = np.broadcast_arrays(np.asarray(x_m, dtype=float), np.asarray(y_m, dtype=float))
        if self._to_dem is not None:
            px, py = self._to_dem.transform(px, py)
            px, py = np.asarray(px, dtype=float), np.asarray(py, dtype=float)
        return np.asarray(self._sampler(px, py), dtype=float)

    __call__ = ground

    def check_covers(self, x_m, y_m, what: str = "points") -> None:
        """Raise :class:`GeoreferenceError` when some points have no ground elevation."""
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
        return f"GroundModel({self.source_}: {self.description_})"
