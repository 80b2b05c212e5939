"""Load the results of a run as one styled layer group, with the core's styles.

The styles themselves are defined once, in the core (``core/products/styles.py``:
QGIS style documents, colours from ``core/colours.py``): a run writes them into
the GeoPackage (``layer_styles``, each layer's default) and beside each
GeoTIFF (``.qml``), so QGIS opens the results styled whether they come from
the command line or from this plugin. This module only

* loads a results folder as one layer group in a sensible order: symbols and
  labels on top, the depth map (depth raster with depth contours) visible,
  the elevation map (elevation raster with elevation contours), the standard
  deviation and the probability below it, hidden;
* applies the core's style where a layer has none stored (results of older
  runs, layers made by the Processing algorithms);
* puts the caution into every layer's metadata.

Rotation of the strike-and-dip symbols: QGIS turns a marker clockwise by its
angle and adds the map rotation; the angle is the strike plus the azimuth, in
the map CRS, of the survey's grid north at the point (see
``core.products.styles.strike_dip_angle_expression``).
"""

from __future__ import annotations

import os

from qgis.core import (
    QgsLayerMetadata,
    QgsLayerTreeGroup,
    QgsMapLayer,
    QgsProject,
    QgsRasterBandStats,
    QgsRasterLayer,
    QgsVectorLayer,
    QgsWkbTypes,
)
from qgis.PyQt.QtCore import QCoreApplication, QVariant
from qgis.PyQt.QtXml import QDomDocument

from ..core import colours
from ..core.products import styles as core_styles
from ..core.products.provenance import CAUTION

# The shared colour code (for code that still wants the names; the styles use them through the core).
DEPTH_RAMP = colours.DEPTH_RAMP
ELEVATION_RAMP = colours.ELEVATION_RAMP
SIGMA_RAMP = colours.SIGMA_RAMP
PROBABILITY_RAMP = colours.PROBABILITY_RAMP
MEASURED_DIP_COLOUR = colours.MEASURED_DIP
SURFACE_DIP_COLOUR = colours.SURFACE_DIP
STATUS_COLOURS = {"ok": colours.STATUS_OK}
FLAGGED_COLOUR = colours.STATUS_FLAGGED
FAILED_COLOUR = colours.STATUS_FAILED

#: Default group name in the layer tree.
GROUP_NAME = "Rockhead results"


def tr(text: str) -> str:
    """Translate a user-visible string."""
    return QCoreApplication.translate("Rockhead", text)


# -- applying the core's styles ---------------------------------------------------------------------
def apply_qml(layer: QgsMapLayer, qml: str) -> None:
    """Apply a QGIS style document (text) to ``layer``; RuntimeError if QGIS refuses it."""
    doc = QDomDocument()
    ok, message, line, column = doc.setContent(qml)
    if not ok:
        raise RuntimeError(f"style of {layer.name()} is not valid XML (line {line}, column {column}): {message}")
    ok, message = layer.importNamedStyle(doc)
    if not ok:
        raise RuntimeError(f"QGIS could not apply the style of {layer.name()}: {message}")
    layer.triggerRepaint()


def _field_kinds(layer: QgsVectorLayer) -> dict:
    out = {}
    for f in layer.fields():
        t = f.type()
        out[f.name()] = (
            "real"
            if t == QVariant.Double
            else "integer"
            if t in (QVariant.Int, QVariant.LongLong, QVariant.UInt, QVariant.ULongLong, QVariant.Bool)
            else "text"
        )
    return out


def _geometry_name(layer: QgsVectorLayer) -> str:
    kind = layer.geometryType()
    return {
        QgsWkbTypes.PointGeometry: "POINT",
        QgsWkbTypes.LineGeometry: "LINESTRING",
        QgsWkbTypes.PolygonGeometry: "POLYGON",
    }.get(kind, "")


def _contour_levels(layer: QgsVectorLayer, value_field: str, kind: str) -> tuple:
    """(interval, number of index levels) of the contours of one kind."""
    if layer.fields().indexOf(value_field) < 0:
        return None, 0
    has_kind = layer.fields().indexOf("kind") >= 0
    has_index = layer.fields().indexOf("index") >= 0
    levels, index = set(), set()
    for f in layer.getFeatures():
        if f[value_field] is None or (has_kind and f["kind"] != kind):
            continue
        levels.add(round(float(f[value_field]), 9))
        if has_index and f["index"]:
            index.add(round(float(f[value_field]), 9))
    ordered = sorted(levels)
    steps = [b - a for a, b in zip(ordered[:-1], ordered[1:]) if b > a]
    return (min(steps) if steps else None), len(index)


def style_layer(layer: QgsVectorLayer, table: str, contour_kind: str = "depth") -> None:
    """Apply the core's style of GeoPackage layer ``table`` to ``layer`` (from the layer's own fields)."""
    interval, n_index = None, 0
    if table == "contours":
        value = "depth_m" if contour_kind == "depth" else "elevation_m"
        interval, n_index = _contour_levels(layer, value, contour_kind)
    qml = core_styles.layer_qml(
        table, _field_kinds(layer), _geometry_name(layer), interval, contour_kind, label_all_contours=n_index < 3
    )
    apply_qml(layer, qml)


def style_raster(
    layer: QgsRasterLayer, ramp=DEPTH_RAMP, unit_label: str = "m", prefix: str = "", decimals: int = 1
) -> None:
    """A continuous ramp over the band's own min..max, the legend in ``unit_label``."""
    stats = layer.dataProvider().bandStatistics(1, QgsRasterBandStats.Min | QgsRasterBandStats.Max)
    suffix = f" {unit_label}" if unit_label else ""
    apply_qml(layer, core_styles.raster_qml(ramp, stats.minimumValue, stats.maximumValue, suffix, prefix, decimals))


def style_dips(layer: QgsVectorLayer, measured: bool = True) -> None:
    """Strike-and-dip symbols rotated by ``strike_deg``, the dip value beside the tick."""
    style_layer(layer, "dip_measurements" if measured else "surface_dips")


def style_contours(layer: QgsVectorLayer, kind: str = "depth") -> None:
    """Contours of one kind ("depth" or "elevation"), index contours heavier and labelled with the unit."""
    style_layer(layer, "contours", kind)


def style_shots(layer: QgsVectorLayer) -> None:
    """Shot points by fit status: ok green, flagged amber, not fitted red."""
    style_layer(layer, "shots")


def set_caution(layer: QgsMapLayer, description: str = "") -> None:
    """Put the caution (and what the layer is) into the layer's metadata (Layer Properties > Metadata)."""
    md = QgsLayerMetadata(layer.metadata())
    md.setTitle(layer.name())
    md.setAbstract((description + "\n\n" if description else "") + tr("Caution: ") + CAUTION)
    md.setRights([CAUTION])
    layer.setMetadata(md)


def _has_stored_style(layer: QgsMapLayer) -> bool:
    """True when QGIS found a default style for the layer (the run's ``layer_styles`` or ``.qml``)."""
    if isinstance(layer, QgsVectorLayer):
        count = layer.listStylesInDatabase()[0]
        return count > 0
    return os.path.isfile(os.path.splitext(layer.source())[0] + ".qml")


# -- the group --------------------------------------------------------------------------------------
#: (gpkg layer, display name, subgroup or None, visible). Top first; subgroups in the order listed.
VECTOR_LAYERS = (
    ("dip_measurements", "Dip and strike (crossing lines)", None, True),
    ("surface_dips", "Dip and strike (from surface)", None, False),
    ("boreholes", "Boreholes", None, True),
    ("shots", "Shots (fit status)", None, True),
    ("lines", "Seismic lines", None, True),
    ("misties", "Line misties", None, False),
    ("reflector_points", "Reflector points", None, False),
    ("stations", "Stations", None, False),
    ("borehole_depths", "Depths at boreholes, every interface", "Other interfaces and layers", False),
    ("contours", "Reflector depth contours", "Depth", True),
    ("contours", "Reflector elevation contours", "Elevation", True),
)
#: (file name, display name, subgroup, visible)
RASTER_LAYERS = (
    ("reflector_depth.tif", "Reflector depth below ground", "Depth", True),
    ("reflector_elevation.tif", "Reflector elevation", "Elevation", True),
    ("depth_sigma.tif", "Depth standard deviation", "Uncertainty", True),
    ("elevation_sigma.tif", "Elevation standard deviation", "Uncertainty", False),
    ("probability_above_design.tif", "Probability of rock above the design level", "Uncertainty", True),
)
#: subgroup -> visible (only the depth map shows at first)
SUBGROUPS = (("Depth", True), ("Elevation", False), ("Uncertainty", False), ("Other interfaces and layers", False))
#: endings of the rasters of the other interfaces of a layered overburden (core.products.overburden)
OTHER_RASTER_ENDINGS = ("_elevation.tif", "_depth.tif", "_depth_sigma.tif", "_elevation_sigma.tif")
_DESCRIPTIONS = {
    "contours": "Contours of the mapped reflector surface; index contours heavier and labelled (m).",
    "dip_measurements": "True dip and strike where crossing lines meet (strike and dip symbol, right-hand rule).",
    "surface_dips": "Dip and strike read off the mapped surface.",
    "shots": "Per-gather fit: velocity, t0, normal distance, traveltime dip, residual, status and reason.",
    "boreholes": "Boreholes against the seismic-only surface: residual = borehole - seismic (m).",
}


def gpkg_layer_names(gpkg_path: str) -> list:
    """Layer names in a GeoPackage (through OGR, as QGIS sees them)."""
    from osgeo import ogr

    ds = ogr.Open(gpkg_path)
    if ds is None:
        return []
    try:
        return [ds.GetLayer(i).GetName() for i in range(ds.GetLayerCount())]
    finally:
        ds = None


def _load_contour_style(layer: QgsVectorLayer, style_name: str, kind: str) -> None:
    """The contours layer's named style from the GeoPackage, else the core's."""
    try:
        count, ids, names, _descriptions, _error = layer.listStylesInDatabase()
    except (TypeError, ValueError):  # a provider without style storage
        count, ids, names = 0, [], []
    for style_id, name in zip(ids[:count], names[:count]):
        if name == style_name:
            qml, _err = layer.getStyleFromDatabase(style_id)
            if qml:
                apply_qml(layer, qml)
                return
    style_contours(layer, kind)


def load_results(out_dir: str, project: QgsProject = None, group_name: str = GROUP_NAME) -> QgsLayerTreeGroup:
    """Load ``survey.gpkg`` and the rasters of ``out_dir`` as one styled group; return the group.

    Layers that a run did not write are skipped. An existing group of the same
    name is replaced, so running again does not pile up copies. Styles are the
    run's own (stored with the data); a layer without one gets the core's style.
    """
    project = project or QgsProject.instance()
    root = project.layerTreeRoot()
    old = root.findGroup(group_name)
    if old is not None:
        for layer_id in old.findLayerIds():
            project.removeMapLayer(layer_id)
        root.removeChildNode(old)
    group = root.insertGroup(0, group_name)
    loaded = []  # (layer, subgroup or None, visible), top first
    gpkg = os.path.join(out_dir, "survey.gpkg")
    names = gpkg_layer_names(gpkg) if os.path.isfile(gpkg) else []
    for table, display, sub, visible in VECTOR_LAYERS:
        if table not in names:
            continue
        layer = QgsVectorLayer(f"{gpkg}|layername={table}", tr(display), "ogr")
        if not layer.isValid():
            continue
        if table == "contours":
            kind = "depth" if "depth" in display else "elevation"
            _load_contour_style(layer, f"{kind} contours", kind)
        elif not _has_stored_style(layer):
            style_layer(layer, table)
        set_caution(layer, _DESCRIPTIONS.get(table, ""))
        loaded.append((layer, sub, visible))
    for filename, display, sub, visible in RASTER_LAYERS:
        path = os.path.join(out_dir, filename)
        if not os.path.isfile(path):
            continue
        layer = QgsRasterLayer(path, tr(display), "gdal")
        if not layer.isValid():
            continue
        if not _has_stored_style(layer):
            ramp, suffix, prefix, decimals, _fixed = core_styles.RASTER_STYLES[filename]
            style_raster(layer, ramp, suffix.strip(), prefix, decimals)
        set_caution(layer, display)
        loaded.append((layer, sub, visible))
    loaded += _other_interface_rasters(out_dir)
    for layer, sub, visible in loaded:
        if sub is None:
            project.addMapLayer(layer, False)
            group.addLayer(layer).setItemVisibilityChecked(visible)
    for name, group_visible in SUBGROUPS:
        members = [(layer, visible) for layer, sub, visible in loaded if sub == name]
        if not members:
            continue
        sub_node = group.addGroup(tr(name))
        sub_node.setItemVisibilityChecked(group_visible)
        for layer, visible in members:
            project.addMapLayer(layer, False)
            sub_node.addLayer(layer).setItemVisibilityChecked(visible)
    return group


def _other_interface_rasters(out_dir: str) -> list:
    """(layer, subgroup, visible) of every other interface's rasters and every interval velocity, hidden.

    Their styles are the .qml files beside them (written by the core), which
    QGIS reads as each raster's default style: the interfaces in the colours of
    the mapped one, the interval velocities in m/s.
    """
    fixed = {filename for filename, *_ in RASTER_LAYERS}
    out = []
    for filename in sorted(os.listdir(out_dir)):
        other = filename.endswith(OTHER_RASTER_ENDINGS) or (
            filename.startswith("interval_velocity_") and filename.endswith(".tif")
        )
        if filename in fixed or not other:
            continue
        layer = QgsRasterLayer(os.path.join(out_dir, filename), filename[: -len(".tif")].replace("_", " "), "gdal")
        if not layer.isValid():
            continue
        set_caution(layer, filename)
        out.append((layer, "Other interfaces and layers", False))
    return out


def group_layers(group: QgsLayerTreeGroup, visible_only=True) -> list:
    """The map layers of a group in drawing order (top first)."""
    out = []
    for node in group.findLayers():
        if visible_only and not node.isVisible():
            continue
        if node.layer() is not None:
            out.append(node.layer())
    return out


def results_layers(project: QgsProject = None, group_name: str = GROUP_NAME) -> list:
    """Every layer of the results group (visible or not)."""
    project = project or QgsProject.instance()
    group = project.layerTreeRoot().findGroup(group_name)
    return [] if group is None else group_layers(group, visible_only=False)


def refresh_results_layers(out_dir: str, project: QgsProject = None) -> int:
    """Reload every layer of the project read from ``out_dir`` (after a run rewrote its files).

    Vector layers reopen their GeoPackage (the run replaced the file); rasters
    reopen theirs and take the new default style (the ``.qml`` the run wrote
    beside it, with the new data range). Returns how many layers were reloaded.
    """
    project = project or QgsProject.instance()
    folder = os.path.realpath(out_dir)
    n = 0
    for layer in project.mapLayers().values():
        path = layer.source().split("|")[0]
        if not path or os.path.dirname(os.path.realpath(path)) != folder:
            continue
        provider = layer.dataProvider()
        if provider is None:
            continue
        provider.reloadData()
        if isinstance(layer, QgsRasterLayer):
            qml = os.path.splitext(path)[0] + ".qml"
            if os.path.isfile(qml):
                metadata = layer.metadata()
                with open(qml, encoding="utf-8") as fh:
                    apply_qml(layer, fh.read())
                layer.setMetadata(metadata)
        elif isinstance(layer, QgsVectorLayer):
            layer.updateExtents()
        layer.triggerRepaint()
        n += 1
    return n


def results_survey(out_dir: str):
    """The survey.toml a results folder was made from (its run_info), or None when it is gone."""
    from ..core.formats.gdalio import read_layer

    gpkg = os.path.join(out_dir, "survey.gpkg")
    if not os.path.isfile(gpkg) or "run_info" not in gpkg_layer_names(gpkg):
        return None
    table, _ = read_layer(gpkg, "run_info")
    items = dict(zip(table.fields["key"], table.fields["value"]))
    path = items.get("survey_file")
    return path if path and os.path.isfile(path) else None
