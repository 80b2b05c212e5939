"""Processing algorithm: sections of the mapped reflector along the lines of a polyline layer."""

from __future__ import annotations

import os

from qgis.core import (
    QgsCoordinateTransform,
    QgsProcessing,
    QgsProcessingException,
    QgsProcessingOutputMultipleLayers,
    QgsProcessingParameterEnum,
    QgsProcessingParameterFeatureSource,
    QgsProcessingParameterField,
    QgsProcessingParameterFolderDestination,
    QgsProcessingParameterNumber,
    QgsWkbTypes,
)

from .base import CoreCall, ReflectorAlgorithm, crs_from_pyproj, progress_for, tr

FORMATS = ("pdf", "svg")


def line_parts(source, name_field, target_crs, context, feedback=None):
    """(name, [(x, y), ...]) of every part of every line feature, in ``target_crs``."""
    transform = QgsCoordinateTransform(source.sourceCrs(), target_crs, context.transformContext())
    out = []
    for k, feat in enumerate(source.getFeatures(), start=1):
        if feedback is not None and feedback.isCanceled():
            break
        geom = feat.geometry()
        if geom is None or geom.isEmpty():
            continue
        geom.transform(transform)
        base = str(feat[name_field]) if name_field else f"alignment_{k}"
        parts = geom.asMultiPolyline() if geom.isMultipart() else [geom.asPolyline()]
        for j, part in enumerate(parts, start=1):
            name = base if len(parts) == 1 else f"{base}_{j}"
            out.append((name, [(p.x(), p.y()) for p in part]))
    return out


class SectionAlongAlignmentAlgorithm(ReflectorAlgorithm):
    """Run the survey's surface and draw a section along each line of an alignment layer."""

    ALIGNMENT = "ALIGNMENT"
    NAME_FIELD = "NAME_FIELD"
    CORRIDOR = "CORRIDOR"
    FORMAT = "FORMAT"
    OUTPUT = "OUTPUT"
    FILES = "FILES"

    _name = "sectionalongalignment"
    _display = "Section along alignment"
    _help = (
        "<p>Maps the reflector of the survey (as <i>Run whole survey</i> does) and draws a section along every "
        "line of the alignment layer: the ground, the mapped reflector with its ±2σ band, the boreholes, shots and "
        "reflector points within half the corridor width of the alignment (projected onto it, their offset "
        "shown), against chainage from the first vertex, at a stated scale and vertical exaggeration.</p>"
        "<p>Writes into the output folder, per alignment, <i>section_NAME.pdf</i> (or .svg) and "
        "<i>section_NAME.csv</i> (chainage_m, x_m, y_m, ground_m, elevation_m, depth_m, sigma_m).</p>"
    )

    def initAlgorithm(self, config=None):
        self.add_survey_parameters()
        self.addParameter(
            QgsProcessingParameterFeatureSource(
                self.ALIGNMENT, tr("Alignment (line layer; one section per line)"), [QgsProcessing.TypeVectorLine]
            )
        )
        self.addParameter(
            QgsProcessingParameterField(
                self.NAME_FIELD,
                tr("Alignment name field (optional)"),
                parentLayerParameterName=self.ALIGNMENT,
                optional=True,
            )
        )
        corridor = QgsProcessingParameterNumber(
            self.CORRIDOR,
            tr("Corridor width (m), centred on the alignment"),
            type=QgsProcessingParameterNumber.Double,
            defaultValue=25.0,
        )
        corridor.setMinimum(0.01)
        self.addParameter(corridor)
        self.addParameter(
            QgsProcessingParameterEnum(self.FORMAT, tr("Sheet format"), options=list(FORMATS), defaultValue=0)
        )
        self.addParameter(QgsProcessingParameterFolderDestination(self.OUTPUT, tr("Output folder")))
        self.addOutput(QgsProcessingOutputMultipleLayers(self.FILES, tr("Section files")))

    def processAlgorithm(self, parameters, context, feedback):
        from ...core.formats.atomic import atomic_path
        from ...core.formats.tables import write_csv
        from ...core.handoff.steps import section_along, sheet_info
        from ...core.products.handoff import section_file_stem, section_files
        from ...core.workflow import compute

        source = self.parameterAsSource(parameters, self.ALIGNMENT, context)
        if source is None:
            raise QgsProcessingException(self.invalidSourceError(parameters, self.ALIGNMENT))
        if QgsWkbTypes.geometryType(source.wkbType()) != QgsWkbTypes.LineGeometry:
            raise QgsProcessingException(tr("The alignment layer must be a line layer."))
        name_field = self.parameterAsString(parameters, self.NAME_FIELD, context)
        corridor = self.parameterAsDouble(parameters, self.CORRIDOR, context)
        fmt = FORMATS[self.parameterAsEnum(parameters, self.FORMAT, context)]
        out_dir = self.parameterAsString(parameters, self.OUTPUT, context)
        os.makedirs(out_dir, exist_ok=True)
        survey = self.load_survey(parameters, context, feedback)
        parts = line_parts(source, name_field, crs_from_pyproj(survey.crs), context, feedback)
        if not parts:
            raise QgsProcessingException(tr("The alignment layer has no line to draw a section along."))
        files = []
        with CoreCall(feedback) as call:
            result = compute(survey, progress=progress_for(feedback))
            info = sheet_info(result)
            for name, vertices in parts:
                if feedback.isCanceled():
                    break
                if len(vertices) < 2:
                    feedback.reportError(
                        tr("Alignment '{name}' has fewer than two vertices: skipped.").format(name=name),
                        fatalError=False,
                    )
                    continue
                section = section_along(result, name, vertices, corridor, title=f"alignment {name}")
                sheet, table = section_files(result, section, fmt, info)
                stem = os.path.join(out_dir, section_file_stem(name))
                with atomic_path(f"{stem}.{fmt}") as tmp:
                    tmp.write_bytes(sheet)
                write_csv(f"{stem}.csv", table)
                files += [f"{stem}.{fmt}", f"{stem}.csv"]
                feedback.pushInfo(
                    tr("Section {name}: {n} boreholes in the corridor.").format(name=name, n=len(section.boreholes))
                )
        if call.cancelled:
            return {}
        return {self.OUTPUT: out_dir, self.FILES: files}
