"""Processing algorithm: probability of rock above a design level and the rock volume above it."""

from __future__ import annotations

from qgis.core import (
    QgsCoordinateTransform,
    QgsProcessing,
    QgsProcessingException,
    QgsProcessingParameterFeatureSink,
    QgsProcessingParameterFeatureSource,
    QgsProcessingParameterNumber,
    QgsProcessingParameterRasterDestination,
    QgsWkbTypes,
)

from .base import CoreCall, ReflectorAlgorithm, crs_from_pyproj, progress_for, tr, write_core_layer


def area_polygon(source, target_crs, context):
    """The union of the polygons of ``source`` as one shapely geometry in ``target_crs`` (None if empty)."""
    from shapely import wkb
    from shapely.ops import unary_union

    transform = QgsCoordinateTransform(source.sourceCrs(), target_crs, context.transformContext())
    parts = []
    for feat in source.getFeatures():
        geom = feat.geometry()
        if geom is None or geom.isEmpty():
            continue
        geom.transform(transform)
        parts.append(wkb.loads(bytes(geom.asWkb())))
    if not parts:
        return None
    return unary_union(parts)


class DesignLevelAlgorithm(ReflectorAlgorithm):
    """P(reflector above a design elevation) per cell, and the P10/P50/P90 rock volume above it."""

    DESIGN_ELEVATION = "DESIGN_ELEVATION"
    AREA = "AREA"
    SIMULATIONS = "SIMULATIONS"
    SEED = "SEED"
    PROBABILITY = "PROBABILITY"
    OUTPUT = "OUTPUT"

    _name = "designlevel"
    _display = "Rock above design level"
    _help = (
        "<p>Maps the reflector of the survey (as <i>Run whole survey</i> does) and answers two design questions "
        "at a level (pile toe, excavation grade): how likely is rock above it at each cell, "
        "Φ((z − z_design)/σ) from the map and its standard deviation; and how much rock lies above it over the "
        "mapped area or the polygons given, as P10/P50/P90 of conditional simulations of the surface (the "
        "fitted variogram's spatial covariance, conditioned by kriging the simulated values at the data; "
        "90 % of the realisations give less than P90).</p>"
        "<p>Needs a kriged surface: the spline gives no standard deviation.</p>"
    )

    def initAlgorithm(self, config=None):
        self.add_survey_parameters()
        self.addParameter(
            QgsProcessingParameterNumber(
                self.DESIGN_ELEVATION,
                tr("Design elevation (m, the survey's heights)"),
                type=QgsProcessingParameterNumber.Double,
            )
        )
        self.addParameter(
            QgsProcessingParameterFeatureSource(
                self.AREA,
                tr("Design area (polygons; empty: the whole mapped area)"),
                [QgsProcessing.TypeVectorPolygon],
                optional=True,
            )
        )
        sims = QgsProcessingParameterNumber(
            self.SIMULATIONS, tr("Conditional simulations"), type=QgsProcessingParameterNumber.Integer, defaultValue=500
        )
        sims.setMinimum(200)
        self.addParameter(sims)
        seed = QgsProcessingParameterNumber(
            self.SEED,
            tr("Random seed (same seed, same volumes)"),
            type=QgsProcessingParameterNumber.Integer,
            defaultValue=1,
        )
        seed.setMinimum(0)
        self.addParameter(seed)
        self.addParameter(
            QgsProcessingParameterRasterDestination(self.PROBABILITY, tr("Probability of rock above the design level"))
        )
        self.addParameter(
            QgsProcessingParameterFeatureSink(
                self.OUTPUT, tr("Rock volume above the design level"), QgsProcessing.TypeVectorPolygon
            )
        )

    def processAlgorithm(self, parameters, context, feedback):
        from ...core.formats.gdalio import write_raster
        from ...core.handoff.steps import design_answers
        from ...core.products.handoff import design_volumes_layer
        from ...core.workflow import compute

        z_design = self.parameterAsDouble(parameters, self.DESIGN_ELEVATION, context)
        n_sims = self.parameterAsInt(parameters, self.SIMULATIONS, context)
        seed = self.parameterAsInt(parameters, self.SEED, context)
        prob_path = self.parameterAsOutputLayer(parameters, self.PROBABILITY, context)
        survey = self.load_survey(parameters, context, feedback)
        crs = crs_from_pyproj(survey.crs)
        area = None
        source = self.parameterAsSource(parameters, self.AREA, context)
        if source is not None:
            if QgsWkbTypes.geometryType(source.wkbType()) != QgsWkbTypes.PolygonGeometry:
                raise QgsProcessingException(tr("The design area must be a polygon layer."))
            area = area_polygon(source, crs, context)
            if area is None:
                raise QgsProcessingException(tr("The design area layer holds no polygon."))
        result = None
        with CoreCall(feedback) as call:
            result = compute(survey, progress=progress_for(feedback))
            design = design_answers(
                result, z_design, area=area, n_simulations=n_sims, seed=seed, progress=progress_for(feedback)
            )
        if call.cancelled or result is None:
            return {}
        if design.probability is None:
            raise QgsProcessingException(design.note)
        spec = result.spec
        write_raster(
            prob_path,
            design.probability,
            spec,
            survey.crs,
            unit="",
            description=f"P(reflector elevation > {z_design:g} m)",
        )
        out = {self.PROBABILITY: prob_path}
        if design.volume is None:
            feedback.reportError(design.note, fatalError=False)
            return out
        v = design.volume
        feedback.pushInfo(
            tr("Rock volume above {z} m: P10 {p10:.0f}, P50 {p50:.0f}, P90 {p90:.0f} m³.").format(
                z=z_design, p10=v.p10_m3, p50=v.p50_m3, p90=v.p90_m3
            )
        )
        if design.note:
            feedback.pushWarning(design.note)
        out[self.OUTPUT] = write_core_layer(
            self, parameters, self.OUTPUT, context, design_volumes_layer(design), crs, feedback
        )
        return out
