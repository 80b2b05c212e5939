"""Processing algorithm: a reflector surface grid with its standard deviation."""

from __future__ import annotations

import numpy as np
from qgis.core import (
    QgsProcessing,
    QgsProcessingException,
    QgsProcessingParameterEnum,
    QgsProcessingParameterFeatureSource,
    QgsProcessingParameterField,
    QgsProcessingParameterNumber,
    QgsProcessingParameterRasterDestination,
    QgsWkbTypes,
)

from .base import CoreCall, ReflectorAlgorithm, optional_number_parameter, progress_for, tr

METHODS = ("kriging", "spline")
VARIOGRAMS = ("spherical", "exponential", "gaussian")


def read_points(source, z_field, sigma_field, feedback=None):
    """x, y, z, sigma arrays (in the source CRS) of a point source; rows with NULLs are dropped."""
    xs, ys, zs, ss = [], [], [], []
    for f in source.getFeatures():
        if feedback is not None and feedback.isCanceled():
            break
        g = f.geometry()
        if g is None or g.isEmpty():
            continue
        p = g.asPoint() if not g.isMultipart() else g.asMultiPoint()[0]
        z = f[z_field]
        s = f[sigma_field] if sigma_field else 0.0
        if z is None or s is None or (hasattr(z, "isNull") and z.isNull()):
            continue
        try:
            z, s = float(z), float(s)
        except (TypeError, ValueError):
            continue
        if not (np.isfinite(z) and np.isfinite(s)):
            continue
        xs.append(p.x())
        ys.append(p.y())
        zs.append(z)
        ss.append(s)
    return np.array(xs), np.array(ys), np.array(zs), np.array(ss)


def write_geotiff(path, spec, values, crs_wkt, description=""):
    """Write one float32 band on a core GridSpec (north-up, NaN as nodata) with GDAL."""
    from osgeo import gdal

    driver = gdal.GetDriverByName("GTiff")
    ds = driver.Create(str(path), spec.nx, spec.ny, 1, gdal.GDT_Float32, options=["COMPRESS=DEFLATE"])
    if ds is None:
        raise QgsProcessingException(tr("Cannot create the raster '{path}'.").format(path=path))
    ds.SetGeoTransform(spec.geotransform)
    ds.SetProjection(crs_wkt)
    band = ds.GetRasterBand(1)
    band.SetNoDataValue(float("nan"))
    band.SetDescription(description)
    band.WriteArray(np.asarray(values, dtype=np.float32))
    band.FlushCache()
    ds = None


class InterpolateSurfaceAlgorithm(ReflectorAlgorithm):
    """Grid reflector elevations (ordinary kriging with measurement error, or a smoothing spline)."""

    INPUT = "INPUT"
    Z_FIELD_POINTS = "VALUE_FIELD"
    SIGMA_FIELD_POINTS = "ERROR_FIELD"
    METHOD = "METHOD"
    VARIOGRAM = "VARIOGRAM"
    CELL_SIZE = "CELL_SIZE"
    MAX_DISTANCE = "MAX_DISTANCE"
    NEIGHBOURS = "NEIGHBOURS"
    OUTPUT = "OUTPUT"
    STD = "STD_OUTPUT"

    _name = "interpolatesurface"
    _display = "Interpolate reflector surface"
    _help = (
        "<p>Grids reflector elevations from points with their standard errors: ordinary kriging "
        "with the measurement-error variance on the diagonal and a variogram fitted to the data "
        "(Cressie 1993; Journel &amp; Huijbregts 1978), in a local neighbourhood, or a smoothing "
        "thin-plate spline. Cells farther than the masking distance from every point are left empty "
        "(no silent extrapolation).</p>"
        "<p><b>Input</b>: a point layer in a projected CRS (metres), such as the reflector points of "
        "Fit shot gathers, with an elevation field and an optional standard-error field "
        "(boreholes: a small error).</p>"
        "<p><b>Outputs</b>: the surface and its kriging standard deviation (empty for the "
        "spline). Empty cell size or masking distance: chosen from the data spacing.</p>"
    )

    def initAlgorithm(self, config=None):
        self.addParameter(
            QgsProcessingParameterFeatureSource(self.INPUT, tr("Reflector points"), [QgsProcessing.TypeVectorPoint])
        )
        self.addParameter(
            QgsProcessingParameterField(
                self.Z_FIELD_POINTS,
                tr("Elevation field (m)"),
                defaultValue="elevation_m",
                parentLayerParameterName=self.INPUT,
                type=QgsProcessingParameterField.Numeric,
            )
        )
        self.addParameter(
            QgsProcessingParameterField(
                self.SIGMA_FIELD_POINTS,
                tr("Standard error field (m)"),
                defaultValue="sigma_m",
                parentLayerParameterName=self.INPUT,
                type=QgsProcessingParameterField.Numeric,
                optional=True,
            )
        )
        self.addParameter(
            QgsProcessingParameterEnum(self.METHOD, tr("Method"), options=[tr(m) for m in METHODS], defaultValue=0)
        )
        self.addParameter(
            QgsProcessingParameterEnum(
                self.VARIOGRAM, tr("Variogram model (kriging)"), options=[tr(v) for v in VARIOGRAMS], defaultValue=0
            )
        )
        self.addParameter(optional_number_parameter(self.CELL_SIZE, "Cell size (m)", 0.01, 1.0e5))
        self.addParameter(optional_number_parameter(self.MAX_DISTANCE, "Masking distance (m)", 0.01, 1.0e6))
        self.addParameter(
            QgsProcessingParameterNumber(
                self.NEIGHBOURS,
                tr("Neighbours per estimate"),
                type=QgsProcessingParameterNumber.Integer,
                defaultValue=32,
                minValue=3,
                maxValue=1000,
            )
        )
        self.addParameter(QgsProcessingParameterRasterDestination(self.OUTPUT, tr("Reflector surface")))
        self.addParameter(
            QgsProcessingParameterRasterDestination(
                self.STD, tr("Standard deviation"), optional=True, createByDefault=True
            )
        )

    def processAlgorithm(self, parameters, context, feedback):
        from ...core.surface import GridSpec, interpolate_surface

        source = self.parameterAsSource(parameters, self.INPUT, context)
        if source is None:
            raise QgsProcessingException(self.invalidSourceError(parameters, self.INPUT))
        if QgsWkbTypes.geometryType(source.wkbType()) != QgsWkbTypes.PointGeometry:
            raise QgsProcessingException(
                tr("The input must be a point layer; it has {geom} geometry.").format(
                    geom=QgsWkbTypes.displayString(source.wkbType())
                )
            )
        crs = source.sourceCrs()
        if crs.isGeographic():
            raise QgsProcessingException(
                tr(
                    "The points are in a geographic CRS ({crs}); reproject them to a projected CRS in metres first."
                ).format(crs=crs.authid())
            )
        z_field = self.parameterAsString(parameters, self.Z_FIELD_POINTS, context)
        sigma_field = self.parameterAsString(parameters, self.SIGMA_FIELD_POINTS, context) or None
        x, y, z, sigma = read_points(source, z_field, sigma_field, feedback)
        if len(x) < 3:
            raise QgsProcessingException(
                tr("Need at least 3 points with a value to interpolate, found {n}.").format(n=len(x))
            )
        method = METHODS[self.parameterAsEnum(parameters, self.METHOD, context)]
        variogram = VARIOGRAMS[self.parameterAsEnum(parameters, self.VARIOGRAM, context)]
        cell = self.optional_number(parameters, self.CELL_SIZE, context)
        max_distance = self.optional_number(parameters, self.MAX_DISTANCE, context)
        neighbours = self.parameterAsInt(parameters, self.NEIGHBOURS, context)
        out = self.parameterAsOutputLayer(parameters, self.OUTPUT, context)
        std_out = self.parameterAsOutputLayer(parameters, self.STD, context)
        surf = None
        with CoreCall(feedback) as call:
            try:
                spec = GridSpec.from_data(x, y, cell_size_m=cell)
                surf, _diag = interpolate_surface(
                    x,
                    y,
                    z,
                    sigma if sigma_field else None,
                    spec,
                    method=method,
                    neighbours=neighbours,
                    variogram_model=variogram,
                    max_distance_m=max_distance,
                    progress=progress_for(feedback),
                )
            except ValueError as err:  # the surface module's input checks
                raise QgsProcessingException(str(err)) from err
        if call.cancelled or surf is None:
            return {}
        wkt = crs.toWkt()
        write_geotiff(out, surf.spec, surf.z, wkt, "reflector elevation (m)")
        results = {self.OUTPUT: out}
        if std_out:
            write_geotiff(std_out, surf.spec, surf.std, wkt, "standard deviation (m)")
            results[self.STD] = std_out
        return results
