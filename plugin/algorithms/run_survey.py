"""Processing algorithm: the whole job, from picks to map layers, rasters and report."""

from __future__ import annotations

import os

from qgis.core import (
    QgsProcessingOutputFile,
    QgsProcessingOutputHtml,
    QgsProcessingOutputRasterLayer,
    QgsProcessingOutputVectorLayer,
    QgsProcessingParameterBoolean,
    QgsProcessingParameterEnum,
    QgsProcessingParameterFolderDestination,
)

from .base import CoreCall, ReflectorAlgorithm, progress_for, tr

#: Surface methods offered (index 0 keeps the survey file's setting).
METHODS = ("survey setting", "auto", "kriging", "spline", "tomography")


class RunSurveyAlgorithm(ReflectorAlgorithm):
    """Run the whole survey and write the GeoPackage, GeoTIFFs and the HTML report."""

    METHOD = "METHOD"
    OUTPUT = "OUTPUT"
    LOAD = "LOAD_RESULTS"
    GEOPACKAGE = "GEOPACKAGE"
    REPORT = "REPORT"
    VECTOR_OUTPUTS = (
        ("SHOTS", "shots", "Shots"),
        ("REFLECTOR_POINTS", "reflector_points", "Reflector points"),
        ("DIP_MEASUREMENTS", "dip_measurements", "Dip measurements"),
        ("SURFACE_DIPS", "surface_dips", "Surface dips"),
        ("MISTIES", "misties", "Line misties"),
        ("BOREHOLES", "boreholes", "Borehole check"),
        ("CONTOURS", "contours", "Contours"),
    )
    RASTER_OUTPUTS = (
        ("ELEVATION", "reflector_elevation.tif", "Reflector elevation"),
        ("DEPTH", "reflector_depth.tif", "Reflector depth below ground"),
        ("DEPTH_SIGMA", "depth_sigma.tif", "Depth standard deviation"),
    )

    _name = "runsurvey"
    _display = "Run whole survey"
    _help = (
        "<p>Runs the whole job on one survey: fits every shot gather, places the reflector points, "
        "combines crossing lines into true dip and strike, checks misties and boreholes, maps the "
        "reflector surface with its standard deviation, and writes into the output folder: "
        "<i>survey.gpkg</i> (layers stations, lines, shots, reflector_points, reflection_points, "
        "dip_measurements, surface_dips, misties, boreholes, contours, cross_validation and more, each styled), "
        "<i>reflector_elevation.tif</i>, <i>reflector_depth.tif</i>, <i>depth_sigma.tif</i>, "
        "<i>elevation_sigma.tif</i>, contours as <i>contours_elevation.dxf</i> and <i>contours_depth.dxf</i>, "
        "every layer as CSV in <i>csv/</i>, the QC figures in <i>qc/</i> (one per line, and one per flagged "
        "gather or as the survey's gather_figures says), <i>report.html</i>, the A3 <i>map_sheet.pdf</i>, a "
        "section along every line (<i>section_line_*.pdf</i> and .csv), the LandXML surface "
        "<i>reflector_surface.xml</i>, and with a [design] level <i>probability_above_design.tif</i>.</p>"
        "<p><b>Input</b>: a survey.toml, or a picks table with a stations point layer and their "
        "fields (then no boreholes are used).</p>"
        "<p>With <i>Load styled results</i> the outputs open as one layer group: depth ramp, "
        "labelled contours, shots by fit status, and strike-and-dip symbols.</p>"
    )

    def initAlgorithm(self, config=None):
        self.add_survey_parameters()
        self.addParameter(
            QgsProcessingParameterEnum(
                self.METHOD, tr("Surface method"), options=[tr(m) for m in METHODS], defaultValue=0
            )
        )
        self.addParameter(
            QgsProcessingParameterBoolean(self.LOAD, tr("Load styled results into the project"), defaultValue=True)
        )
        self.addParameter(QgsProcessingParameterFolderDestination(self.OUTPUT, tr("Output folder")))
        self.addOutput(QgsProcessingOutputFile(self.GEOPACKAGE, tr("GeoPackage")))
        for key, _table, label in self.VECTOR_OUTPUTS:
            self.addOutput(QgsProcessingOutputVectorLayer(key, tr(label)))
        for key, _name, label in self.RASTER_OUTPUTS:
            self.addOutput(QgsProcessingOutputRasterLayer(key, tr(label)))
        self.addOutput(QgsProcessingOutputHtml(self.REPORT, tr("Report")))

    def processAlgorithm(self, parameters, context, feedback):
        from ...core import job
        from ..last_run import keep_run, run_started_ns

        survey_path = self.survey_path(parameters, context, feedback)
        out_dir = self.parameterAsFileOutput(parameters, self.OUTPUT, context)
        if not out_dir:
            out_dir = self.parameterAsString(parameters, self.OUTPUT, context)
        os.makedirs(out_dir, exist_ok=True)
        index = self.parameterAsEnum(parameters, self.METHOD, context)
        method = None if index == 0 else METHODS[index]
        result = None
        started_ns = run_started_ns()
        with CoreCall(feedback) as call:
            result = job.run(
                survey_path,
                out_dir,
                method=method,
                progress=progress_for(feedback),
                confine_inputs=self.confine_inputs(parameters, context),
            )
        if call.cancelled or result is None:
            return {}
        if method is None:  # the survey's own method, the panel's: it takes this result (no second computation)
            keep_run(result, started_ns)
        feedback.pushInfo(result.summary())
        self._out_dir = out_dir
        self._survey_path = survey_path
        self._load = self.parameterAsBoolean(parameters, self.LOAD, context)
        return outputs_of(out_dir, {self.OUTPUT: out_dir})

    def postProcessAlgorithm(self, context, feedback):
        out_dir = getattr(self, "_out_dir", None)
        project = context.project()
        if out_dir and getattr(self, "_load", False) and project is not None:
            from ..qc_dock import remember_run
            from ..styling import load_results

            load_results(out_dir, project)
            remember_run(project, self._survey_path, out_dir)
        return {}


def outputs_of(out_dir, results=None) -> dict:
    """Processing outputs of a run folder (only files and layers that exist)."""
    from ..styling import gpkg_layer_names

    results = dict(results or {})
    gpkg = os.path.join(out_dir, "survey.gpkg")
    if os.path.isfile(gpkg):
        results[RunSurveyAlgorithm.GEOPACKAGE] = gpkg
        names = set(gpkg_layer_names(gpkg))
        for key, table, _label in RunSurveyAlgorithm.VECTOR_OUTPUTS:
            if table in names:
                results[key] = f"{gpkg}|layername={table}"
    for key, name, _label in RunSurveyAlgorithm.RASTER_OUTPUTS:
        path = os.path.join(out_dir, name)
        if os.path.isfile(path):
            results[key] = path
    report = os.path.join(out_dir, "report.html")
    if os.path.isfile(report):
        results[RunSurveyAlgorithm.REPORT] = report
    return results
