"""Processing algorithm: a reflector surface grid with its standard deviation."""

from __future__ import annotations

import numpy as np
from qgis.core import (
    QgsProcessing,
    QgsProcessingException,
    QgsProcessingParameterEnum,
    QgsProcessingParameterFeatureSink,
    QgsProcessingParameterFeatureSource,
    QgsProcessingParameterField,
    QgsProcessingParameterNumber,
    QgsProcessingParameterRasterDestination,
    QgsWkbTypes,
)

from .base import (
    CoreCall,
    ReflectorAlgorithm,
    optional_number_parameter,
    progress_for,
    tr,
    write_core_layer,
)

METHODS = ("kriging", "spline")
VARIOGRAMS = ("auto", "spherical", "exponential", "gaussian")
TRENDS = ("linear", "none")


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


def pyproj_crs(crs):
    """pyproj CRS of a QgsCoordinateReferenceSystem (by authority code when it has one)."""
    from pyproj import CRS

    return CRS.from_user_input(crs.authid()) if crs.authid() else CRS.from_wkt(crs.toWkt())


def raster_provenance(crs, method: str, source_name: str):
    """Caution and origin written into the rasters of this algorithm."""
    from ...core import __version__
    from ...core.crs import crs_label, horizontal_crs
    from ...core.products.provenance import Provenance, product_timestamp, vertical_label

    vertical = crs.sub_crs_list[1] if crs.is_compound and len(crs.sub_crs_list) > 1 else None
    return Provenance(
        software=f"Rockhead {__version__}",
        survey=f"points of the layer '{source_name}'",
        method=method,
        date="not stated",
        timestamp=product_timestamp(None),
        crs=crs_label(horizontal_crs(crs)),
        vertical_datum=vertical_label(vertical),
    )


class InterpolateSurfaceAlgorithm(ReflectorAlgorithm):
    """Grid reflector elevations (ordinary kriging with measurement error, or a smoothing spline)."""

    INPUT = "INPUT"
    Z_FIELD_POINTS = "VALUE_FIELD"
    SIGMA_FIELD_POINTS = "ERROR_FIELD"
    METHOD = "METHOD"
    VARIOGRAM = "VARIOGRAM"
    TREND = "TREND"
    CELL_SIZE = "CELL_SIZE"
    MAX_DISTANCE = "MAX_DISTANCE"
    NEIGHBOURS = "NEIGHBOURS"
    CONTOUR_INTERVAL = "CONTOUR_INTERVAL"
    OUTPUT = "OUTPUT"
    STD = "STD_OUTPUT"
    CONTOURS = "CONTOURS"

    _name = "interpolatesurface"
    _display = "Interpolate reflector surface"
    _help = (
        "<p>Grids reflector elevations from points with their standard errors: ordinary kriging "
        "with the measurement-error variance on the diagonal and a variogram fitted to the data "
        "(Cressie 1993; Journel &amp; Huijbregts 1978), in a local neighbourhood, or a smoothing "
        "thin-plate spline. By default a regional plane (the overall dip) is removed first and "
        "added back (linear drift), and the variogram model with the best leave-one-out score is "
        "used (auto). The joint inversion of all picks for curved reflectors needs the picks: use "
        "Run whole survey with the tomography method. Cells farther than the masking distance from "
        "every point are left empty (no silent extrapolation).</p>"
        "<p><b>Input</b>: a point layer in a projected CRS (metres), such as the reflector points of "
        "Fit shot gathers, with an elevation field and an optional standard-error field "
        "(boreholes: a small error).</p>"
        "<p><b>Outputs</b>: the surface and its kriging standard deviation (empty for the spline), in "
        "the format of the file name's extension (.tif: a cloud-optimised GeoTIFF; .asc, .img and the "
        "other GDAL raster formats), each with the caution and its provenance in its metadata, and "
        "contour lines of the surface (fields kind = 'elevation', elevation_m, index; "
        "every fifth level an index contour). Empty cell size, masking distance or contour interval: "
        "chosen from the data.</p>"
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
        self.addParameter(
            QgsProcessingParameterEnum(
                self.TREND, tr("Trend removed before gridding"), options=[tr(v) for v in TRENDS], defaultValue=0
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
        self.addParameter(optional_number_parameter(self.CONTOUR_INTERVAL, "Contour interval (m)", 0.001, 1.0e5))
        self.addParameter(QgsProcessingParameterRasterDestination(self.OUTPUT, tr("Reflector surface")))
        self.addParameter(
            QgsProcessingParameterRasterDestination(
                self.STD, tr("Standard deviation"), optional=True, createByDefault=True
            )
        )
        self.addParameter(
            QgsProcessingParameterFeatureSink(
                self.CONTOURS,
                tr("Contours"),
                QgsProcessing.TypeVectorLine,
                optional=True,
                createByDefault=True,
            )
        )

    def processAlgorithm(self, parameters, context, feedback):
        from ...core.grid import GridSpec
        from ...core.surface.trend import grid_with_trend
        from ...core.survey.model import Settings

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
        trend = TRENDS[self.parameterAsEnum(parameters, self.TREND, context)]
        cell = self.optional_number(parameters, self.CELL_SIZE, context)
        max_distance = self.optional_number(parameters, self.MAX_DISTANCE, context)
        neighbours = self.parameterAsInt(parameters, self.NEIGHBOURS, context)
        out = self.parameterAsOutputLayer(parameters, self.OUTPUT, context)
        std_out = self.parameterAsOutputLayer(parameters, self.STD, context)
        surf = None
        with CoreCall(feedback) as call:
            try:
                spec = GridSpec.from_data(x, y, cell_size_m=cell)
                settings = Settings(
                    neighbours=neighbours, variogram_model=variogram, max_distance_m=max_distance, trend=trend
                )
                surf, _diag = grid_with_trend(
                    x,
                    y,
                    z,
                    sigma if sigma_field else np.zeros_like(z),
                    spec,
                    settings,
                    method,
                    progress_for(feedback),
                )
            except ValueError as err:  # the surface module's input checks
                raise QgsProcessingException(str(err)) from err
        if call.cancelled or surf is None:
            return {}
        interval = self.optional_number(parameters, self.CONTOUR_INTERVAL, context)
        from ...core.formats.gdalio import write_raster
        from ...core.surface.contours import contours_layer

        spec = surf.spec
        with CoreCall(feedback):
            target = pyproj_crs(crs)
            prov = raster_provenance(target, method, source.sourceName())
            for path, grid, what in (
                (out, surf.z, "reflector elevation (m, up positive)"),
                (std_out, surf.std, "standard deviation of the reflector surface (m)"),
            ):
                if path:  # the GDAL driver follows the file's extension (.tif: cloud-optimised GeoTIFF)
                    write_raster(
                        path,
                        grid,
                        spec,
                        target,
                        metadata=prov.items(),
                        description=what,
                        timestamp=prov.timestamp,
                        software=prov.software,
                    )
            lines = contours_layer(spec.x_centres, spec.y_centres, elevation_m=surf.z, elevation_interval_m=interval)
        results = {self.OUTPUT: out}
        if std_out:
            results[self.STD] = std_out
        if parameters.get(self.CONTOURS) is not None:
            results[self.CONTOURS] = write_core_layer(self, parameters, self.CONTOURS, context, lines, crs, feedback)
        return results
