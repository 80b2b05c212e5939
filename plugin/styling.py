"""Load the results of a run as one styled layer group.

Styles (all built here, colours of our own choosing):

* reflector depth and elevation rasters: continuous colour ramps with a legend;
  depth runs from pale (shallow) to dark (deep), elevation from deep blue-green
  (low) to pale sand (high); the kriging standard deviation grey to crimson;
* contours: thin lines, index contours heavier and labelled along the line;
* shots: coloured by fit status;
* dips: the strike-and-dip symbol of geologic maps (FGDC-STD-013-2006, the
  "strike and dip of beds" symbol): a long bar along strike, a short tick from
  the bar's middle toward the dip direction, the dip value beside it. The
  symbol is two line markers rotated by a data-defined angle; measured dips
  (crossing lines) are black, surface-derived dips blue and smaller.

Rotation. QGIS rotates a marker clockwise by its angle in degrees, and adds the
map rotation when the angle is data-defined, so the symbol follows a rotated
map. Strike is an azimuth from *grid* north of the survey CRS; when the map is
drawn in another CRS, grid north of the survey is not "up" on the map, so the
angle adds the azimuth, in the map CRS, of the survey's grid north at that
point (the grid convergence between the two CRSs; zero when they are equal).
"""

from __future__ import annotations

import os

from qgis.core import (
    QgsBilinearRasterResampler,
    QgsColorRampShader,
    QgsLayerTreeGroup,
    QgsLineSymbol,
    QgsMarkerSymbol,
    QgsPalLayerSettings,
    QgsProject,
    QgsProperty,
    QgsPropertyCollection,
    QgsRasterBandStats,
    QgsRasterLayer,
    QgsRasterShader,
    QgsRuleBasedRenderer,
    QgsSimpleMarkerSymbolLayer,
    QgsSimpleMarkerSymbolLayerBase,
    QgsSingleBandPseudoColorRenderer,
    QgsSingleSymbolRenderer,
    QgsTextBufferSettings,
    QgsTextFormat,
    QgsUnitTypes,
    QgsVectorLayer,
    QgsVectorLayerSimpleLabeling,
)
from qgis.PyQt.QtCore import QCoreApplication
from qgis.PyQt.QtGui import QColor, QFont

# Colour ramps (positions 0..1 of the data range); our own choice of colours.
DEPTH_RAMP = (  # shallow -> deep
    (0.00, "#fbf3da"),
    (0.25, "#f1c98a"),
    (0.50, "#d98a4e"),
    (0.75, "#9c4b4f"),
    (1.00, "#432b57"),
)
ELEVATION_RAMP = (  # low -> high
    (0.00, "#1d3d6b"),
    (0.30, "#2f7f86"),
    (0.60, "#8fbf74"),
    (0.85, "#e3d69a"),
    (1.00, "#fbf3e4"),
)
SIGMA_RAMP = (  # small -> large standard deviation
    (0.00, "#f2f2f2"),
    (0.50, "#c9a3a3"),
    (1.00, "#9b1230"),
)
MEASURED_DIP_COLOUR = "#141414"
SURFACE_DIP_COLOUR = "#2458a6"
STATUS_COLOURS = {  # fit status -> colour; anything else is drawn in FLAGGED colour
    "ok": "#2e8b57",
}
FLAGGED_COLOUR = "#e08a1e"
FAILED_COLOUR = "#c0262d"

#: Default group name in the layer tree.
GROUP_NAME = "Rockhead results"


def tr(text: str) -> str:
    """Translate a user-visible string."""
    return QCoreApplication.translate("Rockhead", text)


# -- rasters ------------------------------------------------------------------------------------
def style_raster(layer: QgsRasterLayer, ramp, unit_label: str, invert=False) -> None:
    """A continuous pseudocolour ramp over the band's min..max with a legend in ``unit_label``."""
    provider = layer.dataProvider()
    stats = provider.bandStatistics(1, QgsRasterBandStats.Min | QgsRasterBandStats.Max)
    lo, hi = float(stats.minimumValue), float(stats.maximumValue)
    if not (hi > lo):
        hi = lo + 1.0
    stops = [(1.0 - p, c) for p, c in reversed(ramp)] if invert else list(ramp)
    items = []
    for pos, colour in stops:
        value = lo + pos * (hi - lo)
        items.append(QgsColorRampShader.ColorRampItem(value, QColor(colour), f"{value:.1f} {unit_label}"))
    ramp_shader = QgsColorRampShader(lo, hi)
    ramp_shader.setColorRampType(QgsColorRampShader.Interpolated)
    ramp_shader.setColorRampItemList(items)
    shader = QgsRasterShader()
    shader.setRasterShaderFunction(ramp_shader)
    renderer = QgsSingleBandPseudoColorRenderer(provider, 1, shader)
    renderer.setClassificationMin(lo)
    renderer.setClassificationMax(hi)
    layer.setRenderer(renderer)
    # smooth display of the coarse grid when zoomed in (values stay the cells' own)
    layer.resampleFilter().setZoomedInResampler(QgsBilinearRasterResampler())
    layer.triggerRepaint()


# -- contours -----------------------------------------------------------------------------------
def _field_exists(layer, name):
    return layer.fields().indexOf(name) >= 0


def style_contours(layer: QgsVectorLayer, value_field="elevation_m", colour="#5a3d1e", kind=None) -> None:
    """Thin contours, heavier index contours (field ``index`` true), index ones labelled.

    ``kind`` ("elevation" or "depth") draws only the contours of that kind when
    the layer holds both (field ``kind``); this is done with renderer and label
    filters, not a subset string (a subset string on one GeoPackage layer made
    QGIS 3.22 fail to open further layers of the same file).
    """
    has_index = _field_exists(layer, "index")
    only = f"\"kind\" = '{kind}'" if kind and _field_exists(layer, "kind") else "TRUE"
    thin = QgsLineSymbol.createSimple({"line_color": colour, "line_width": "0.25", "line_width_unit": "MM"})
    heavy = QgsLineSymbol.createSimple({"line_color": colour, "line_width": "0.6", "line_width_unit": "MM"})
    root = QgsRuleBasedRenderer.Rule(None)
    if has_index:
        root.appendChild(QgsRuleBasedRenderer.Rule(heavy, 0, 0, f'{only} AND "index"', tr("index contour")))
        root.appendChild(QgsRuleBasedRenderer.Rule(thin, 0, 0, f'{only} AND NOT "index"', tr("contour")))
    else:
        root.appendChild(QgsRuleBasedRenderer.Rule(thin, 0, 0, only, tr("contour")))
    layer.setRenderer(QgsRuleBasedRenderer(root))
    settings = QgsPalLayerSettings()
    settings.isExpression = True
    settings.fieldName = f'format_number("{value_field}", 1)'
    settings.placement = QgsPalLayerSettings.Line
    settings.placementFlags = QgsPalLayerSettings.OnLine
    settings.repeatDistance = 60
    settings.repeatDistanceUnit = QgsUnitTypes.RenderMillimeters
    fmt = QgsTextFormat()
    fmt.setFont(QFont("Sans Serif"))
    fmt.setSize(8)
    fmt.setColor(QColor(colour))
    buf = QgsTextBufferSettings()
    buf.setEnabled(True)
    buf.setSize(0.8)
    buf.setColor(QColor("white"))
    fmt.setBuffer(buf)
    settings.setFormat(fmt)
    props = settings.dataDefinedProperties()
    props.setProperty(
        QgsPalLayerSettings.Show, QgsProperty.fromExpression(f'{only} AND "index"' if has_index else only)
    )
    settings.setDataDefinedProperties(props)
    layer.setLabeling(QgsVectorLayerSimpleLabeling(settings))
    layer.setLabelsEnabled(True)
    layer.triggerRepaint()


# -- shots --------------------------------------------------------------------------------------
def style_shots(layer: QgsVectorLayer) -> None:
    """Shot points coloured by fit status: ok green, other flags amber, failures red."""
    root = QgsRuleBasedRenderer.Rule(None)

    def marker(colour, shape="circle", size="2.6"):
        return QgsMarkerSymbol.createSimple(
            {"name": shape, "color": colour, "outline_color": "#202020", "outline_width": "0.2", "size": size}
        )

    root.appendChild(QgsRuleBasedRenderer.Rule(marker(STATUS_COLOURS["ok"]), 0, 0, "\"status\" = 'ok'", tr("fit ok")))
    root.appendChild(
        QgsRuleBasedRenderer.Rule(
            marker(FAILED_COLOUR, "cross2", "3.2"),
            0,
            0,
            '"velocity_m_s" IS NULL OR "status" = \'too_few_picks\'',
            tr("not fitted"),
        )
    )
    root.appendChild(
        QgsRuleBasedRenderer.Rule(marker(FLAGGED_COLOUR, "triangle", "3.0"), 0, 0, "ELSE", tr("fitted, flagged"))
    )
    layer.setRenderer(QgsRuleBasedRenderer(root))
    layer.triggerRepaint()


def style_points(layer: QgsVectorLayer, colour: str, shape="circle", size="1.2") -> None:
    """A plain marker for stations, reflector points and boreholes."""
    layer.setRenderer(
        QgsSingleSymbolRenderer(
            QgsMarkerSymbol.createSimple(
                {"name": shape, "color": colour, "outline_color": "#303030", "outline_width": "0.1", "size": size}
            )
        )
    )


# -- strike and dip -----------------------------------------------------------------------------
def grid_north_rotation_expression(strike_field="strike_deg") -> str:
    """Marker angle: strike plus the map-CRS azimuth of the layer's grid north at the point."""
    north = (
        "degrees(azimuth(transform($geometry, @layer_crs, @map_crs), "
        "transform(translate($geometry, 0, 10), @layer_crs, @map_crs)))"
    )
    return f'"{strike_field}" + coalesce({north}, 0)'


def strike_dip_symbol(colour: str, bar_mm: float = 7.0, tick_mm: float = 2.4, width_mm: float = 0.5) -> QgsMarkerSymbol:
    """The strike-and-dip marker at angle 0: bar north-south, tick pointing east.

    At angle 0 the strike is north, so by the right-hand rule the dip direction
    is east: the tick runs from the bar's middle toward +x. Rotating the whole
    marker clockwise by the strike angle turns both parts together (QGIS
    rotates marker offsets with the marker).
    """
    bar = QgsSimpleMarkerSymbolLayer(QgsSimpleMarkerSymbolLayerBase.Line, bar_mm)
    bar.setStrokeColor(QColor(colour))
    bar.setStrokeWidth(width_mm)
    bar.setSizeUnit(QgsUnitTypes.RenderMillimeters)
    tick = QgsSimpleMarkerSymbolLayer(QgsSimpleMarkerSymbolLayerBase.Line, tick_mm)
    tick.setStrokeColor(QColor(colour))
    tick.setStrokeWidth(width_mm)
    tick.setAngle(90.0)  # the 'line' shape is vertical; 90 deg makes it horizontal
    # QGIS turns a layer's offset by that layer's own total angle (here 90 + strike), so an
    # offset pointing "up" ends at azimuth strike + 90: from the bar's middle toward the dip.
    tick.setOffset(_qpointf(0.0, -tick_mm / 2.0))
    tick.setOffsetUnit(QgsUnitTypes.RenderMillimeters)
    symbol = QgsMarkerSymbol()  # built layer by layer: these calls take ownership
    symbol.changeSymbolLayer(0, bar)
    symbol.appendSymbolLayer(tick)
    return symbol


def _qpointf(x, y):
    from qgis.PyQt.QtCore import QPointF

    return QPointF(x, y)


def style_dips(layer: QgsVectorLayer, measured: bool = True, label_size: float = 8.0) -> None:
    """Strike-and-dip symbols rotated by ``strike_deg``, dip value labelled beside the tick."""
    colour = MEASURED_DIP_COLOUR if measured else SURFACE_DIP_COLOUR
    symbol = strike_dip_symbol(
        colour, bar_mm=7.0 if measured else 5.5, tick_mm=2.4 if measured else 1.9, width_mm=0.5 if measured else 0.35
    )
    symbol.setDataDefinedAngle(QgsProperty.fromExpression(grid_north_rotation_expression()))
    # flagged rows (no dip: e.g. line directions too close) carry NULL values and are not drawn
    root = QgsRuleBasedRenderer.Rule(None)
    label = tr("dip and strike, crossing lines") if measured else tr("dip and strike, from surface")
    root.appendChild(
        QgsRuleBasedRenderer.Rule(symbol, 0, 0, '"dip_deg" IS NOT NULL AND "strike_deg" IS NOT NULL', label)
    )
    layer.setRenderer(QgsRuleBasedRenderer(root))
    settings = QgsPalLayerSettings()
    settings.isExpression = True
    settings.fieldName = 'format_number("dip_deg", 0)'
    settings.placement = QgsPalLayerSettings.OverPoint
    # Beside the tick: offset 4 mm from the point toward the dip direction (on the map).
    props = QgsPropertyCollection()
    # (labels are placed in the map's own frame; the offset is turned with the map by QGIS)
    angle = grid_north_rotation_expression() + " + 90"
    props.setProperty(
        QgsPalLayerSettings.OffsetXY,
        QgsProperty.fromExpression(f"array_to_string(array(4 * sin(radians({angle})), -4 * cos(radians({angle}))))"),
    )
    settings.setDataDefinedProperties(props)
    settings.offsetUnits = QgsUnitTypes.RenderMillimeters
    fmt = QgsTextFormat()
    fmt.setFont(QFont("Sans Serif"))
    fmt.setSize(label_size)
    fmt.setColor(QColor(colour))
    buf = QgsTextBufferSettings()
    buf.setEnabled(True)
    buf.setSize(0.7)
    buf.setColor(QColor("white"))
    fmt.setBuffer(buf)
    settings.setFormat(fmt)
    layer.setLabeling(QgsVectorLayerSimpleLabeling(settings))
    layer.setLabelsEnabled(True)
    layer.triggerRepaint()


# -- the group ----------------------------------------------------------------------------------
#: (gpkg layer name, display name, styler, visible)
VECTOR_LAYERS = (
    ("dip_measurements", "Dip and strike (crossing lines)", lambda lyr: style_dips(lyr, True), True),
    ("surface_dips", "Dip and strike (from surface)", lambda lyr: style_dips(lyr, False), False),
    (
        "contours",
        "Reflector elevation contours",
        lambda lyr: style_contours(lyr, "elevation_m", kind="elevation"),
        True,
    ),
    (
        "contours",
        "Reflector depth contours",
        lambda lyr: style_contours(lyr, "depth_m", "#3b2f6b", kind="depth"),
        False,
    ),
    ("shots", "Shots (fit status)", style_shots, True),
    ("boreholes", "Boreholes", lambda lyr: style_points(lyr, "#f5f5f5", "circle", "2.8"), True),
    ("misties", "Line misties", None, False),
    ("reflector_points", "Reflector points", lambda lyr: style_points(lyr, "#505050", "circle", "0.9"), False),
    ("stations", "Stations", lambda lyr: style_points(lyr, "#9a9a9a", "circle", "0.7"), False),
)
#: (file name, display name, ramp, unit, visible)
RASTER_LAYERS = (
    ("reflector_depth.tif", "Reflector depth below ground", DEPTH_RAMP, "m", True),
    ("reflector_elevation.tif", "Reflector elevation", ELEVATION_RAMP, "m", False),
    ("depth_sigma.tif", "Depth standard deviation", SIGMA_RAMP, "m", False),
)


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


def load_results(out_dir: str, project: QgsProject = None, group_name: str = GROUP_NAME) -> QgsLayerTreeGroup:
    """Load ``survey.gpkg`` and the rasters of ``out_dir`` as one styled group; return the group.

    Layers that a run did not write are skipped. An existing group of the same
    name is replaced, so running again does not pile up copies.
    """
    project = project or QgsProject.instance()
    root = project.layerTreeRoot()
    old = root.findGroup(group_name)
    if old is not None:
        for layer_id in old.findLayerIds():
            project.removeMapLayer(layer_id)
        root.removeChildNode(old)
    group = root.insertGroup(0, group_name)
    gpkg = os.path.join(out_dir, "survey.gpkg")
    names = gpkg_layer_names(gpkg) if os.path.isfile(gpkg) else []
    for table, display, styler, visible in VECTOR_LAYERS:
        if table not in names:
            continue
        layer = QgsVectorLayer(f"{gpkg}|layername={table}", tr(display), "ogr")
        if not layer.isValid():
            continue
        if styler is not None:
            styler(layer)
        project.addMapLayer(layer, False)
        node = group.addLayer(layer)
        node.setItemVisibilityChecked(visible)
    for filename, display, ramp, unit, visible in RASTER_LAYERS:
        path = os.path.join(out_dir, filename)
        if not os.path.isfile(path):
            continue
        layer = QgsRasterLayer(path, tr(display), "gdal")
        if not layer.isValid():
            continue
        style_raster(layer, ramp, unit)
        project.addMapLayer(layer, False)
        node = group.addLayer(layer)
        node.setItemVisibilityChecked(visible)
    return group


def group_layers(group: QgsLayerTreeGroup, visible_only=True) -> list:
    """The map layers of a group in drawing order (top first)."""
    out = []
    for node in group.findLayers():
        if visible_only and not node.isVisible():
            continue
        if node.layer() is not None:
            out.append(node.layer())
    return out
