"""Build the sample QGIS project (sample_project/tarnwick.qgz) from a finished run, headless.

Usage (with QGIS's Python)::

    QT_QPA_PLATFORM=offscreen python3 -m rockhead.plugin.make_sample_project \\
        sample_project/results sample_project/tarnwick.qgz [--survey sample_project/survey.toml] \\
        [--png preview.png]

The results folder is what ``rockhead run survey.toml --out results`` writes.
The project stores paths relative to itself, so the sample folder can be moved.
"""

from __future__ import annotations

import argparse
import os
import sys

from qgis.core import (
    QgsApplication,
    QgsMapRendererParallelJob,
    QgsMapSettings,
    QgsProject,
    QgsRectangle,
    QgsReferencedRectangle,
)
from qgis.PyQt.QtCore import QSize
from qgis.PyQt.QtGui import QColor

from .qc_dock import PROJECT_KEY_RESULTS, PROJECT_KEY_SURVEY, PROJECT_SCOPE
from .styling import group_layers, load_results

TITLE = "Tarnwick Creek bridge (demo): bedrock reflector"


def build_project(results_dir, project_path, survey_path=None, title=TITLE, project=None):
    """Load the styled results into a project and write it; return the project."""
    project = project or QgsProject.instance()
    project.clear()
    project.setFileName(os.path.abspath(project_path))
    project.writeEntryBool("Paths", "/Absolute", False)
    group = load_results(os.path.abspath(results_dir), project)
    layers = group_layers(group, visible_only=False)
    if not layers:
        raise RuntimeError(f"no result layers found in {results_dir}")
    crs = layers[0].crs()
    project.setCrs(crs)
    project.setTitle(title)
    extent = full_extent(layers)
    project.viewSettings().setDefaultViewExtent(QgsReferencedRectangle(extent, crs))
    if survey_path:
        project.writeEntry(PROJECT_SCOPE, PROJECT_KEY_SURVEY, project.writePath(os.path.abspath(survey_path)))
    project.writeEntry(PROJECT_SCOPE, PROJECT_KEY_RESULTS, project.writePath(os.path.abspath(results_dir)))
    if not project.write():
        raise RuntimeError(f"could not write {project_path}: {project.error()}")
    return project, group


def full_extent(layers) -> QgsRectangle:
    """Union of the layers' extents with a 5 % margin."""
    extent = QgsRectangle()
    extent.setMinimal()
    for layer in layers:
        extent.combineExtentWith(layer.extent())
    extent.scale(1.05)
    return extent


def render_png(layers, path, crs, extent=None, size=(1000, 800), dpi=96, rotation=0.0):
    """Render layers (top first) to a PNG, as the map canvas would (labels included)."""
    from qgis.core import QgsExpressionContext, QgsExpressionContextUtils

    settings = QgsMapSettings()
    settings.setLayers(list(layers))
    settings.setDestinationCrs(crs)
    settings.setOutputSize(QSize(*size))
    settings.setOutputDpi(dpi)
    settings.setBackgroundColor(QColor("white"))
    settings.setRotation(rotation)
    settings.setExtent(extent or full_extent(layers))
    context = QgsExpressionContext()
    context.appendScopes(QgsExpressionContextUtils.globalProjectLayerScopes(layers[0]))
    context.appendScope(QgsExpressionContextUtils.mapSettingsScope(settings))
    settings.setExpressionContext(context)
    job = QgsMapRendererParallelJob(settings)
    job.start()
    job.waitForFinished()
    image = job.renderedImage()
    if path:
        image.save(str(path), "PNG")
    return image


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Build the sample QGIS project from a results folder.")
    ap.add_argument("results")
    ap.add_argument("project")
    ap.add_argument("--survey", help="survey.toml (remembered for the QC panel)")
    ap.add_argument("--png", help="also render the visible layers to this PNG")
    args = ap.parse_args(argv)
    app = QgsApplication([], False)
    app.initQgis()
    try:
        project, group = build_project(args.results, args.project, args.survey)
        if args.png:
            render_png(group_layers(group), args.png, project.crs())
        print(args.project)
        project.clear()
    finally:
        app.exitQgis()
    return 0


if __name__ == "__main__":
    sys.exit(main())
