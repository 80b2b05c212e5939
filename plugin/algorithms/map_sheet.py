"""Processing algorithm: a QGIS print layout of a results folder, exported to PDF.

Two A3 landscape pages: the depth to the reflector (contours, lines, reflector
points, boreholes, strike-and-dip symbols) and the standard deviation of the
mapped surface; a third, the probability of rock above the design level, when
the run had one. Each page has a map at a round scale with a coordinate grid, a
legend with units, a scale bar, a north arrow (grid north), the cautions and a
title block (survey, dates, software version, CRS, vertical datum, method,
cell size) read from the run's ``run_info`` table.
"""

from __future__ import annotations

import datetime as _dt
import os

from qgis.core import (
    QgsApplication,
    QgsCoordinateReferenceSystem,
    QgsLayerTree,
    QgsLayoutExporter,
    QgsLayoutItemLabel,
    QgsLayoutItemLegend,
    QgsLayoutItemMap,
    QgsLayoutItemMapGrid,
    QgsLayoutItemPage,
    QgsLayoutItemPicture,
    QgsLayoutItemScaleBar,
    QgsLayoutPoint,
    QgsLayoutSize,
    QgsPrintLayout,
    QgsProcessingException,
    QgsProcessingParameterFile,
    QgsProcessingParameterFileDestination,
    QgsProject,
    QgsRasterLayer,
    QgsRectangle,
    QgsUnitTypes,
    QgsVectorLayer,
)
from qgis.PyQt.QtGui import QColor, QFont

from .base import ReflectorAlgorithm, tr

MM = QgsUnitTypes.LayoutMillimeters
#: Map frame on each page: left, top, width, height (mm) of A3 landscape (420 x 297 mm).
MAP_FRAME_MM = (12.0, 14.0, 290.0, 270.0)
PANEL_X_MM = 316.0
PANEL_W_MM = 96.0

#: Layers of a results folder on each page (GeoPackage tables; the raster first is the page's subject).
DEPTH_PAGE = (
    "reflector_depth.tif",
    "contours",
    "shots",
    "reflector_points",
    "boreholes",
    "dip_measurements",
    "surface_dips",
)
SIGMA_PAGE = ("depth_sigma.tif", "shots", "reflector_points", "boreholes")
PROBABILITY_PAGE = ("probability_above_design.tif", "shots", "reflector_points", "boreholes")


def run_info(out_dir) -> dict:
    """key -> value of the run_info table of a results folder ({} when missing)."""
    layer = QgsVectorLayer(f"{os.path.join(out_dir, 'survey.gpkg')}|layername=run_info", "run_info", "ogr")
    if not layer.isValid():
        return {}
    return {str(f["key"]): str(f["value"]) for f in layer.getFeatures()}


def _add_page(layout, index):
    if index == 0:
        page = layout.pageCollection().page(0)
    else:
        page = QgsLayoutItemPage(layout)
        layout.pageCollection().addPage(page)
    page.setPageSize("A3", QgsLayoutItemPage.Landscape)
    return page


def _place(item, layout, x, y, w, h, page):
    layout.addLayoutItem(item)
    item.attemptMove(QgsLayoutPoint(x, y, MM), page=page)
    item.attemptResize(QgsLayoutSize(w, h, MM))
    return item


def _label(layout, text, x, y, w, h, page, size=8.0, bold=False, frame=False, background=None):
    item = QgsLayoutItemLabel(layout)
    item.setText(text)
    font = QFont()
    font.setPointSizeF(size)
    font.setBold(bold)
    item.setFont(font)
    item.setMargin(1.5)
    if frame:
        item.setFrameEnabled(True)
    if background:
        item.setBackgroundEnabled(True)
        item.setBackgroundColor(QColor(background))
    return _place(item, layout, x, y, w, h, page)


def _north_arrow_svg():
    for folder in QgsApplication.svgPaths():
        path = os.path.join(folder, "arrows", "NorthArrow_02.svg")
        if os.path.isfile(path):
            return path
    return None


def _nice_interval(span_m):
    from ...core.grid import nice_step

    return nice_step(span_m / 5.0)


def build_layout(project, out_dir, layers_by_name, crs, info, title=None):
    """The two-page print layout of a results folder (layers already in ``project``)."""
    from ...core.report.sheet import CAUTION_LINES, nice_scale

    layout = QgsPrintLayout(project)
    layout.initializeDefaults()
    layout.setName(title or "Rockhead map sheet")
    keep = []  # legend layer trees must outlive the export
    pages = [
        (tr("Depth to the reflector below ground"), DEPTH_PAGE),
        (tr("Standard deviation of the depth"), SIGMA_PAGE),
    ]
    if "probability_above_design.tif" in layers_by_name:  # a run with a [design] level
        level = info.get("design_elevation_m", "")
        pages.append((tr("Probability that the reflector is above {level} m").format(level=level), PROBABILITY_PAGE))
    subject = layers_by_name.get("reflector_depth.tif")
    extent = QgsRectangle(subject.extent()) if subject is not None else None
    x0, y0, mw, mh = MAP_FRAME_MM
    scale = None
    if extent is not None:
        scale = nice_scale(max(extent.width() / mw, extent.height() / mh) * 1000.0 * 1.02)
    facts = [
        (tr("survey"), info.get("survey", "")),
        (tr("surveyed"), info.get("survey_date", tr("date not stated"))),
        (tr("issued"), _dt.date.today().isoformat()),
        (tr("horizontal CRS"), info.get("crs", crs.authid())),
        (tr("vertical datum"), info.get("vertical_datum", tr("vertical datum not stated"))),
        (tr("surface method"), info.get("surface_method", "")),
        (tr("grid cell"), f"{info.get('cell_size_m', '')} m"),
        (tr("scale"), f"1:{scale:,} (A3)" if scale else ""),
        (tr("software"), info.get("software", "Rockhead")),
    ]
    for k, (page_title, names) in enumerate(pages):
        _add_page(layout, k)
        layers = [layers_by_name[n] for n in reversed(names) if n in layers_by_name]
        layers = list(reversed(layers))  # drawing order: first name on top... rasters last
        layers.sort(key=lambda lyr: isinstance(lyr, QgsRasterLayer))
        m = QgsLayoutItemMap(layout)
        _place(m, layout, x0, y0, mw, mh, k)
        m.setCrs(crs)
        m.setLayers(layers)
        m.setKeepLayerSet(True)
        m.setFrameEnabled(True)
        if extent is not None:
            m.setExtent(extent)  # zoomToExtent needs an extent to start from; this one resizes the item
            m.attemptResize(QgsLayoutSize(mw, mh, MM))  # back to the frame, keeping the centre
            m.setScale(scale)
            grid = QgsLayoutItemMapGrid(tr("coordinate grid"), m)
            m.grids().addGrid(grid)
            step = _nice_interval(max(extent.width(), extent.height()))
            grid.setIntervalX(step)
            grid.setIntervalY(step)
            grid.setStyle(QgsLayoutItemMapGrid.Solid)
            grid.setAnnotationEnabled(True)
            grid.setAnnotationPrecision(0)
            grid.setAnnotationFormat(QgsLayoutItemMapGrid.Decimal)
            pen = grid.lineSymbol()
            if pen is not None:
                pen.setColor(QColor(140, 140, 140))
                pen.setWidth(0.1)
        _label(layout, f"{page_title} — {info.get('survey', '')}", x0, 4.0, mw, 9.0, k, size=13, bold=True)
        legend = QgsLayoutItemLegend(layout)
        legend.setTitle(tr("Legend"))
        legend.setLinkedMap(m)
        legend.setAutoUpdateModel(False)
        root = QgsLayerTree()
        for lyr in layers:
            root.addLayer(lyr)
        keep.append(root)
        legend.model().setRootGroup(root)
        _place(legend, layout, PANEL_X_MM, 14.0, PANEL_W_MM, 110.0, k)
        bar = QgsLayoutItemScaleBar(layout)
        bar.setStyle("Single Box")
        bar.setLinkedMap(m)
        bar.setUnits(QgsUnitTypes.DistanceMeters)
        bar.setUnitLabel("m")
        bar.setNumberOfSegments(4)
        bar.setNumberOfSegmentsLeft(0)
        if scale:
            bar.setUnitsPerSegment(_nice_interval(0.5 * PANEL_W_MM * scale / 1000.0 * 5.0) / 4)
        _place(bar, layout, PANEL_X_MM, 130.0, 70.0, 14.0, k)
        svg = _north_arrow_svg()
        if svg:
            arrow = QgsLayoutItemPicture(layout)
            arrow.setPicturePath(svg)
            arrow.setLinkedMap(m)  # rotates with the map: grid north up
            _place(arrow, layout, PANEL_X_MM + 80.0, 126.0, 16.0, 20.0, k)
        _label(layout, tr("N: grid north"), PANEL_X_MM + 74.0, 146.0, 26.0, 5.0, k, size=7)
        _label(
            layout,
            "\n".join(CAUTION_LINES),
            PANEL_X_MM,
            154.0,
            PANEL_W_MM,
            32.0,
            k,
            size=7.5,
            frame=True,
            background="#fff4d6",
        )
        block = "\n".join(f"{a}: {b}" for a, b in facts)
        _label(
            layout,
            f"{page_title} (sheet {k + 1} of {len(pages)})",
            PANEL_X_MM,
            190.0,
            PANEL_W_MM,
            10.0,
            k,
            size=10,
            bold=True,
            frame=True,
        )
        _label(layout, block, PANEL_X_MM, 200.0, PANEL_W_MM, 84.0, k, size=8, frame=True)
    return layout, keep


class MapSheetAlgorithm(ReflectorAlgorithm):
    """Print layout of a results folder (from Run whole survey) exported to a PDF map sheet."""

    RESULTS = "RESULTS"
    TITLE = "TITLE"
    OUTPUT = "OUTPUT"

    _name = "mapsheet"
    _display = "Map sheet (print layout)"
    _help = (
        "<p>Builds a QGIS print layout from the folder written by <i>Run whole survey</i> and exports it as a "
        "PDF: page 1 the depth to the reflector with contours, the seismic lines, reflector points, boreholes "
        "and strike-and-dip symbols; page 2 the standard deviation of the mapped surface; page 3, when the run "
        "had a design level, the probability of rock above it. Each page carries a "
        "coordinate grid, a legend with units, a scale bar, a north arrow (grid north), the cautions and a "
        "title block (survey, dates, software version, CRS, vertical datum, method, cell size).</p>"
    )

    def initAlgorithm(self, config=None):
        self.addParameter(
            QgsProcessingParameterFile(
                self.RESULTS,
                tr("Results folder (written by Run whole survey)"),
                behavior=QgsProcessingParameterFile.Folder,
            )
        )
        self.addParameter(
            QgsProcessingParameterFileDestination(
                self.OUTPUT, tr("Map sheet (PDF)"), fileFilter=tr("PDF files (*.pdf)")
            )
        )

    def processAlgorithm(self, parameters, context, feedback):
        from ..styling import load_results

        out_dir = self.parameterAsFile(parameters, self.RESULTS, context)
        pdf = self.parameterAsFileOutput(parameters, self.OUTPUT, context)
        if not out_dir or not os.path.isfile(os.path.join(out_dir, "reflector_depth.tif")):
            raise QgsProcessingException(
                tr("'{path}' holds no results of Run whole survey (reflector_depth.tif is missing).").format(
                    path=out_dir
                )
            )
        info = run_info(out_dir)
        project = QgsProject()  # a private project: the user's is left as it is
        group = load_results(out_dir, project)
        layers_by_name = {}
        for node in group.findLayers():
            lyr = node.layer()
            source = lyr.source()
            key = source.split("layername=")[-1] if "layername=" in source else os.path.basename(source)
            layers_by_name[key] = lyr
        depth = layers_by_name.get("reflector_depth.tif")
        # a CRS built from its authority code (the layer's own object from the GeoTIFF keys leaves the layout map's
        # scale undefined in a private project)
        crs = QgsCoordinateReferenceSystem(depth.crs().authid()) if depth.crs().authid() else depth.crs()
        project.setCrs(crs)
        layout, keep = build_layout(project, out_dir, layers_by_name, crs, info)
        feedback.setProgress(50)
        exporter = QgsLayoutExporter(layout)
        settings = QgsLayoutExporter.PdfExportSettings()
        settings.rasterizeWholeImage = False
        status = exporter.exportToPdf(pdf, settings)
        del keep
        if status != QgsLayoutExporter.Success:
            raise QgsProcessingException(
                tr("The map sheet could not be exported to '{path}' ({err}).").format(
                    path=pdf, err=exporter.errorMessage() if hasattr(exporter, "errorMessage") else status
                )
            )
        project.removeAllMapLayers()
        feedback.setProgress(100)
        return {self.OUTPUT: pdf}
