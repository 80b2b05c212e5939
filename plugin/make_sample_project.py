"""Build the sample QGIS project (sample_project/tarnwick.qgz) from a finished run, headless.

Usage (with QGIS's Python)::

    QT_QPA_PLATFORM=offscreen python3 -m rockhead.plugin.make_sample_project \\
        sample_project/results sample_project/tarnwick.qgz [--survey sample_project/survey.toml] \\
        [--png preview.png]

The results folder is what ``rockhead run survey.toml --out results`` writes.
The project stores paths relative to itself, so the sample folder can be moved.
An existing project is replaced only when its content changes: QGIS stamps
every save with the time and draws new layer ids, and a rebuild from the same
results must not show the shipped file as modified.
"""

from __future__ import annotations

import argparse
import io
import math
import os
import re
import sys
import xml.etree.ElementTree as ET
import zipfile
from pathlib import Path

os.environ.setdefault("QT_HASH_SEED", "0")  # before Qt starts: attribute order in the XML the same on every build

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
AUTHOR = "Rockhead sample project builder"
SAVE_STAMPS = ("saveDateTime", "saveUser", "saveUserFull")
# parts QGIS writes in the order of its layers' random ids or addresses: (parent, how to key a child)
UNORDERED = (
    ("projectlayers", lambda child: child.findtext("id", "")),
    ("individual-layer-settings", lambda child: child.get("id", "")),
)
_NUMBER = re.compile(r"-?\d+\.\d+(?:e[-+]?\d+)?")
_UUID = re.compile(r"[0-9a-f]{8}([-_])[0-9a-f]{4}\1[0-9a-f]{4}\1[0-9a-f]{4}\1[0-9a-f]{12}")


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
    metadata = project.metadata()
    metadata.setAuthor(AUTHOR)  # not the login of whoever rebuilt it
    project.setMetadata(metadata)
    extent = full_extent(layers)
    project.viewSettings().setDefaultViewExtent(QgsReferencedRectangle(extent, crs))
    if survey_path:
        project.writeEntry(PROJECT_SCOPE, PROJECT_KEY_SURVEY, project.writePath(os.path.abspath(survey_path)))
    project.writeEntry(PROJECT_SCOPE, PROJECT_KEY_RESULTS, project.writePath(os.path.abspath(results_dir)))
    if not project.write():
        raise RuntimeError(f"could not write {project_path}: {project.error()}")
    return project, group


def project_content(qgz):
    """The project XML of a .qgz (path or file object) without what changes on every save, or None when unreadable.

    Left out: the save stamps (time, user, the metadata's creation time); the random ids QGIS gives layers and
    rules (numbered in order of appearance instead); the order of attributes
    (canonical XML, W3C C14N 2.0); the order of the layers and of their
    snapping settings. Other hash-ordered parts (attributes of the XML that style
    options hold as text) are fixed by ``QT_HASH_SEED=0``, set before Qt starts.
    """
    try:
        with zipfile.ZipFile(qgz) as zf:
            name = next(n for n in zf.namelist() if n.endswith(".qgs"))
            root = ET.fromstring(zf.read(name))
    except (OSError, zipfile.BadZipFile, StopIteration, ET.ParseError):
        return None
    for key in SAVE_STAMPS:
        root.attrib.pop(key, None)
    for metadata in root.iter("projectMetadata"):
        for stamp in metadata.findall("creation"):
            metadata.remove(stamp)
    ids: dict = {}
    root = ET.fromstring(_UUID.sub(lambda m: f"id{ids.setdefault(m.group(0), len(ids))}", ET.tostring(root, "unicode")))
    for tag, key in UNORDERED:
        for parent in root.iter(tag):
            parent[:] = sorted(parent, key=key)
    return ET.canonicalize(ET.tostring(root, encoding="unicode"), strip_text=True)


def same_content(a, b, rel_tol: float = 1e-6) -> bool:
    """True when two :func:`project_content` texts are equal, decimals to ``rel_tol``.

    The legend limits are the data's extremes: another BLAS or CPU changes them
    in the last digits, which is no change of the project.
    """
    if a is None or b is None:
        return False
    sa, sb = _NUMBER.split(a), _NUMBER.split(b)
    na, nb = _NUMBER.findall(a), _NUMBER.findall(b)
    return (
        sa == sb
        and len(na) == len(nb)
        and all(x == y or math.isclose(float(x), float(y), rel_tol=rel_tol) for x, y in zip(na, nb))
    )


def write_if_changed(results_dir, project_path, survey_path=None, title=TITLE):
    """Build the project at ``project_path``; keep the old file's bytes when its content is the same.

    Returns True when the content changed (:func:`same_content`). QGIS names the project inside a
    .qgz after the file and stores paths relative to it, so the project is
    written in place; an unchanged one gets its earlier bytes back, moved in
    over it in one step.
    """
    final = Path(project_path)
    before = final.read_bytes() if final.is_file() else None
    project, _ = build_project(results_dir, final, survey_path, title)
    project.clear()
    if before is None or not same_content(project_content(final), project_content(io.BytesIO(before))):
        return True
    staged = final.with_name(f".{final.name}.keep")
    staged.write_bytes(before)
    os.replace(staged, final)
    return False


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
        if args.png:
            project, group = build_project(args.results, args.project, args.survey)
            render_png(group_layers(group), args.png, project.crs())
            project.clear()
            print(args.project)
        elif write_if_changed(args.results, args.project, args.survey):
            print(f"{args.project}: rebuilt from {args.results}")
        else:
            print(f"{args.project}: unchanged (same layers, styles and legends as {args.results})")
    finally:
        app.exitQgis()
    return 0


if __name__ == "__main__":
    sys.exit(main())
