"""Shared parts of the Rockhead Processing algorithms.

Every algorithm follows one pattern: read the parameters into plain Python
values, make ONE call into the core through :class:`~..feedback.FeedbackProgress`,
and write the result to Processing outputs. Core errors become
``QgsProcessingException`` with the core's own message; a cancel stops cleanly.
"""

from __future__ import annotations

import csv
import dataclasses
import os
import tempfile

from qgis.core import (
    QgsApplication,
    QgsCoordinateReferenceSystem,
    QgsCoordinateTransform,
    QgsFeature,
    QgsFeatureSink,
    QgsField,
    QgsFields,
    QgsGeometry,
    QgsPointXY,
    QgsProcessing,
    QgsProcessingAlgorithm,
    QgsProcessingException,
    QgsProcessingParameterBoolean,
    QgsProcessingParameterCrs,
    QgsProcessingParameterDefinition,
    QgsProcessingParameterFeatureSource,
    QgsProcessingParameterField,
    QgsProcessingParameterFile,
    QgsProcessingParameterNumber,
    QgsProcessingUtils,
    QgsWkbTypes,
)
from qgis.PyQt.QtCore import QCoreApplication, QVariant
from qgis.PyQt.QtGui import QIcon

from ..feedback import FeedbackProgress
from ..provider import ICON_PATH

GROUP_ID = "survey"


def under_qgis_process() -> bool:
    """True when QGIS runs as the ``qgis_process`` command line (no QGIS window)."""
    try:
        return QgsApplication.platform() == "qgis_process"
    except (AttributeError, RuntimeError):  # no QgsApplication
        return False


def tr(text: str) -> str:
    """Translate a user-visible string (translate first, format afterwards)."""
    return QCoreApplication.translate("Rockhead", text)


def caution_text() -> str:
    """The caution every algorithm's help ends with."""
    return tr(
        "<p><b>Caution.</b> A seismic depth map is an interpretation with stated uncertainty. "
        "It does not replace borings: designs that rely on it must be checked against borings "
        "and signed off under local codes by licensed professionals.</p>"
    )


class CoreCall:
    """Context manager: run one core call, turning its errors into Processing ones.

    ``CancelledError`` is swallowed and flagged in :attr:`cancelled`, so the
    algorithm can return what it has (nothing) without a red error.
    """

    def __init__(self, feedback):
        self.feedback = feedback
        self.cancelled = False

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            return False
        from ...core.errors import CancelledError, RockheadError

        if issubclass(exc_type, CancelledError):
            self.cancelled = True
            if self.feedback is not None:
                self.feedback.reportError(tr("Cancelled: no output written."), fatalError=False)
            return True
        if issubclass(exc_type, RockheadError):
            raise QgsProcessingException(str(exc)) from exc
        return False


class ReflectorAlgorithm(QgsProcessingAlgorithm):
    """Base class: naming, help with cautions, the survey-input parameters."""

    SURVEY = "SURVEY"
    CONFINE = "INPUTS_IN_SURVEY_FOLDER"
    PICKS = "PICKS"
    LINE_FIELD = "LINE_FIELD"
    SHOT_FIELD = "SHOT_FIELD"
    RECEIVER_FIELD = "RECEIVER_FIELD"
    TIME_FIELD = "TIME_FIELD"
    SIGMA_FIELD = "SIGMA_FIELD"
    STATIONS = "STATIONS"
    STATION_LINE_FIELD = "STATION_LINE_FIELD"
    STATION_FIELD = "STATION_FIELD"
    Z_FIELD = "Z_FIELD"
    CRS = "CRS"

    # subclasses set these
    _name = ""
    _display = ""
    _help = ""

    def createInstance(self):
        return type(self)()

    def name(self):
        return self._name

    def displayName(self):
        return tr(self._display)

    def group(self):
        return tr("Survey processing")

    def groupId(self):
        return GROUP_ID

    def icon(self):
        return QIcon(ICON_PATH)

    def shortHelpString(self):
        return tr(self._help) + caution_text()

    def tr(self, text):
        return tr(text)

    # -- survey input --------------------------------------------------------------------------
    def add_survey_parameters(self):
        """Either a survey.toml, or a picks table plus a stations point layer chosen in QGIS."""
        self.addParameter(
            QgsProcessingParameterFile(
                self.SURVEY,
                tr("Survey file (survey.toml); leave empty to use the layers below"),
                behavior=QgsProcessingParameterFile.File,
                fileFilter=tr("Survey files (*.toml)"),
                optional=True,
            )
        )
        # A survey.toml names its files by path; from a folder of unknown origin (a batch on a
        # server, qgis_process behind a web service) it could name any readable file on the
        # machine. Under qgis_process the inputs are confined to the survey's folder by default;
        # in the QGIS window the user chose the survey and may keep a shared DEM elsewhere.
        confine = QgsProcessingParameterBoolean(
            self.CONFINE,
            tr("Read input files only from the survey file's folder (and its subfolders)"),
            defaultValue=under_qgis_process(),
            optional=True,
        )
        confine.setFlags(confine.flags() | QgsProcessingParameterDefinition.FlagAdvanced)
        self.addParameter(confine)
        self.addParameter(
            QgsProcessingParameterFeatureSource(
                self.PICKS,
                tr("Picks table (one row per picked arrival)"),
                [QgsProcessing.TypeVector],
                optional=True,
            )
        )
        for key, label, default in (
            (self.LINE_FIELD, "Line field", "line"),
            (self.SHOT_FIELD, "Shot station field", "shot"),
            (self.RECEIVER_FIELD, "Receiver station field", "receiver"),
            (self.TIME_FIELD, "Two-way time field (ms)", "time_ms"),
        ):
            self.addParameter(
                QgsProcessingParameterField(
                    key, tr(label), defaultValue=default, parentLayerParameterName=self.PICKS, optional=True
                )
            )
        self.addParameter(
            QgsProcessingParameterField(
                self.SIGMA_FIELD,
                tr("Pick standard error field (ms), optional"),
                parentLayerParameterName=self.PICKS,
                type=QgsProcessingParameterField.Numeric,
                optional=True,
            )
        )
        self.addParameter(
            QgsProcessingParameterFeatureSource(
                self.STATIONS,
                tr("Stations (surveyed geophone and shot points)"),
                [QgsProcessing.TypeVectorPoint],
                optional=True,
            )
        )
        self.addParameter(
            QgsProcessingParameterField(
                self.STATION_LINE_FIELD,
                tr("Stations: line field"),
                defaultValue="line",
                parentLayerParameterName=self.STATIONS,
                optional=True,
            )
        )
        self.addParameter(
            QgsProcessingParameterField(
                self.STATION_FIELD,
                tr("Stations: station label field"),
                defaultValue="station",
                parentLayerParameterName=self.STATIONS,
                optional=True,
            )
        )
        self.addParameter(
            QgsProcessingParameterField(
                self.Z_FIELD,
                tr("Stations: ground elevation field (m)"),
                defaultValue="z",
                parentLayerParameterName=self.STATIONS,
                type=QgsProcessingParameterField.Numeric,
                optional=True,
            )
        )
        self.addParameter(
            QgsProcessingParameterCrs(
                self.CRS, tr("Projected CRS to work in (default: the stations layer's)"), optional=True
            )
        )

    def survey_path(self, parameters, context, feedback, workdir=None) -> str:
        """Path of a survey.toml: the one given, or one written from the two layers."""
        path = self.parameterAsFile(parameters, self.SURVEY, context)
        if path:
            if not os.path.isfile(path):
                raise QgsProcessingException(tr("Survey file not found: '{path}'.").format(path=path))
            return path
        picks = self.parameterAsSource(parameters, self.PICKS, context)
        stations = self.parameterAsSource(parameters, self.STATIONS, context)
        if picks is None or stations is None:
            raise QgsProcessingException(
                tr("Give either a survey file (survey.toml) or both a picks table and a stations point layer.")
            )
        if QgsWkbTypes.geometryType(stations.wkbType()) != QgsWkbTypes.PointGeometry:
            # Processing does not enforce the point-only filter in processing.run
            raise QgsProcessingException(
                tr("The stations layer must be a point layer; '{name}' has {geom} geometry.").format(
                    name=stations.sourceName(), geom=QgsWkbTypes.displayString(stations.wkbType())
                )
            )
        crs = self.parameterAsCrs(parameters, self.CRS, context)
        if not crs.isValid():
            crs = stations.sourceCrs()
        if not crs.isValid():
            raise QgsProcessingException(
                tr("The stations layer has no CRS and none was chosen: choose the CRS of the survey.")
            )
        # inside Processing's temporary folder, which QGIS removes when it exits
        workdir = workdir or tempfile.mkdtemp(prefix="reflector-survey-", dir=QgsProcessingUtils.tempFolder())
        return write_survey_from_layers(
            workdir,
            picks,
            stations,
            crs,
            context,
            pick_fields=[
                self.parameterAsString(parameters, k, context)
                for k in (self.LINE_FIELD, self.SHOT_FIELD, self.RECEIVER_FIELD, self.TIME_FIELD, self.SIGMA_FIELD)
            ],
            station_fields=[
                self.parameterAsString(parameters, k, context)
                for k in (self.STATION_LINE_FIELD, self.STATION_FIELD, self.Z_FIELD)
            ],
            feedback=feedback,
        )

    def load_survey(self, parameters, context, feedback, overrides=None):
        """Load the survey (core.survey.config.load_survey) and apply setting overrides."""
        from ...core.survey.config import load_survey

        path = self.survey_path(parameters, context, feedback)
        with CoreCall(feedback):
            survey = load_survey(path, confine_inputs=self.confine_inputs(parameters, context))
            overrides = {k: v for k, v in (overrides or {}).items() if v is not None}
            if overrides:
                survey = dataclasses.replace(survey, settings=dataclasses.replace(survey.settings, **overrides))
            return survey
        raise QgsProcessingException(tr("Cancelled while reading the survey."))

    def confine_inputs(self, parameters, context) -> bool:
        """Whether the survey's input files must lie in its folder (the advanced parameter)."""
        if self.CONFINE not in parameters or parameters.get(self.CONFINE) is None:
            return under_qgis_process()
        return self.parameterAsBoolean(parameters, self.CONFINE, context)

    def optional_number(self, parameters, key, context):
        """A number parameter, or None when it was left empty."""
        value = parameters.get(key)
        if value is None or value == "":
            return None
        return self.parameterAsDouble(parameters, key, context)


def optional_number_parameter(key, label, minimum=None, maximum=None, integer=False):
    """An optional number: empty means 'use the survey's setting'."""
    p = QgsProcessingParameterNumber(
        key,
        tr(label),
        type=QgsProcessingParameterNumber.Integer if integer else QgsProcessingParameterNumber.Double,
        optional=True,
    )
    if minimum is not None:
        p.setMinimum(minimum)
    if maximum is not None:
        p.setMaximum(maximum)
    return p


def _text(feature, name):
    value = feature[name]
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    return "" if value is None else str(value)


def write_survey_from_layers(workdir, picks, stations, crs, context, pick_fields, station_fields, feedback=None) -> str:
    """Write picks.csv, stations.csv and survey.toml from QGIS sources; return the TOML path.

    Station coordinates are taken from the point geometry, transformed to
    ``crs``. Writing the survey's own file format keeps one reading path (and
    its checks) for both kinds of input.
    """
    line_f, shot_f, recv_f, time_f, sigma_f = pick_fields
    for name, label in ((line_f, "line"), (shot_f, "shot"), (recv_f, "receiver"), (time_f, "time")):
        if not name or picks.fields().indexOf(name) < 0:
            raise QgsProcessingException(
                tr("Picks table: choose the {label} field (field '{name}' not found).").format(label=label, name=name)
            )
    sline_f, station_f, z_f = station_fields
    for name, label in ((sline_f, "line"), (station_f, "station"), (z_f, "elevation")):
        if not name or stations.fields().indexOf(name) < 0:
            raise QgsProcessingException(
                tr("Stations layer: choose the {label} field (field '{name}' not found).").format(
                    label=label, name=name
                )
            )
    os.makedirs(workdir, exist_ok=True)
    transform = QgsCoordinateTransform(stations.sourceCrs(), crs, context.transformContext())
    with open(os.path.join(workdir, "stations.csv"), "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["line", "station", "x", "y", "z"])
        for f in stations.getFeatures():
            if feedback is not None and feedback.isCanceled():
                break
            g = f.geometry()
            if g is None or g.isEmpty():
                continue
            p = transform.transform(g.asPoint() if not g.isMultipart() else g.asMultiPoint()[0])
            w.writerow([_text(f, sline_f), _text(f, station_f), repr(p.x()), repr(p.y()), f[z_f]])
    with open(os.path.join(workdir, "picks.csv"), "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        header = ["line", "shot", "receiver", "time_ms"] + (["sigma_ms"] if sigma_f else [])
        w.writerow(header)
        for f in picks.getFeatures():
            if feedback is not None and feedback.isCanceled():
                break
            row = [_text(f, line_f), _text(f, shot_f), _text(f, recv_f), f[time_f]]
            if sigma_f:
                row.append(f[sigma_f])
            w.writerow(row)
    crs_text = crs.authid() or crs.toWkt()
    toml_path = os.path.join(workdir, "survey.toml")
    with open(toml_path, "w", encoding="utf-8") as fh:
        fh.write("# written by the Rockhead QGIS plugin from map layers\n")
        fh.write('[survey]\nname = "QGIS layers"\n')
        fh.write("crs = " + _toml_string(crs_text) + "\n")
        fh.write('[files]\nstations = "stations.csv"\npicks = "picks.csv"\n')
    return toml_path


def _toml_string(text: str) -> str:
    return "'''" + text.replace("'''", "") + "'''"


# -- writing core tables to sinks ---------------------------------------------------------------
def qgs_fields(columns: dict) -> QgsFields:
    """QgsFields for a dict of name -> numpy array (str, int or float columns)."""
    import numpy as np

    fields = QgsFields()
    for name, values in columns.items():
        arr = np.asarray(values)
        if arr.dtype.kind == "b":
            fields.append(QgsField(name, QVariant.Bool))
        elif arr.dtype.kind in "iu":
            fields.append(QgsField(name, QVariant.LongLong))
        elif arr.dtype.kind == "f":
            fields.append(QgsField(name, QVariant.Double))
        else:
            fields.append(QgsField(name, QVariant.String))
    return fields


def _plain(value):
    import numpy as np

    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and value != value:  # NaN -> NULL
        return None
    return value


def write_features(sink, fields, columns, geometries, feedback=None):
    """Add one feature per row; ``geometries`` is a list of QgsGeometry (or None)."""
    names = list(columns)
    n = len(geometries)
    for i in range(n):
        if feedback is not None and feedback.isCanceled():
            break
        feat = QgsFeature(fields)
        if geometries[i] is not None:
            feat.setGeometry(geometries[i])
        feat.setAttributes([_plain(columns[name][i]) for name in names])
        sink.addFeature(feat, QgsFeatureSink.FastInsert)


def point_geometries(x, y):
    """QgsGeometry points for coordinate arrays."""
    return [QgsGeometry.fromPointXY(QgsPointXY(float(a), float(b))) for a, b in zip(x, y)]


def crs_from_pyproj(crs) -> QgsCoordinateReferenceSystem:
    """QgsCoordinateReferenceSystem from a pyproj CRS (by authority code when it has one)."""
    auth = crs.to_authority() if hasattr(crs, "to_authority") else None
    if auth:
        q = QgsCoordinateReferenceSystem(f"{auth[0]}:{auth[1]}")
        if q.isValid():
            return q
    return QgsCoordinateReferenceSystem.fromWkt(crs.to_wkt())


def progress_for(feedback):
    """The core progress object for a Processing feedback."""
    return FeedbackProgress(feedback)


_WKB_TYPES = {
    "POINT": QgsWkbTypes.Point,
    "LINESTRING": QgsWkbTypes.LineString,
    "POLYGON": QgsWkbTypes.Polygon,
    "MULTIPOINT": QgsWkbTypes.MultiPoint,
    "MULTILINESTRING": QgsWkbTypes.MultiLineString,
    "MULTIPOLYGON": QgsWkbTypes.MultiPolygon,
    "GEOMETRY": QgsWkbTypes.Unknown,
    None: QgsWkbTypes.Unknown,
}


def core_layer_geometries(core_layer) -> list:
    """QgsGeometry list of a core ``gpkg.Layer`` (shapely geometries, None for no geometry)."""
    out = []
    for geom in core_layer.geometries or []:
        if geom is None or geom.is_empty:
            out.append(None)
            continue
        g = QgsGeometry()
        g.fromWkb(bytes(geom.wkb))
        out.append(g)
    return out


def write_core_layer(alg, parameters, key, context, core_layer, crs, feedback=None):
    """Write a core ``gpkg.Layer`` (the project's fixed output fields) to the sink ``key``.

    Returns the sink's destination id. The fields and their order are the
    core's, so a sink holds exactly what the GeoPackage of a full run holds.
    """
    import numpy as np

    columns = {name: np.asarray(values) for name, values in core_layer.fields.items()}
    fields = qgs_fields(columns)
    wkb = _WKB_TYPES.get(core_layer.geometry_type, QgsWkbTypes.Unknown)
    sink, dest = alg.parameterAsSink(parameters, key, context, fields, wkb, crs)
    if sink is None:
        raise QgsProcessingException(alg.invalidSinkError(parameters, key))
    write_features(sink, fields, columns, core_layer_geometries(core_layer), feedback)
    return dest
